"""The statistics query: one aggregate scan that returns X'WX, the score X'(y - mu) and the log-likelihood.

For the logistic log-likelihood l(b) = sum w_i [y_i eta_i - n_i log(1 + exp(eta_i))] with eta = offset + X b,
the score is X' w (y - n mu) and the Fisher information X' diag(w n mu (1 - mu)) X
(McCullagh and Nelder 1989, Generalized Linear Models, 2nd ed., section 4.4). The per-row terms are those
of :mod:`dbfit.fitting.rowterms`, written with e = exp(-|eta|), so no intermediate overflows for any eta.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from sqlglot import exp

from dbfit.design.layout import SEGMENT, Design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import FitError
from dbfit.expressions import builders as sb
from dbfit.fitting.cells import CoefficientTable, SumPlan, cell_factors, sum_plan
from dbfit.fitting.rowterms import RowQuantities, carried_columns, linear_predictor, with_e
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
    cells: tuple[int, ...] = (),
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
    ``cells`` are categorical factors the sums are further grouped by (after the segment or level key); the
    sums and their order are those of :func:`query_plan`, whose ``assemble`` reads them back.
    """
    plan = query_plan(design, active, intercept, level_join is not None, cells)
    if not score_only:
        check_width(sum(m is not None for m in plan.monomials) if cells else len(active))
    z_names = [f"dbfit_z{j}" for j in active]
    segmented = coefficients is not None
    key_name = SEGMENT if segmented else (level_join[0] if level_join else None)
    keys = [sb.column(key_name)] if key_name else []
    keys += [sb.column(design.factors[f].alias) for f in cells]
    base = (rows.copy() if rows is not None else design.base_query()).subquery("dbfit_base")
    # Grouped by cells (without segment or level join), each row's linear predictor takes the coefficients of
    # its level combination from small joined tables instead of one indicator expression per column.
    tables = plan.joined_tables(design) if not segmented and not level_join else None
    zs = [
        exp.alias_(design.column_expression(design.columns[j]), name, quoted=True)
        for j, name in zip(active, z_names)
        if tables is None
    ]
    names, monomials = _monomial_columns(design, plan, z_names if tables is None else None)
    summed = [n for n in names if n is not None]
    columns = exp.select(*[k.copy() for k in keys], *zs, *monomials, *carried_columns(design)).from_(base)

    size = len(active) + (1 if intercept else 0)
    if segmented:
        values: list[exp.Expression] = [
            exp.column(f"c{k}", table="dbfit_coef", quoted=True) for k in range(size)
        ]
    elif beta is None:
        values = [exp.Placeholder() for _ in range(size)]
    else:
        values = [sb.number(b) for b in beta]
    if tables is not None:
        direct = plan.direct()
        eta = linear_predictor(
            [values[k] for k in direct], [_named(names[plan.monomial_of[k]]) for k in direct]
        )
        for t, table in enumerate(tables):
            terms = [
                (exp.column(f"g{c}", table=f"dbfit_t{t}", quoted=True), _named(names[a]))
                for c, a in enumerate(table.monomials)
            ]
            eta = sb.add(eta, *[g if m is None else sb.mul(g, m) for g, m in terms])
    else:
        eta = linear_predictor(values, [None] * int(intercept) + [sb.column(name) for name in z_names])
    if level_join:
        eta = sb.add(eta, exp.column("g", table="dbfit_coef", quoted=True))
    kept = [
        *[k.copy() for k in keys],
        *[sb.column(n) for n in summed],
        sb.column("y"),
        sb.column("pw"),
        sb.column("n"),
    ]
    if keys:
        kept = [exp.column(c.name, table="dbfit_cols", quoted=True) for c in kept]
    linear = exp.select(*kept, exp.alias_(eta, "eta", quoted=True)).from_(columns.subquery("dbfit_cols"))
    for t, table in enumerate(tables or []):
        linear = linear.join(
            _coefficient_table(design, table, None if beta is None else np.asarray(beta), f"dbfit_t{t}"),
            on=exp.and_(
                *[
                    exp.EQ(
                        this=exp.column(design.factors[f].alias, table="dbfit_cols", quoted=True),
                        expression=exp.column(design.factors[f].alias, table=f"dbfit_t{t}", quoted=True),
                    )
                    for f in table.factors
                ]
            ),
        )
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
        *[sb.column(n) for n in summed],
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
        *[sb.column(n) for n in summed],
        *[exp.alias_(sb.mul(sb.column("wt"), sb.column(n)), f"w{n}", quoted=True) for n in summed],
        sb.column("wt"),
        sb.column("r"),
        sb.column("ll"),
        sb.column("ext"),
        sb.column("bad"),
    ).from_(row_terms.subquery("dbfit_terms"))

    sums: list[exp.Expression] = []
    if not score_only:
        sums += [sb.agg_sum(_product(names[a], names[b])) for a, b in plan.pairs]
    for name in names:
        sums.append(sb.agg_sum(sb.column("r") if name is None else sb.mul(sb.column("r"), sb.column(name))))
    sums += [sb.agg_sum(sb.column("ll")), sb.agg_sum(sb.column("ext")), sb.agg_sum(sb.column("bad"))]
    query = exp.select(
        *[k.copy() for k in keys], *[exp.alias_(s, f"s{i}", quoted=True) for i, s in enumerate(sums)]
    )
    query = query.from_(weighted.subquery("dbfit_w"))
    return query.group_by(*[k.copy() for k in keys]) if keys else query


