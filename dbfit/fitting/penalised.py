"""Ridge and elastic-net fits: one shrinkage, or a path over a grid chosen by k-fold cross-validated deviance.

The penalty lives on the internal standardised scale (see :mod:`dbfit.solver.coordinate_descent`); every Newton pass is one
scan. A grid is walked from the largest shrinkage down with warm starts (Friedman, Hastie and Tibshirani 2010,
J. Statistical Software 33(1), doi:10.18637/jss.v033.i01). Under cross-validation the k fold fits and the fit on
all rows walk the grid together and share each scan (:mod:`dbfit.fitting.folds`), which also returns each fold's
held-out log-likelihood, so the folds add width to the scans, not scans.
The chosen shrinkage minimises the cross-validated deviance -2 sum_k l_k(b_-k) (Hastie, Tibshirani and
Friedman 2009, The Elements of Statistical Learning, 2nd ed., section 7.10). An automatic grid whose least
deviance falls on its weakest value is walked on down, a decade at a time, until the least deviance lies
inside it or the strength reaches 0; a choice at either end of the grid is reported in the warnings.
"""

from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
from sqlglot import exp

from dbfit.design.layout import Design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import FitError
from dbfit.fitting import splits
from dbfit.fitting.folds import FoldFit, FoldPass, fold_scan
from dbfit.model import inference
from dbfit.model.fitted import Model
from dbfit.solver.coordinate_descent import Penalty, penalised_run
from dbfit.solver.information import PassResult
from dbfit.solver.newton import IterationReport, NewtonResult, Stepper, aliased_columns, solve

GRID_POINTS = 12
RIDGE_TOP_SHARE = 1e-3  # the top of a ridge grid is placed as for an L1 share of 1e-3 (common practice)
FLOOR_SHARE = 1e-9  # an automatic grid extended downwards ends with 0 once below this share of its top

Evaluate = Callable[[list[int], np.ndarray], PassResult]


@dataclasses.dataclass(frozen=True)
class PenaltyRequest:
    shrinkage: float | tuple[float, ...] | str
    l1_share: float
    folds: int
    split_key: str | None

    @property
    def cross_validated(self) -> bool:
        return not isinstance(self.shrinkage, float)


@dataclasses.dataclass
class PathPoint:
    shrinkage: float
    cv_deviance: float | None = None


@dataclasses.dataclass
class PenalisedFit:
    newton: NewtonResult  # positions into the fitted parameters, as the core's result
    penalty: Penalty
    path: list[PathPoint]
    passes: int
    chosen: int | None = None
    unconverged: int = 0  # path points of the fold fits that stopped at max_iter


def check_request(shrinkage: Any, l1_share: Any, folds: Any, split_key: str | None) -> PenaltyRequest | None:
    """Validate the penalty options; None when no penalty is asked for."""
    if shrinkage is None:
        if split_key is not None:
            raise FitError(
                "split_key is only used to cross-validate a shrinkage grid; give shrinkage='cv' or a list"
            )
        return None
    if isinstance(l1_share, bool) or not isinstance(l1_share, (int, float)) or not 0 <= l1_share <= 1:
        raise FitError(f"l1_share must be between 0 (ridge) and 1 (pure L1) (got {l1_share!r})")
    if isinstance(folds, bool) or not isinstance(folds, int) or folds < 2:
        raise FitError(f"folds must be a whole number of at least 2 (got {folds!r})")
    value: float | tuple[float, ...] | str
    if isinstance(shrinkage, str):
        if shrinkage != "cv":
            raise FitError(
                f"shrinkage must be a number >= 0, a list of numbers > 0, or 'cv' (got {shrinkage!r})"
            )
        value = "cv"
    elif isinstance(shrinkage, (int, float)) and not isinstance(shrinkage, bool):
        if not (math.isfinite(shrinkage) and shrinkage >= 0):
            raise FitError(f"shrinkage must be finite and >= 0 (got {shrinkage!r})")
        value = float(shrinkage)
    elif (
        isinstance(shrinkage, Sequence)
        and shrinkage
        and all(
            isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) and v > 0
            for v in shrinkage
        )
    ):
        value = tuple(sorted({float(v) for v in shrinkage}, reverse=True))
    else:
        raise FitError(
            f"shrinkage must be a number >= 0, a non-empty list of numbers > 0, or 'cv' (got {shrinkage!r})"
        )
    if isinstance(value, float) and split_key is not None:
        raise FitError(
            "split_key is only used to cross-validate a shrinkage grid; give shrinkage='cv' or a list"
        )
    return PenaltyRequest(value, float(l1_share), folds, split_key)


