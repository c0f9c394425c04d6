"""A sample of the complete rows held in memory, and the statistics of a Newton pass on it computed by numpy.

A large fit starts from the estimates of a sample (see :func:`dbfit.fitting.driver._sample_start`). The
sample is small by construction, so its standardised design is fetched once and every Newton pass on it runs
in numpy instead of as an aggregate query. The row terms are those of :mod:`dbfit.fitting.rowterms`
(McCullagh and Nelder 1989, Generalized Linear Models, 2nd ed., section 4.4), written with e = exp(-|eta|)
so that nothing overflows at any eta: mu = 1 / (1 + e) for eta >= 0 and e / (1 + e) below,
mu (1 - mu) = e / (1 + e)^2 and log(1 + e^eta) = max(eta, 0) + log(1 + e).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from sqlglot import exp

from dbfit.design.layout import Design
from dbfit.engines.base import Engine
from dbfit.expressions import builders as sb
from dbfit.fitting.rowterms import ONE, carried_columns, z_columns
from dbfit.fitting.statistics import EXTREME_ETA
from dbfit.solver.information import PassResult

CARRIED = ("off", "y", "pw", "n")


HASH_RANGE = 1_000_000  # a row-hash sample keeps the rows whose hash modulo this is below share * HASH_RANGE


def sampled_rows(design: Design, rows: int, seed: int, form: str) -> tuple[exp.Select, bool]:
    """About ``rows`` of the complete rows, and whether drawing them reads every row of the source.

    ``form`` is the engine dialect's ``FittingForms.sample``. Of a table, where the engine samples row
    blocks: a repeatable system sample of them, which reads only those blocks. Of any other source: a
    reservoir sample of the complete rows, or where the engine has none, the rows whose row hash falls in
    the share wanted of its range (deterministic without a seed); either reads every row once.
    """
    percent = min(100.0, 100.0 * rows / max(design.rows_total, 1))
    if form != "hash" and isinstance(design.relation, exp.Table) and not design.relation.args.get("sample"):
        sampled = design.relation.copy()
        sampled.set(
            "sample",
            exp.TableSample(
                method=exp.var("SYSTEM"), percent=sb.number(round(percent, 6)), seed=exp.Literal.number(seed)
            ),
        )
        return replace(design, relation=sampled).base_query(), False
    if form != "system_reservoir":
        return hashed_sample(design, percent / 100.0), True
    reservoir = exp.select("*").from_(design.base_query().subquery("dbfit_complete"))
    reservoir.set(
        "sample",
        exp.TableSample(
            method=exp.var("RESERVOIR"), size=exp.Literal.number(rows), seed=exp.Literal.number(seed)
        ),
    )
    return reservoir, True


def hashed_sample(design: Design, share: float) -> exp.Select:
    """The complete rows whose row hash modulo HASH_RANGE is below ``share`` of it.

    The hash is written as DuckDB's ``hash`` of the whole row, which each engine's dialect rewrites in its own
    row-hash form (:func:`dbfit.expressions.dialects.rewrite.adapt`).
    """
    row_hash = exp.Cast(
        this=exp.Anonymous(this="hash", expressions=[exp.column("dbfit_complete", quoted=True)]),
        to=exp.DataType.build("HUGEINT"),
    )
    whole = exp.Literal.number(HASH_RANGE)
    remainder = exp.Mod(
        this=sb.paren(sb.add(exp.Mod(this=row_hash, expression=whole), whole)), expression=whole
    )
    hashed = exp.select("*", exp.alias_(remainder, "dbfit_row_hash", quoted=True)).from_(
        design.base_query().subquery("dbfit_complete")
    )
    kept = exp.LT(this=sb.column("dbfit_row_hash"), expression=exp.Literal.number(round(share * HASH_RANGE)))
    return exp.select("*").from_(hashed.subquery("dbfit_hashed")).where(kept)


@dataclass(frozen=True)
class SampleArrays:
    """The sample's internal (centred, scaled) columns for some parameters, with offset, outcome, prior
    weight and trials of each row; the intercept's column is ones."""

    design_rows: np.ndarray  # rows x parameters
    offset: np.ndarray
    outcome: np.ndarray
    prior_weight: np.ndarray
    trials: np.ndarray

    @property
    def rows(self) -> int:
        return int(self.design_rows.shape[0])

    @classmethod
    def fetch(
        cls, engine: Engine, design: Design, parameters: list[int], rows: exp.Select, scan: bool
    ) -> SampleArrays:
        """Fetch ``rows`` (complete rows, as :meth:`Design.base_query` gives them) once, as arrays of
        ``parameters`` (indices into the design's labels, intercept first)."""
        names, projections = z_columns(design, parameters)
        carried = [
            exp.alias_(sb.as_double(column.this), column.alias, quoted=True)
            for column in carried_columns(design)
        ]
        query = exp.select(*projections, *carried).from_(rows.subquery("dbfit_base"))
        columns = engine.fetch_columns(query, scan=scan)
        count = len(columns["y"])
        matrix = np.empty((count, len(names)))
        for k, name in enumerate(names):
            matrix[:, k] = 1.0 if name is ONE else np.asarray(columns[name], dtype=float)
        values = [np.asarray(columns[name], dtype=float) for name in CARRIED]
        return cls(matrix, *values)

    def statistics(self, positions: list[int], beta: np.ndarray) -> PassResult:
        """What one statistics query returns over the columns at ``positions``: X'WX, the score
        X'(w (y - n mu)), the log-likelihood and the weighted counts of rows fitted at 0 or 1 (of those, at
        the wrong one)."""
        every = list(positions) == list(range(self.design_rows.shape[1]))
        x = self.design_rows if every else self.design_rows[:, positions]  # a copy only once some are aliased
        eta = self.offset + x @ np.asarray(beta, dtype=float)
        e = np.exp(-np.abs(eta))
        one_plus_e = 1.0 + e
        mu = np.where(eta >= 0, 1.0, e) / one_plus_e
        y, w, n = self.outcome, self.prior_weight, self.trials
        working_weight = w * n * e / (one_plus_e * one_plus_e)
        loglik = w * (y * eta - n * (np.maximum(eta, 0.0) + np.log1p(e)))
        high, low = eta > EXTREME_ETA, eta < -EXTREME_ETA
        misfit = (high & (y < n)) | (low & (y > 0))
        return PassResult(
            gram=x.T @ (x * working_weight[:, None]),
            score=x.T @ (w * (y - n * mu)),
            loglik=float(loglik.sum()),
            extreme=float(w[high | low].sum()),
            misfit_extreme=float(w[misfit].sum()),
        )
