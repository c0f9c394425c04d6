"""One Newton driver for every fit: plain IRLS, penalised, Firth and the score-only refinement.

The solver only ever sees p x p numbers. A pass runs these steps, in this order, each a method of
:class:`NewtonRun`:

1. set-up (:meth:`NewtonRun.set_up`, first pass only): a start that fits every row at 0 or 1 is replaced by
   the default start; columns aliased in the first information matrix leave the model;
2. evaluate: one scan at the current point (the generator yields the point and is sent the scan), and the
   objective of the scan (:meth:`Objective.value`);
3. line search (:meth:`NewtonRun.line_search`): a point whose objective rose is halved towards the last
   accepted point, one scan per try (step-halving; Nocedal and Wright 2006, Numerical Optimization,
   2nd ed., section 3.1, backtracking), or the run stops at the last accepted point;
4. inner solve (:meth:`Objective.inner_solve`): the step from the accepted point, e.g. the Newton step
   I^-1 U (Green 1984; McCullagh and Nelder 1989, Generalized Linear Models, 2nd ed., section 4.4) or
   coordinate descent on the penalised quadratic model (Friedman, Hastie and Tibshirani 2010);
5. convergence (:meth:`NewtonRun.converged`): a small relative change of the objective with a small step, or
   a negligible step; a run that diverges under separation stops (Albert and Anderson 1984);
6. finish (:meth:`NewtonRun.finish`): the converged step is confirmed by one more scan at the estimate (so
   the information, log-likelihood and covariance returned are those of the estimate returned; a run may
   skip it when the step is too small to move them, ``NewtonRules.confirm_above``) and, for
   Firth's fit, polished with plain steps until negligible; the separation check of the converged fit.

What differs between the fits is the :class:`Objective` (what a pass evaluates and how a step is found)
and the :class:`NewtonRules` (tolerances, limits and which finishing steps run); every number they use
is defined in :mod:`dbfit.solver.tolerances`.
References: Green (1984), "Iteratively reweighted least squares for maximum likelihood estimation",
JRSS B 46(2), 149-192; Albert and Anderson (1984), "On the existence of maximum likelihood estimates in
logistic regression models", Biometrika 71(1), 1-10, doi:10.1093/biomet/71.1.1 (separation).
"""

from __future__ import annotations

import time
from collections.abc import Callable, Generator
from dataclasses import dataclass, field
from typing import Literal, Protocol

import numpy as np

from dbfit.solver.information import Information, PassResult
from dbfit.solver.tolerances import (
    ALIAS_TOLERANCE,
    COLLAPSED_WEIGHT,
    MAX_HALVINGS,
    RISE_TOLERANCE,
    SEPARATION_CHANGE,
    SINGULAR_RATIO,
    STEP_FLOOR,
    STEP_TOLERANCE,
)


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
    last: PassResult  # the scan at the last accepted point ``scanned``
    iterations: int
    converged: bool
    separation: bool
    suspects: list[int] = field(default_factory=list)  # parameter indices in the direction of separation
    scanned: np.ndarray = field(default_factory=lambda: np.zeros(0))  # the point of ``last``
    objective: float = np.inf  # the objective at ``scanned``


class Objective(Protocol):
    """What a pass minimises and how a scan becomes a step: the evaluate and inner-solve variants."""

    def value(self, beta: np.ndarray, scan: PassResult) -> float:
        """The objective at ``beta`` from its scan (smaller is better)."""

    def inner_solve(self, beta: np.ndarray, scan: PassResult) -> np.ndarray:
        """The step from ``beta`` given its scan."""


@dataclass(frozen=True)
class Deviance:
    """The binomial deviance 2 (l_saturated - l(b)), stepped by Newton-Raphson / IRLS (Green 1984).

    For Firth's fit the scan carries the penalised log-likelihood, the modified score and the matrix of the
    Newton step (see :mod:`dbfit.fitting.firth`); the objective and step are the same expressions.
    """

    saturated_loglik: float

    def value(self, beta: np.ndarray, scan: PassResult) -> float:
        return 2.0 * (self.saturated_loglik - scan.loglik)

    def inner_solve(self, beta: np.ndarray, scan: PassResult) -> np.ndarray:
        return scan.gram.solve(scan.score)


@dataclass(frozen=True)
class ChordDeviance(Deviance):
    """The deviance stepped with a fixed information matrix (a chord method), for score-only scans.

    With the information of a large random sample scaled to the full data, each step shrinks the error by
    a factor of about sqrt(p / sample size) (Ortega and Rheinboldt 1970, Iterative Solution of Nonlinear
    Equations in Several Variables, section 7.1).
    """

    information: Information

    def inner_solve(self, beta: np.ndarray, scan: PassResult) -> np.ndarray:
        return self.information.solve(scan.score)