def fit_penalised(
    engine: DuckDBEngine,
    design: Design,
    evaluate: Evaluate,
    start: np.ndarray,
    fitted: list[int],
    request: PenaltyRequest,
    max_iter: int,
    report: Callable[[IterationReport], None] | None = None,
) -> PenalisedFit:
    """Fit at one shrinkage, or cross-validate a grid and refit along it on all rows.

    ``report`` receives one :class:`IterationReport` per scan, with the deviance of the fit on all rows
    (NaN for a shared scan the fit on all rows did not need).
    """
    on_scan = _scan_reporter(report, design.saturated_loglik)
    protected = 1 if design.intercept else 0
    first = evaluate(fitted, start)
    on_scan(first.loglik)
    dropped = aliased_columns(first.gram, protected)
    keep = [k for k in range(len(fitted)) if k not in dropped]
    parameters = [fitted[k] for k in keep]
    first = first.restricted(keep)
    mask = np.array([not (design.intercept and k == 0) for k in parameters])
    if not mask.any():
        raise FitError("shrinkage needs at least one term besides the intercept to penalise")

    def scan_once(beta: np.ndarray, _active: list[int]) -> PassResult:
        result = evaluate(parameters, beta)
        on_scan(result.loglik)
        return result

    def run(beginning: np.ndarray, shrinkage: float, scan: PassResult | None) -> tuple[NewtonResult, Penalty]:
        penalty = Penalty(shrinkage, request.l1_share, mask)
        return solve(penalised_run(beginning, penalty, design.trial_sum, max_iter, scan), scan_once), penalty

    start = start[keep]
    if not request.cross_validated:
        result, penalty = run(start, float(request.shrinkage), first)  # type: ignore[arg-type]
        passes = result.iterations + 1
        return PenalisedFit(
            _as_newton(result, keep, dropped, passes), penalty, [PathPoint(penalty.shrinkage)], passes
        )

    null, _ = run(start, math.inf, first)
    passes = null.iterations + 1
    grid = _grid(request, null, mask, design.trial_sum, len(parameters))
    fold = splits.fold_expression(design, request.split_key, request.folds)
    sizes = splits.fold_sizes(engine, design, fold, request.folds)
    settings = (grid, request.l1_share, mask, max_iter)
    runners = [PathRunner(*settings, design.trial_sum, None, null.scanned, null.last)] + [
        PathRunner(*settings, design.trial_sum - sizes.trials[k], k, null.scanned)
        for k in range(request.folds)
    ]
    passes += walk_together(engine, design, parameters, fold, runners, on_scan)
    deviance = -2.0 * np.sum([runner.held_out_logliks for runner in runners[1:]], axis=0)
    chosen = int(np.argmin(deviance))
    while request.shrinkage == "cv" and chosen == len(grid) - 1 and grid[-1] > 0.0:
        # The deviance is still falling at the weak end: walk on down (the runners share ``grid``).
        grid.extend(_weaker(grid))
        passes += walk_together(engine, design, parameters, fold, runners, on_scan)
        deviance = -2.0 * np.sum([runner.held_out_logliks for runner in runners[1:]], axis=0)
        chosen = int(np.argmin(deviance))
    result = runners[0].solutions[chosen]
    path = [PathPoint(s, float(d)) for s, d in zip(grid, deviance)]
    unconverged = sum(not point.converged for runner in runners[1:] for point in runner.solutions)
    return PenalisedFit(
        _as_newton(result, keep, dropped, passes),
        Penalty(grid[chosen], request.l1_share, mask),
        path,
        passes,
        chosen,
        unconverged,
    )


