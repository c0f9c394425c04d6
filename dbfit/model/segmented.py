"""The result of a ``by=`` fit: one model per segment value, the segments that failed, and the shared passes."""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from decimal import Decimal
from typing import Any

import pyarrow as pa
from sqlglot import exp

from dbfit.errors import StoreError
from dbfit.expressions.names import model_name
from dbfit.model.fitted import Model

_UNNAMEABLE = re.compile(r"[^A-Za-z0-9_.-]")


@dataclass
class SegmentedFit:
    """Models fitted one per value of the ``by`` expression, and the segments that could not be fitted."""

    by: str
    models: dict[Any, Model]
    failures: dict[Any, str]
    passes: int
    scans: int
    warnings: list[str] = field(default_factory=list)
    source: str = ""
    by_expression: exp.Expression | None = None
    rows_total: int = 0  # rows of the whole source, segment NULL or not

    @property
    def coefficients(self) -> pa.Table:
        """Every segment's coefficient table stacked, with the segment value first."""
        tables = []
        for value, model in self.models.items():
            table = model.coefficients
            tables.append(
                table.add_column(0, "segment", pa.array([str(value)] * table.num_rows, type=pa.string()))
            )
        return pa.concat_tables(tables) if tables else pa.table({"segment": pa.array([], type=pa.string())})

    @property
    def stats(self) -> pa.Table:
        """One row per fitted segment with its fit statistics."""
        keys = [
            "n_used",
            "n_excluded",
            "log_likelihood",
            "deviance",
            "null_deviance",
            "aic",
            "bic",
            "iterations",
            "converged",
            "separation",
        ]
        rows = [
            {"segment": str(v), **{k: m.stats[k] for k in keys}, "warnings": len(m.warnings)}
            for v, m in self.models.items()
        ]
        return pa.Table.from_pylist(rows) if rows else pa.table({"segment": pa.array([], type=pa.string())})

    def model_names(self, name: str) -> dict[Any, str]:
        """The store name of each segment's model: ``name.segment`` (characters a name cannot hold become '_')."""
        model_name(name)
        names = {
            value: model_name(f"{name}.{_UNNAMEABLE.sub('_', str(plain_value(value)))}"[:128])
            for value in self.models
        }
        seen: dict[str, Any] = {}
        for value, stored in names.items():
            if stored in seen:
                raise StoreError(
                    f"segments {seen[stored]!r} and {value!r} would both be stored as model '{stored}': "
                    "recode the by expression so that its values differ in letters, digits, '_', '.' or '-'"
                )
            seen[stored] = value
        return names

    def summary(self) -> str:
        lines = [
            f"dbfit | one model per value of  {self.by}: {len(self.models)} fitted, {len(self.failures)} not"
            f" ({self.passes} grouped passes, {self.scans} scans of the data)"
        ]
        for value, model in self.models.items():
            state = "converged" if model.stats["converged"] else "NOT converged"
            lines.append(
                f"  {str(value):<20} {model.stats['n_used']:>10,} rows  deviance {model.stats['deviance']:,.4f}"
                f"  {state}  {len(model.warnings)} warnings"
            )
        for value, reason in self.failures.items():
            lines.append(f"  {str(value):<20} not fitted: {reason}")
        return "\n".join(lines)


def plain_value(value: Any) -> Any:
    """A segment value as plain Python (DuckDB's DECIMAL segment values as text)."""
    return str(value) if isinstance(value, Decimal) else value
