"""PostgreSQL as an engine for the fitter, through psycopg: the same three operations as DuckDB's engine."""

from __future__ import annotations

from typing import Any

from sqlglot import exp

from dbfit.engine import Engine
from dbfit.errors import DbfitError, FormulaError, SourceError

# PostgreSQL type OIDs (pg_type.dat) to the type names the design understands.
TYPE_NAMES = {16: "BOOLEAN", 20: "BIGINT", 21: "SMALLINT", 23: "INTEGER", 700: "FLOAT", 701: "DOUBLE", 1700: "DECIMAL",
              25: "VARCHAR", 1043: "VARCHAR", 1042: "VARCHAR", 19: "VARCHAR"}


class PostgresEngine(Engine):
    """Runs dbfit's query trees on a psycopg connection, written in PostgreSQL's dialect."""

    dialect = "postgres"
    def __init__(self, connection: Any) -> None:
        super().__init__(connection)
        self._run("SET jit = off")  # JIT compilation of a wide aggregate costs more than the scan it speeds up

    def describe(self, query: exp.Expression) -> list[tuple[str, str]]:
        probe = exp.select("*").from_(query.subquery("dbfit_probe")).limit(0)
        with self.connection.cursor() as cursor:
            self._execute(cursor, self.sql(probe))
            return [(column.name, TYPE_NAMES.get(column.type_code, f"OID{column.type_code}")) for column in cursor.description]

    def _run(self, sql: str, parameters: list[Any] | None = None) -> list[tuple[Any, ...]]:
        with self.connection.cursor() as cursor:
            self._execute(cursor, sql)
            return cursor.fetchall() if cursor.description is not None else []

    def _execute(self, cursor: Any, sql: str) -> None:
        import psycopg

        try:
            cursor.execute(sql)
        except psycopg.Error as err:
            if not self.connection.autocommit:
                self.connection.rollback()
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
