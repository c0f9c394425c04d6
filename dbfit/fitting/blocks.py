"""A high-cardinality categorical without dense indicator sums: the information matrix by blocks.

With one categorical of m levels beside k other parameters, the information is
    [[A, B'], [B, D]]   with A = sum w x x' (k x k), B[l] = sum over level l of w x (m x k), D = diag(sum over
level l of w). One query grouped by level returns, per level, the sums of w x x', w x, w, r x and r, so the
number of aggregate expressions does not depend on m; A is the sum over levels. Newton steps and the
covariance use the Schur complement S = A - B' D^-1 B (Golub and Van Loan 2013, Matrix Computations,
4th ed., section 3.2.5), so nothing costs more than O(m k^2).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sqlglot import exp

from dbfit.design.layout import Design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.expressions import builders as sb
from dbfit.fitting.statistics import query_plan, statistics_query, unpack_groups
from dbfit.solver.information import BlockInformation, PassResult

HIGH_CARDINALITY_LEVELS = 50  # a main-effect categorical with more levels than this is fitted by blocks


def blocked_factor(design: Design) -> int | None:
    """The categorical fitted by blocks: more than HIGH_CARDINALITY_LEVELS levels, used only as a main effect."""
    candidates = []
    for index, factor in enumerate(design.factors):
        if factor.kind != "categorical" or len(factor.levels) <= HIGH_CARDINALITY_LEVELS:
            continue
        terms = [t for t in design.formula.terms if factor.text in t.texts]
        if all(len(t.texts) == 1 for t in terms):
            candidates.append(index)
    return max(candidates, key=lambda i: len(design.factors[i].levels)) if candidates else None


def is_level_column(design: Design, column: int, factor: int) -> bool:
    entry = design.columns[column]
    return not entry.numeric and len(entry.indicators) == 1 and entry.indicators[0][0] == factor


class BlockedStatisticsPass:
    """One grouped scan per Newton step; parameters are ordered dense first, then the levels."""

    def __init__(
        self, engine: DuckDBEngine, design: Design, factor: int, rows: exp.Expression | None = None
    ) -> None:
        self.engine, self.design, self.factor, self.rows = engine, design, factor, rows
        self.alias = design.factors[factor].alias
        self._templates: dict[tuple[tuple[int, ...], bool], sb.ValuesTemplate] = {}

    def __call__(self, parameters: list[int], beta: np.ndarray) -> PassResult:
        design, offset = self.design, 1 if self.design.intercept else 0
        intercept = bool(design.intercept and 0 in parameters)
        dense = [
            k for k in parameters if not (k >= offset and is_level_column(design, k - offset, self.factor))
        ]
        columns = [k - offset for k in dense if not (design.intercept and k == 0)]
        level_values = [design.columns[k - offset].indicators[0][1] for k in parameters[len(dense) :]]
        level_beta = dict(zip(level_values, beta[len(dense) :]))
        factor = design.factors[self.factor]
        rows = [(v, factor.level_literal(v), [float(level_beta.get(v, 0.0))]) for v in factor.levels]
        if self.engine.parameters:
            sql = self._template(tuple(columns), intercept).render(rows)
            fetched = self.engine.fetch_sql(
                sql, [float(b) for b in beta[: len(dense)]], scan=self.rows is None
            )
        else:  # numbers written as literals: the dense coefficients in the tree, the levels' in a VALUES tree
            query = statistics_query(
                design,
                columns,
                intercept,
                np.asarray(beta[: len(dense)], dtype=float),
                self.rows,
                level_join=(self.alias, level_coefficients(self.alias, rows)),
            )
            fetched = self.engine.fetch(query, scan=self.rows is None)
        groups = unpack_groups(
            query_plan(design, columns, intercept, level_join=True), fetched, separate=True
        )
        return _assemble_blocks(groups, level_values, intercept, len(columns))

    def query(self, parameters: list[int], beta: np.ndarray) -> exp.Select:
        """The grouped statistics query (level coefficients in a placeholder relation), for inspection."""
        offset = 1 if self.design.intercept else 0
        intercept = bool(self.design.intercept and 0 in parameters)
        columns = [
            k - offset
            for k in parameters
            if not (k >= offset and is_level_column(self.design, k - offset, self.factor))
            and not (self.design.intercept and k == 0)
        ]
        return statistics_query(
            self.design,
            columns,
            intercept,
            None,
            self.rows,
            level_join=(self.alias, sb.ValuesTemplate.placeholder("dbfit_coef")),
        )

    def _template(self, columns: tuple[int, ...], intercept: bool) -> sb.ValuesTemplate:
        key = (columns, intercept)
        if key not in self._templates:
            placeholder = sb.ValuesTemplate.placeholder("dbfit_coef")
            query = statistics_query(
                self.design, list(columns), intercept, None, self.rows, level_join=(self.alias, placeholder)
            )
            self._templates[key] = sb.ValuesTemplate(
                self.engine.sql(query),
                self.engine.sql(placeholder),
                "dbfit_coef",
                [self.alias, "g"],
                self.engine.dialect,
            )
        return self._templates[key]


def level_coefficients(alias: str, rows: list[tuple[Any, exp.Expression, list[float]]]) -> exp.Values:
    """VALUES (level, g) AS dbfit_coef(alias, g): each level's coefficient as a literal, for engines whose
    queries take no parameters (the relation :class:`dbfit.expressions.builders.ValuesTemplate` writes)."""
    double = exp.DataType.build("DOUBLE")
    tuples = [
        exp.Tuple(expressions=[literal.copy(), exp.Cast(this=sb.number(numbers[0]), to=double.copy())])
        for _, literal, numbers in rows
    ]
    return exp.Values(
        expressions=tuples,
        alias=exp.TableAlias(
            this=exp.to_identifier("dbfit_coef"),
            columns=[exp.to_identifier(alias, quoted=True), exp.to_identifier("g", quoted=True)],
        ),
    )


def _assemble_blocks(
    groups: dict[Any, PassResult], level_values: list[Any], intercept: bool, columns: int
) -> PassResult:
    """Sum the per-level results into A and the dense score; the level rows give B, D and their score."""
    # Each group's Gram is over [1] + columns; the dense parameters are [1] + columns with an intercept, else columns.
    dense_slice = slice(0, columns + 1) if intercept else slice(1, columns + 1)
    total_gram = sum(g.gram.as_array() for g in groups.values())
    total_score = sum(g.score for g in groups.values())
    level_groups = [groups[v] for v in level_values]
    cross = np.array([g.gram.as_array()[0, dense_slice] for g in level_groups]).reshape(len(level_groups), -1)
    diagonal = np.array([g.gram.as_array()[0, 0] for g in level_groups])
    score = np.concatenate([total_score[dense_slice], [g.score[0] for g in level_groups]])
    information = BlockInformation(total_gram[dense_slice, dense_slice], cross, diagonal)
    return PassResult(
        gram=information,
        score=score,
        loglik=float(sum(g.loglik for g in groups.values())),
        extreme=float(sum(g.extreme for g in groups.values())),
        misfit_extreme=float(sum(g.misfit_extreme for g in groups.values())),
    )


def dense_first(design: Design, fitted: list[int], factor: int) -> list[int]:
    """Reorder parameter indices so that the blocked factor's levels come last."""
    offset = 1 if design.intercept else 0
    levels = [k for k in fitted if k >= offset and is_level_column(design, k - offset, factor)]
    return [k for k in fitted if k not in levels] + levels
