"""``fit``: formula -> design -> statistics queries -> Newton steps -> model."""

from __future__ import annotations

import logging
import math
import sys
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import duckdb
import numpy as np

from dbfit.design.layout import Design, build_design
from dbfit.design.term_resolution import resolve_formula
from dbfit.engines import engine_for
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.engines.progress import progress_settings
from dbfit.errors import DbfitError, FitError
from dbfit.expressions.dialects import dialect
from dbfit.expressions.formula import parse_formula
from dbfit.expressions.source import source_relation
from dbfit.fitting import firth as bias_reduction
from dbfit.fitting import penalised, prior_correction
from dbfit.fitting import robust as robust_errors
from dbfit.fitting.blocks import BlockedStatisticsPass, blocked_factor, dense_first
from dbfit.fitting.cells import cell_factors
from dbfit.fitting.options import FitOptions
from dbfit.fitting.sample_fit import SampleArrays, sampled_rows
from dbfit.fitting.segments import fit_segments
from dbfit.fitting.statistics import MAX_DENSE_COLUMNS, StatisticsPass, check_width
from dbfit.fitting.streamed import (
    MAX_STREAMED_COLUMNS,
    STREAMED_MIN_COLUMNS,
    StreamedStatisticsPass,
    one_blas_thread,
)
from dbfit.model import inference
from dbfit.model.fitted import Model
from dbfit.model.segmented import SegmentedFit
from dbfit.solver.information import Information
from dbfit.solver.newton import (
    ChordDeviance,
    Deviance,
    IterationReport,
    NewtonResult,
    NewtonRules,
    NewtonRun,
    Stepper,
    solve,
)
from dbfit.solver.tolerances import STEP_TOLERANCE

log = logging.getLogger("dbfit")

SAMPLE_START_ROWS = 500_000  # from this many rows used, start from a fit on a sample
SAMPLE_ROWS = 100_000
SAMPLE_SEED = 20261201
SAMPLE_TOL = 1e-4  # the sample's estimates are within sampling error of the answer anyway
REFINE_PASSES = 6  # most score-only scans of the refinement from the sample's estimates
# Shares of the full pass's tolerances the last refinement step may use (see full_pass_finishes): the fall of
# the deviance it predicts is within a few per cent, the rate of the chord steps within a factor of about 3.
REFINE_FALL_SHARE = 0.5
REFINE_STEP_SHARE = 0.25

Progress = bool | Callable[[IterationReport], None] | None
Reporter = Callable[[IterationReport], None]


