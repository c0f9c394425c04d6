"""The store in a DuckDB database: catalog functions, Arrow inserts, a CHECKPOINT after each commit.

DuckDB has no row locks: two writers of one model both read the same latest version and the second to commit
hits the primary key; that clash is reported as StoreConflictError and the save is retried.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import duckdb
import pyarrow as pa

from dbfit.engines.duckdb_engine import connection_lock
from dbfit.errors import StoreConflictError, StoreError
from dbfit.store.backend import StoreDatabase, columns_of
from dbfit.store.tables import SCHEMA, schema_statements


class DuckDBStore(StoreDatabase):
    dialect = "duckdb"

    def fetch(self, sql: str, parameters: list[Any] | None = None) -> list[tuple[Any, ...]]:
        try:
            with connection_lock(self.connection):
                return (
                    self.connection.execute(sql, parameters).fetchall()
                    if parameters
                    else self.connection.execute(sql).fetchall()
                )
        except duckdb.Error as err:
            raise store_error(err) from None

    def fetch_fresh(self, sql: str, parameters: list[Any]) -> list[tuple[Any, ...]]:
        with self.connection.cursor() as fresh:
            return DuckDBStore(fresh).fetch(sql, parameters)

    def fetch_dicts(self, sql: str, parameters: list[Any]) -> list[dict[str, Any]]:
        try:
            with connection_lock(self.connection):
                cursor = self.connection.execute(sql, parameters)
                names = [d[0] for d in cursor.description]
                return [dict(zip(names, row)) for row in cursor.fetchall()]
        except duckdb.Error as err:
            raise store_error(err) from None

    def tables(self) -> set[str]:
        rows = self.fetch(
            "SELECT table_name FROM duckdb_tables() WHERE database_name = current_database() "
            "AND schema_name = ?",
            [SCHEMA],
        )
        return {row[0] for row in rows}

    @contextmanager
    def transaction(self, names: list[str]) -> Iterator[StoreDatabase]:
        writer = DuckDBStore(self.connection.cursor())
        try:
            if not writer.complete():
                for statement in schema_statements(self.dialect):
                    writer.fetch(statement)
            writer.fetch("BEGIN TRANSACTION")
            try:
                yield writer
                writer.fetch("COMMIT")
            except BaseException:
                _rollback(writer.connection)
                raise
            _checkpoint(writer.connection)
        finally:
            writer.connection.close()

    def insert(self, table: str, columns: dict[str, list[Any]]) -> None:
        data = dict(columns_of(columns))
        if not data:
            return
        self.connection.register("dbfit_incoming_rows", pa.table(data))
        try:
            self.fetch(f"INSERT INTO {SCHEMA}.{table} BY NAME SELECT * FROM dbfit_incoming_rows")
        finally:
            try:
                self.connection.unregister("dbfit_incoming_rows")
            except duckdb.Error:
                pass  # the transaction is aborted; the rollback that follows drops the registration

    def in_list(self, column: str) -> str:
        return f"{column} IN (SELECT unnest(?))"

    def view_text(self, database: str, schema: str, view: str) -> str | None:
        rows = self.fetch(
            "SELECT sql FROM duckdb_views() WHERE lower(database_name) = lower(?) AND "
            "lower(schema_name) = lower(?) AND lower(view_name) = lower(?)",
            [database, schema, view],
        )
        return rows[0][0] if rows else None

    def create_view(self, statement: str, shown: str) -> None:
        try:
            self.connection.execute(statement)
        except duckdb.Error as err:
            first = (str(err).strip().splitlines() or [type(err).__name__])[0]
            raise StoreError(f"view {shown} cannot be created or replaced: {first}") from None


def _checkpoint(writer: duckdb.DuckDBPyConnection) -> None:
    """Move committed writes from the write-ahead log into the database file, so that a copy of the file alone
    holds them even when the writing session never closes. Never FORCE (that aborts the transactions of other
    connections); when DuckDB declines, the commit stays safe in the log."""
    try:
        writer.execute("CHECKPOINT").fetchall()
    except duckdb.Error:
        pass


def _rollback(writer: duckdb.DuckDBPyConnection) -> None:
    try:
        writer.execute("ROLLBACK").fetchall()
    except duckdb.Error:
        pass


def store_error(err: duckdb.Error) -> StoreError:
    """A DuckDB error met while reading or writing the store, in plain words."""
    first = (str(err).strip().splitlines() or [type(err).__name__])[0]
    if isinstance(err, duckdb.ConstraintException):
        return StoreConflictError(
            f"the model store already holds a row with this key (written by another connection "
            f"meanwhile, or left there by hand): {first}"
        )
    if isinstance(err, duckdb.TransactionException) or "conflict" in first.lower():
        return StoreConflictError(
            f"another connection wrote to the model store at the same time; retry ({first})"
        )
    if "read-only" in first.lower() or "read only" in first.lower():
        return StoreError(f"the database is open read-only, so the model store cannot be written ({first})")
    if isinstance(err, duckdb.IOException) and "lock" in first.lower():
        return StoreError(f"the database file is locked by another process ({first})")
    return StoreError(f"the model store could not be used: {first}")
