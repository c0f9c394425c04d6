"""Deterministic splits inside the database from a hash of a key: k folds, or a holdout share.

The key is an SQL expression over the source (a row id, a customer id to keep a customer's rows together);
by default the row's used values (target and terms), so identical rows share a part. The hash is MD5 of the
key's text (the first 32 bits as a number in [0, 1)), which DuckDB, PostgreSQL and Spark compute alike, so
the same row lands in the same part whatever the engine or the row order (Rivest 1992, RFC 1321).
"""

from __future__ import annotations

import dataclasses

from sqlglot import exp

from dbfit.design.layout import Design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import FitError
from dbfit.expressions import builders as sb
from dbfit.expressions.formula import parse_expression
from dbfit.expressions.splits import unit_hash

FOLD = "dbfit_fold"


@dataclasses.dataclass
class FoldSizes:
    trials: list[float]  # weighted trials per fold


def split_keys(design: Design, key_text: str | None) -> list[exp.Expression]:
    if key_text is not None:
        return [parse_expression(key_text, "split_key")]
    return [design.target.copy()] + [f.expression.copy() for f in design.factors]


def fold_expression(design: Design, key_text: str | None, folds: int) -> exp.Expression:
    """SQL for the fold number 0 .. folds - 1 of a source row."""
    unit = unit_hash(split_keys(design, key_text))
    return exp.Cast(
        this=exp.Floor(this=sb.mul(unit, exp.Literal.number(folds))), to=exp.DataType.build("INTEGER")
    )


def fold_sizes(engine: DuckDBEngine, design: Design, fold: exp.Expression, folds: int) -> FoldSizes:
    """One scan: weighted trials per fold; every fold must hold rows."""
    base = design.base_query({FOLD: fold}).subquery("dbfit_base")
    weighted_trials = sb.mul(design.weight_expression(), design.trials_expression())
    query = exp.select(sb.column(FOLD), sb.agg_sum(weighted_trials)).from_(base).group_by(sb.column(FOLD))
    found = {int(number): float(total) for number, total in engine.fetch(query)}
    empty = [k for k in range(folds) if k not in found]
    if empty:
        raise FitError(
            f"folds={folds} leaves fold(s) {empty} without rows ({design.rows_used} rows used); use fewer folds "
            "or a split_key with more distinct values"
        )
    return FoldSizes([found[k] for k in range(folds)])