def fit(
    con: duckdb.DuckDBPyConnection,
    formula: str,
    source: str,
    *,
    weights: str | None = None,
    offset: str | None = None,
    trials: str | None = None,
    reference: Mapping[str, Any] | None = None,
    positive: Any = None,
    max_iter: int = 50,
    tol: float = 1e-10,
    start: Mapping[str, float] | Sequence[float] | None = None,
    progress: Progress = None,
    by: str | None = None,
    robust: str | None = None,
    cluster: str | None = None,
    firth: bool = False,
    population_rate: float | None = None,
    shrinkage: float | Sequence[float] | str | None = None,
    l1_share: float = 0.0,
    folds: int = 5,
    split_key: str | None = None,
    missing: Mapping[str, str] | str | None = None,
) -> Model | SegmentedFit:
    """Fit a logistic regression of ``formula`` on ``source`` inside the database.

    Parameters
    ----------
    con : DuckDB connection holding (or able to read) the source.
    formula : ``target ~ term + ...``; the target is a 0/1 or boolean SQL expression (or text with ``positive``).
    source : table or view name, Parquet/CSV path, or a single SELECT.
    weights : SQL expression of non-negative prior (frequency) weights; default 1.
    offset : SQL expression added to the linear predictor with coefficient 1.
    trials : SQL expression of the number of trials; the target then counts successes (grouped binomial).
    reference : ``{term: level}`` reference levels of categorical terms (default: first in sort order).
    positive : the value of a two-valued target that counts as the event.
    max_iter : most Newton passes (>= 1), default 50.
    tol : relative deviance change at convergence, default 1e-10.
    start : starting estimates on the original scale, by label or in label order (warm start).
    progress : None prints each pass (and a live share of rows scanned) on stderr when it is a terminal and
        otherwise logs each pass at INFO on the ``dbfit`` logger; True always prints; False is quiet; a
        callable receives an :class:`IterationReport`.
    by : SQL expression of a segment; one model is fitted per value, all in the same scans, and a
        :class:`SegmentedFit` is returned.
    robust : ``"HC0"``, ``"HC1"`` or ``"cluster"``: sandwich standard errors instead of the model-based ones
        (see :mod:`dbfit.fitting.robust`); one more scan.
    cluster : SQL expression naming each row's cluster, for cluster-robust standard errors.
    firth : fit Firth's bias-reduced estimates (finite under separation; see :mod:`dbfit.fitting.firth`);
        two scans per Newton pass.
    population_rate : the known population event rate when the rows were sampled by outcome; the intercept
        is prior-corrected to it (see :mod:`dbfit.fitting.prior_correction`).
    shrinkage : penalty strength on the standardised scale (ridge / elastic net, see :mod:`dbfit.solver.coordinate_descent`);
        a list of strengths, or ``"cv"`` for an automatic grid, is walked as a path and the value with the
        least ``folds``-fold cross-validated deviance is kept.
    l1_share : share of the L1 part of the penalty, from 0 (ridge) to 1 (pure L1); default 0.
    folds : number of cross-validation folds, default 5.
    split_key : SQL expression whose hash assigns rows to folds (default: the row's used values).
    missing : what a NULL in a term does: ``"drop"`` the row (default), ``"indicator"`` (a numeric term is
        filled with its training mean and gains the term ``is_missing(x)``) or ``"level"`` (a categorical's
        NULL is the level ``(missing)``); one policy for every term it fits, or ``{term: policy}``.

    References
    ----------
    McCullagh and Nelder (1989), Generalized Linear Models, 2nd ed., Chapman & Hall, chapter 4.
    """
    chosen = FitOptions.of(
        weights=weights,
        offset=offset,
        trials=trials,
        reference=reference,
        positive=positive,
        max_iter=max_iter,
        tol=tol,
        start=start,
        by=by,
        robust=robust,
        cluster=cluster,
        firth=firth,
        population_rate=population_rate,
        shrinkage=shrinkage,
        l1_share=l1_share,
        folds=folds,
        split_key=split_key,
        missing=missing,
    )
    return fit_with(con, formula, source, chosen, progress)


def fit_with(
    con: duckdb.DuckDBPyConnection, formula: str, source: str, options: FitOptions, progress: Progress = None
) -> Model | SegmentedFit:
    """:func:`fit` with its options already checked (each entry point builds :class:`FitOptions` once)."""
    check_progress(progress)
    engine = engine_for(con)
    engine.live_progress = (
        engine.dialect == "duckdb"
        and progress is not False
        and not callable(progress)
        and (progress is True or sys.stderr.isatty())  # True: plain lines where stderr is no terminal
    )
    with one_blas_thread():  # the p x p algebra is small; spinning BLAS threads would fight the engine's
        if engine.dialect == "duckdb":
            # dbfit reports progress itself (or is quiet): DuckDB's own printed bar stays off during the fit.
            with progress_settings(con, track=engine.live_progress):
                return _fit(engine, formula, source, options, progress)
        return _fit(engine, formula, source, options, progress)


def check_progress(progress: Any) -> None:
    if progress is not None and not isinstance(progress, bool) and not callable(progress):
        raise FitError(f"progress must be True, False, None or a function of one report (got {progress!r})")


