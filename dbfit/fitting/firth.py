"""Firth's bias-reduced logistic regression, with the hat values computed inside the database.

Firth (1993), "Bias reduction of maximum likelihood estimates", Biometrika 80(1), 27-38,
doi:10.1093/biomet/80.1.27: maximise l*(b) = l(b) + 1/2 log|I(b)|. Its score is
U*_j = sum_i [r_i + h_i (1/2 - mu_i)] z_ij with the hat values h_i = wt_i z_i' I^-1 z_i (Heinze and Schemper
2002, Statistics in Medicine 21(16), 2409-2419, doi:10.1002/sim.1047). Estimates are finite even under complete
separation. Each Newton pass runs two scans: the core statistics query gives I(b), l(b) and the score; then a
second query, with I(b)^-1 written in as constants, sums h_i (1/2 - mu_i) z_i and the second and third
moments that give the negative Hessian of l* (:func:`penalised_information`), the matrix of the Newton step
(for many parameters a secant estimate of it, :class:`SecantCurvature`). These are the evaluate and
inner-solve variant of the one Newton run (:class:`dbfit.solver.newton.NewtonRun`): step-halving and the
stopping rule follow l* itself, and the converged steps are polished until below FINAL_STEP (:func:`rules`).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable

import numpy as np
from sqlglot import exp

from dbfit.design.layout import Design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import FitError
from dbfit.expressions import builders as sb
from dbfit.fitting.rowterms import row_terms, upper_products
from dbfit.model import inference
from dbfit.model.fitted import Model
from dbfit.solver.information import PassResult
from dbfit.solver.newton import IterationReport, NewtonResult, NewtonRules, aliased_columns
from dbfit.solver.tolerances import FINAL_STEP

Evaluate = Callable[[list[int], np.ndarray], PassResult]
# Up to this many parameters the Newton matrix has the penalty's curvature, from p^3 / 6 third moments
# (364 at 12): beyond, that many sums would outgrow the O(p^2) numbers a pass may bring out of the database,
# and :class:`SecantCurvature` estimates the curvature from the modified scores of successive passes.
CURVATURE_MAX_PARAMETERS = 12


def hat_value_expression(z: list[exp.Expression], inverse: np.ndarray) -> exp.Expression:
    """wt * z' M z written out with the entries of M = I^-1 as literals (off-diagonals counted twice)."""
    size = len(z)
    quadratic: list[exp.Expression] = []
    for pair, product in zip([(a, b) for a in range(size) for b in range(a, size)], upper_products(z)):
        coefficient = inverse[pair[0], pair[1]] * (1.0 if pair[0] == pair[1] else 2.0)
        quadratic.append(sb.mul(sb.number(coefficient), product))
    return sb.mul(sb.column("wt"), sb.paren(sb.add(*quadratic)))


def adjustment_query(
    design: Design, parameters: list[int], beta: np.ndarray, inverse: np.ndarray, curvature: bool = False
) -> exp.Select:
    """The sums over the rows that Firth's score and its derivative need, as one row.

    ``s{k}``: sum_i h_i (1/2 - mu_i) z_ik, the penalty's part of the modified score. With ``curvature`` also
    ``c{a}_{b}``: sum_i h_i (1/2 - 3 mu_i (1 - mu_i)) z_ia z_ib and ``t{j}_{a}_{b}`` (j <= a <= b):
    sum_i w_i (1/2 - mu_i) z_ij z_ia z_ib, from which :func:`penalised_information` builds the penalty's part
    of the negative Hessian.
    """
    terms = row_terms(design, parameters, beta)
    size = len(parameters)
    z = [terms.z(k) for k in range(size)]
    a = [sb.column(f"a{k}") for k in range(size)]
    with_hat = exp.select(
        *[exp.alias_(zk, f"a{k}", quoted=True) for k, zk in enumerate(z)],
        exp.alias_(hat_value_expression(z, inverse), "hat", quoted=True),
        sb.column("mu"),
        sb.column("wt"),
    ).from_(terms.subquery())
    half_minus_mu = sb.paren(sb.sub(exp.Literal.number(0.5), sb.column("mu")))
    factors = {"h": sb.mul(sb.column("hat"), half_minus_mu)}
    if curvature:
        mu_variance = sb.mul(sb.column("mu"), sb.paren(sb.sub(exp.Literal.number(1), sb.column("mu"))))
        three_variances = sb.mul(exp.Literal.number(3), mu_variance)
        factors["g"] = sb.mul(sb.column("hat"), sb.paren(sb.sub(exp.Literal.number(0.5), three_variances)))
        factors["q"] = sb.mul(sb.column("wt"), half_minus_mu.copy())
    per_row = exp.select(
        *[node.copy() for node in a], *[exp.alias_(node, name, quoted=True) for name, node in factors.items()]
    ).from_(with_hat.subquery("dbfit_hat"))
    sums = [(f"s{k}", sb.agg_sum(sb.mul(sb.column("h"), a[k].copy()))) for k in range(size)]
    if curvature:
        sums += [
            (f"c{i}_{j}", sb.agg_sum(sb.mul(sb.column("g"), a[i].copy(), a[j].copy())))
            for i, j in _pairs(size)
        ]
        sums += [
            (f"t{i}_{j}_{k}", sb.agg_sum(sb.mul(sb.column("q"), a[i].copy(), a[j].copy(), a[k].copy())))
            for i, j, k in _triples(size)
        ]
    return exp.select(*[exp.alias_(node, name, quoted=True) for name, node in sums]).from_(
        per_row.subquery("dbfit_factors")
    )