def _monomial_columns(
    design: Design, plan: SumPlan, z_names: list[str] | None
) -> tuple[list[str | None], list[exp.Expression]]:
    """Each monomial's column name (None: the constant) and the projections of those not already a z column
    (with ``z_names`` None no z column is projected)."""
    parameter_names: list[str | None] = [None] * (len(plan.parameters) - len(z_names or [])) + list(
        z_names or []
    )
    names: list[str | None] = []
    projections: list[exp.Expression] = []
    for a, monomial in enumerate(plan.monomials):
        same = plan.monomial_is_parameter(a) if z_names is not None else None
        if monomial is None or same is not None:
            names.append(None if monomial is None else parameter_names[same])  # type: ignore[index]
            continue
        names.append(f"dbfit_m{a}")
        projections.append(exp.alias_(design.column_expression(monomial), names[-1], quoted=True))
    return names, projections


def _named(name: str | None) -> exp.Expression | None:
    return None if name is None else sb.column(name)


def _coefficient_table(
    design: Design, table: CoefficientTable, beta: np.ndarray | None, alias: str
) -> exp.Expression:
    """VALUES (levels..., g0, g1, ...) of one coefficient table: parameters, or the numbers at ``beta``."""
    numbers = table.values(beta) if beta is not None else None
    double = exp.DataType.build("DOUBLE")
    rows = []
    for combo, row in table.row_of.items():
        levels = [design.factors[f].level_literal(v) for f, v in zip(table.factors, combo)]
        gs = [
            exp.Cast(
                this=exp.Placeholder() if numbers is None else sb.number(numbers[row, c]), to=double.copy()
            )
            for c in range(len(table.monomials))
        ]
        rows.append(exp.Tuple(expressions=levels + gs))
    columns = [design.factors[f].alias for f in table.factors] + [
        f"g{c}" for c in range(len(table.monomials))
    ]
    return exp.Values(
        expressions=rows,
        alias=exp.TableAlias(
            this=exp.to_identifier(alias), columns=[exp.to_identifier(c, quoted=True) for c in columns]
        ),
    )


def query_plan(
    design: Design, active: list[int], intercept: bool, level_join: bool = False, cells: tuple[int, ...] = ()
) -> SumPlan:
    """The sums of :func:`statistics_query` with these arguments; a level join always sums the constant."""
    return sum_plan(design, active, intercept or level_join, cells)


def unpack_groups(
    plan: SumPlan, rows: list[tuple], separate: bool, score_only: bool = False
) -> dict[Any, PassResult]:
    """Assemble the grouped query's rows: one PassResult per value of the first key when ``separate`` (a
    segment or a level), else the one result under the key None; the cell keys are summed over."""
    keys = (1 if separate else 0) + len(plan.cells)
    if not plan.cells:
        values = np.array([row[keys:] for row in rows], dtype=float)
        results = plan.assemble_each(values, score_only)
        return dict(zip([row[0] if separate else None for row in rows], results))
    groups: dict[Any, list[tuple]] = {}
    for row in rows:
        groups.setdefault(row[0] if separate else None, []).append(row)
    return {
        value: plan.assemble(
            [tuple(row[1 if separate else 0 : keys]) for row in members],
            np.array([row[keys:] for row in members], dtype=float),
            score_only,
        )
        for value, members in groups.items()
    }


class StatisticsPass:
    """Runs the statistics query for any coefficients, writing its SQL once per set of active columns.

    ``cells`` are the categorical factors the rows are grouped by (see :mod:`dbfit.fitting.cells`); by
    default the rule of :func:`dbfit.fitting.cells.cell_factors` chooses them.
    """

    def __init__(
        self,
        engine: DuckDBEngine,
        design: Design,
        rows: exp.Expression | None = None,
        cells: tuple[int, ...] | None = None,
    ) -> None:
        self.engine, self.design, self.rows = engine, design, rows
        self.cells = cell_factors(design) if cells is None else cells
        self.path = (
            "cells" if self.cells else "dense"
        )  # how the pass computes its sums, kept in a model's stats
        self._sql: dict[tuple[tuple[int, ...], bool, bool], str] = {}
        self._plans: dict[tuple[tuple[int, ...], bool], SumPlan] = {}

    def __call__(self, parameters: list[int], beta: np.ndarray) -> PassResult:
        """One scan at ``beta`` over ``parameters`` (indices into intercept + columns)."""
        return self.run(*self._split(parameters), beta)

    def run(
        self, columns: tuple[int, ...], intercept: bool, beta: np.ndarray, score_only: bool = False
    ) -> PassResult:
        """One scan at ``beta`` over ``[intercept] + columns`` (indices into the design's columns)."""
        plan_key = (columns, intercept)
        if plan_key not in self._plans:
            self._plans[plan_key] = query_plan(self.design, list(columns), intercept, cells=self.cells)
        plan = self._plans[plan_key]
        if not self.engine.parameters:
            query = statistics_query(
                self.design,
                list(columns),
                intercept,
                np.asarray(beta),
                self.rows,
                score_only,
                cells=self.cells,
            )
            rows = self.engine.fetch(query, scan=self.rows is None)
        else:
            key = (columns, intercept, score_only)
            if key not in self._sql:
                query = statistics_query(
                    self.design, list(columns), intercept, None, self.rows, score_only, cells=self.cells
                )
                self._sql[key] = self.engine.sql(query)
            sql = self._sql[key]
            values = (
                plan.query_parameters(self.design, np.asarray(beta))
                if plan.joined_tables(self.design) is not None
                else [float(b) for b in beta]
            )
            rows = self.engine.fetch_sql(sql, values, scan=self.rows is None)
        found = unpack_groups(plan, rows, separate=False, score_only=score_only)
        if None not in found:  # no complete row in any cell
            size = len(plan.parameters)
            return PassResult(
                np.full((size, size), np.nan), np.full(size, np.nan), math.nan, math.nan, math.nan
            )
        return found[None]

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
