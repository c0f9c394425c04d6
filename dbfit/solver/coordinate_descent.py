"""Penalised Newton passes: coordinate descent on the quadratic approximation each scan returns.

Objective on the internal (standardised) scale, with N the weighted number of trials:
    F(b) = -l(b) / N + shrinkage * [(1 - l1_share) / 2 * sum_j b_j^2 + l1_share * sum_j |b_j|],
the intercept never penalised. A scan at b gives the information G, the score g and l(b); the quadratic
approximation 1/2 b'Qb - c'b with Q = G / N, c = (g + G b) / N plus the penalty is minimised by cyclic
coordinate descent with soft-thresholding (Friedman, Hastie and Tibshirani 2010, "Regularization paths for
generalized linear models via coordinate descent", J. Statistical Software 33(1), doi:10.18637/jss.v033.i01),
so a coefficient the L1 part removes is exactly zero. Coordinate descent is the inner solve of a penalised
Newton pass (:class:`PenalisedObjective`); the passes themselves, with their step-halving, are those of
:class:`dbfit.solver.newton.NewtonRun`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from dbfit.solver.information import PassResult
from dbfit.solver.newton import NewtonRules, NewtonRun
from dbfit.solver.tolerances import FINAL_STEP, MAX_SWEEPS, SWEEP_TOLERANCE


@dataclass(frozen=True)
class Penalty:
    shrinkage: float
    l1_share: float
    penalised: np.ndarray  # boolean mask over the parameters: False for the intercept

    def value(self, beta: np.ndarray) -> float:
        b = beta[self.penalised]
        if not b.any():
            return 0.0
        return self.shrinkage * (
            (1.0 - self.l1_share) / 2.0 * float(b @ b) + self.l1_share * float(np.abs(b).sum())
        )


@dataclass(frozen=True)
class PenalisedObjective:
    """F(b) = -l(b) / N + penalty(b); its inner solve minimises the quadratic model plus the penalty."""

    penalty: Penalty
    trials: float  # N, the weighted number of trials

    def value(self, beta: np.ndarray, scan: PassResult) -> float:
        return -scan.loglik / self.trials + self.penalty.value(beta)

    def inner_solve(self, beta: np.ndarray, scan: PassResult) -> np.ndarray:
        gram = scan.gram.as_array()
        linear = (scan.score + gram @ beta) / self.trials
        proposal = coordinate_descent(gram / self.trials, linear, beta, self.penalty)
        step: np.ndarray = proposal - beta
        return step


def penalised_run(
    start: np.ndarray, penalty: Penalty, trials: float, max_iter: int, first: PassResult | None = None
) -> NewtonRun:
    """The Newton run minimising F from ``start``; ``first`` is a scan already run at ``start`` (saves one).

    Converged when coordinate descent moves no coefficient by FINAL_STEP; the estimate is that last proposal
    (no confirming scan: its change is below any rounding of the sums).
    """
    rules = NewtonRules(
        max_passes=max_iter,
        tol=0.0,
        step_floor=FINAL_STEP,
        confirm=False,
        check_aliasing=False,
        detect_separation=False,
    )
    return NewtonRun(PenalisedObjective(penalty, trials), start, rules, first)


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
