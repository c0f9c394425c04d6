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

from dbfit.statsquery import PassResult

STEP_TOLERANCE = 1e-10  # largest change of a coefficient (internal scale) accepted at convergence
SWEEP_TOLERANCE = 1e-15
MAX_SWEEPS = 100_000
MAX_HALVINGS = 30


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


def penalised_newton(
    evaluate: Callable[[np.ndarray], PassResult],
    start: np.ndarray,
    penalty: Penalty,
    trials: float,
    max_iter: int,
    first: PassResult | None = None,
) -> PenalisedResult:
    """Minimise F from ``start``; ``first`` is a scan already run at ``start`` (saves one)."""
    beta = start.copy()
    current = first if first is not None else evaluate(beta)
    passes = 0 if first is not None else 1
    objective = -current.loglik / trials + penalty.value(beta)
    while passes < max_iter:
        proposal = coordinate_descent(current.gram / trials, (current.score + current.gram @ beta) / trials, beta, penalty)
        if np.max(np.abs(proposal - beta), initial=0.0) < STEP_TOLERANCE:
            return PenalisedResult(proposal, current, beta, passes, True)
        for _ in range(MAX_HALVINGS):
            trial = evaluate(proposal)
            passes += 1
            trial_objective = -trial.loglik / trials + penalty.value(proposal)
            if trial_objective <= objective + 1e-15 * (abs(objective) + 1.0) or passes >= max_iter:
                break
            proposal = 0.5 * (beta + proposal)
        beta, current, objective = proposal, trial, trial_objective
    return PenalisedResult(beta, current, beta, passes, False)