def _pairs(size: int) -> list[tuple[int, int]]:
    return [(i, j) for i in range(size) for j in range(i, size)]


def _triples(size: int) -> list[tuple[int, int, int]]:
    return [(i, j, k) for i in range(size) for j in range(i, size) for k in range(j, size)]


def penalised_information(
    information: np.ndarray, inverse: np.ndarray, pair_sums: np.ndarray, triple_sums: np.ndarray
) -> np.ndarray:
    """The negative Hessian of l*(b) = l(b) + 1/2 log|I(b)|: I - C + 2 T.

    Differentiating Firth's modified score U*_j = sum_i [r_i + h_i (1/2 - mu_i)] z_ij (Firth 1993; Heinze and
    Schemper 2002) once more, with dI/db_k = sum_i w_i (1 - 2 mu_i) z_ik z_i z_i' and d(I^-1) = -I^-1 dI I^-1
    (derived here, not taken from a paper): C = sum_i h_i (1/2 - 3 mu_i (1 - mu_i)) z_i z_i', and
    T_jk = trace(A_j M A_k M) with M = I^-1 and (A_j)_ab = sum_i w_i (1/2 - mu_i) z_ij z_ia z_ib.
    """
    return information - _pair_matrix(pair_sums, information.shape[0]) + _moment_cross(triple_sums, inverse)


def _pair_matrix(pair_sums: np.ndarray, size: int) -> np.ndarray:
    matrix = np.zeros((size, size))
    for value, (i, j) in zip(pair_sums, _pairs(size)):
        matrix[i, j] = matrix[j, i] = value
    return matrix


def _moment_cross(triple_sums: np.ndarray, inverse: np.ndarray) -> np.ndarray:
    """2 T with T_jk = trace(A_j M A_k M), from the third moments listed for j <= a <= b."""
    size = inverse.shape[0]
    moments = np.zeros((size, size, size))
    for value, (i, j, k) in zip(triple_sums, _triples(size)):
        for a, b, c in {(i, j, k), (i, k, j), (j, i, k), (j, k, i), (k, i, j), (k, j, i)}:
            moments[a, b, c] = value
    scaled = np.einsum("jab,bc->jac", moments, inverse)  # A_j M
    return 2.0 * np.einsum("jab,kba->jk", scaled, scaled)  # 2 trace(A_j M A_k M)


def firth_evaluator(engine: DuckDBEngine, design: Design, evaluate: Evaluate, protected: int) -> Evaluate:
    """Wrap the core evaluation so it returns Firth's modified score and the penalised log-likelihood.

    Columns the core will find aliased (same check, same order) are left out of the penalty, so the
    penalised log-likelihood of the first pass is comparable with the later ones. The matrix returned for
    the Newton step is the negative Hessian of the penalised log-likelihood (:func:`penalised_information`)
    where it is positive definite, so the steps converge quadratically; Fisher's information alone (as in
    Heinze and Schemper 2002) leaves out the penalty's own curvature and converges only linearly, slowly
    under separation, where the penalty carries the estimates. Beyond ``CURVATURE_MAX_PARAMETERS`` (the third
    moments grow as p^3) the penalty's curvature is estimated from the passes so far by
    :class:`SecantCurvature` (p numbers a pass); where neither gives a positive definite matrix, the step
    uses the information.
    """
    secant = SecantCurvature()

    def evaluate_firth(parameters: list[int], beta: np.ndarray) -> PassResult:
        core = evaluate(parameters, beta)
        keep = [k for k in range(len(parameters)) if k not in aliased_columns(core.gram, protected)]
        gram = core.gram.keep(keep).as_array()
        sign, log_determinant = np.linalg.slogdet(gram)
        if sign <= 0:
            raise FitError(
                "the information matrix is singular at the current estimates; the Firth penalty is undefined"
            )
        inverse = np.linalg.inv(gram)
        size = len(keep)
        curvature = size == len(parameters) and size <= CURVATURE_MAX_PARAMETERS
        kept = [parameters[k] for k in keep]
        row = engine.fetch(adjustment_query(design, kept, beta[keep], inverse, curvature))[0]
        values = np.array([0.0 if v is None else float(v) for v in row])
        score = core.score.copy()
        score[keep] += values[:size]
        newton_matrix = core.gram.as_array()
        if curvature:
            pairs = len(_pairs(size))
            pair_sums, triple_sums = values[size : size + pairs], values[size + pairs :]
            candidate = penalised_information(gram, inverse, pair_sums, triple_sums)
            if _positive_definite(candidate):
                newton_matrix = candidate
        elif size == len(parameters):
            newton_matrix = secant.matrix(parameters, beta, score, gram)
        penalised = core.loglik + 0.5 * log_determinant
        return PassResult(newton_matrix, score, penalised, core.extreme, core.misfit_extreme)

    return evaluate_firth