@dataclass(frozen=True)
class NewtonRules:
    """Limits, tolerances and the finishing steps of one run (defaults: the plain maximum-likelihood fit)."""

    max_passes: int
    tol: float = 0.0  # relative objective change accepted at convergence (with a step below step_tolerance)
    step_tolerance: float = STEP_TOLERANCE
    step_floor: float = STEP_FLOOR  # a step below this is convergence on its own
    confirm: bool = True  # scan once more at the converged estimate
    confirm_above: float = 0.0  # ... unless the converged step is no larger than this
    polish_below: float | None = None  # after confirming, plain steps until one is below this (Firth)
    stop_on_rise: bool = False  # a rise ends the run at the last accepted point instead of halving
    protected: int = 0  # leading parameters never aliased (the intercept)
    check_aliasing: bool = True
    detect_separation: bool = True
    fallback_start: np.ndarray | None = None  # start again here when the start fits every row at 0 or 1
    weight_total: float = 1.0
    start_objective: float = np.inf  # the objective near the start, when a cheaper phase measured it
    report: Callable[[IterationReport], None] | None = None
    phase: str = "full data"


Steps = Generator[tuple[np.ndarray, list[int]], PassResult, NewtonResult]


class NewtonRun:
    """One Newton run as a generator (:meth:`steps`): it yields ``(beta, active)`` and is sent that scan.

    Written so that one query can serve many runs at once (one per segment, or per cross-validation fold),
    each keeping its own state; :func:`solve` drives a single one and :class:`Stepper` one scan at a time.
    ``first`` is a scan already run at ``start``: it is used without a pass being counted.
    """

    def __init__(
        self, objective: Objective, start: np.ndarray, rules: NewtonRules, first: PassResult | None = None
    ) -> None:
        self.objective, self.rules, self.first = objective, rules, first
        self.beta = np.asarray(start, dtype=float).copy()
        self.active = list(range(len(self.beta)))
        self.aliased: list[int] = []
        self.fallback = rules.fallback_start
        self.set_up_done = first is not None
        self.accepted_beta: np.ndarray | None = None  # the last accepted point, its scan and its objective
        self.accepted_scan: PassResult | None = None
        self.accepted_value = rules.start_objective
        self.accepted = False  # whether the last scan sent was accepted (not halved, not a restart)
        self.passes = self.halvings = 0
        self.converged = self.separation = self.stopped = False
        self.suspects: list[int] = []
        self.step_history: list[float] = []
        self.began = time.perf_counter()

    def steps(self) -> Steps:
        """The passes, each running the steps below in order; returns the :class:`NewtonResult`."""
        scan, self.first = self.first, None
        while True:
            if scan is None:
                if self.passes >= self.rules.max_passes:
                    break
                self.passes += 1
                scan = yield self.beta, self.active
            self.accepted = False
            value = self.objective.value(self.beta, scan)
            if not self.set_up_done:
                scan = self.set_up(scan, value)
                if scan is None:
                    continue
            if not np.isfinite(value):
                raise FloatingPointError("the deviance is not finite")
            verdict = self.line_search(value)
            if verdict == "halve":
                scan = None
                continue
            if verdict == "stop":
                self.stopped = True
                break
            change = self._change(value)
            self._accept(scan, value)
            step = self.objective.inner_solve(self.beta, scan)
            step_size = float(np.max(np.abs(step))) if step.size else 0.0
            self._report(self.passes, value, step_size)
            if self.converged_at(change, step_size):
                yield from self.finish(step)
                break
            if self.diverging(change, step, step_size, scan):
                break
            self.beta = self.beta + step
            scan = None
        return self.result()

    # The steps, in the order they run.

    def set_up(self, scan: PassResult, value: float) -> PassResult | None:
        """First pass: None to start again from the fallback start when every row is fitted at 0 or 1;
        otherwise the scan without the aliased columns, which leave the model."""
        rules = self.rules
        if self.fallback is not None and _weights_collapsed(scan, rules.weight_total):
            self._report(self.passes + 1, value, float("nan"))
            self.beta, self.fallback = self.fallback[: len(self.active)].copy(), None
            self.passes = 0
            return None
        self.set_up_done = True
        dropped = aliased_columns(scan.gram, rules.protected) if rules.check_aliasing else []
        if not dropped:
            return scan
        keep = [k for k in range(len(self.active)) if k not in dropped]
        self.aliased = [self.active[k] for k in dropped]
        self.active = [self.active[k] for k in keep]
        self.beta = self.beta[keep]
        return scan.restricted(keep)

    def line_search(self, value: float) -> Literal["accept", "halve", "stop"]:
        """Step-halving: a point whose objective rose is moved halfway back to the last accepted point
        ("halve": scan again), up to MAX_HALVINGS times; under ``stop_on_rise`` the run ends instead."""
        if self.accepted_beta is None or not _rose(value, self.accepted_value):
            return "accept"
        if self.rules.stop_on_rise:
            return "stop"
        if self.halvings >= MAX_HALVINGS:
            return "accept"
        self.halvings += 1
        self.beta = 0.5 * (self.beta + self.accepted_beta)
        self._report(self.passes + 1, value, float("nan"), halving=True)
        return "halve"

    def converged_at(self, change: float, step_size: float) -> bool:
        """A small relative change of the objective with a small step, or a negligible step."""
        rules = self.rules
        return (change < rules.tol and step_size < rules.step_tolerance) or step_size < rules.step_floor

    def diverging(self, change: float, step: np.ndarray, step_size: float, scan: PassResult) -> bool:
        """Separation: steps that stop shrinking (see :func:`_diverging`); records the suspect parameters."""
        self.step_history.append(step_size)
        if not (self.rules.detect_separation and _diverging(self.step_history, change, scan)):
            return False
        self.separation = True
        top = np.max(np.abs(step))
        self.suspects = [self.active[k] for k in range(len(step)) if abs(step[k]) >= 0.25 * top]
        return True

    def finish(self, step: np.ndarray) -> Generator[tuple[np.ndarray, list[int]], PassResult, None]:
        """Take the converged step; confirm it by a scan at the estimate, kept unless the objective rose (the
        step then only added rounding); under ``polish_below``, plain steps until one is that small."""
        self.converged = True
        self.beta = self.beta + step
        if not self.rules.confirm or (step.size == 0 or np.max(np.abs(step)) <= self.rules.confirm_above):
            return
        scan = yield self.beta, self.active  # not a pass: it only measures the estimate
        value = self.objective.value(self.beta, scan)
        if _rose(value, self.accepted_value):
            assert self.accepted_beta is not None
            self.beta = self.accepted_beta
        else:
            self._accept(scan, value)
        if self.rules.polish_below is not None:
            yield from self.polish(self.rules.polish_below)

    def polish(self, goal: float) -> Generator[tuple[np.ndarray, list[int]], PassResult, None]:
        """Plain steps from the accepted point until one is below ``goal`` (not converged if none is)."""
        small = False
        while self.passes < self.rules.max_passes:
            assert self.accepted_scan is not None
            step = self.objective.inner_solve(self.beta, self.accepted_scan)
            self.beta = self.beta + step
            small = float(np.max(np.abs(step))) < goal if step.size else True
            if small:
                break
            self.passes += 1
            scan = yield self.beta, self.active
            self._accept(scan, self.objective.value(self.beta, scan))
        self.converged = small

    def result(self) -> NewtonResult:
        """The estimate (the last accepted point when the run stopped on a rise) and the separation check of a
        converged fit."""
        last = self.accepted_scan
        if last is None or self.accepted_beta is None:
            raise ValueError("max_iter must be at least 1")
        if (
            self.rules.detect_separation
            and self.converged
            and last.extreme > 0
            and last.misfit_extreme == 0
            and _some_rows_perfect(last)
        ):
            self.separation = True
        return NewtonResult(
            beta=self.accepted_beta if self.stopped else self.beta,
            active=self.active,
            aliased=self.aliased,
            last=last,
            iterations=self.passes,
            converged=self.converged and not self.separation,
            separation=self.separation,
            suspects=self.suspects,
            scanned=self.accepted_beta,
            objective=self.accepted_value,
        )

    def _accept(self, scan: PassResult, value: float) -> None:
        self.halvings, self.accepted = 0, True
        self.accepted_beta, self.accepted_scan, self.accepted_value = self.beta, scan, value

    def _change(self, value: float) -> float:
        previous = self.accepted_value
        return abs(previous - value) / (abs(value) + 0.1) if np.isfinite(previous) else np.inf

    def _report(self, iteration: int, value: float, step_size: float, halving: bool = False) -> None:
        if self.rules.report:
            self.rules.report(
                IterationReport(
                    iteration,
                    value,
                    time.perf_counter() - self.began,
                    step_size,
                    halving=halving,
                    phase=self.rules.phase,
                )
            )


