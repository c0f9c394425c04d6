"""Deterministic k-fold split inside the database: fold = hash(key) mod k.

The key is an SQL expression over the source (a row id, a customer id to keep a customer's rows together);
by default the row's used values (target and terms), so identical rows share a fold. DuckDB's ``hash`` is
deterministic for a given DuckDB version (common practice for reproducible splits; no rows leave the database).
"""

from __future__ import annotations

import dataclasses

from sqlglot import exp

from dbfit import sqlbuild as sb
from dbfit.design import Design
from dbfit.engine import DuckDBEngine
from dbfit.errors import FitError
from dbfit.formula import parse_expression

FOLD = "dbfit_fold"


@dataclasses.dataclass
class FoldSizes:
    rows: list[int]
    trials: list[float]  # weighted trials per fold


def fold_expression(design: Design, key_text: str | None, folds: int) -> exp.Expression:
    """SQL for the fold number 0 .. folds - 1 of a source row."""
    if key_text is not None:
        keys = [parse_expression(key_text, "split_key")]
    else:
        keys = [design.target.copy()] + [f.expression.copy() for f in design.factors]
    return exp.Mod(this=sb.paren(sb.func("hash", *keys)), expression=exp.Literal.number(folds))


def fold_sizes(engine: DuckDBEngine, design: Design, fold: exp.Expression, folds: int) -> FoldSizes:
    """One scan: rows and weighted trials per fold; every fold must hold rows."""
    base = design.base_query({FOLD: fold}).subquery("dbfit_base")
    weighted_trials = sb.mul(design.weight_expression(), design.trials_expression())
    query = (
        exp.select(sb.column(FOLD), exp.Count(this=exp.Star()), sb.agg_sum(weighted_trials))
        .from_(base)
        .group_by(sb.column(FOLD))
    )
    found = {int(number): (int(rows), float(total)) for number, rows, total in engine.fetch(query)}
    empty = [k for k in range(folds) if k not in found]
    if empty:
        raise FitError(
            f"folds={folds} leaves fold(s) {empty} without rows ({design.rows_used} rows used); use fewer folds "
            "or a split_key with more distinct values"
        )
    return FoldSizes([found[k][0] for k in range(folds)], [found[k][1] for k in range(folds)])
