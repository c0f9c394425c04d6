"""Newton's method (IRLS) for the logistic log-likelihood, driven by one aggregate scan per step.

The solver only ever sees p x p numbers. Steps, in the order they run: set-up (start values, aliasing
check on the first Gram), Newton step by Cholesky solve, step-halving when the deviance rises, convergence
check on the relative deviance change and the step size, one more scan at the final estimate (so the
information, log-likelihood and covariance returned are those of the estimate returned), and a separation
check.
References: Green (1984), "Iteratively reweighted least squares for maximum likelihood estimation",
JRSS B 46(2), 149-192; Albert and Anderson (1984), "On the existence of maximum likelihood estimates in
logistic regression models", Biometrika 71(1), 1-10, doi:10.1093/biomet/71.1.1 (separation).
"""

from __future__ import annotations

import dataclasses
import time
from dataclasses import dataclass, field
from typing import Callable, Generator

import numpy as np

from dbfit.solver.information import BlockInformation, PassResult

ALIAS_TOLERANCE = 1e-10  # share of a column's variance left after projecting on earlier columns
MAX_HALVINGS = 30
STEP_TOLERANCE = 1e-4  # largest Newton step on the internal (standardised) scale accepted at convergence


@dataclass
class IterationReport:
    """Passed to the progress callback after every scan."""

    iteration: int
    deviance: float
    elapsed: float
    step_size: float
    halving: bool = False
    phase: str = "full data"


@dataclass
class NewtonResult:
    beta: np.ndarray  # over the active parameters
    active: list[int]  # parameter indices still in the model (aliased ones removed)
    aliased: list[int]
    last: PassResult
    iterations: int
    converged: bool
    separation: bool
    suspects: list[int] = field(default_factory=list)  # parameter indices in the direction of separation
    deviance_trace: list[float] = field(default_factory=list)


def aliased_columns(gram: np.ndarray | BlockInformation, protected: int = 0) -> list[int]:
    """Indices of columns that are (numerically) linear combinations of earlier columns.

    Sequential Cholesky on the correlation-scaled Gram: a later column of an exactly collinear set is the
    one dropped, as in a pivot-free QR. The first ``protected`` columns (the intercept) are never dropped.
    For block information the check runs on the Schur complement: a dense column that the levels explain
    is aliased; the levels themselves always carry weight.
    """
    if isinstance(gram, BlockInformation):
        return aliased_columns(gram.schur(), protected)
    diagonal = np.diag(gram).copy()
    keep: list[int] = []
    aliased: list[int] = []
    for j in range(gram.shape[0]):
        if diagonal[j] <= 0 and j >= protected:
            aliased.append(j)
            continue
        if keep:
            sub = gram[np.ix_(keep, keep)]
            cross = gram[keep, j]
            try:
                solved = np.linalg.solve(sub, cross)
                residual = gram[j, j] - cross @ solved
            except np.linalg.LinAlgError:
                residual = 0.0
        else:
            residual = gram[j, j]
        if j >= protected and residual <= ALIAS_TOLERANCE * gram[j, j]:
            aliased.append(j)
        else:
            keep.append(j)
    return aliased


def newton_step(gram: np.ndarray | BlockInformation, score: np.ndarray) -> np.ndarray:
    """Solve gram @ step = score by Cholesky; fall back to least squares when not positive definite."""
    if isinstance(gram, BlockInformation):
        return gram.solve(score)
    try:
        factor = np.linalg.cholesky(gram)
        return np.linalg.solve(factor.T, np.linalg.solve(factor, score))
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(gram, score, rcond=None)[0]


def fit_newton(evaluate: Callable[[np.ndarray, list[int]], PassResult], start: np.ndarray, **options) -> NewtonResult:
    """Maximise the log-likelihood; ``evaluate(beta, active)`` runs one scan at ``beta``.

    ``options`` are those of :func:`newton_iterations`.
    """
    steps = newton_iterations(start, **options)
    try:
        request = next(steps)
        while True:
            request = steps.send(evaluate(*request))
    except StopIteration as finished:
        return finished.value


