"""Which sums a statistics query carries, and how its per-group sums become X'WX and the score.

Every internal column is (numeric part) x (level indicators). Split the indicators into those of the
categorical factors the rows are grouped by (the *cell* keys) and the rest: a column is then
z_j = I_j(c) m_a(j), where I_j(c) is 1 when the row's cell c has the column's grouped levels and m_a(j) is
the column's *monomial*, its numeric part times its ungrouped indicators. Within a cell I_j is constant, so

    (X'WX)[j, k] = sum over cells c of I_j(c) I_k(c) S_c[a(j), a(k)],   S_c[a, b] = sum over c's rows of wt m_a m_b,

and the score is sum over c of I_j(c) R_c[a(j)] with R_c[a] = sum over c's rows of r m_a. Only the monomials'
products are summed per row: with categoricals of 5, 20 and 50 levels beside 10 numeric columns, 80 sums
per cell (66 products, 11 score parts, log-likelihood and two counts) instead of 3,572 dense ones. Sums are
linear: grouping the rows changes only the order in which the same products are added (common practice).

Products of monomials that are structurally zero (two indicators of different levels of one factor) are
left out, and products equal to another one already summed (d x d = d for an indicator, d x e = e when e's
levels include d's) are summed once and copied, so the dense query (no cell keys) is spared them too.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from dbfit.design.layout import Design, DesignColumn
from dbfit.solver.information import PassResult

# What a grouped scan costs, measured on 1M rows (DuckDB 2.0, 2 cores under load, so roughly): a sum costs
# about the same per row grouped into up to 100 groups as in one, and more as the aggregate states
# (groups x sums) outgrow the caches: 1.7 times at 55,000 states, 4.3 to 5 at 275,000, 6 to 8 at 1.1 million,
# 12 at 2.75 million, 38 at 27.5 million, close to sqrt(states / 20,000). Hashing the keys and joining the
# coefficient tables cost about as much as 16 sums per row.
STATE_CACHE = 20_000
CELL_OVERHEAD_SUMS = 16
# Most groups of one grouped scan (cells, times segments with by=): their sums all come back to numpy.
MAX_CELLS = 100_000
# Most coefficients the joined tables of one query carry: DuckDB parses a VALUES list again on every pass,
# about 0.1 s per 2,000 entries; beyond, each row's linear predictor is written out column by column.
MAX_TABLE_VALUES = 5_000
# Most categorical factors whose subsets are all tried; beyond, the largest are grouped first.
EXHAUSTIVE_FACTORS = 10
FORCED: str | None = None  # "dense" or "cells": tests force one path to compare it with the other

NumericPart = tuple[tuple[int, ...], float, float] | None  # (numeric factors, centre, scale); None for 1
Part = tuple[NumericPart, frozenset[tuple[int, Any]]]


def _numeric_part(column: DesignColumn | None) -> NumericPart:
    if column is None or not column.numeric:
        return None
    return column.numeric, column.centre, column.scale


@dataclass
class SumPlan:
    """The sums of one statistics query over ``parameters`` ([constant] + columns; None is the constant).

    ``monomials`` are the columns summed per row (None: the constant 1), ``pairs`` the monomial products
    summed (upper-triangle order, each distinct product once), ``slot`` the position of every monomial
    product among ``pairs`` (-1: structurally zero), ``cells`` the grouped categorical factors.
    """

    parameters: list[DesignColumn | None]
    cells: tuple[int, ...]
    monomials: list[DesignColumn | None]
    monomial_of: np.ndarray
    pairs: list[tuple[int, int]]
    slot: np.ndarray
    grouped_levels: list[tuple[tuple[int, Any], ...]]  # per parameter: (position among cells, level)
    _tables: list[CoefficientTable] | None = field(default=None, repr=False)

    def coefficient_tables(self, design: Design) -> list[CoefficientTable]:
        """The coefficients by level combination of each set of grouped factors the columns carry."""
        if self._tables is not None:
            return self._tables
        tables: dict[tuple[int, ...], CoefficientTable] = {}
        for k, levels in enumerate(self.grouped_levels):
            if not levels:
                continue
            factors = tuple(self.cells[position] for position, _ in levels)
            if factors not in tables:
                combos = itertools.product(*[design.factors[f].levels for f in factors])
                tables[factors] = CoefficientTable(factors, {combo: row for row, combo in enumerate(combos)})
            table = tables[factors]
            monomial = int(self.monomial_of[k])
            if monomial not in table.monomials:
                table.monomials.append(monomial)
            row = table.row_of[tuple(level for _, level in levels)]
            table.entries.append((k, row, table.monomials.index(monomial)))
        self._tables = list(tables.values())
        return self._tables

    def joined_tables(self, design: Design) -> list[CoefficientTable] | None:
        """The coefficient tables the linear predictor joins, or None when it is written column by column
        (no cell keys, or tables too large to write on every pass)."""
        if not self.cells:
            return None
        tables = self.coefficient_tables(design)
        size = sum(len(table.row_of) * len(table.monomials) for table in tables)
        return tables if size <= MAX_TABLE_VALUES else None

    def direct(self) -> list[int]:
        """The parameters without grouped levels: each is its own monomial, with its own coefficient."""
        return [k for k, levels in enumerate(self.grouped_levels) if not levels]

    def query_parameters(self, design: Design, beta: np.ndarray) -> list[float]:
        """The values of the query's parameters at ``beta``: the direct coefficients, then each coefficient
        table row by row."""
        values = [float(beta[k]) for k in self.direct()]
        for table in self.coefficient_tables(design):
            values += table.values(beta).ravel().tolist()
        return values

    def width(self, score_only: bool = False) -> int:
        """The number of sums the query returns per group."""
        return (0 if score_only else len(self.pairs)) + len(self.monomials) + 3

    def monomial_is_parameter(self, monomial: int) -> int | None:
        """The parameter whose column is this monomial itself (no grouped levels), if any."""
        for k in range(len(self.parameters)):
            if self.monomial_of[k] == monomial and not self.grouped_levels[k]:
                return k
        return None

    def assemble(
        self, cell_keys: Sequence[tuple[Any, ...]], values: np.ndarray, score_only: bool
    ) -> PassResult:
        """One PassResult from the rows of one group of cells: their key values and their sums."""
        values = np.asarray(values, dtype=float).reshape(len(cell_keys), self.width(score_only))
        pairs, q = (0 if score_only else len(self.pairs)), len(self.monomials)
        scores = values[:, pairs : pairs + q]
        tails = values[:, pairs + q :].sum(axis=0)
        mono = self.monomial_of
        indicators = self._indicators(cell_keys)
        score = (scores[:, mono] if indicators is None else indicators * scores[:, mono]).sum(axis=0)
        gram = np.zeros((0, 0))
        if not score_only:
            gram = self._gram(self._per_cell(values), indicators)
        return PassResult(
            gram=gram,
            score=score,
            loglik=float(tails[0]),
            extreme=float(tails[1]),
            misfit_extreme=float(tails[2]),
        )

    def assemble_each(self, values: np.ndarray, score_only: bool) -> list[PassResult]:
        """One PassResult per row of sums (a plan without cell keys: each row is a segment or a level)."""
        values = np.asarray(values, dtype=float).reshape(-1, self.width(score_only))
        pairs, q, mono = (0 if score_only else len(self.pairs)), len(self.monomials), self.monomial_of
        scores = values[:, pairs : pairs + q][:, mono]
        if score_only:
            grams = np.zeros((len(values), 0, 0))
        else:
            grams = self._per_cell(values)[:, mono][:, :, mono]
        tails = values[:, pairs + q :].tolist()
        return [
            PassResult(gram=grams[k], score=scores[k], loglik=t[0], extreme=t[1], misfit_extreme=t[2])
            for k, t in enumerate(tails)
        ]

    def _per_cell(self, values: np.ndarray) -> np.ndarray:
        """S_c, the monomial products of every row of sums as q x q matrices (0 where structurally zero)."""
        q = len(self.monomials)
        per_cell = np.zeros((len(values), q, q))
        rows, columns = np.nonzero(self.slot >= 0)
        per_cell[:, rows, columns] = values[:, self.slot[rows, columns]]
        return per_cell

    def _indicators(self, cell_keys: Sequence[tuple[Any, ...]]) -> np.ndarray | None:
        """I_j(c) for every cell (row) and parameter (column); None without cell keys (all ones)."""
        if not self.cells:
            return None
        codes: dict[int, tuple[dict[Any, int], np.ndarray]] = {}
        indicators = np.ones((len(cell_keys), len(self.parameters)))
        for k, levels in enumerate(self.grouped_levels):
            for position, level in levels:
                if position not in codes:
                    seen: dict[Any, int] = {}
                    found = [seen.setdefault(key[position], len(seen)) for key in cell_keys]
                    codes[position] = (seen, np.array(found, dtype=int))
                seen, found = codes[position]
                indicators[:, k] *= found == seen.get(level, -1)
        return indicators

    def _gram(self, per_cell: np.ndarray, indicators: np.ndarray | None) -> np.ndarray:
        mono = self.monomial_of
        if indicators is None:
            total = per_cell.sum(axis=0)
            return total[np.ix_(mono, mono)]
        gram = np.zeros((len(mono), len(mono)))
        for monomial in np.unique(mono):
            rows = np.flatnonzero(mono == monomial)
            gram[rows, :] = indicators[:, rows].T @ (indicators * per_cell[:, monomial, mono])
        return (gram + gram.T) / 2.0


@dataclass
class CoefficientTable:
    """Per level combination of ``factors``, the coefficient of each of ``monomials`` in the linear predictor:
    eta = offset + direct terms + sum over tables of g[levels of the row, a] m_a."""

    factors: tuple[int, ...]
    row_of: dict[tuple[Any, ...], int]  # every combination of the factors' levels, in product order
    monomials: list[int] = field(default_factory=list)
    entries: list[tuple[int, int, int]] = field(default_factory=list)  # (parameter, row, column)

    def values(self, beta: np.ndarray) -> np.ndarray:
        table = np.zeros((len(self.row_of), len(self.monomials)))
        for k, row, column in self.entries:
            table[row, column] += beta[k]
        return table


def sum_plan(design: Design, columns: Sequence[int], constant: bool, cells: Sequence[int] = ()) -> SumPlan:
    """The plan of the sums over ``[constant] + columns`` (design column indices), grouped by ``cells``."""
    cells = tuple(cells)
    position = {factor: k for k, factor in enumerate(cells)}
    parameters: list[DesignColumn | None] = ([None] if constant else []) + [
        design.columns[j] for j in columns
    ]
    parts: list[Part] = []
    grouped_levels = []
    for column in parameters:
        indicators = column.indicators if column is not None else ()
        grouped_levels.append(tuple((position[f], level) for f, level in indicators if f in position))
        rest = frozenset((f, level) for f, level in indicators if f not in position)
        parts.append((_numeric_part(column), rest))
    distinct: dict[Part, int] = {}
    monomials: list[DesignColumn | None] = []
    for column, part in zip(parameters, parts):
        if part not in distinct:
            distinct[part] = len(monomials)
            monomials.append(_monomial(column, part))
    monomial_of = np.array([distinct[part] for part in parts], dtype=int)
    monomial_parts = list(distinct)
    size = len(monomials)
    slot = np.full((size, size), -1, dtype=int)
    pairs: list[tuple[int, int]] = []
    seen: dict[Any, int] = {}
    for a, b in itertools.combinations_with_replacement(range(size), 2):
        signature = _product_signature(monomial_parts[a], monomial_parts[b])
        if signature is None:
            continue
        if signature not in seen:
            seen[signature] = len(pairs)
            pairs.append((a, b))
        slot[a, b] = slot[b, a] = seen[signature]
    return SumPlan(parameters, cells, monomials, monomial_of, pairs, slot, grouped_levels)


def _monomial(column: DesignColumn | None, part: Part) -> DesignColumn | None:
    numeric, rest = part
    if numeric is None and not rest:
        return None
    if column is None:
        raise AssertionError("the constant has no ungrouped part")
    return replace(column, indicators=tuple(sorted(rest, key=lambda pair: pair[0])))


def _product_signature(a: Part, b: Part) -> Any:
    """What the row product of two monomials is, or None when it is 0 on every row."""
    levels: dict[int, Any] = {}
    for factor, level in itertools.chain(a[1], b[1]):
        if levels.setdefault(factor, level) != level:
            return None
    numeric = tuple(sorted(part for part in (a[0], b[0]) if part is not None))
    return numeric, frozenset(levels.items())


def cell_factors(design: Design, segments: int = 1) -> tuple[int, ...]:
    """The categorical factors to group the rows by (empty: the dense sums).

    Among the subsets of the categorical factors with indicator columns whose cells (the product of their
    level counts, times ``segments``) stay within MAX_CELLS, the one of least modelled cost per row
    (:func:`grouped_cost`), if that is below the dense sums' count.
    """
    if FORCED == "dense":
        return ()
    columns = [j for j, column in enumerate(design.columns) if not column.constant]
    used = sorted({f for j in columns for f, _ in design.columns[j].indicators})
    if not used:
        return ()
    bound = math.inf if FORCED == "cells" else MAX_CELLS
    levels = {f: len(design.factors[f].levels) for f in used}
    if len(used) <= EXHAUSTIVE_FACTORS:
        candidates = [
            subset for size in range(1, len(used) + 1) for subset in itertools.combinations(used, size)
        ]
    else:
        largest = sorted(used, key=lambda f: -levels[f])
        candidates = [tuple(largest[:size]) for size in range(1, len(used) + 1)]
    groups = {c: segments * math.prod(levels[f] for f in c) for c in candidates}
    fitting = [c for c in candidates if groups[c] <= bound]
    if not fitting:
        return ()

    def cost(subset: tuple[int, ...]) -> float:
        monomials = _monomial_count(design, columns, subset)
        return grouped_cost(groups[subset], monomials * (monomials + 1) // 2 + monomials + 3)

    best = min(fitting, key=lambda c: (cost(c), groups[c]))
    dense = sum_plan(design, columns, design.intercept).width()
    return tuple(sorted(best)) if FORCED == "cells" or cost(best) < dense else ()


def grouped_cost(groups: int, sums: int) -> float:
    """A grouped scan's cost per row, in ungrouped sums: ``sums`` slowed by the size of the aggregate states,
    plus the hashing and joining (see STATE_CACHE)."""
    return sums * max(1.0, math.sqrt(groups * sums / STATE_CACHE)) + CELL_OVERHEAD_SUMS


def _monomial_count(design: Design, columns: Sequence[int], cells: tuple[int, ...]) -> int:
    return len(
        {
            (
                _numeric_part(design.columns[j]),
                frozenset(i for i in design.columns[j].indicators if i[0] not in cells),
            )
            for j in columns
        }
    )
