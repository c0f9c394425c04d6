"""Penalised Newton passes: coordinate descent on the quadratic approximation each scan returns.

Objective on the internal (standardised) scale, with N the weighted number of trials:
    F(b) = -l(b) / N + shrinkage * [(1 - l1_share) / 2 * sum_j b_j^2 + l1_share * sum_j |b_j|],
the intercept never penalised. A scan at b gives the information G, the score g and l(b); the quadratic
approximation 1/2 b'Qb - c'b with Q = G / N, c = (g + G b) / N plus the penalty is minimised by cyclic
coordinate descent with soft-thresholding (Friedman, Hastie and Tibshirani 2010, "Regularization paths for
generalized linear models via coordinate descent", J. Statistical Software 33(1), doi:10.18637/jss.v033.i01),
so a coefficient the L1 part removes is exactly zero. A proposal that raises F is halved towards the last
accepted point, one scan per try.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from dbfit.solver.information import PassResult

STEP_TOLERANCE = 1e-10  # largest change of a coefficient (internal scale) accepted at convergence
SWEEP_TOLERANCE = 1e-15
MAX_SWEEPS = 100_000
MAX_HALVINGS = 30
RISE_TOLERANCE = 1e-12  # relative rise of the objective taken as rounding in the sums (as in dbfit.solver.newton)


@dataclass(frozen=True)
class Penalty:
    shrinkage: float
    l1_share: float
    penalised: np.ndarray  # boolean mask over the parameters: False for the intercept

    def value(self, beta: np.ndarray) -> float:
        b = beta[self.penalised]
        if not b.any():
            return 0.0
        return self.shrinkage * ((1.0 - self.l1_share) / 2.0 * float(b @ b) + self.l1_share * float(np.abs(b).sum()))


@dataclass
class PenalisedResult:
    beta: np.ndarray
    last: PassResult  # the scan at the last accepted point ``scanned``
    scanned: np.ndarray
    passes: int
    converged: bool


def coordinate_descent(q: np.ndarray, c: np.ndarray, start: np.ndarray, penalty: Penalty) -> np.ndarray:
    """Minimise 1/2 b'qb - c'b + penalty(b) by cyclic coordinate updates with soft-thresholding."""
    beta = start.copy()
    l1 = penalty.shrinkage * penalty.l1_share
    l2 = penalty.shrinkage * (1.0 - penalty.l1_share)
    fitted = q @ beta
    for _ in range(MAX_SWEEPS):
        largest = 0.0
        for j in range(beta.size):
            partial = c[j] - fitted[j] + q[j, j] * beta[j]
            if penalty.penalised[j] and math.isinf(penalty.shrinkage):
                updated = 0.0
            elif penalty.penalised[j]:
                updated = np.sign(partial) * max(abs(partial) - l1, 0.0) / (q[j, j] + l2)
            else:
                updated = partial / q[j, j]
            change = updated - beta[j]
            if change != 0.0:
                fitted += q[:, j] * change
                beta[j] = updated
                largest = max(largest, abs(change))
        if largest < SWEEP_TOLERANCE * (1.0 + np.max(np.abs(beta))):
            break
    return beta


class PenalisedSolver:
    """One penalised fit driven scan by scan: :meth:`wanted` names the point to scan next, :meth:`take` its scan.

    Driving fits this way lets several of them (the folds of a cross-validation) share each scan.
    """

    def __init__(self, start: np.ndarray, penalty: Penalty, trials: float, max_iter: int,
                 first: PassResult | None = None) -> None:
        self.penalty, self.trials, self.max_iter = penalty, trials, max_iter
        self.beta = start.copy()
        self.current: PassResult | None = None
        self.objective = math.inf
        self.pending: np.ndarray | None = self.beta
        self.final: np.ndarray | None = None
        self.passes = self.halvings = 0
        self.converged = False
        if first is not None:
            self.current, self.objective = first, self._objective(first, self.beta)
            self._propose()

    def _objective(self, scan: PassResult, beta: np.ndarray) -> float:
        return -scan.loglik / self.trials + self.penalty.value(beta)

    def _propose(self) -> None:
        assert self.current is not None
        self.pending, self.halvings = None, 0
        if self.passes >= self.max_iter:
            self.final = self.beta
            return
        gram, score = self.current.gram, self.current.score
        proposal = coordinate_descent(gram / self.trials, (score + gram @ self.beta) / self.trials, self.beta, self.penalty)
        if np.max(np.abs(proposal - self.beta), initial=0.0) < STEP_TOLERANCE:
            self.final, self.converged = proposal, True
        else:
            self.pending = proposal

    def wanted(self) -> np.ndarray | None:
        return self.pending

    def take(self, scan: PassResult) -> bool:
        """Use the scan at :meth:`wanted`; True when the point is accepted (False: halved, scan again)."""
        assert self.pending is not None
        self.passes += 1
        if self.current is None:
            self.current, self.objective = scan, self._objective(scan, self.beta)
            self._propose()
            return True
        objective = self._objective(scan, self.pending)
        if objective <= self.objective + RISE_TOLERANCE * (abs(self.objective) + 1.0) or self.halvings >= MAX_HALVINGS \
                or self.passes >= self.max_iter:
            self.beta, self.current, self.objective = self.pending, scan, objective
            self._propose()
            return True
        self.pending, self.halvings = 0.5 * (self.beta + self.pending), self.halvings + 1
        return False

    def result(self) -> PenalisedResult:
        assert self.final is not None and self.current is not None
        return PenalisedResult(self.final, self.current, self.beta, self.passes, self.converged)


def penalised_newton(
    evaluate: Callable[[np.ndarray], PassResult],
    start: np.ndarray,
    penalty: Penalty,
    trials: float,
    max_iter: int,
    first: PassResult | None = None,
) -> PenalisedResult:
    """Minimise F from ``start``; ``first`` is a scan already run at ``start`` (saves one)."""
    solver = PenalisedSolver(start, penalty, trials, max_iter, first)
    while (point := solver.wanted()) is not None:
        solver.take(evaluate(point))
    return solver.result()
