"""The statistics pass for wide designs on DuckDB: the standardised design streamed through numpy's BLAS.

The SQL statistics query carries (p + 1)(p + 2) / 2 sums, each costing about the same per row, so its time
grows with the square of the width. Here DuckDB computes only the centred, scaled columns of the design
(the same expressions :meth:`Design.column_expression` gives the statistics query) with the offset, outcome,
prior weight and trials, and hands them over as Arrow record batches of a bounded number of rows; numpy
computes the linear predictor, the row terms and the sums per batch, the p x p information as one symmetric
rank-k update (syrk of the level 3 BLAS: Dongarra, Du Croz, Hammarling and Duff 1990, ACM Transactions on
Mathematical Software 16(1), 1-17). Memory holds one batch, never the whole table. The row terms are those of
:mod:`dbfit.fitting.rowterms` (McCullagh and Nelder 1989, Generalized Linear Models, 2nd ed., section 4.4),
written with e = exp(-|eta|) so that nothing overflows at any eta.

PostgreSQL and Spark keep the SQL sums: there the rows would have to cross the network to the client, while
the sums bring out only p x p numbers.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Any, cast

import numpy as np
from sqlglot import exp
from threadpoolctl import ThreadpoolController

from dbfit.design.layout import Design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.expressions import builders as sb
from dbfit.fitting.rowterms import carried_columns
from dbfit.fitting.statistics import EXTREME_ETA, StatisticsPass
from dbfit.solver.information import DenseInformation, PassResult

# Measured on 500,000 rows (2 busy cores, see the README): below about this many columns the SQL sums are
# faster (SQL / streamed 0.59 at 10 columns, 1.12 at 15, 1.59 at 20).
STREAMED_MIN_COLUMNS = 16
# Streamed, the width is not bounded by the size of one SQL statement; measured up to 500 columns (README).
MAX_STREAMED_COLUMNS = 500
BATCH_BYTES = 16 * 2**20  # one record batch's rows, as doubles: about this many bytes (20,000 rows at 100)
MIN_BATCH_ROWS = 2048  # DuckDB's own vector size; smaller batches only add per-batch overhead
CARRIED = 4  # off, y, pw, n follow the design row in every batch


@functools.cache
def blas_libraries() -> ThreadpoolController:
    """The BLAS libraries numpy loaded (looked up once)."""
    return ThreadpoolController()


def one_blas_thread() -> Any:
    """A context in which numpy's BLAS runs on one thread. During a streamed pass DuckDB's threads produce the
    next batches meanwhile; BLAS threads that wait for work by spinning fight them and any other process for
    the cores: on 2 busy cores a pass at 100 columns took 15.2 s instead of 2.3 s, and the aliasing check of
    320 columns 83 s instead of 2.3 s (see the README)."""
    return blas_libraries().limit(limits=1, user_api="blas")


def batch_rows(width: int) -> int:
    """Rows per record batch for ``width`` design columns, so that one batch holds about BATCH_BYTES."""
    return max(MIN_BATCH_ROWS, BATCH_BYTES // (8 * (width + CARRIED)))


def design_query(
    design: Design, columns: tuple[int, ...], intercept: bool, rows: exp.Expression | None = None
) -> exp.Select:
    """One row per complete source row: the design row ``[1] + columns`` (internal scale) as one array of
    DOUBLE (Arrow hands it over as one block, read as a rows x width matrix without a copy), then off, y, pw
    and n as DOUBLE."""
    source = cast(exp.Query, rows).copy() if rows is not None else design.base_query()
    base = source.subquery("dbfit_base")
    values = [exp.Literal.number(1)] * int(intercept) + [
        design.column_expression(design.columns[j]) for j in columns
    ]
    width = len(values)
    matrix = exp.Cast(
        this=exp.Array(expressions=[value.copy() for value in values]),
        to=exp.DataType.build(f"DOUBLE[{width}]", dialect="duckdb"),
    )
    carried = [
        exp.alias_(sb.as_double(alias.this), alias.alias, quoted=True) for alias in carried_columns(design)
    ]
    return exp.select(exp.alias_(matrix, "dbfit_x", quoted=True), *carried).from_(base)


def design_rows(batch: Any, width: int) -> tuple[np.ndarray, list[np.ndarray]]:
    """The batch's design rows as a (rows, width) matrix and its off, y, pw and n; a NULL would be NaN."""
    flat = batch.column(0).flatten().to_numpy(zero_copy_only=False)
    carried = [column.to_numpy(zero_copy_only=False) for column in batch.columns[1:]]
    return flat.reshape(-1, width), carried


