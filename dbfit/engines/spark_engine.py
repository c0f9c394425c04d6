"""Apache Spark SQL as an engine for the fitter, through a SparkSession: the same three operations."""

from __future__ import annotations

import re
from typing import Any

from sqlglot import exp

from dbfit.engines.base import Engine
from dbfit.errors import DbfitError, FormulaError, SourceError

TYPE_NAMES = {
    "boolean": "BOOLEAN",
    "tinyint": "TINYINT",
    "smallint": "SMALLINT",
    "int": "INTEGER",
    "bigint": "BIGINT",
    "float": "FLOAT",
    "double": "DOUBLE",
    "string": "VARCHAR",
}


class SparkEngine(Engine):
    """Runs dbfit's query trees as Spark SQL; only the aggregates' single rows come back to the driver."""

    dialect = "spark"

    def describe(self, query: exp.Expression) -> list[tuple[str, str]]:
        frame = self._frame(self.sql(query))
        return [(field.name, _type_name(field.dataType.simpleString())) for field in frame.schema.fields]

    def _run(self, sql: str, parameters: list[Any] | None = None) -> list[tuple[Any, ...]]:
        return [tuple(row) for row in self._frame(sql).collect()]

    def _frame(self, sql: str) -> Any:
        try:
            return self.connection.sql(sql)
        except Exception as err:  # pyspark raises its own AnalysisException family
            raise translate_error(err) from None


def _type_name(simple: str) -> str:
    if simple.startswith("decimal"):
        return "DECIMAL"
    return TYPE_NAMES.get(simple, simple.upper())


def translate_error(err: Exception) -> DbfitError:
    text = str(err).strip()
    first = text.splitlines()[0] if text else type(err).__name__
    if "UNRESOLVED_COLUMN" in text or re.search(r"cannot resolve", text, re.I):
        return FormulaError(f"unknown column in the formula or options: {first}")
    if "TABLE_OR_VIEW_NOT_FOUND" in text:
        return SourceError(f"the source cannot be found: {first}")
    return DbfitError(f"Spark refused the query: {first}")