def newton_iterations(
    start: np.ndarray,
    *,
    saturated_loglik: float,
    max_iter: int,
    tol: float,
    protected: int,
    report: Callable[[IterationReport], None] | None = None,
    check_aliasing: bool = True,
    fallback_start: np.ndarray | None = None,
    weight_total: float = 1.0,
    start_deviance: float = np.inf,
    detect_separation: bool = True,
) -> Generator[tuple[np.ndarray, list[int]], PassResult, NewtonResult]:
    """Newton's method as a generator: it yields ``(beta, active)`` and is sent the scan's result there.

    Written so that one grouped query can serve many fits at once (one per segment), each fit keeping its
    own state; :func:`fit_newton` drives a single one. ``detect_separation=False`` for objectives whose
    maximum exists under separation (Firth's), where slowly shrinking steps are no sign of divergence.
    """
    began = time.perf_counter()
    active = list(range(len(start)))
    aliased: list[int] = []
    beta = np.asarray(start, dtype=float).copy()
    previous_beta: np.ndarray | None = None
    previous_deviance = start_deviance  # the deviance near the start, when a cheaper phase measured it
    step_history: list[float] = []
    trace: list[float] = []
    halvings = 0
    iteration = 0
    result: PassResult | None = None
    converged = separation = False
    suspects: list[int] = []
    confirming: tuple[np.ndarray, PassResult] | None = None  # estimate and scan before the last step

    while iteration < max_iter or confirming is not None:
        iteration += confirming is None  # the confirming scan at the final estimate is not a Newton step
        result = yield beta, active
        deviance = 2.0 * (saturated_loglik - result.loglik)
        if confirming is not None:
            # The scan at the estimate returned, so its information (and covariance) belong to that estimate.
            if not deviance <= previous_deviance + 1e-12 * (abs(previous_deviance) + 1.0):
                beta, result = confirming  # the last step only added rounding: keep the point before it
            else:
                trace.append(deviance)
            break
        if iteration == 1 and _weights_collapsed(result, weight_total) and fallback_start is not None:
            # The start puts every row at a fitted 0 or 1: no curvature to step on. Start again from the default.
            if report:
                report(IterationReport(iteration + 1, deviance, time.perf_counter() - began, float("nan")))
            beta, fallback_start = fallback_start[: len(active)].copy(), None
            iteration = 0
            continue
        if iteration == 1 and check_aliasing:
            dropped = aliased_columns(result.gram, protected)
            if dropped:
                keep = [k for k in range(len(active)) if k not in dropped]
                aliased = [active[k] for k in dropped]
                active = [active[k] for k in keep]
                beta = beta[keep]
                result = restrict(result, keep)
        if not np.isfinite(deviance):
            raise FloatingPointError("the deviance is not finite")
        rising = deviance > previous_deviance + 1e-12 * (abs(previous_deviance) + 1.0)
        if rising and previous_beta is not None and halvings < MAX_HALVINGS:
            halvings += 1
            beta = 0.5 * (beta + previous_beta)
            if report:
                report(IterationReport(iteration + 1, deviance, time.perf_counter() - began, float("nan"), halving=True))
            continue
        halvings = 0
        trace.append(deviance)
        step = newton_step(result.gram, result.score)
        step_size = float(np.max(np.abs(step))) if step.size else 0.0
        if report:
            report(IterationReport(iteration, deviance, time.perf_counter() - began, step_size))
        change = abs(previous_deviance - deviance) / (abs(deviance) + 0.1) if np.isfinite(previous_deviance) else np.inf
        if (change < tol and step_size < STEP_TOLERANCE) or step_size < STEP_TOLERANCE * 1e-3:
            confirming, previous_deviance = (beta, result), deviance
            beta = beta + step
            converged = True
            continue
        step_history.append(step_size)
        if detect_separation and _diverging(step_history, change, result):
            separation = True
            top = np.max(np.abs(step))
            suspects = [active[k] for k in range(len(step)) if abs(step[k]) >= 0.25 * top]
            break
        previous_beta, previous_deviance = beta, deviance
        beta = beta + step

    if result is None:
        raise ValueError("max_iter must be at least 1")
    if (detect_separation and converged and result.extreme > 0 and result.misfit_extreme == 0
            and _some_rows_perfect(result)):
        separation = True
    return NewtonResult(
        beta=beta,
        active=active,
        aliased=aliased,
        last=result,
        iterations=iteration,
        converged=converged and not separation,
        separation=separation,
        suspects=suspects,
        deviance_trace=trace,
    )