def solve(run: NewtonRun, evaluate: Callable[[np.ndarray, list[int]], PassResult]) -> NewtonResult:
    """Drive one run to its end; ``evaluate(beta, active)`` runs one scan at ``beta``."""
    steps = run.steps()
    try:
        request = next(steps)
        while True:
            request = steps.send(evaluate(*request))
    except StopIteration as finished:
        result: NewtonResult = finished.value
        return result


class Stepper:
    """One run driven a scan at a time: :meth:`wanted` names the point to scan next (None at the end),
    :meth:`take` is given its scan and says whether the point was accepted (False: halved, scan again).

    Driving runs this way lets several of them (the folds of a cross-validation) share each scan.
    """

    def __init__(self, run: NewtonRun) -> None:
        self.run = run
        self._steps = run.steps()
        self._result: NewtonResult | None = None
        self._pending = self._advance(None)

    def _advance(self, scan: PassResult | None) -> np.ndarray | None:
        try:
            beta, _ = self._steps.send(scan) if scan is not None else next(self._steps)
            return beta
        except StopIteration as finished:
            self._result = finished.value
            return None

    def wanted(self) -> np.ndarray | None:
        return self._pending

    def take(self, scan: PassResult) -> bool:
        self._pending = self._advance(scan)
        return self.run.accepted

    def result(self) -> NewtonResult:
        assert self._result is not None
        return self._result