class PathRunner:
    """Walks one fit down the grid; each point starts from the last scan of the one before (warm start)."""

    def __init__(
        self,
        grid: list[float],
        l1_share: float,
        mask: np.ndarray,
        max_iter: int,
        trials: float,
        held_out: int | None,
        start: np.ndarray,
        first: PassResult | None = None,
    ) -> None:
        self.grid, self.l1_share, self.mask, self.max_iter, self.trials = (
            grid,
            l1_share,
            mask,
            max_iter,
            trials,
        )
        self.held_out = held_out
        self.solutions: list[NewtonResult] = []
        self.held_out_logliks: list[float] = []
        self._held_out_now = 0.0  # held-out log-likelihood at the solver's last accepted point
        self.solver: Stepper | None = Stepper(
            penalised_run(start, Penalty(grid[0], l1_share, mask), trials, max_iter, first)
        )

    def wanted(self) -> np.ndarray | None:
        """The point to scan next, or None at the end of the grid (which may grow: see :func:`_weaker`)."""
        while len(self.solutions) < len(self.grid):
            if self.solver is None:
                last = self.solutions[-1]
                penalty = Penalty(self.grid[len(self.solutions)], self.l1_share, self.mask)
                run = penalised_run(last.scanned, penalty, self.trials, self.max_iter, last.last)
                self.solver = Stepper(run)
            point = self.solver.wanted()
            if point is not None:
                return point
            self.solutions.append(self.solver.result())
            self.held_out_logliks.append(self._held_out_now)
            self.solver = None
        return None

    def take(self, scan: FoldPass) -> None:
        assert self.solver is not None
        if self.solver.take(scan.result):
            self._held_out_now = scan.held_out_loglik


def walk_together(
    engine: DuckDBEngine,
    design: Design,
    parameters: list[int],
    fold: exp.Expression,
    runners: list[PathRunner],
    on_scan: Callable[[float], None],
) -> int:
    """Drive all runners to the end of the grid, one shared scan per pass; returns the number of scans."""
    scans = 0
    while True:
        wanted = [(runner, point) for runner in runners if (point := runner.wanted()) is not None]
        if not wanted:
            return scans
        results = fold_scan(
            engine, design, parameters, fold, [FoldFit(runner.held_out, point) for runner, point in wanted]
        )
        scans += 1
        on_scan(results[0].result.loglik if wanted[0][0] is runners[0] else math.nan)
        for (runner, _), result in zip(wanted, results):
            runner.take(result)


def _scan_reporter(
    report: Callable[[IterationReport], None] | None, saturated_loglik: float
) -> Callable[[float], None]:
    began, count = time.perf_counter(), [0]

    def on_scan(loglik: float) -> None:
        count[0] += 1
        if report is not None:
            report(
                IterationReport(
                    count[0], 2.0 * (saturated_loglik - loglik), time.perf_counter() - began, math.nan
                )
            )

    return on_scan


def _grid(
    request: PenaltyRequest, null: NewtonResult, mask: np.ndarray, trials: float, size: int
) -> list[float]:
    if request.shrinkage != "cv":
        return list(request.shrinkage)  # type: ignore[arg-type]
    top = float(np.max(np.abs(null.last.score[mask]))) / (trials * max(request.l1_share, RIDGE_TOP_SHARE))
    ratio = 1e-3 if trials > size else 1e-2
    return [float(v) for v in top * ratio ** np.linspace(0.0, 1.0, GRID_POINTS)]


def _weaker(grid: list[float]) -> list[float]:
    """About a decade of strengths below the end of an automatic grid, in its own spacing; once below
    ``FLOOR_SHARE`` of the top, the last value is 0 (no penalty)."""
    spacing = grid[1] / grid[0]
    count = math.ceil(math.log(0.1) / math.log(spacing))
    values = [grid[-1] * spacing**k for k in range(1, count + 1)]
    kept = [v for v in values if v >= grid[0] * FLOOR_SHARE]
    return kept if len(kept) == len(values) else kept + [0.0]


