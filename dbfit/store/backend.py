"""What the store asks of a database, whatever the engine: the interface each engine's store module fills in.

The store's SQL is written once with ``?`` parameters; an engine's module binds them in its own way. Table and
schema names in that SQL are the store's own constants, never user text; model names and every other value
travel as bound parameters.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import AbstractContextManager
from typing import Any

from dbfit.store.tables import TABLES


class StoreDatabase:
    """The store's view of one connection: reads on it, and write transactions on a connection of its own."""

    dialect = ""

    def __init__(self, connection: Any) -> None:
        self.connection = connection

    def fetch(self, sql: str, parameters: list[Any] | None = None) -> list[tuple[Any, ...]]:
        """The rows of ``sql`` (``?`` parameters); a database error becomes a StoreError."""
        raise NotImplementedError

    def fetch_fresh(self, sql: str, parameters: list[Any]) -> list[tuple[Any, ...]]:
        """As :meth:`fetch`, seeing every committed write (outside the caller's open transaction)."""
        return self.fetch(sql, parameters)

    def fetch_dicts(self, sql: str, parameters: list[Any]) -> list[dict[str, Any]]:
        """The rows of ``sql`` as dicts keyed by column name."""
        raise NotImplementedError

    def tables(self) -> set[str]:
        """The names of the store tables that exist in this database."""
        raise NotImplementedError

    def complete(self) -> bool:
        """Whether every store table exists (a store of an older dbfit lacks the newer ones)."""
        return len(self.tables() & set(TABLES)) == len(TABLES)

    def transaction(self, names: list[str]) -> AbstractContextManager[StoreDatabase]:
        """A connection of its own with one open transaction, the store's tables created first when missing:
        committed on success, rolled back on any other exit. ``names`` are the models the transaction writes;
        an engine with row or advisory locks holds them until the commit, so that writers of one model take
        turns (an engine without them reports a clash as StoreConflictError, which the caller retries)."""
        raise NotImplementedError

    def insert(self, table: str, columns: dict[str, list[Any]]) -> None:
        """Append rows given column-wise, in a transaction of :meth:`transaction`."""
        raise NotImplementedError

    def in_list(self, column: str) -> str:
        """A condition true when ``column`` is one of the values of a list bound to its one ``?``."""
        raise NotImplementedError

    def view_text(self, database: str, schema: str, view: str) -> str | None:
        """The engine's text of a view (None when there is no such view); names compare case-blind."""
        raise NotImplementedError

    def create_view(self, statement: str, shown: str) -> None:
        """Run a CREATE OR REPLACE VIEW in a :meth:`transaction`; a StoreError names ``shown``."""
        raise NotImplementedError


def columns_of(table: dict[str, list[Any]]) -> Iterator[tuple[str, list[Any]]]:
    """``(column, values)`` with one-element lists (the key) repeated to the row count; nothing when empty."""
    rows = max(len(v) for v in table.values())
    if rows == 0 or any(len(v) == 0 for v in table.values()):
        return
    for column, values in table.items():
        yield column, (values * rows if len(values) == 1 else values)
