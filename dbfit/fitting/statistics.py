"""The statistics query: one aggregate scan that returns X'WX, the score X'(y - mu) and the log-likelihood.

For the logistic log-likelihood l(b) = sum w_i [y_i eta_i - n_i log(1 + exp(eta_i))] with eta = offset + X b,
the score is X' w (y - n mu) and the Fisher information X' diag(w n mu (1 - mu)) X
(McCullagh and Nelder 1989, Generalized Linear Models, 2nd ed., section 4.4). The per-row terms are those
of :mod:`dbfit.fitting.rowterms`, written with e = exp(-|eta|), so no intermediate overflows for any eta.
"""

from __future__ import annotations

import numpy as np
from sqlglot import exp

from dbfit.design.layout import SEGMENT, Design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import FitError
from dbfit.expressions import builders as sb
from dbfit.fitting.rowterms import (
    RowQuantities,
    carried_columns,
    linear_predictor,
    symmetric,
    triangle_size,
    upper_pairs,
    with_e,
)
from dbfit.solver.information import PassResult

# The statistics query carries p(p + 1) / 2 sums for p dense columns (the intercept's besides): 45,150 at 300,
# 500,500 at 1,000, where building and planning the one aggregate costs minutes and gigabytes. Wider designs
# (numeric terms and indicator columns, not counting the levels of a factor fitted by blocks) are refused,
# except for plain fits on DuckDB, whose full pass streams the rows instead (:mod:`dbfit.fitting.streamed`).
MAX_DENSE_COLUMNS = 300
EXTREME_ETA = 17.0  # |eta| beyond this puts the fitted probability within 4e-8 of 0 or 1


def check_width(columns: int) -> None:
    """Refuse a design too wide for one statistics query, before anything of it is built or run."""
    if columns > MAX_DENSE_COLUMNS:
        sums = columns * (columns + 1) // 2
        raise FitError(
            f"the design has {columns} columns besides the intercept (numeric terms and indicator columns): its "
            f"statistics query would carry {sums:,} sums, and dbfit fits at most {MAX_DENSE_COLUMNS} in one query. "
            "Use fewer "
            "columns, put a categorical of many levels in the formula as one factor (fitted by blocks) instead "
            "of indicator or numeric columns, or select predictors first (e.g. shrinkage on a subset)"
        )


def statistics_query(
    design: Design,
    active: list[int],
    intercept: bool,
    beta: np.ndarray | None,
    rows: exp.Expression | None = None,
    score_only: bool = False,
    coefficients: exp.Expression | None = None,
    level_join: tuple[str, exp.Expression] | None = None,
) -> exp.Select:
    """Build the aggregate query for coefficients ``beta`` over ``[intercept] + active`` columns.

    With ``beta`` None the coefficients are query parameters (``?``, in parameter order), so one query
    text serves every Newton step. ``rows`` replaces the source's complete rows (the base query) by another
    relation with the same columns, such as a sample of them. ``score_only`` leaves out X'WX.
    ``coefficients`` is a relation of one row per segment (column ``dbfit_seg``, then ``c0``, ``c1``, ... in
    parameter order): it is joined to the rows, and every sum is grouped by segment.
    ``level_join`` is ``(factor alias, relation of (that alias, g))``: each row's level coefficient ``g`` is
    joined in and added to the linear predictor, and the sums are grouped by level, always including the
    sums of the constant column (per-level totals), so that the information can be assembled by blocks.
    """
    if not score_only:
        check_width(len(active))
    z_names = [f"dbfit_z{j}" for j in active]
    segmented = coefficients is not None
    key_name = SEGMENT if segmented else (level_join[0] if level_join else None)
    keys = [sb.column(key_name)] if key_name else []
    base = (rows.copy() if rows is not None else design.base_query()).subquery("dbfit_base")
    zs = [
        exp.alias_(design.column_expression(design.columns[j]), name, quoted=True)
        for j, name in zip(active, z_names)
    ]
    columns = exp.select(*[k.copy() for k in keys], *zs, *carried_columns(design)).from_(base)

    size = len(active) + (1 if intercept else 0)
    if segmented:
        values: list[exp.Expression] = [
            exp.column(f"c{k}", table="dbfit_coef", quoted=True) for k in range(size)
        ]
    elif beta is None:
        values = [exp.Placeholder() for _ in range(size)]
    else:
        values = [sb.number(b) for b in beta]
    eta = linear_predictor(values, [None] * int(intercept) + [sb.column(name) for name in z_names])
    if level_join:
        eta = sb.add(eta, exp.column("g", table="dbfit_coef", quoted=True))
    kept = [
        *[k.copy() for k in keys],
        *[sb.column(n) for n in z_names],
        sb.column("y"),
        sb.column("pw"),
        sb.column("n"),
    ]
    if keys:
        kept = [exp.column(c.name, table="dbfit_cols", quoted=True) for c in kept]
    linear = exp.select(*kept, exp.alias_(eta, "eta", quoted=True)).from_(columns.subquery("dbfit_cols"))
    joined = coefficients if segmented else (level_join[1] if level_join else None)
    if joined is not None:
        linear = linear.join(
            joined.copy(),
            on=exp.EQ(
                this=exp.column(key_name, table="dbfit_cols", quoted=True),
                expression=exp.column(key_name, table="dbfit_coef", quoted=True),
            ),
        )

    eta = sb.column("eta")
    quantities = RowQuantities()
    is_extreme = exp.GT(this=exp.Abs(this=eta.copy()), expression=sb.number(EXTREME_ETA))
    # Wrong extreme: eta far positive but the row has failures, or far negative but it has successes.
    wrong = exp.or_(
        exp.and_(
            exp.GT(this=eta.copy(), expression=sb.number(EXTREME_ETA)),
            exp.LT(this=sb.column("y"), expression=sb.column("n")),
        ),
        exp.and_(
            exp.LT(this=eta.copy(), expression=sb.number(-EXTREME_ETA)),
            exp.GT(this=sb.column("y"), expression=exp.Literal.number(0)),
        ),
    )
    row_terms = exp.select(
        *[k.copy() for k in keys],
        *[sb.column(n) for n in z_names],
        exp.alias_(quantities.working_weight(), "wt", quoted=True),
        exp.alias_(quantities.residual(), "r", quoted=True),
        exp.alias_(quantities.loglik(), "ll", quoted=True),
        exp.alias_(
            exp.If(this=is_extreme, true=sb.column("pw"), false=exp.Literal.number(0)), "ext", quoted=True
        ),
        exp.alias_(exp.If(this=wrong, true=sb.column("pw"), false=exp.Literal.number(0)), "bad", quoted=True),
    ).from_(with_e(linear, "dbfit_lin").subquery("dbfit_e"))
    weighted = exp.select(
        *[k.copy() for k in keys],
        *[sb.column(n) for n in z_names],
        *[exp.alias_(sb.mul(sb.column("wt"), sb.column(n)), f"w{n}", quoted=True) for n in z_names],
        sb.column("wt"),
        sb.column("r"),
        sb.column("ll"),
        sb.column("ext"),
        sb.column("bad"),
    ).from_(row_terms.subquery("dbfit_terms"))

    sums: list[exp.Expression] = []
    names = ([None] if intercept or level_join else []) + z_names
    if not score_only:
        sums += [sb.agg_sum(_product(names[a], names[b])) for a, b in upper_pairs(len(names))]
    for name in names:
        sums.append(sb.agg_sum(sb.column("r") if name is None else sb.mul(sb.column("r"), sb.column(name))))
    sums += [sb.agg_sum(sb.column("ll")), sb.agg_sum(sb.column("ext")), sb.agg_sum(sb.column("bad"))]
    query = exp.select(
        *[k.copy() for k in keys], *[exp.alias_(s, f"s{i}", quoted=True) for i, s in enumerate(sums)]
    )
    query = query.from_(weighted.subquery("dbfit_w"))
    return query.group_by(*[k.copy() for k in keys]) if keys else query