def refine_with_fixed_information(
    evaluate_score: Callable[[np.ndarray], PassResult],
    start: np.ndarray,
    information: np.ndarray,
    *,
    saturated_loglik: float,
    max_passes: int = 6,
    step_goal: float = 1e-5,
    report: Callable[[IterationReport], None] | None = None,
) -> tuple[np.ndarray, float]:
    """Newton steps with a fixed approximation of the information (a chord method), score-only scans.

    With the information of a large random sample scaled to the full data, each step shrinks the error by
    a factor of about sqrt(p / sample size) (Ortega and Rheinboldt 1970, Iterative Solution of Nonlinear
    Equations in Several Variables, section 7.1), and a scan for the score alone is several times cheaper
    than one for X'WX. The answer is then confirmed by full Newton passes. Returns the refined estimates
    and the last deviance measured.
    """
    began = time.perf_counter()
    factor = np.linalg.cholesky(information)
    beta, best, best_deviance = start.copy(), start.copy(), np.inf
    for scan in range(1, max_passes + 1):
        result = evaluate_score(beta)
        deviance = 2.0 * (saturated_loglik - result.loglik)
        if not deviance <= best_deviance + 1e-12 * (abs(best_deviance) + 1.0):
            return best, best_deviance
        best, best_deviance = beta, deviance
        step = np.linalg.solve(factor.T, np.linalg.solve(factor, result.score))
        size = float(np.max(np.abs(step))) if step.size else 0.0
        if report:
            report(IterationReport(scan, deviance, time.perf_counter() - began, size, phase="full data, score only"))
        beta = beta + step
        if size < step_goal:
            break
    return beta, best_deviance


def restrict(result: PassResult, keep: list[int]) -> PassResult:
    """``result`` over the parameters ``keep`` only (for block information, dropped ones are dense)."""
    gram = result.gram
    if isinstance(gram, BlockInformation):
        dense = gram.dense.shape[0]
        restricted = gram.keep_dense([k for k in keep if k < dense])
    else:
        restricted = gram[np.ix_(keep, keep)]
    return dataclasses.replace(result, gram=restricted, score=result.score[keep])


def _weights_collapsed(result: PassResult, weight_total: float) -> bool:
    diagonal = result.gram.diag() if isinstance(result.gram, BlockInformation) else np.diag(result.gram)
    return bool(diagonal.size) and float(diagonal.max()) < 1e-10 * weight_total


def _diverging(steps: list[float], change: float, result: PassResult) -> bool:
    """Steps that stop shrinking while the deviance settles and rows sit at fitted 0 or 1.

    Under separation the likelihood keeps rising along a direction without bound: Newton's steps stay of
    the same size while the deviance changes less and less (Albert and Anderson 1984).
    """
    if len(steps) < 6 or result.extreme <= 0 or result.misfit_extreme > 0 or change > 1e-4:
        return False
    recent = steps[-3:]
    return all(later > 0.5 * earlier for earlier, later in zip(recent, recent[1:]))


def _some_rows_perfect(result: PassResult) -> bool:
    """Converged yet some rows fitted exactly: flagged only when the information matrix is near singular."""
    gram = result.gram
    if isinstance(gram, BlockInformation):
        eigenvalues = np.concatenate([np.linalg.eigvalsh(gram.schur()), gram.diagonal, np.linalg.eigvalsh(gram.dense)])
    else:
        eigenvalues = np.linalg.eigvalsh(gram) if gram.size else np.array([1.0])
    return bool(eigenvalues.min() <= 1e-10 * max(eigenvalues.max(), 1e-300))
