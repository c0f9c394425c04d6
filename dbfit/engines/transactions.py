"""Whether a DuckDB connection is inside a transaction the caller opened, and whether it has been aborted."""

from __future__ import annotations

import duckdb


def in_transaction(connection: duckdb.DuckDBPyConnection) -> bool:
    """Whether ``connection`` is inside a transaction it opened with BEGIN: two reads of the transaction id
    agree only there (outside, each statement is a transaction of its own). Reads nothing else, changes nothing."""
    try:
        first = connection.execute("SELECT txid_current()").fetchall()
        return first == connection.execute("SELECT txid_current()").fetchall()
    except duckdb.TransactionException:
        return True  # an aborted transaction is still open until the caller's ROLLBACK


def transaction_aborted(connection: duckdb.DuckDBPyConnection) -> bool:
    """Whether ``connection``'s open transaction has been aborted by an earlier failure (it then refuses all)."""
    try:
        connection.execute("SELECT 1").fetchall()
    except duckdb.TransactionException:
        return True
    except duckdb.Error:
        return False
    return False
