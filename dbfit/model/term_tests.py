"""Joint Wald tests per formula term, from the covariance alone (no scan).

For the estimates b_T of the columns of one term T (all indicator columns of a categorical, all columns of an
interaction) and their covariance V_TT, W = b_T' V_TT^-1 b_T is chi-square with as many degrees of freedom as
the term has estimated columns when the term has no effect (Wald 1943, Trans. Amer. Math. Soc. 54(3),
426-482, doi:10.1090/S0002-9947-1943-0012401-3; in this form Agresti 2013, Categorical Data Analysis, 3rd ed.,
Wiley, section 4.3, cited from memory). Aliased columns (no estimate) are left out of a term's test.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from dbfit.errors import FitError
from dbfit.model.fitted import Model


@dataclass(frozen=True)
class TermColumns:
    """One formula term and the parameters (indices into the model's labels) that estimate it."""

    term: str
    parameters: tuple[int, ...]


def chi_square_tail(statistic: float, df: float) -> float:
    """P(X > statistic) for X chi-square with ``df`` degrees of freedom (scipy loads at the first call)."""
    from scipy.stats import chi2

    return float(chi2.sf(statistic, df))


def term_columns(model: Model) -> list[TermColumns]:
    """Every formula term in formula order with its estimated parameters (aliased ones left out)."""
    offset = 1 if model.design.intercept else 0
    estimated = np.isfinite(np.asarray(model.estimates, dtype=float))
    terms: list[TermColumns] = []
    for term in model.design.formula.terms:
        parameters = tuple(
            j + offset
            for j, column in enumerate(model.design.columns)
            if column.term == term.label and estimated[j + offset]
        )
        terms.append(TermColumns(term.label, parameters))
    return terms


def wald_statistic(estimates: np.ndarray, covariance: np.ndarray) -> float:
    """b' V^-1 b; NaN when V is not finite (a penalised fit has no covariance) or singular."""
    if not np.all(np.isfinite(covariance)):
        return math.nan
    try:
        return float(estimates @ np.linalg.solve(covariance, estimates))
    except np.linalg.LinAlgError:
        return math.nan


def wald_term_tests(model: Model) -> list[dict[str, float | int | str | None]]:
    """One dict per formula term: term, df, wald_chi_square, wald_p_value (None where not defined)."""
    if not model.design.formula.terms:
        raise FitError("the model has no formula terms to test (intercept only)")
    estimates = np.asarray(model.estimates, dtype=float)
    rows: list[dict[str, float | int | str | None]] = []
    for columns in term_columns(model):
        chosen = list(columns.parameters)
        statistic = (
            wald_statistic(estimates[chosen], model.covariance[np.ix_(chosen, chosen)])
            if chosen
            else math.nan
        )
        defined = math.isfinite(statistic)
        rows.append(
            {
                "term": columns.term,
                "df": len(chosen),
                "wald_chi_square": statistic if defined else None,
                "wald_p_value": chi_square_tail(max(statistic, 0.0), len(chosen)) if defined else None,
            }
        )
    return rows
