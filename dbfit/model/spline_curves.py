"""The fitted curve of a spline term: log-odds against the variable, with a pointwise confidence band.

The basis coefficients of ``spline(x, k)`` say little on their own; the curve does. On a grid of values of
``x`` the linear predictor is evaluated at the baseline row reason codes use by default
(:func:`dbfit.deployment.scoring.baseline_values`: every other numeric column at its training mean, the
column's centre, or 0 in a model without intercept; every categorical at its reference level), with the
spline's columns at each grid value. Its standard error is sqrt(g' V g), g the gradient of the linear predictor in
the estimates (the design row itself) and V the model's covariance: the delta method, as for the scoring
standard error (Agresti 2013, Categorical Data Analysis, 3rd ed., Wiley, cited from memory). The band is
the Wald interval of the log-odds at ``level``.
"""

from __future__ import annotations

from statistics import NormalDist
from typing import Any

import numpy as np
import pyarrow as pa

from dbfit.errors import DbfitError
from dbfit.expressions.basis_terms import SplineCall, spline_basis_values

CURVE_COLUMNS = ("value", "log_odds", "standard_error", "low", "high")


def training_baseline(design: Any) -> list[float]:
    """Each design column at the baseline row: a numeric column at its centre, an indicator at 0."""
    return [0.0 if column.indicators else float(column.centre) for column in design.columns]


def spline_terms(model: Any) -> dict[str, SplineCall]:
    """The spline terms of ``model`` by name (``spline(x)``)."""
    found: dict[str, SplineCall] = {}
    for term in model.design.formula.terms:
        if isinstance(term.call, SplineCall):
            found.setdefault(term.call.name, term.call)
    return found


def spline_curve(
    model: Any, term: str, *, points: int = 50, level: float = 0.95, grid: Any = None
) -> pa.Table:
    """``points`` grid values from the lower to the upper boundary knot of spline ``term`` (``spline(x)`` or
    ``x``), or the values ``grid``, with the log-odds, its standard error and the band (see the module
    docstring)."""
    terms = spline_terms(model)
    call = terms.get(term) or next((c for c in terms.values() if c.argument_text == term), None)
    if call is None:
        raise DbfitError(
            f"'{term}' is not a spline term of this model (spline terms: {', '.join(terms) or 'none'})"
        )
    if not 0.0 < level < 1.0:
        raise DbfitError(f"level must be between 0 and 1 (got {level})")
    if not isinstance(points, int) or points < 2:
        raise DbfitError(f"points must be a whole number >= 2 (got {points!r})")
    assert call.knots is not None
    design = model.design
    grid = np.linspace(call.knots[0], call.knots[-1], points) if grid is None else np.asarray(grid, float)
    points = len(grid)
    names = [f"{call.name}[{j + 1}]" for j in range(call.df)]
    offset = 1 if design.intercept else 0
    rows = np.tile(
        np.concatenate([[1.0] if design.intercept else [], training_baseline(design)]), (points, 1)
    )
    basis = spline_basis_values(call, grid)
    for j, column in enumerate(design.columns):
        if column.label in names:
            rows[:, j + offset] = basis[:, names.index(column.label)]
    estimated = ~np.isnan(np.asarray(model.estimates, dtype=float))
    beta = np.asarray(model.estimates, dtype=float)[estimated]
    covariance = np.asarray(model.covariance, dtype=float)[np.ix_(estimated, estimated)]
    x = rows[:, estimated]
    log_odds = x @ beta
    se = np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", x, covariance, x), 0.0))
    z = NormalDist().inv_cdf(0.5 + level / 2.0)
    values = (grid, log_odds, se, log_odds - z * se, log_odds + z * se)
    return pa.table({name: v for name, v in zip(CURVE_COLUMNS, values)})


def spline_curve_lines(model: Any, term: str) -> list[str]:
    """The summary's text of spline ``term``: the log-odds and its 95% band at the knots."""
    call = spline_terms(model)[term]
    assert call.knots is not None
    curve = spline_curve(model, term, grid=list(call.knots)).to_pydict()
    lines = [
        f"  {term}: log-odds at the knots ({call.df} df) with its 95% band, other columns at their training",
        "  means or reference levels (dbfit.spline_curve gives the whole curve)",
        f"  {'value':>12} {'log-odds':>11}  [95% band]",
    ]
    for value, log_odds, low, high in zip(curve["value"], curve["log_odds"], curve["low"], curve["high"]):
        lines.append(f"  {value:>12.5g} {log_odds:>11.5g}  [{low:.4g}, {high:.4g}]")
    return lines
