"""Firth's bias-reduced logistic regression, with the hat values computed inside the database.

Firth (1993), "Bias reduction of maximum likelihood estimates", Biometrika 80(1), 27-38,
doi:10.1093/biomet/80.1.27: maximise l*(b) = l(b) + 1/2 log|I(b)|. Its score is
U*_j = sum_i [r_i + h_i (1/2 - mu_i)] z_ij with the hat values h_i = wt_i z_i' I^-1 z_i (Heinze and Schemper
2002, Statistics in Medicine 21(16), 2409-2419, doi:10.1002/sim.1047). Estimates are finite even under complete
separation. Each Newton pass runs two scans: the core statistics query gives I(b), l(b) and the score; then a
second query, with I(b)^-1 written in as constants, sums h_i (1/2 - mu_i) z_i.
"""

from __future__ import annotations

import dataclasses
from typing import Callable

import numpy as np
from sqlglot import exp

from dbfit import inference
from dbfit import sqlbuild as sb
from dbfit.design import Design
from dbfit.engine import DuckDBEngine
from dbfit.errors import FitError
from dbfit.irls import NewtonResult, aliased_columns, newton_step
from dbfit.model import Model
from dbfit.rowterms import row_terms, upper_products
from dbfit.statsquery import PassResult

Evaluate = Callable[[list[int], np.ndarray], PassResult]
FINAL_STEP = 1e-10  # largest step on the internal scale accepted at convergence


def hat_value_expression(z: list[exp.Expression], inverse: np.ndarray) -> exp.Expression:
    """wt * z' M z written out with the entries of M = I^-1 as literals (off-diagonals counted twice)."""
    size = len(z)
    quadratic: list[exp.Expression] = []
    for a, product in zip([(a, b) for a in range(size) for b in range(a, size)], upper_products(z)):
        coefficient = inverse[a[0], a[1]] * (1.0 if a[0] == a[1] else 2.0)
        quadratic.append(sb.mul(sb.number(coefficient), product))
    return sb.mul(sb.column("wt"), sb.paren(sb.add(*quadratic)))


def adjustment_query(design: Design, parameters: list[int], beta: np.ndarray, inverse: np.ndarray) -> exp.Select:
    """sum_i h_i (1/2 - mu_i) z_i over the rows, one column per parameter."""
    terms = row_terms(design, parameters, beta)
    z = [terms.z(k) for k in range(len(parameters))]
    half_minus_mu = sb.paren(sb.sub(exp.Literal.number(0.5), sb.column("mu")))
    with_hat = exp.select(*[exp.alias_(zk, f"a{k}", quoted=True) for k, zk in enumerate(z)],
                          exp.alias_(sb.mul(hat_value_expression(z, inverse), half_minus_mu), "h", quoted=True)
                          ).from_(terms.subquery())
    sums = [sb.agg_sum(sb.mul(sb.column("h"), sb.column(f"a{k}"))) for k in range(len(z))]
    return exp.select(*[exp.alias_(s, f"s{k}", quoted=True) for k, s in enumerate(sums)]).from_(
        with_hat.subquery("dbfit_hat")
    )


def firth_evaluator(engine: DuckDBEngine, design: Design, evaluate: Evaluate, protected: int) -> Evaluate:
    """Wrap the core evaluation so it returns Firth's modified score and the penalised log-likelihood.

    Columns the core will find aliased (same check, same order) are left out of the penalty, so the
    penalised log-likelihood of the first pass is comparable with the later ones.
    """

    def evaluate_firth(parameters: list[int], beta: np.ndarray) -> PassResult:
        core = evaluate(parameters, beta)
        keep = [k for k in range(len(parameters)) if k not in aliased_columns(core.gram, protected)]
        gram = core.gram[np.ix_(keep, keep)]
        sign, log_determinant = np.linalg.slogdet(gram)
        if sign <= 0:
            raise FitError("the information matrix is singular at the current estimates; the Firth penalty is undefined")
        inverse = np.linalg.inv(gram)
        row = engine.fetch(adjustment_query(design, [parameters[k] for k in keep], beta[keep], inverse))[0]
        score = core.score.copy()
        score[keep] += np.array([0.0 if v is None else float(v) for v in row])
        return PassResult(core.gram, score, core.loglik + 0.5 * log_determinant, core.extreme, core.misfit_extreme)

    return evaluate_firth


def penalized_loglik(loglik: float, internal_gram: np.ndarray, transform: np.ndarray) -> float:
    """l + 1/2 log|I| on the original scale: I_original = A^-T I A^-1 for original = A internal."""
    _, log_determinant = np.linalg.slogdet(internal_gram)
    _, log_transform = np.linalg.slogdet(transform)
    return loglik + 0.5 * log_determinant - log_transform



def finish(newton: NewtonResult, step_evaluate: Evaluate, core_evaluate: Evaluate, parameters: list[int],
           max_iter: int) -> NewtonResult:
    """Polish to a step below ``FINAL_STEP``, then re-run the core pass at the estimate.

    Newton's steps with the Fisher information converge only linearly on the penalised likelihood (the
    penalty's own curvature is left out), so the core's stopping rule is followed by plain steps until they
    are negligible; the last pass gives the unpenalised log-likelihood and the information at the estimate.
    """
    beta, iterations, small = newton.beta, newton.iterations, False
    while newton.converged and iterations < max_iter:
        result = step_evaluate(parameters, beta)
        step = newton_step(result.gram, result.score)
        iterations += 1
        beta = beta + step
        small = float(np.max(np.abs(step))) < FINAL_STEP if step.size else True
        if small:
            break
    return dataclasses.replace(newton, beta=beta, last=core_evaluate(parameters, beta), iterations=iterations,
                               converged=newton.converged and small)


def annotate(model: Model, last: PassResult) -> Model:
    """Record the penalised log-likelihood and the method in the model's statistics."""
    active = [k for k in range(len(model.labels)) if np.isfinite(model.estimates[k])]
    transform = inference.original_scale_map(model.design, active)
    stats = dict(model.stats)
    stats["penalized_log_likelihood"] = penalized_loglik(stats["log_likelihood"], last.gram, transform)
    stats["notes"] = [*stats.get("notes", []), "method    Firth bias-reduced (log-likelihood + 1/2 log|information|)"
                      f"; penalised log-lik {stats['penalized_log_likelihood']:,.4f}"]
    return dataclasses.replace(model, stats=stats)