def _fit(
    engine: DuckDBEngine, formula: str, source: str, options: FitOptions, progress: Progress
) -> Model | SegmentedFit:
    special = options.variants()
    max_iter, tol, start, by = options.max_iter, options.tol, options.start, options.by
    resolution = resolve_formula(
        engine,
        formula,
        source_relation(source),
        missing=options.missing,
        option_expressions=(options.weights, options.offset, options.trials, by),
        weights=options.weights,
    )
    formula = resolution.formula
    parsed = parse_formula(formula)
    design = build_design(
        engine,
        parsed,
        source_relation(source),
        weights=options.weights,
        offset=options.offset,
        trials=options.trials,
        positive=options.positive,
        reference={resolution.renamed.get(k, k): v for k, v in (options.reference or {}).items()},
        by=by,
    )
    design.filled_rows, design.columns_at_fit = resolution.filled_rows, resolution.source_columns_seen
    formula = design.formula.text  # term functions with their knots and edges listed: the model keeps them
    has_intercept = 1 if design.intercept else 0
    constant = [k + has_intercept for k, c in enumerate(design.columns) if c.constant]
    all_parameters = list(range(len(design.labels)))
    fitted = [k for k in all_parameters if k not in constant]
    reporter = progress_reporter(progress)
    recorded = options.recorded()
    if by is not None:
        if start is not None:
            raise FitError("start= cannot be combined with by=: every segment starts from its own intercept")
        pooled = None
        if design.rows_used >= SAMPLE_START_ROWS:
            pooled = sample_fit(engine, design, fitted, max_iter, tol, None)
        return fit_segments(
            engine,
            design,
            fitted,
            constant,
            pooled=pooled[0] if pooled is not None else None,
            max_iter=max_iter,
            tol=tol,
            reporter=reporter,
            assemble=assemble_model,
            formula=formula,
            source=source,
            options=recorded,
        )

    factor = blocked_factor(design)
    if factor is not None and not (special.plain and special.robust_kind is None):  # prior correction is fine
        raise FitError(
            f"'{design.factors[factor].text}' has {len(design.factors[factor].levels)} levels: firth, shrinkage and "
            "robust errors are not available with a categorical of that many levels; merge rare levels first"
        )
    if factor is not None:
        fitted = dense_first(design, fitted, factor)
    default_start = start_values(design, None, fitted)
    start_deviance = np.inf
    statistics_path = "blocks"
    if factor is not None:
        full_pass: StatisticsPass | BlockedStatisticsPass = BlockedStatisticsPass(engine, design, factor)
        beta_start = start_values(design, start, fitted)
    else:
        check_design_width(engine, design, special.plain and special.robust_kind is None)
        full_pass = statistics_pass(engine, design)
        statistics_path = full_pass.path
        if start is None and design.rows_used >= SAMPLE_START_ROWS and special.plain:
            beta_start, start_deviance = _sample_start(
                engine, design, full_pass, fitted, default_start, max_iter, tol, reporter
            )
        else:
            beta_start = start_values(design, start, fitted)

    firth = special.firth
    step_evaluate = (
        bias_reduction.firth_evaluator(engine, design, full_pass, has_intercept) if firth else full_pass
    )
    if special.penalty_request is not None:
        path = penalised.fit_penalised(
            engine, design, full_pass, beta_start, fitted, special.penalty_request, max_iter, reporter
        )
        newton = path.newton
    else:
        fallback = None if start is None else default_start
        if firth:
            rules = bias_reduction.rules(max_iter, tol, has_intercept, reporter, fallback, design.trial_sum)
        else:
            rules = NewtonRules(
                max_passes=max_iter,
                tol=tol,
                protected=has_intercept,
                report=reporter,
                fallback_start=fallback,
                weight_total=design.trial_sum,
                start_objective=start_deviance,
            )
        newton = solve(
            NewtonRun(Deviance(design.saturated_loglik), beta_start, rules),
            lambda beta, active: step_evaluate([fitted[k] for k in active], beta),
        )
    active = [fitted[k] for k in newton.active]
    aliased = sorted(constant + [fitted[k] for k in newton.aliased])
    if firth:
        newton = bias_reduction.finish(newton, full_pass, active)
    null_loglik = _null_loglik(engine, design, max_iter, tol)
    model = assemble_model(
        design,
        newton,
        active,
        aliased,
        null_loglik,
        engine.scans,
        formula,
        source,
        {**recorded, "firth": firth},
    )
    if firth:
        model = bias_reduction.annotate(model, newton.last)
    if special.penalty_request is not None:
        model = penalised.annotate(model, path, special.penalty_request)
    if special.robust_kind is not None:
        model = robust_errors.with_robust_errors(engine, model, special.robust_kind, special.cluster)
    if special.population_rate is not None:
        model = prior_correction.prior_corrected(model, special.population_rate)
    model.stats["statistics_path"] = statistics_path
    return model


def _sample_start(
    engine: DuckDBEngine,
    design: Design,
    full_pass: StatisticsPass,
    fitted: list[int],
    default_start: np.ndarray,
    max_iter: int,
    tol: float,
    reporter: Callable[[IterationReport], None] | None,
) -> tuple[np.ndarray, float]:
    """Fit a sample of the complete rows in memory, and start from its estimates.

    The sample (see :func:`dbfit.fitting.sample_fit.sampled_rows`: a system sample of a table's row blocks,
    otherwise a reservoir or row-hash sample in one scan, as the engine's dialect has) is fetched once as its
    standardised design, and its Newton passes run in numpy. From its estimates, score-only scans with the
    sample's information scaled to the full data (a chord method) close in on the answer, and one full Newton
    pass confirms it. Returns the start and the last deviance.
    """
    fitted_sample = sample_fit(engine, design, fitted, max_iter, tol, reporter)
    if fitted_sample is None:
        return default_start, np.inf
    sample, sample_rows = fitted_sample
    start = np.zeros(len(fitted))
    start[sample.active] = sample.beta
    if sample.aliased:
        return start, np.inf
    scaled = sample.last.gram.scaled(design.rows_used / sample_rows)
    return refine_with_fixed_information(
        full_pass, fitted, start, scaled, design.saturated_loglik, reporter, tol
    )


