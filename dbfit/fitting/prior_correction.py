"""Prior correction of the intercept for outcome-sampled (case-control) data.

When rows were sampled by outcome (say all events and a share of the non-events), the slopes of a logistic
model stay consistent but the intercept is shifted by the sampling. With tau the known population event rate
and ybar the event rate of the fitted rows, the corrected intercept is
b0 - ln[((1 - tau) / tau) * (ybar / (1 - ybar))] (King and Zeng 2001, "Logistic regression in rare events
data", Political Analysis 9(2), 137-163, doi:10.1093/oxfordjournals.pan.a004868 (page numbers and DOI
from memory)); its standard error is unchanged.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from dbfit.errors import FitError
from dbfit.model import inference
from dbfit.model.fitted import Model


def check_population_rate(population_rate: float | None) -> None:
    if population_rate is None:
        return
    if (
        isinstance(population_rate, bool)
        or not isinstance(population_rate, (int, float))
        or not 0 < population_rate < 1
    ):
        raise FitError(
            f"population_rate must be the population event rate, strictly between 0 and 1 (got {population_rate!r})"
        )


def intercept_shift(sample_rate: float, population_rate: float) -> float:
    """ln[((1 - tau) / tau) * (ybar / (1 - ybar))] = logit(ybar) - logit(tau), taken off the intercept."""
    return inference.logit(sample_rate) - inference.logit(population_rate)


def prior_corrected(model: Model, population_rate: float) -> Model:
    """A copy of ``model`` with its intercept corrected to the population event rate ``population_rate``."""
    check_population_rate(population_rate)
    if not model.design.intercept:
        raise FitError(
            "population_rate corrects the intercept, but the model has none (the formula drops it)"
        )
    if model.options.get("population_rate") is not None:
        raise FitError(
            f"the intercept is already prior-corrected (population_rate={model.options['population_rate']})"
        )
    design = model.design
    sample_rate = inference.success_rate(design)
    shift = intercept_shift(sample_rate, population_rate)
    estimates = model.estimates.copy()
    estimates[0] -= shift
    stats = dict(model.stats)
    stats.update(
        sample_event_rate=sample_rate, population_event_rate=float(population_rate), intercept_shift=-shift
    )
    stats["notes"] = [
        *stats.get("notes", []),
        f"intercept prior-corrected for outcome sampling: event rate {sample_rate:.4g} in the rows, "
        f"{population_rate:.4g} in the population (shift {-shift:+.5g})",
    ]
    return dataclasses.replace(
        model,
        estimates=estimates,
        coefficients=inference.coefficient_table(model.labels, estimates, model.covariance),
        stats=stats,
        options={**model.options, "population_rate": float(population_rate)},
    )


def fitted_estimates(model: Model) -> np.ndarray:
    """The estimates as fitted on the rows, before any prior correction of the intercept."""
    estimates = model.estimates.copy()
    if model.options.get("population_rate") is not None:
        estimates[0] -= model.stats["intercept_shift"]
    return estimates
