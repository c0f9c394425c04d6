"""Prior correction of the intercept on a simulated case-control sample (King and Zeng 2001, Political Analysis).

Property check on simulated data: a population is drawn from a known logistic model with a rare event, all
events and a random share of the non-events are kept, and the corrected intercept must recover the population
intercept within two of its standard errors (a 95 % band), while the uncorrected one must not.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import load_frame

import dbfit

TRUE_INTERCEPT, TRUE_SLOPES = -5.0, (0.8, -0.5)


def case_control_sample(con, seed: int = 20260101) -> float:
    """Load the sample as table ``cases``; return the population event rate."""
    rng = np.random.default_rng(seed)
    rows = 400_000
    x1, x2 = rng.normal(size=rows), rng.normal(size=rows)
    eta = TRUE_INTERCEPT + TRUE_SLOPES[0] * x1 + TRUE_SLOPES[1] * x2
    event = rng.random(rows) < 1.0 / (1.0 + np.exp(-eta))
    keep = event | (rng.random(rows) < 0.02)
    load_frame(con, "cases", pd.DataFrame({"event": event[keep].astype(int), "x1": x1[keep], "x2": x2[keep]}))
    return float(event.mean())


def test_corrected_intercept_recovers_the_population_intercept(con):
    population_rate = case_control_sample(con)
    model = dbfit.fit(con, "event ~ x1 + x2", "cases", population_rate=population_rate, progress=False)
    plain = dbfit.fit(con, "event ~ x1 + x2", "cases", progress=False)
    table = {row["term"]: row for row in model.coefficients.to_pylist()}
    intercept, std_error = table["intercept"]["estimate"], table["intercept"]["std_error"]
    assert abs(intercept - TRUE_INTERCEPT) < 2 * std_error
    assert abs(plain.estimate("intercept") - TRUE_INTERCEPT) > 10 * std_error
    for label, slope in zip(["x1", "x2"], TRUE_SLOPES):
        assert model.estimate(label) == plain.estimate(label)
        assert abs(model.estimate(label) - slope) < 3 * table[label]["std_error"]
    assert table["intercept"]["std_error"] == plain.coefficients["std_error"][0].as_py()
    assert model.options["population_rate"] == population_rate
    assert model.stats["population_event_rate"] == population_rate
    assert "prior-corrected for outcome sampling" in model.summary()


def test_shift_is_the_king_zeng_formula_and_robust_errors_still_use_the_fitted_rows(con):
    # Reference: statsmodels GLM (HC0) on the same rows, and the closed form written out by hand.
    population_rate = case_control_sample(con)
    frame = con.execute("SELECT * FROM cases").df()
    sample_rate = frame.event.mean()
    model = dbfit.fit(
        con, "event ~ x1 + x2", "cases", population_rate=population_rate, robust="HC0", progress=False
    )
    reference = sm.GLM(frame.event, sm.add_constant(frame[["x1", "x2"]]), family=sm.families.Binomial()).fit(
        cov_type="HC0", tol=1e-13
    )
    by_hand = math.log((1 - population_rate) / population_rate * sample_rate / (1 - sample_rate))
    assert model.estimate("intercept") == pytest.approx(reference.params["const"] - by_hand, rel=1e-8)
    np.testing.assert_allclose(model.covariance, reference.cov_params().values, rtol=1e-7)
    later = dbfit.with_robust_errors(
        con,
        dbfit.fit(con, "event ~ x1 + x2", "cases", population_rate=population_rate, progress=False),
        "HC0",
    )
    np.testing.assert_allclose(later.covariance, model.covariance, rtol=1e-10)


@pytest.mark.parametrize("rate", [0, 1, 1.5, -0.1, True, "0.1"])
def test_bad_population_rate_is_named(con, rate):
    case_control_sample(con)
    with pytest.raises(dbfit.FitError, match="population_rate must be the population event rate"):
        dbfit.fit(con, "event ~ x1", "cases", population_rate=rate, progress=False)


def test_population_rate_needs_an_intercept(con):
    case_control_sample(con)
    with pytest.raises(dbfit.FitError, match="the model has none"):
        dbfit.fit(con, "event ~ x1 - 1", "cases", population_rate=0.01, progress=False)
