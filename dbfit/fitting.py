"""``fit``: formula -> design -> statistics queries -> Newton steps -> model."""

from __future__ import annotations

import logging
import math
import sys
from collections.abc import Mapping, Sequence
from typing import Any, Callable

import duckdb
import numpy as np

from dbfit import firth as bias_reduction
from dbfit import inference, penalized, priorcorrection
from dbfit import robust as robust_errors
from dbfit.design import Design, build_design
from dbfit.engine import DuckDBEngine
from dbfit.errors import FitError
from dbfit.formula import parse_formula
from dbfit.irls import IterationReport, NewtonResult, fit_newton
from dbfit.model import Model
from dbfit.source import source_relation
from dbfit.statsquery import PassResult, statistics_query, unpack

log = logging.getLogger("dbfit")

Progress = bool | Callable[[IterationReport], None] | None


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
    robust: str | None = None,
    cluster: str | None = None,
    firth: bool = False,
    population_rate: float | None = None,
    shrinkage: float | Sequence[float] | str | None = None,
    l1_share: float = 0.0,
    folds: int = 5,
    split_key: str | None = None,
) -> Model:
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
    progress : None logs each pass at INFO on the ``dbfit`` logger, True prints to stderr, False is quiet,
        a callable receives an :class:`IterationReport`.
    robust : ``"HC0"``, ``"HC1"`` or ``"cluster"``: sandwich standard errors instead of the model-based ones
        (see :mod:`dbfit.robust`); one more scan.
    cluster : SQL expression naming each row's cluster, for cluster-robust standard errors.
    firth : fit Firth's bias-reduced estimates (finite under separation; see :mod:`dbfit.firth`);
        two scans per Newton pass.
    population_rate : the known population event rate when the rows were sampled by outcome; the intercept
        is prior-corrected to it (see :mod:`dbfit.priorcorrection`).
    shrinkage : penalty strength on the standardised scale (ridge / elastic net, see :mod:`dbfit.penalty`);
        a list of strengths, or ``"cv"`` for an automatic grid, is walked as a path and the value with the
        least ``folds``-fold cross-validated deviance is kept.
    l1_share : share of the L1 part of the penalty, from 0 (ridge) to 1 (pure L1); default 0.
    folds : number of cross-validation folds, default 5.
    split_key : SQL expression whose hash assigns rows to folds (default: the row's used values).

    References
    ----------
    McCullagh and Nelder (1989), Generalized Linear Models, 2nd ed., Chapman & Hall, chapter 4.
    """
    if max_iter < 1:
        raise FitError(f"max_iter must be at least 1 (got {max_iter})")
    if not tol > 0:
        raise FitError(f"tol must be positive (got {tol})")
    robust_kind = robust_errors.choose_kind(robust, cluster)
    priorcorrection.check_population_rate(population_rate)
    penalty_request = penalized.check_request(shrinkage, l1_share, folds, split_key)
    if penalty_request is not None and (firth or robust_kind is not None):
        raise FitError("shrinkage cannot be combined with firth=True or robust standard errors")
    engine = DuckDBEngine(con)
    parsed = parse_formula(formula)
    design = build_design(
        engine,
        parsed,
        source_relation(source),
        weights=weights,
        offset=offset,
        trials=trials,
        positive=positive,
        reference=dict(reference or {}),
    )
    has_intercept = 1 if design.intercept else 0
    constant = [k + has_intercept for k, c in enumerate(design.columns) if c.constant]
    all_parameters = list(range(len(design.labels)))
    fitted = [k for k in all_parameters if k not in constant]
    reporter = _reporter(progress)

    beta_start = _start_values(design, start, fitted)
    default_start = _start_values(design, None, fitted)

    def evaluate(parameters: list[int], beta: np.ndarray) -> PassResult:
        return _evaluate(engine, design, parameters, beta)

    step_evaluate = bias_reduction.firth_evaluator(engine, design, evaluate, has_intercept) if firth else evaluate
    if penalty_request is not None:
        penalised = penalized.fit_penalised(engine, design, evaluate, beta_start, fitted, penalty_request, max_iter,
                                            reporter)
        newton = penalised.newton
    else:
        newton = fit_newton(
            lambda beta, active: step_evaluate([fitted[k] for k in active], beta),
            beta_start,
            saturated_loglik=design.saturated_loglik,
            max_iter=max_iter,
            tol=tol,
            protected=has_intercept,
            report=reporter,
            fallback_start=None if start is None else default_start,
            weight_total=design.trial_sum,
        )
    active = [fitted[k] for k in newton.active]
    aliased = sorted(constant + [fitted[k] for k in newton.aliased])
    if firth:
        newton = bias_reduction.finish(newton, step_evaluate, evaluate, active, max_iter)
    null_loglik = _null_loglik(engine, design, max_iter, tol)
    model = _assemble(design, newton, active, aliased, null_loglik, engine.scans, formula, source,
                      dict(weights=weights, offset=offset, trials=trials, reference=dict(reference or {}),
                           positive=positive, max_iter=max_iter, tol=tol, firth=firth))
    if firth:
        model = bias_reduction.annotate(model, newton.last)
    if penalty_request is not None:
        model = penalized.annotate(model, penalised, penalty_request)
    if robust_kind is not None:
        model = robust_errors.with_robust_errors(con, model, robust_kind, cluster)
    if population_rate is not None:
        model = priorcorrection.prior_corrected(model, population_rate)
    return model


def _evaluate(engine: DuckDBEngine, design: Design, parameters: list[int], beta: np.ndarray) -> PassResult:
    has_intercept = 1 if design.intercept else 0
    intercept = bool(design.intercept and 0 in parameters)
    columns = [k - has_intercept for k in parameters if not (design.intercept and k == 0)]
    query = statistics_query(design, columns, intercept, beta)
    return unpack(engine.fetch(query)[0], len(parameters))


def _start_values(design: Design, start: Mapping[str, float] | Sequence[float] | None, fitted: list[int]) -> np.ndarray:
    labels = design.labels
    if start is None:
        internal = np.zeros(len(labels))
        if design.intercept and design.offset is None:
            rate = design.success_sum / design.trial_sum
            internal[0] = math.log(rate / (1.0 - rate))
        return internal[fitted]
    if isinstance(start, Mapping):
        unknown = [name for name in start if name not in labels]
        if unknown:
            raise FitError(f"start names unknown terms {unknown}; the model's terms are {labels}")
        original = np.array([float(start.get(label, 0.0) or 0.0) for label in labels])
    else:
        original = np.asarray(list(start), dtype=float)
        if original.shape != (len(labels),):
            raise FitError(f"start has {original.size} values but the model has {len(labels)} terms: {labels}")
    original = np.nan_to_num(original, nan=0.0)
    return inference.internal_start(design, original)[fitted]


def _null_loglik(engine: DuckDBEngine, design: Design, max_iter: int, tol: float) -> float:
    """Log-likelihood of the intercept-only model with the same weights and offset."""
    if design.offset is None:
        return inference.null_loglik_closed_form(design)
    rate = design.success_sum / design.trial_sum
    result = fit_newton(
        lambda beta, active: unpack(engine.fetch(statistics_query(design, [], True, beta))[0], 1),
        np.array([math.log(rate / (1.0 - rate))]),
        saturated_loglik=design.saturated_loglik,
        max_iter=max_iter,
        tol=tol,
        protected=1,
        check_aliasing=False,
    )
    return result.last.loglik + design.loglik_constant


def _assemble(
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
    gram = newton.last.gram
    try:
        internal_covariance = np.linalg.inv(gram)
    except np.linalg.LinAlgError:
        internal_covariance = np.linalg.pinv(gram)
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
            "and standard errors shown are not trustworthy: drop or merge those terms, or refit with "
            "dbfit.fit(..., firth=True) for Firth's bias-reduced estimates, which stay finite"
        )
    elif not newton.converged:
        warnings.append(
            f"not converged: the deviance was still changing after {newton.iterations} passes; raise max_iter "
            "or check the data for extreme values"
        )

    loglik = newton.last.loglik + design.loglik_constant
    parameters = len(active)
    aic, bic = inference.information_criteria(loglik, parameters, design.rows_used)
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
        "df_residual": design.rows_used - parameters,
        "scans": scans,
        "weight_sum": design.weight_sum,
    }
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


def _reporter(progress: Progress) -> Callable[[IterationReport], None] | None:
    if progress is False:
        return None
    if callable(progress):
        return progress

    def report(item: IterationReport) -> None:
        text = (
            f"dbfit pass {item.iteration}: deviance {item.deviance:.10g}"
            + (" (rose: halving the step)" if item.halving else f", step {item.step_size:.3g}")
            + f", {item.elapsed:.2f}s"
        )
        if progress is True:
            print(text, file=sys.stderr, flush=True)
        else:
            log.info(text)

    return report