class StatisticsPass:
    """Runs the statistics query for any coefficients, writing its SQL once per set of active columns."""

    path = "dense"  # how the pass computes its sums, recorded in a model's stats

    def __init__(self, engine: DuckDBEngine, design: Design, rows: exp.Expression | None = None) -> None:
        self.engine, self.design, self.rows = engine, design, rows
        self._sql: dict[tuple[tuple[int, ...], bool], str] = {}

    def __call__(self, parameters: list[int], beta: np.ndarray) -> PassResult:
        """One scan at ``beta`` over ``parameters`` (indices into intercept + columns)."""
        return self.run(*self._split(parameters), beta)

    def run(
        self, columns: tuple[int, ...], intercept: bool, beta: np.ndarray, score_only: bool = False
    ) -> PassResult:
        """One scan at ``beta`` over ``[intercept] + columns`` (indices into the design's columns)."""
        if not self.engine.parameters:
            query = statistics_query(
                self.design, list(columns), intercept, np.asarray(beta), self.rows, score_only
            )
            row = self.engine.fetch(query, scan=self.rows is None)[0]
            return unpack(row, len(columns) + (1 if intercept else 0), score_only)
        key = (columns, intercept, score_only)
        if key not in self._sql:
            query = statistics_query(self.design, list(columns), intercept, None, self.rows, score_only)
            self._sql[key] = self.engine.sql(query)
        row = self.engine.fetch_sql(self._sql[key], [float(b) for b in beta], scan=self.rows is None)[0]
        return unpack(row, len(columns) + (1 if intercept else 0), score_only)

    def score_only(self, parameters: list[int], beta: np.ndarray) -> PassResult:
        """A cheaper scan: the score and log-likelihood without X'WX (its ``gram`` is empty)."""
        return self.run(*self._split(parameters), beta, score_only=True)

    def _split(self, parameters: list[int]) -> tuple[tuple[int, ...], bool]:
        has_intercept = 1 if self.design.intercept else 0
        intercept = bool(self.design.intercept and 0 in parameters)
        return tuple(
            k - has_intercept for k in parameters if not (self.design.intercept and k == 0)
        ), intercept


def _product(a: str | None, b: str | None) -> exp.Expression:
    """wt * z_a * z_b with the intercept's z = 1 left out; uses the precomputed w*z column."""
    if a is None and b is None:
        return sb.column("wt")
    if a is None:
        return sb.column(f"w{b}")
    if b is None:
        return sb.column(f"w{a}")
    return sb.mul(sb.column(f"w{a}"), sb.column(b))


def unpack(row: tuple, size: int, score_only: bool = False) -> PassResult:
    """Turn the query's single row into the symmetric Gram matrix, the score and the log-likelihood."""
    return unpack_many([row], size, score_only)[0]


def unpack_many(rows: list[tuple], size: int, score_only: bool = False) -> list[PassResult]:
    """:func:`unpack` for many rows of the same layout at once (one per segment); NULL sums become NaN."""
    values = np.array(rows, dtype=float).reshape(len(rows), -1)
    if score_only:
        grams, count = np.zeros((len(rows), 0, 0)), 0
    else:
        count = triangle_size(size)
        grams = symmetric(values[:, :count], size)
    scores = values[:, count : count + size]
    tails = values[:, count + size : count + size + 3].tolist()
    return [
        PassResult(gram=grams[k], score=scores[k], loglik=tail[0], extreme=tail[1], misfit_extreme=tail[2])
        for k, tail in enumerate(tails)
    ]