def aliased_columns(gram: Information, protected: int = 0) -> list[int]:
    """Indices of columns that are (numerically) linear combinations of earlier columns.

    Sequential Cholesky on the correlation-scaled Gram: a later column of an exactly collinear set is the
    one dropped, as in a pivot-free QR. The first ``protected`` columns (the intercept) are never dropped.
    For block information the check runs on the Schur complement: a dense column that the levels explain
    is aliased; the levels themselves always carry weight.
    """
    matrix = gram.aliasing_matrix()
    diagonal = np.diag(matrix).copy()
    if _clearly_full_rank(matrix, diagonal):
        return []
    keep: list[int] = []
    aliased: list[int] = []
    for j in range(matrix.shape[0]):
        if diagonal[j] <= 0 and j >= protected:
            aliased.append(j)
            continue
        if keep:
            cross = matrix[keep, j]
            try:
                residual = matrix[j, j] - cross @ np.linalg.solve(matrix[np.ix_(keep, keep)], cross)
            except np.linalg.LinAlgError:
                residual = 0.0
        else:
            residual = matrix[j, j]
        if j >= protected and residual <= ALIAS_TOLERANCE * matrix[j, j]:
            aliased.append(j)
        else:
            keep.append(j)
    return aliased


def _clearly_full_rank(matrix: np.ndarray, diagonal: np.ndarray) -> bool:
    """Whether no column is aliased, from one Cholesky factorisation: the square of its j-th pivot is the
    residual the sequential check computes for column j with every earlier column kept (Golub and Van Loan
    2013, Matrix Computations, 4th ed., section 4.2). Pivots within a factor of two of the tolerance go to
    the sequential check, so the two never decide differently through rounding."""
    if not matrix.size or not np.all(diagonal > 0):
        return False
    try:
        pivots = np.diag(np.linalg.cholesky(matrix))
    except np.linalg.LinAlgError:
        return False
    return bool(np.all(pivots * pivots > 2.0 * ALIAS_TOLERANCE * diagonal))


def _rose(value: float, reference: float) -> bool:
    """The objective rose beyond rounding in the sums."""
    return not value <= reference + RISE_TOLERANCE * (abs(reference) + 1.0)


def _weights_collapsed(result: PassResult, weight_total: float) -> bool:
    diagonal = result.gram.diag()
    return bool(diagonal.size) and float(diagonal.max()) < COLLAPSED_WEIGHT * weight_total


def _diverging(steps: list[float], change: float, result: PassResult) -> bool:
    """Steps that stop shrinking while the deviance settles and rows sit at fitted 0 or 1.

    Under separation the likelihood keeps rising along a direction without bound: Newton's steps stay of
    the same size while the deviance changes less and less (Albert and Anderson 1984).
    """
    if len(steps) < 6 or result.extreme <= 0 or result.misfit_extreme > 0 or change > SEPARATION_CHANGE:
        return False
    recent = steps[-3:]
    return all(later > 0.5 * earlier for earlier, later in zip(recent, recent[1:]))


def _some_rows_perfect(result: PassResult) -> bool:
    """Converged yet some rows fitted exactly: flagged only when the information matrix is near singular."""
    eigenvalues = result.gram.eigenvalues()
    return bool(eigenvalues.min() <= SINGULAR_RATIO * max(eigenvalues.max(), 1e-300))
