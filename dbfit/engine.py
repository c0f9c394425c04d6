"""The one place dbfit talks to a database: run a query tree, fetch its rows, describe its columns.

Later engines (PostgreSQL, Spark) implement the same three methods; dialect quirks live in their module.
"""

from __future__ import annotations

import difflib
import re
import threading
import weakref
from typing import Any

import duckdb
from sqlglot import exp

from dbfit.dialects import adapt
from dbfit.errors import DbfitError, FormulaError, SourceError
from dbfit.progress import watch_scan


_LOCKS: weakref.WeakKeyDictionary[Any, threading.RLock] = weakref.WeakKeyDictionary()
_LOCKS_GUARD = threading.Lock()


def connection_lock(connection: Any) -> threading.RLock:
    """The lock dbfit holds on ``connection`` from running a query to fetching its last row.

    A DuckDB connection runs one query at a time; two threads sharing one would interleave their results
    (one thread fetching the other's rows), so dbfit's own reads on it take turns.
    """
    with _LOCKS_GUARD:
        lock = _LOCKS.get(connection)
        if lock is None:
            lock = _LOCKS[connection] = threading.RLock()
        return lock


class Engine:
    """What every engine shares: scan counting around ``_run``, which a subclass supplies with ``sql``."""

    dialect = ""
    parameters = False
    live_progress = False

    def __init__(self, connection: Any) -> None:
        self.connection = connection
        self.scans = 0

    def sql(self, query: exp.Expression) -> str:
        return adapt(query, self.dialect).sql(dialect=self.dialect)

    def fetch(self, query: exp.Expression, *, scan: bool = True) -> list[tuple[Any, ...]]:
        """Run ``query`` and return all its rows; ``scan`` says whether it reads the whole source."""
        if scan:
            self.scans += 1
        return self._run(self.sql(query))

    def fetch_sql(self, sql: str, parameters: list[Any], *, scan: bool = True) -> list[tuple[Any, ...]]:
        """Run SQL that dbfit generated from a tree, with ``?`` parameters where the engine takes them."""
        if parameters and not self.parameters:
            raise DbfitError(f"{self.dialect} queries from dbfit carry their numbers as literals, not parameters")
        if scan:
            self.scans += 1
        return self._run(sql, parameters) if parameters else self._run(sql)

    def execute(self, *, sql: str, scan: bool) -> None:
        """Run a statement dbfit wrote itself from trees and its own names: temporary tables of samples."""
        if scan:
            self.scans += 1
        self._run(sql)

    def _run(self, sql: str, parameters: list[Any] | None = None) -> list[tuple[Any, ...]]:
        raise NotImplementedError


class DuckDBEngine(Engine):
    """Runs sqlglot trees on a DuckDB connection and counts the queries that scan the data."""

    dialect = "duckdb"
    parameters = True  # coefficients may be bound as ? parameters

    def describe(self, query: exp.Expression) -> list[tuple[str, str]]:
        """Column names and SQL types of ``query`` without reading its rows."""
        try:
            rows = self._run(f"DESCRIBE {self.sql(query)}")
        except FormulaError as err:
            missing = _MISSING_NAME.search(str(err))
            source = query.args.get("from_") if isinstance(query, exp.Select) else None
            if missing is None or source is None:
                raise
            columns = [row[0] for row in self._run(f"DESCRIBE {self.sql(exp.select('*').from_(source.this.copy()))}")]
            raise FormulaError(unknown_column_message(missing.group(1), columns)) from None
        return [(row[0], row[1]) for row in rows]

    def _run(self, sql: str, parameters: list[Any] | None = None) -> list[tuple[Any, ...]]:
        try:
            with connection_lock(self.connection):
                if self.live_progress:
                    with watch_scan(self.connection, f"dbfit scan {self.scans}"):
                        return self.connection.execute(sql, parameters).fetchall()
                return self.connection.execute(sql, parameters).fetchall()
        except duckdb.Error as err:
            raise translate_error(err) from None


_MISSING_NAME = re.compile(r"^unknown column '([^']+)'")
SHOWN_COLUMNS = 60  # a source's columns listed in full up to this many


def unknown_column_message(name: str, columns: list[str]) -> str:
    """Name the unknown column, the closest of the source's columns and the source's columns (all, or the
    first SHOWN_COLUMNS and how many more)."""
    close = difflib.get_close_matches(name, columns, n=3, cutoff=0.5)
    nearest = f"; closest: {', '.join(close)}" if close else ""
    listed = ", ".join(columns[:SHOWN_COLUMNS])
    more = f" and {len(columns) - SHOWN_COLUMNS} more" if len(columns) > SHOWN_COLUMNS else ""
    return (f"unknown column '{name}' in the formula or options{nearest} (the source's {len(columns)} columns: "
            f"{listed}{more})")


_MISSING_COLUMN = re.compile(r'Referenced column "?([^"\s]+)"? not found', re.IGNORECASE)


def engine_for(connection: Any) -> Any:
    """The engine for a DuckDB connection, a psycopg connection or a SparkSession (or an engine, as given)."""
    if hasattr(connection, "fetch") and hasattr(connection, "dialect"):
        return connection
    if isinstance(connection, duckdb.DuckDBPyConnection):
        return DuckDBEngine(connection)
    module = type(connection).__module__
    if module.startswith("psycopg"):
        from dbfit.postgres import PostgresEngine

        return PostgresEngine(connection)
    if module.startswith("pyspark"):
        from dbfit.spark import SparkEngine

        return SparkEngine(connection)
    raise DbfitError(
        f"cannot fit on a {type(connection).__name__}: give a DuckDB connection, a psycopg connection or a SparkSession"
    )


def translate_error(err: duckdb.Error) -> DbfitError:
    """Map a DuckDB error to the dbfit family with a message that says what to change."""
    message = str(err).strip()
    first = message.splitlines()[0] if message else type(err).__name__
    missing = _MISSING_COLUMN.search(message)
    if missing:
        candidates = re.search(r"Candidate bindings: (.*)", message)
        hint = f" (the source has: {candidates.group(1).strip()})" if candidates else ""
        return FormulaError(f"unknown column '{missing.group(1)}' in the formula or options{hint}")
    if isinstance(err, duckdb.CatalogException):
        return SourceError(f"the source cannot be found: {first}")
    if isinstance(err, duckdb.IOException):
        if "lock" in message.lower():
            return SourceError(
                "the database file is locked by another process; wait for it to finish or open the file read-only "
                f"({first})"
            )
        return SourceError(f"the source cannot be read: {first}")
    if isinstance(err, (duckdb.BinderException, duckdb.ParserException)):
        return FormulaError(f"the formula or an option does not fit the source: {first}")
    if isinstance(err, duckdb.OutOfMemoryException):
        return DbfitError(
            f"DuckDB ran out of memory within its memory_limit ({first}); raise memory_limit, lower threads, "
            "or set temp_directory so that it can spill to disk"
        )
    if isinstance(err, duckdb.ConversionException):
        return FormulaError(f"a value cannot be converted: {first}")
    return DbfitError(f"the database refused the query: {first}")