def sample_fit(
    engine: DuckDBEngine,
    design: Design,
    fitted: list[int],
    max_iter: int,
    tol: float,
    reporter: Callable[[IterationReport], None] | None,
) -> tuple[NewtonResult, int] | None:
    """The Newton fit in numpy of SAMPLE_ROWS complete rows (the default start, tolerance SAMPLE_TOL) and the
    rows it had; None when the sample is too small or its fit did not converge."""
    form = dialect(engine.dialect).fitting.sample
    rows, reads_all = sampled_rows(design, SAMPLE_ROWS, SAMPLE_SEED, form)
    try:
        sample_rows = SampleArrays.fetch(engine, design, fitted, rows, scan=reads_all)
    except DbfitError:
        if reads_all or form != "system_hash":
            raise
        # PostgreSQL samples the blocks of tables only: a view's rows are sampled by their hash instead.
        rows, reads_all = sampled_rows(design, SAMPLE_ROWS, SAMPLE_SEED, "hash")
        sample_rows = SampleArrays.fetch(engine, design, fitted, rows, scan=reads_all)
    if sample_rows.rows <= len(fitted):
        return None

    def sample_report(item: IterationReport) -> None:
        item.phase = f"sample of {SAMPLE_ROWS:,} rows"
        reporter(item)

    rules = NewtonRules(
        max_passes=max_iter,
        tol=max(tol, SAMPLE_TOL),
        protected=1 if design.intercept else 0,
        report=sample_report if reporter else None,
    )
    sample = solve(
        NewtonRun(Deviance(0.0), start_values(design, None, fitted), rules),
        lambda beta, active: sample_rows.statistics(active, beta),
    )
    if not sample.converged or sample.separation:
        return None
    return sample, sample_rows.rows


def refine_with_fixed_information(
    full_pass: StatisticsPass,
    fitted: list[int],
    start: np.ndarray,
    information: Information,
    saturated_loglik: float,
    reporter: Reporter | None,
    tol: float,
) -> tuple[np.ndarray, float]:
    """Newton steps with a fixed approximation of the information (a chord method, :class:`ChordDeviance`) on
    score-only scans, several times cheaper than one for X'WX; stops at the first rise, after REFINE_PASSES
    scans, or once the full Newton pass that follows finishes the fit (:func:`full_pass_finishes`). Returns
    the refined estimates and the last deviance measured."""
    rules = NewtonRules(
        max_passes=REFINE_PASSES,
        step_floor=0.0,
        confirm=False,
        stop_on_rise=True,
        check_aliasing=False,
        detect_separation=False,
        report=reporter,
        phase="full data, score only",
    )
    run = NewtonRun(ChordDeviance(saturated_loglik, information), start, rules)
    stepper = Stepper(run)
    previous_size = np.inf
    while (beta := stepper.wanted()) is not None:
        scan = full_pass.score_only(fitted, beta)
        stepper.take(scan)
        following = stepper.wanted()
        if following is None:
            break
        step = following - beta
        if full_pass_finishes(scan.score, step, previous_size, run.accepted_value, tol):
            return following, run.accepted_value
        previous_size = float(np.max(np.abs(step)))
    refined = stepper.result()
    return refined.beta, refined.objective


