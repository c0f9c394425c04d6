"""Run a .sql script on a connection with dbfit installed, statement by statement (for ``dbfit sql``)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import duckdb

from dbfit.errors import DbfitError


@dataclass
class StatementResult:
    """One statement of a script: its text, its result's column names and rows (empty for DDL)."""

    text: str
    columns: list[str]
    rows: list[tuple[Any, ...]]


def run_script(con: duckdb.DuckDBPyConnection, script: str) -> list[StatementResult]:
    """Execute every statement of ``script`` in order; stop at the first error, naming the statement."""
    results = []
    for number, statement in enumerate(con.extract_statements(script), start=1):
        text = statement.query.strip()
        try:
            relation = con.execute(statement)
            columns = [d[0] for d in relation.description] if relation.description else []
            rows = relation.fetchall() if columns else []
        except duckdb.Error as err:
            raise DbfitError(
                f"statement {number} of the script failed: {str(err).splitlines()[0]}\n  {text[:200]}"
            ) from None
        results.append(StatementResult(text=text, columns=columns, rows=rows))
    return results


def format_result(result: StatementResult, limit: int = 20) -> str:
    """A plain text table of at most ``limit`` rows."""
    if not result.columns:
        return "(done)"
    cells = [[_cell(v) for v in row] for row in result.rows[:limit]]
    widths = [max([len(c)] + [len(row[i]) for row in cells]) for i, c in enumerate(result.columns)]
    lines = ["  ".join(c.ljust(w) for c, w in zip(result.columns, widths))]
    lines.append("  ".join("-" * w for w in widths))
    lines += ["  ".join(v.ljust(w) for v, w in zip(row, widths)) for row in cells]
    if len(result.rows) > limit:
        lines.append(f"... {len(result.rows) - limit} more rows")
    return "\n".join(lines)


def _cell(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.6g}"
    return "NULL" if value is None else str(value)