def _as_newton(result: NewtonResult, keep: list[int], dropped: list[int], passes: int) -> NewtonResult:
    return dataclasses.replace(result, active=keep, aliased=dropped, iterations=passes)


def effective_df(gram: np.ndarray, beta: np.ndarray, penalty: Penalty, trials: float) -> float:
    """tr[(G_A + N l2 D_A)^-1 G_A] over the non-zero coefficients A (Hastie, Tibshirani and Friedman 2009, section
    3.4.1, equation number 3.50 from memory; Zou, Hastie and Tibshirani 2007, doi:10.1214/009053607000000127, for
    the L1 part)."""
    nonzero = np.flatnonzero(beta != 0.0)
    if nonzero.size == 0:
        return 0.0
    sub = gram[np.ix_(nonzero, nonzero)]
    ridge = (
        trials
        * penalty.shrinkage
        * (1.0 - penalty.l1_share)
        * np.diag(penalty.penalised[nonzero].astype(float))
    )
    return float(np.trace(np.linalg.solve(sub + ridge, sub)))


def annotate(model: Model, fit: PenalisedFit, request: PenaltyRequest) -> Model:
    """Penalised estimates carry no Wald standard errors; record the penalty, the path and the exact zeros."""
    covariance = np.full_like(model.covariance, np.nan)
    design = model.design
    zeros = [
        label
        for k, (label, value) in enumerate(zip(model.labels, model.estimates))
        if value == 0.0 and not (design.intercept and k == 0)
    ]
    df = effective_df(fit.newton.last.gram.as_array(), fit.newton.beta, fit.penalty, design.trial_sum)
    stats = dict(model.stats)
    rows = design.rows_informative
    aic, bic = inference.information_criteria(stats["log_likelihood"], 0, rows)
    stats.update(
        shrinkage=fit.penalty.shrinkage,
        l1_share=fit.penalty.l1_share,
        effective_df=df,
        exact_zeros=zeros,
        aic=aic + 2.0 * df,
        bic=bic + math.log(rows) * df,
        df_residual=round(rows - df, 3),
        passes=fit.passes,
        path=[{"shrinkage": p.shrinkage, "cv_deviance": p.cv_deviance} for p in fit.path],
    )
    kind = (
        "ridge"
        if fit.penalty.l1_share == 0
        else ("L1 (lasso)" if fit.penalty.l1_share == 1 else "elastic net")
    )
    how = (
        f", chosen by {request.folds}-fold cross-validated deviance over {len(fit.path)} values"
        if fit.chosen is not None
        else ""
    )
    stats["notes"] = [
        *stats.get("notes", []),
        f"penalty   {kind} on the standardised scale, shrinkage {fit.penalty.shrinkage:.6g}{how}; "
        f"L1 share {fit.penalty.l1_share:g}; effective df {df:.3f}; {len(zeros)} coefficient(s) exactly 0; "
        "no Wald standard errors for penalised estimates",
    ]
    warnings = list(model.warnings)
    if fit.chosen is not None and len(fit.path) > 1 and fit.chosen in (0, len(fit.path) - 1):
        end = "strongest" if fit.chosen == 0 else "weakest"
        beyond = fit.penalty.shrinkage > 0 or fit.chosen == 0
        warnings.append(
            f"shrinkage at the end of the grid: the cross-validated deviance is least at the {end} value "
            f"tried, {fit.penalty.shrinkage:.6g}; "
            + (
                "the best strength may lie beyond it: widen the grid"
                if beyond
                else "the data need no penalty (the estimates are the maximum-likelihood ones)"
            )
        )
    if fit.unconverged:
        warnings.append(
            f"not converged: {fit.unconverged} fold fit(s) along the path stopped after max_iter passes; "
            "their held-out deviance is approximate: raise max_iter"
        )
    return dataclasses.replace(
        model,
        covariance=covariance,
        coefficients=inference.coefficient_table(model.labels, model.estimates, covariance),
        stats=stats,
        warnings=warnings,
        options={
            **model.options,
            "shrinkage": request.shrinkage,
            "l1_share": request.l1_share,
            "folds": request.folds if request.cross_validated else None,
            "split_key": request.split_key,
        },
    )