def full_pass_finishes(
    score: np.ndarray, step: np.ndarray, previous_size: float, deviance: float, tol: float
) -> bool:
    """Whether the score-only scans can stop after ``step`` (taken from a point of this ``deviance`` and
    ``score``): the full Newton pass at the next point then converges at once, and its step finishes the fit.

    The step lowers the deviance by about score's step (2 U's - s'Is with I s close to U); the full pass
    measures that fall, and converges when it is below ``tol`` relative to the deviance and its own step is
    below STEP_TOLERANCE: the fall must be below REFINE_FALL_SHARE of that. The chord steps shrink by a
    steady rate r (their ratio; 1/2 taken before there are two), so the point reached is about
    r / (1 - r) times this step from the estimate, the size of the full pass's Newton step, which must be
    below REFINE_STEP_SHARE of STEP_TOLERANCE.
    Newton's method converges quadratically near the estimate (Nocedal and Wright 2006, Numerical
    Optimization, 2nd ed., section 3.3, Theorem 3.5, from memory): from an error e one step leaves about
    C e^2, with C of order one on the standardised scale, so the steps before the last do not need to be
    smaller than that rule asks.
    """
    size = float(np.max(np.abs(step))) if step.size else 0.0
    rate = size / previous_size if np.isfinite(previous_size) and previous_size > 0 else 0.5
    if rate >= 1.0:
        return False
    fall = float(score @ step)
    left = rate / (1.0 - rate) * size
    return (
        fall <= REFINE_FALL_SHARE * tol * (abs(deviance - fall) + 0.1)
        and left < REFINE_STEP_SHARE * STEP_TOLERANCE
    )


def statistics_pass(engine: DuckDBEngine, design: Design) -> StatisticsPass:
    """The full statistics pass for ``design``; its ``path`` names how it computes X'WX.

    "cells" when grouping the rows by categorical levels saves sums (:func:`dbfit.fitting.cells.cell_factors`)
    and fewer than STREAMED_MIN_COLUMNS numeric parts remain to be summed per row; otherwise on DuckDB, from
    STREAMED_MIN_COLUMNS columns, "streamed": the design's rows through numpy (:mod:`dbfit.fitting.streamed`);
    else "dense", the SQL sums (always on PostgreSQL and Spark, where the rows would cross the network).
    """
    cells = cell_factors(design)  # the rule costs every subset of the factors: decided once, handed on
    if cells and len(numeric_parts(design)) < STREAMED_MIN_COLUMNS:
        return StatisticsPass(engine, design, cells=cells)
    if engine.dialect == "duckdb" and fitted_columns(design) >= STREAMED_MIN_COLUMNS:
        return StreamedStatisticsPass(engine, design, cells=cells)
    return StatisticsPass(engine, design, cells=cells)


def numeric_parts(design: Design) -> set[tuple[int, ...]]:
    """The distinct products of numeric factors among the design's fitted columns (what a cell sums per row)."""
    return {column.numeric for column in design.columns if column.numeric and not column.constant}


def check_design_width(engine: DuckDBEngine, design: Design, core_sums_only: bool) -> None:
    """Refuse a design too wide before any pass runs. Streamed on DuckDB, a fit whose only p x p sums are the
    core pass's (no Firth, shrinkage or robust errors, whose scans sum p x p products in SQL) may have up to
    MAX_STREAMED_COLUMNS columns; every other fit at most MAX_DENSE_COLUMNS."""
    columns = fitted_columns(design)
    if columns <= MAX_DENSE_COLUMNS or not (engine.dialect == "duckdb" and core_sums_only):
        check_width(columns)
    elif columns > MAX_STREAMED_COLUMNS:
        raise FitError(
            f"the design has {columns} columns besides the intercept (numeric terms and indicator columns); "
            f"dbfit fits at most {MAX_STREAMED_COLUMNS} (at most {MAX_DENSE_COLUMNS} with firth, shrinkage "
            "or robust errors). Use fewer columns, put a categorical of many levels in the formula as one "
            "factor (fitted by blocks), or select predictors first"
        )


def fitted_columns(design: Design) -> int:
    """The design's columns besides the intercept that are fitted (not constant in the rows used)."""
    return sum(1 for column in design.columns if not column.constant)


def start_values(
    design: Design, start: Mapping[str, float] | Sequence[float] | None, fitted: list[int]
) -> np.ndarray:
    labels = design.labels
    if start is None:
        internal = np.zeros(len(labels))
        if design.intercept and design.offset is None:
            internal[0] = inference.intercept_only_estimate(design)
        return internal[fitted]
    if isinstance(start, Mapping):
        unknown = [name for name in start if name not in labels]
        if unknown:
            raise FitError(f"start names unknown terms {unknown}; the model's terms are {labels}")
        original = np.array([float(start.get(label, 0.0) or 0.0) for label in labels])
    else:
        original = np.asarray(list(start), dtype=float)
        if original.shape != (len(labels),):
            raise FitError(
                f"start has {original.size} values but the model has {len(labels)} terms: {labels}"
            )
    original = np.nan_to_num(original, nan=0.0)
    return inference.internal_start(design, original)[fitted]


