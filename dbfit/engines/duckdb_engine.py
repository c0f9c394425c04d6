"""The one place dbfit talks to a database: run a query tree, fetch its rows, describe its columns.

Later engines (PostgreSQL, Spark) implement the same three methods; dialect quirks live in their module.
"""

from __future__ import annotations

import difflib
import re
import threading
import weakref
from collections.abc import Callable
from typing import Any, TypeVar

import duckdb
from sqlglot import exp

from dbfit.engines.base import Engine
from dbfit.engines.progress import watch_scan
from dbfit.engines.transactions import in_transaction, transaction_aborted
from dbfit.errors import AbortedTransactionError, DbfitError, FormulaError, SourceError

Read = TypeVar("Read")

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


class DuckDBEngine(Engine):
    """Runs sqlglot trees on a DuckDB connection and counts the queries that scan the data.

    Inside the caller's open transaction every query is parsed and bound before it runs, through DuckDB's
    relation API, which reports an unknown column, table or type without touching that transaction (a failing
    ``execute`` would abort it: DuckDB has no savepoints). Only an error while the rows are read (a value that
    cannot be converted, an unreadable file, memory) can still end it; :class:`AbortedTransactionError` says so.
    """

    dialect = "duckdb"
    parameters = True  # coefficients may be bound as ? parameters

    def __init__(self, connection: Any) -> None:
        if not isinstance(connection, duckdb.DuckDBPyConnection):
            raise DbfitError(
                "the DuckDB engine needs a DuckDB connection, not a "
                f"{type(connection).__module__.split('.')[0]} connection (dbfit.engines.engine_for picks the engine)"
            )
        super().__init__(connection)
        self.aborted = False
        self._checked: set[str] = set()  # query texts already looked at (and bound inside a transaction)

    def describe(self, query: exp.Expression) -> list[tuple[str, str]]:
        """Column names and SQL types of ``query`` without reading its rows."""
        sql = self.sql(query)
        try:
            with connection_lock(self.connection):
                self._parse(sql)
                relation = self._bind(sql)
                return [(name, str(kind)) for name, kind in zip(relation.columns, relation.types)]
        except FormulaError as err:
            missing = _MISSING_NAME.search(str(err))
            source = query.args.get("from_") if isinstance(query, exp.Select) else None
            if missing is None or source is None:
                raise
            columns = [name for name, _ in self.describe(exp.select("*").from_(source.this.copy()))]
            raise FormulaError(unknown_column_message(missing.group(1), columns)) from None

    def execute(self, *, sql: str, scan: bool) -> None:
        """Run a statement dbfit wrote itself (``CREATE TEMP TABLE name AS SELECT ...``, ``DROP TABLE``); its
        query is bound first. Skipped once DuckDB has aborted the caller's transaction: the ROLLBACK the caller
        must run then removes dbfit's temporary tables too."""
        if self.aborted:
            return
        created = _CREATE_AS.match(sql)
        if created and in_transaction(self.connection):
            self._parse(sql)
            self._bind(sql[created.end() :])
        super().execute(sql=sql, scan=scan)

    def _run(self, sql: str, parameters: list[Any] | None = None) -> list[tuple[Any, ...]]:
        # Outside a transaction a failing statement ends only its own; inside, it must fail before it runs. A
        # query text is looked at once (the Newton passes repeat one text with new parameters): binding a wide
        # statistics query costs about a third of running it on a small table, and asking whether a
        # transaction is open costs two small queries.
        with connection_lock(self.connection):
            if sql not in self._checked:
                if in_transaction(self.connection) and self._parse(sql).type == duckdb.StatementType.SELECT:
                    self._bind(sql, parameters)
                self._checked.add(sql)
            return self._read(lambda: self.connection.execute(sql, parameters).fetchall())

    def fetch_columns(self, query: exp.Expression, *, scan: bool = True) -> dict[str, Any]:
        """Run ``query`` and return its columns as numpy arrays by name (for small results, such as a sample;
        DuckDB's own conversion, which unlike Arrow's to_numpy does not import pandas)."""
        sql = self.sql(query)
        if scan:
            self.scans += 1
        with connection_lock(self.connection):
            if in_transaction(self.connection):
                self._parse(sql)
                self._bind(sql)
            return self._read(lambda: self.connection.execute(sql).fetchnumpy())

    def stream(self, sql: str, batch_rows: int, consume: Callable[[Any], None], *, scan: bool = True) -> None:
        """Run ``sql`` (generated by :meth:`sql` from a tree) and hand its rows to ``consume`` as Arrow record
        batches of at most ``batch_rows`` rows, one at a time, so memory holds one batch and never the whole
        result. The query is bound before it runs (a wrong name or type fails without touching the caller's
        transaction); a failure while the rows are read is reported as in :meth:`fetch`."""
        if scan:
            self.scans += 1
        with connection_lock(self.connection):
            self._parse(sql)
            relation = self._bind(sql)

            def read_all() -> None:
                try:
                    for batch in relation.to_arrow_reader(batch_rows):
                        consume(batch)
                except OSError as err:  # Arrow's reader reports DuckDB's error as text: its kind comes first
                    raise duckdb_error(str(err)) from None

            self._read(read_all)

    def _parse(self, sql: str) -> Any:
        """The parsed statement (a parser error, unlike one from ``execute``, leaves the transaction alone)."""
        try:
            statements = self.connection.extract_statements(sql)
        except duckdb.Error as err:
            raise translate_error(err) from None
        if len(statements) != 1:
            raise DbfitError(f"dbfit runs one statement at a time, not {len(statements)}")
        return statements[0]

    def _bind(self, sql: str, parameters: list[Any] | None = None) -> duckdb.DuckDBPyRelation:
        """The bound (not yet run) query of parsed ``sql``: names, types and functions checked, nothing read."""
        try:
            return self.connection.sql(sql, params=parameters) if parameters else self.connection.sql(sql)
        except duckdb.Error as err:
            raise translate_error(err) from None

    def _read(self, run: Callable[[], Read]) -> Read:
        try:
            if self.live_progress:
                with watch_scan(self.connection, f"dbfit scan {self.scans}"):
                    return run()
            return run()
        except duckdb.TransactionException as err:
            if "aborted" not in str(err):
                raise translate_error(err) from None
            raise AbortedTransactionError(
                "your open transaction was aborted by an earlier failure, before dbfit ran: ROLLBACK first"
            ) from None
        except duckdb.Error as err:
            translated = translate_error(err)
            if transaction_aborted(self.connection):
                self.aborted = True
                raise AbortedTransactionError(
                    f"{translated}. DuckDB has aborted your open transaction because of it (DuckDB has no "
                    "savepoints): run ROLLBACK, then fit outside a transaction or after COMMIT"
                ) from None
            raise translated from None