@dataclass
class RowTermArrays:
    """The per-row terms of :class:`dbfit.fitting.rowterms.RowQuantities` for arrays of rows."""

    working_weight: np.ndarray  # pw n mu (1 - mu)
    residual: np.ndarray  # pw (y - n mu)
    loglik: np.ndarray  # pw [y eta - n log(1 + e^eta)]
    extreme: np.ndarray  # pw where |eta| > EXTREME_ETA
    misfit: np.ndarray  # pw where the row is fitted at the wrong extreme

    @classmethod
    def at(cls, eta: np.ndarray, y: np.ndarray, pw: np.ndarray, n: np.ndarray) -> RowTermArrays:
        """The terms at linear predictor ``eta``, with e = exp(-|eta|) in (0, 1]: mu = 1 / (1 + e) for
        eta >= 0 and e / (1 + e) below, mu (1 - mu) = e / (1 + e)^2 and
        log(1 + e^eta) = max(eta, 0) + log(1 + e)."""
        e = np.exp(-np.abs(eta))
        one_plus_e = 1.0 + e
        mu = np.where(eta >= 0, 1.0, e) / one_plus_e
        log1pexp = np.maximum(eta, 0.0) + np.log1p(e)
        high, low = eta > EXTREME_ETA, eta < -EXTREME_ETA
        wrong = (high & (y < n)) | (low & (y > 0))
        return cls(
            working_weight=pw * n * e / (one_plus_e * one_plus_e),
            residual=pw * (y - n * mu),
            loglik=pw * (y * eta - n * log1pexp),
            extreme=np.where(high | low, pw, 0.0),
            misfit=np.where(wrong, pw, 0.0),
        )


class PassSums:
    """The sums of one pass over ``size`` parameters, added to batch by batch."""

    def __init__(self, size: int) -> None:
        self.gram = np.zeros((size, size))
        self.score = np.zeros(size)
        self.tails = np.zeros(3)  # log-likelihood, extreme, misfit

    def add(self, design_rows: np.ndarray, terms: RowTermArrays) -> None:
        """Add one batch: ``design_rows`` is (rows, size), the intercept's column of ones included."""
        root_weighted = design_rows * np.sqrt(terms.working_weight)[:, None]
        self.gram += root_weighted.T @ root_weighted  # numpy runs A'A as one syrk
        self.score += design_rows.T @ terms.residual
        self.tails += [terms.loglik.sum(), terms.extreme.sum(), terms.misfit.sum()]

    def result(self) -> PassResult:
        # exactly symmetric, as the SQL sums' triangle
        gram = DenseInformation(np.triu(self.gram) + np.triu(self.gram, 1).T)
        loglik, extreme, misfit = (float(v) for v in self.tails)
        return PassResult(
            gram=gram, score=self.score.copy(), loglik=loglik, extreme=extreme, misfit_extreme=misfit
        )


class StreamedStatisticsPass(StatisticsPass):
    """:class:`StatisticsPass` with the same calls and results, its sums computed in numpy from streamed rows.

    The query carries no coefficients (the linear predictor is computed per batch), so one query text per set
    of columns serves every Newton step.
    """

    def __init__(
        self,
        engine: DuckDBEngine,
        design: Design,
        rows: exp.Expression | None = None,
        cells: tuple[int, ...] | None = None,
    ) -> None:
        super().__init__(engine, design, rows, cells)  # cells serve its score-only passes, which stay in SQL
        self.path = "streamed"
        self._queries: dict[tuple[tuple[int, ...], bool], str] = {}

    def run(
        self, columns: tuple[int, ...], intercept: bool, beta: np.ndarray, score_only: bool = False
    ) -> PassResult:
        """One scan at ``beta`` over ``[intercept] + columns`` (indices into the design's columns). A
        score-only scan stays in SQL: its p + 4 sums cost less than handing the rows over."""
        if score_only:
            return super().run(columns, intercept, beta, score_only=True)
        key = (columns, intercept)
        if key not in self._queries:
            self._queries[key] = self.engine.sql(design_query(self.design, columns, intercept, self.rows))
        width = len(columns) + (1 if intercept else 0)
        coefficients = np.asarray(beta, dtype=float)
        sums = PassSums(width)

        def add_batch(batch: Any) -> None:
            matrix, (off, y, pw, n) = design_rows(batch, width)
            sums.add(matrix, RowTermArrays.at(off + matrix @ coefficients, y, pw, n))

        with one_blas_thread():
            self.engine.stream(self._queries[key], batch_rows(width), add_batch, scan=self.rows is None)
        return sums.result()