def _null_loglik(engine: DuckDBEngine, design: Design, max_iter: int, tol: float) -> float:
    """Log-likelihood of the intercept-only model with the same weights and offset."""
    if design.offset is None:
        return inference.null_loglik_closed_form(design)
    intercept_only = StatisticsPass(engine, design)
    rules = NewtonRules(max_passes=max_iter, tol=tol, protected=1, check_aliasing=False)
    start = np.array([inference.intercept_only_estimate(design)])
    result = solve(
        NewtonRun(Deviance(design.saturated_loglik), start, rules),
        lambda beta, active: intercept_only.run((), True, beta),
    )
    return result.last.loglik + design.loglik_constant


def assemble_model(
    design: Design,
    newton: NewtonResult,
    active: list[int],
    aliased: list[int],
    null_loglik: float,
    scans: int,
    formula: str,
    source: str,
    options: dict[str, Any],
) -> Model:
    labels = design.labels
    size = len(labels)
    transform = inference.original_scale_map(design, active)
    internal_covariance = newton.last.gram.inverse()
    estimates = np.full(size, np.nan)
    covariance = np.full((size, size), np.nan)
    estimates[active] = transform @ newton.beta
    covariance[np.ix_(active, active)] = transform @ internal_covariance @ transform.T

    warnings: list[str] = []
    for k in aliased:
        warnings.append(
            f"aliased: '{labels[k]}' is constant or a linear combination of earlier terms in these rows; "
            "its estimate is NULL and the other estimates are valid without it"
        )
    if newton.separation:
        suspects = [labels[active[k]] for k in range(len(active)) if active[k] in newton.suspects] or [
            labels[k] for k in active if not (design.intercept and k == 0)
        ]
        warnings.append(
            "separation: the outcome is (quasi-)completely separated, fitted probabilities reach 0 or 1 and the "
            f"maximum-likelihood estimates do not exist; suspected terms: {', '.join(suspects)}. The estimates "
            "and standard errors shown are not trustworthy: drop or merge those terms"
            + (
                ""
                if options.get("firth")
                else ", or refit with dbfit.fit(..., firth=True) for Firth's "
                "bias-reduced estimates, which stay finite"
            )
        )
    elif not newton.converged:
        warnings.append(
            f"not converged: the deviance was still changing after {newton.iterations} passes; raise max_iter "
            "or check the data for extreme values"
        )

    loglik = newton.last.loglik + design.loglik_constant
    parameters = len(active)
    informative = design.rows_informative  # rows with 0 trials count in neither the residual df nor BIC's n
    aic, bic = inference.information_criteria(loglik, parameters, informative)
    stats = {
        "n_used": design.rows_used,
        "n_excluded": design.rows_total - design.rows_used,
        "log_likelihood": loglik,
        "null_log_likelihood": null_loglik,
        "deviance": 2.0 * (design.saturated_loglik + design.loglik_constant - loglik),
        "null_deviance": 2.0 * (design.saturated_loglik + design.loglik_constant - null_loglik),
        "aic": aic,
        "bic": bic,
        "iterations": newton.iterations,
        "converged": newton.converged,
        "separation": newton.separation,
        "parameters": parameters,
        "aliased": len(aliased),
        "df_residual": informative - parameters,
        "scans": scans,
        "weight_sum": design.weight_sum,
    }
    if design.trials is not None:
        stats["rows_zero_trials"] = design.rows_zero_trials
    if design.filled_rows:
        stats["missing_filled"] = dict(design.filled_rows)
    if design.columns_at_fit is not None:
        stats["source_columns_at_fit"] = list(design.columns_at_fit)
    return Model(
        formula=formula,
        source=source,
        design=design,
        labels=labels,
        estimates=estimates,
        covariance=covariance,
        coefficients=inference.coefficient_table(labels, estimates, covariance),
        stats=stats,
        warnings=warnings,
        options=options,
    )


def progress_reporter(progress: Progress) -> Callable[[IterationReport], None] | None:
    if progress is False:
        return None
    if callable(progress):
        return progress

    def report(item: IterationReport) -> None:
        text = (
            ("dbfit " if item.phase == "full data" else f"dbfit {item.phase}, ")
            + f"pass {item.iteration}: deviance {item.deviance:.10g}"
            + (" (rose: halving the step)" if item.halving else "")
            + (f", step {item.step_size:.3g}" if math.isfinite(item.step_size) else "")
            + f", {item.elapsed:.2f}s"
        )
        if progress is True or sys.stderr.isatty():
            print(text, file=sys.stderr, flush=True)
        else:
            log.info(text)

    return report