def duckdb_error(message: str) -> duckdb.Error:
    """DuckDB's exception for ``message`` in DuckDB's own text form (``Conversion Error: ...``)."""
    kind = message.split(" Error:", 1)[0] if " Error:" in message else ""
    name = "".join(word if word.isupper() else word.capitalize() for word in kind.split()) + "Exception"
    error_class = getattr(duckdb, name, None)
    if not (isinstance(error_class, type) and issubclass(error_class, duckdb.Error)):
        error_class = duckdb.Error
    return error_class(message)


_CREATE_AS = re.compile(r'\s*CREATE\s+TEMP(?:ORARY)?\s+TABLE\s+"[^"]+"\s+AS\s+', re.IGNORECASE)


_MISSING_NAME = re.compile(r"^unknown column '([^']+)'")
SHOWN_COLUMNS = 60  # a source's columns listed in full up to this many


def unknown_column_message(name: str, columns: list[str]) -> str:
    """Name the unknown column, the closest of the source's columns and the source's columns (all, or the
    first SHOWN_COLUMNS and how many more)."""
    close = difflib.get_close_matches(name, columns, n=3, cutoff=0.5)
    nearest = f"; closest: {', '.join(close)}" if close else ""
    listed = ", ".join(columns[:SHOWN_COLUMNS])
    more = f" and {len(columns) - SHOWN_COLUMNS} more" if len(columns) > SHOWN_COLUMNS else ""
    return (
        f"unknown column '{name}' in the formula or options{nearest} (the source's {len(columns)} columns: "
        f"{listed}{more})"
    )


_MISSING_COLUMN = re.compile(r'Referenced column "?([^"\s]+)"? not found', re.IGNORECASE)


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
