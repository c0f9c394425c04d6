"""What every engine shares: running dbfit's query trees in the engine's dialect and counting the scans.

DuckDB, PostgreSQL and Spark implement ``_run`` (and ``describe``) in their own modules.
"""

from __future__ import annotations

from typing import Any

from sqlglot import exp

from dbfit.errors import DbfitError
from dbfit.expressions.dialects import dialect
from dbfit.expressions.dialects.rewrite import adapt


class Engine:
    """What every engine shares: scan counting around ``_run``, which a subclass supplies with ``sql``."""

    dialect = ""
    parameters = False
    live_progress = False

    def __init__(self, connection: Any) -> None:
        self.connection = connection
        self.scans = 0

    def sql(self, query: exp.Expression) -> str:
        return adapt(query, dialect(self.dialect)).sql(dialect=self.dialect)

    def fetch(self, query: exp.Expression, *, scan: bool = True) -> list[tuple[Any, ...]]:
        """Run ``query`` and return all its rows; ``scan`` says whether it reads the whole source."""
        if scan:
            self.scans += 1
        return self._run(self.sql(query))

    def fetch_columns(self, query: exp.Expression, *, scan: bool = True) -> dict[str, Any]:
        """Run ``query`` and return its columns as lists by name (for small results, such as a sample)."""
        names = [name for name, _ in self.describe(query)]
        rows = self.fetch(query, scan=scan)
        return {name: [row[k] for row in rows] for k, name in enumerate(names)}

    def describe(self, query: exp.Expression) -> list[tuple[str, str]]:
        raise NotImplementedError

    def fetch_sql(self, sql: str, parameters: list[Any], *, scan: bool = True) -> list[tuple[Any, ...]]:
        """Run SQL that dbfit generated from a tree, with ``?`` parameters where the engine takes them."""
        if parameters and not self.parameters:
            raise DbfitError(
                f"{self.dialect} queries from dbfit carry their numbers as literals, not parameters"
            )
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