class SecantCurvature:
    """The penalty's part of the negative Hessian of l*, estimated from the modified scores of earlier passes.

    A structured secant method (Dennis, Gay and Welsch 1981, "An adaptive nonlinear least-squares algorithm",
    ACM Transactions on Mathematical Software 7(3), 348-368, doi:10.1145/355958.355965): the Newton matrix is
    the information I(b), computed exactly each pass, plus a correction D for the part the scan does not give.
    After each pass D is changed by the symmetric rank-one update so that the matrix reproduces the last
    change of the modified score, (I(b) + D) s = U*(b - s) - U*(b), skipped when the update's denominator is
    tiny relative to its vectors (Nocedal and Wright 2006, Numerical Optimization, 2nd ed., section 6.2). The
    penalty's curvature may be indefinite, which the rank-one update, unlike BFGS, allows; when I(b) + D is
    not positive definite (early passes far from the estimate teach D little that holds near it) D starts
    again from zero and the step is an information step. Measured on scikit-learn's breast-cancer data with 20
    and 30 columns: 30 and 31 passes instead of 52 and 215 with information steps alone.
    """

    SKIP_RATIO = 1e-8

    def __init__(self) -> None:
        self.parameters: list[int] = []
        self.beta = self.score = self.correction = np.zeros(0)

    def matrix(
        self, parameters: list[int], beta: np.ndarray, score: np.ndarray, information: np.ndarray
    ) -> np.ndarray:
        """I(b) + D after the update with this pass's estimate and modified score."""
        if parameters != self.parameters:
            self.parameters, self.correction = list(parameters), np.zeros_like(information)
        else:
            step = beta - self.beta
            residual = (self.score - score) - (information + self.correction) @ step
            denominator = float(residual @ step)
            if abs(denominator) > self.SKIP_RATIO * np.linalg.norm(residual) * np.linalg.norm(step) > 0:
                self.correction = self.correction + np.outer(residual, residual) / denominator
        self.beta, self.score = beta.copy(), score.copy()
        candidate = information + self.correction
        if not _positive_definite(candidate):
            self.correction = np.zeros_like(information)
            return information
        return candidate


def _positive_definite(matrix: np.ndarray) -> bool:
    try:
        np.linalg.cholesky(matrix)
    except np.linalg.LinAlgError:
        return False
    return bool(np.all(np.isfinite(matrix)))


def penalized_loglik(loglik: float, internal_gram: np.ndarray, transform: np.ndarray) -> float:
    """l + 1/2 log|I| on the original scale: I_original = A^-T I A^-1 for original = A internal."""
    _, log_determinant = np.linalg.slogdet(internal_gram)
    _, log_transform = np.linalg.slogdet(transform)
    return loglik + 0.5 * log_determinant - log_transform


def rules(
    max_iter: int,
    tol: float,
    protected: int,
    report: Callable[[IterationReport], None] | None,
    fallback_start: np.ndarray | None,
    weight_total: float,
) -> NewtonRules:
    """The Newton rules of a Firth fit: no separation check (the maximum of l* exists under separation, and
    slowly shrinking steps there are no sign of divergence), and after the stopping rule on the change of l*,
    plain steps on the modified score until one is below FINAL_STEP (one or two with the penalised Hessian,
    more where the step falls back to the information)."""
    return NewtonRules(
        max_passes=max_iter,
        tol=tol,
        protected=protected,
        report=report,
        fallback_start=fallback_start,
        weight_total=weight_total,
        detect_separation=False,
        polish_below=FINAL_STEP,
    )


def finish(newton: NewtonResult, core_evaluate: Evaluate, parameters: list[int]) -> NewtonResult:
    """Re-run the core pass at the estimate: the unpenalised log-likelihood and the information there."""
    return dataclasses.replace(newton, last=core_evaluate(parameters, newton.beta))


def annotate(model: Model, last: PassResult) -> Model:
    """Record the penalised log-likelihood and the method in the model's statistics."""
    active = [k for k in range(len(model.labels)) if np.isfinite(model.estimates[k])]
    transform = inference.original_scale_map(model.design, active)
    stats = dict(model.stats)
    information = last.gram.as_array()
    stats["penalized_log_likelihood"] = penalized_loglik(stats["log_likelihood"], information, transform)
    stats["notes"] = [
        *stats.get("notes", []),
        "method    Firth bias-reduced (log-likelihood + 1/2 log|information|)"
        f"; penalised log-lik {stats['penalized_log_likelihood']:,.4f}",
    ]
    return dataclasses.replace(model, stats=stats)
