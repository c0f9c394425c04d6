"""Tests per formula term: the Wald tests of :mod:`dbfit.model.term_tests` and, on request, likelihood-ratio
tests, each from a refit without the term.

The likelihood-ratio statistic of a term is the deviance of the model without the term's columns minus the
deviance of the full model, chi-square with as many degrees of freedom as columns dropped when the term has
no effect (Wilks 1938, Ann. Math. Statist. 9(1), 60-62, doi:10.1214/aoms/1177732360; Agresti 2013,
Categorical Data Analysis, 3rd ed., Wiley, section 4.4, cited from memory). The reduced model keeps the
design of the full one (the same coding of every other term, the same rows) and drops only the term's
columns, so it is the restriction the Wald test tests. Each refit runs the Newton passes of any fit, started
from the full model's estimates without the term (in the internal, centred parameterisation, where dropping
a column leaves the intercept near its answer); each pass is one scan.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np
import pyarrow as pa

from dbfit.design.layout import Design, build_design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import FitError
from dbfit.expressions.source import source_relation
from dbfit.fitting.prior_correction import fitted_estimates
from dbfit.fitting.statistics import StatisticsPass
from dbfit.model import inference
from dbfit.model.fitted import Model
from dbfit.model.term_tests import chi_square_tail, term_columns, wald_term_tests
from dbfit.solver.newton import Deviance, NewtonRules, NewtonRun, solve

TEST_COLUMNS = {
    "term": pa.string(),
    "df": pa.int64(),
    "wald_chi_square": pa.float64(),
    "wald_p_value": pa.float64(),
}
LR_COLUMNS = {
    "deviance_difference": pa.float64(),
    "lr_p_value": pa.float64(),
    "refit_scans": pa.int64(),
    "note": pa.string(),
}


def refuse_likelihood_ratio(model: Model) -> None:
    """The likelihood-ratio tests need the plain likelihood of the model's own rows."""
    if model.options.get("firth"):
        raise FitError(
            "likelihood-ratio tests per term compare plain likelihoods; this model maximised Firth's penalised "
            "likelihood: use the Wald tests (likelihood_ratio=False)"
        )
    if model.options.get("shrinkage") is not None:
        raise FitError("likelihood-ratio tests per term are not defined for a penalised (shrinkage) fit")
    model.source_or_own(None)


def fitted_rows_design(model: Model) -> Design:
    """The model's design over the rows it was fitted on: the training part of a holdout fit, one segment's
    rows for a segment's model (whose design was laid out over the whole source), else its source."""
    return dataclasses.replace(model.design, relation=source_relation(model.rows_source("training")))


def profiled_design(engine: DuckDBEngine, model: Model) -> Design:
    """The model's design with the sums of its profiling scan. A model read from the store or a document
    keeps its columns but not those sums (nor the typing of its target), so its rows are profiled again (one
    scan), with its reference levels; the source must still give the same columns and rows."""
    design = fitted_rows_design(model)
    if design.trial_sum > 0:
        return design
    again = build_design(
        engine,
        design.formula,
        design.relation,
        weights=design.weights_text,
        offset=design.offset_text,
        trials=design.trials_text,
        positive=model.options.get("positive"),
        reference={f.text: f.reference for f in design.factors if f.kind == "categorical"},
    )
    if again.labels != design.labels or again.rows_used != design.rows_used:
        raise FitError(
            f"the model's source no longer gives the rows it was fitted on ({again.rows_used:,} rows used now, "
            f"{design.rows_used:,} then; columns {'the same' if again.labels == design.labels else 'differ'}): "
            "refit the model before testing its terms by likelihood ratio"
        )
    return again


def likelihood_ratio_rows(engine: DuckDBEngine, model: Model) -> list[dict[str, Any]]:
    """One dict per formula term: the deviance difference of the refit without it, p-value, scans, note."""
    refuse_likelihood_ratio(model)
    design = profiled_design(engine, model)
    has_intercept = 1 if design.intercept else 0
    original = fitted_estimates(model)
    estimated = [k for k in range(len(model.labels)) if np.isfinite(original[k])]
    internal = inference.internal_start(design, np.nan_to_num(original, nan=0.0))
    statistics_pass = StatisticsPass(engine, design)
    full_loglik = float(model.stats["log_likelihood"])
    rules = NewtonRules(
        max_passes=int(model.options.get("max_iter") or 50),
        tol=float(model.options.get("tol") or 1e-10),
        protected=has_intercept,
        weight_total=design.trial_sum,
    )
    rows: list[dict[str, Any]] = []
    for columns in term_columns(model):
        kept = [k for k in estimated if k not in columns.parameters]
        before = engine.scans
        if not columns.parameters:
            rows.append(_row(None, 0, 0, "no estimated column: nothing to drop"))
            continue
        if not kept:
            rows.append(_row(None, 0, 0, "the term is the model's only column: nothing would remain"))
            continue
        result = solve(
            NewtonRun(Deviance(design.saturated_loglik), internal[kept], rules),
            lambda beta, active, kept=kept: statistics_pass([kept[k] for k in active], beta),
        )
        loglik = result.last.loglik + design.loglik_constant
        df = len(estimated) - len(result.active)
        note = None
        if result.separation:
            note = "the fit without the term is separated: the statistic is not reliable"
        elif not result.converged:
            note = f"the fit without the term did not converge in {result.iterations} passes"
        rows.append(_row(2.0 * (full_loglik - loglik), df, engine.scans - before, note))
    return rows


def _row(difference: float | None, df: int, scans: int, note: str | None) -> dict[str, Any]:
    defined = difference is not None and math.isfinite(difference) and df > 0
    return {
        "deviance_difference": difference if defined else None,
        "lr_p_value": chi_square_tail(max(difference, 0.0), df) if defined else None,
        "refit_scans": scans,
        "note": note,
    }


def term_tests(engine: DuckDBEngine, model: Model, *, likelihood_ratio: bool = False) -> pa.Table:
    """One row per formula term: its df and joint Wald test, and with ``likelihood_ratio`` the test from a
    refit without it. The schema metadata ``dbfit_scans`` gives the scans all refits cost (0 for Wald)."""
    if not isinstance(likelihood_ratio, bool):
        raise FitError(f"likelihood_ratio must be True or False (got {likelihood_ratio!r})")
    wald = wald_term_tests(model)
    before = engine.scans  # a stored model's profiling scan counts among the likelihood-ratio tests' scans
    columns = dict(TEST_COLUMNS)
    if likelihood_ratio:
        lr = likelihood_ratio_rows(engine, model)
        wald = [{**w, **row} for w, row in zip(wald, lr)]
        columns |= LR_COLUMNS
    table = pa.table(
        {name: pa.array([row[name] for row in wald], type=kind) for name, kind in columns.items()}
    )
    return table.replace_schema_metadata({b"dbfit_scans": str(engine.scans - before).encode()})
