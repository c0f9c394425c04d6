"""PostgreSQL as an engine for the fitter, through psycopg: the same three operations as DuckDB's engine."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from sqlglot import exp

from dbfit.engines.base import Engine
from dbfit.errors import DbfitError, FormulaError, SourceError

# PostgreSQL type OIDs (pg_type.dat) to the type names the design understands.
TYPE_NAMES = {
    16: "BOOLEAN",
    20: "BIGINT",
    21: "SMALLINT",
    23: "INTEGER",
    700: "FLOAT",
    701: "DOUBLE",
    1700: "DECIMAL",
    25: "VARCHAR",
    1043: "VARCHAR",
    1042: "VARCHAR",
    19: "VARCHAR",
}


class PostgresEngine(Engine):
    """Runs dbfit's query trees on a psycopg connection, written in PostgreSQL's dialect.

    Each query runs in a transaction of its own, or, inside the caller's open transaction, in a savepoint:
    a failing query is rolled back to that savepoint only, so the caller's transaction and its rows stay as
    they were. JIT compilation is off for dbfit's queries only (``set_config(..., true)`` inside that
    transaction or savepoint, set back to the value read before): a wide aggregate costs more to compile than
    the scan it speeds up.
    """

    dialect = "postgres"

    def describe(self, query: exp.Expression) -> list[tuple[str, str]]:
        probe = exp.select("*").from_(query.subquery("dbfit_probe")).limit(0)
        description = self._guarded(self.sql(probe), lambda cursor: cursor.description)
        columns = [(column.name, column.type_code) for column in description]
        unknown = sorted({code for _, code in columns if code not in TYPE_NAMES})
        named = dict(self._type_names(unknown)) if unknown else {}
        return [(name, TYPE_NAMES.get(code) or named.get(code, f"OID{code}")) for name, code in columns]

    def _type_names(self, oids: list[int]) -> list[tuple[int, str]]:
        """PostgreSQL's own names (pg_type, upper case: DATE, TIMESTAMP, ...) of type OIDs outside TYPE_NAMES."""
        listed = exp.Tuple(expressions=[exp.Literal.number(int(oid)) for oid in oids])
        query = (
            exp.select("oid::INT", "upper(typname)")
            .from_("pg_catalog.pg_type")
            .where(exp.In(this=exp.column("oid"), expressions=listed.expressions))
        )
        return [(int(oid), str(name)) for oid, name in self._run(self.sql(query))]

    def _run(self, sql: str, parameters: list[Any] | None = None) -> list[tuple[Any, ...]]:
        return self._guarded(sql, lambda cursor: cursor.fetchall() if cursor.description is not None else [])

    def _guarded(self, sql: str, result: Callable[[Any], Any]) -> Any:
        """Run ``sql`` inside a transaction or savepoint of dbfit's own and return ``result(cursor)``."""
        import psycopg
        from psycopg.pq import TransactionStatus

        if self.connection.info.transaction_status == TransactionStatus.INERROR:
            raise DbfitError(
                "the connection's open transaction has already failed: roll it back before fitting"
            )
        try:
            with self.connection.transaction(), self.connection.cursor() as cursor:
                cursor.execute("SELECT current_setting('jit'), set_config('jit', 'off', true)")
                before = cursor.fetchone()[0]
                cursor.execute(sql)
                value = result(cursor)
                cursor.execute("SELECT set_config('jit', %s, true)", [before])
                return value
        except psycopg.Error as err:
            raise translate_error(err) from None


def translate_error(err: Exception) -> DbfitError:
    import psycopg.errors as errors

    first = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
    if isinstance(err, errors.UndefinedColumn):
        return FormulaError(f"unknown column in the formula or options: {first}")
    if isinstance(err, errors.UndefinedTable):
        return SourceError(f"the source cannot be found: {first}")
    if isinstance(err, (errors.SyntaxError, errors.UndefinedFunction, errors.DatatypeMismatch)):
        return FormulaError(f"PostgreSQL cannot run the formula or an option as written: {first}")
    return DbfitError(f"PostgreSQL refused the query: {first}")
