"""Honest diagnostics: NULL exclusion, aliasing, separation, and numerical stability."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from conftest import assert_close, load_frame

import dbfit


@pytest.fixture
def spector(con):
    frame = sm.datasets.spector.load_pandas().data.copy()
    load_frame(con, "spector", frame)
    return frame


def test_rows_with_null_are_excluded_and_counted(con, spector):
    # Reference: statsmodels on the complete rows only.
    con.execute("UPDATE spector SET TUCE = NULL WHERE rowid IN (1, 5, 9)")
    model = dbfit.fit(con, "GRADE ~ GPA + TUCE", "spector", progress=False)
    assert model.stats["n_used"] == 29 and model.stats["n_excluded"] == 3
    complete = spector.drop(index=[1, 5, 9])
    reference = sm.Logit(complete.GRADE, sm.add_constant(complete[["GPA", "TUCE"]])).fit(disp=0, tol=1e-12)
    assert_close(model.estimates, reference.params.values, 1e-6, "estimates on complete rows")


def test_exactly_collinear_term_is_aliased_and_rest_is_valid(con, spector):
    # Reference: statsmodels without the aliased term (common practice: the later collinear term is dropped).
    model = dbfit.fit(con, "GRADE ~ GPA + TUCE + (2 * GPA - TUCE) + PSI", "spector", progress=False)
    table = {row["term"]: row for row in model.coefficients.to_pylist()}
    assert table["(2 * GPA - TUCE)"]["estimate"] is None
    assert table["(2 * GPA - TUCE)"]["std_error"] is None
    assert any("aliased" in w and "(2 * GPA - TUCE)" in w for w in model.warnings)
    reference = sm.Logit(spector.GRADE, sm.add_constant(spector[["GPA", "TUCE", "PSI"]])).fit(
        disp=0, tol=1e-12
    )
    kept = [model.labels.index(t) for t in ["intercept", "GPA", "TUCE", "PSI"]]
    assert_close(model.estimates[kept], reference.params.values, 1e-6, "estimates without the aliased term")
    assert np.isnan(model.covariance[model.labels.index("(2 * GPA - TUCE)")]).all()
    assert model.stats["parameters"] == 4 and model.stats["aliased"] == 1


def test_constant_term_is_aliased_with_intercept(con, spector):
    model = dbfit.fit(con, "GRADE ~ GPA + 3.5 + PSI", "spector", progress=False)
    assert np.isnan(model.estimate("3.5"))
    assert any("aliased" in w and "'3.5'" in w for w in model.warnings)
    assert np.isfinite(model.estimate("GPA"))


def test_categorical_level_aliased_by_duplicate_factor(con):
    con.execute(
        "CREATE TABLE t AS SELECT i % 3 = 0 AS y, ['a','b','c'][1 + (i % 7) % 3] AS g, i / 100.0 AS x FROM range(300) r(i)"
    )
    model = dbfit.fit(con, "y ~ g + x + g::VARCHAR", "t", progress=False)
    assert np.isnan(model.estimate("g::VARCHAR=b")) and np.isnan(model.estimate("g::VARCHAR=c"))
    assert np.isfinite(model.estimate("g=b"))


def test_complete_separation_is_detected_and_named(con):
    con.execute(
        "CREATE TABLE sep AS SELECT (i >= 50)::INTEGER AS y, i / 10.0 AS x, (i * 37 % 11) / 11.0 AS noise FROM range(100) r(i)"
    )
    model = dbfit.fit(con, "y ~ x + noise", "sep", progress=False)
    assert model.stats["separation"] and not model.stats["converged"]
    separation = [w for w in model.warnings if "separation" in w]
    assert separation and "x" in separation[0].split("suspected terms:")[1]
    assert model.stats["iterations"] < 50


def test_quasi_complete_separation_is_detected(con):
    # Common practice: a level with only one outcome class (here g = 'c' is always 1) separates quasi-completely.
    con.execute("""CREATE TABLE quasi AS SELECT
        CASE WHEN g = 'c' THEN 1 ELSE (i * 7 % 5 < 2)::INTEGER END AS y, g, (i * 13 % 17) / 17.0 AS x
        FROM (SELECT i, ['a','b','c'][1 + i % 3] AS g FROM range(300) r(i))""")
    model = dbfit.fit(con, "y ~ x + g", "quasi", progress=False)
    separation = [w for w in model.warnings if "separation" in w]
    assert separation and "g=c" in separation[0]
    assert model.stats["separation"]


def test_well_separated_but_finite_data_is_not_flagged(con):
    # Source: scikit-learn breast-cancer data with strong but overlapping predictors (MLE exists).
    from sklearn.datasets import load_breast_cancer

    load_frame(con, "cancer", load_breast_cancer(as_frame=True).frame)
    model = dbfit.fit(
        con, 'target ~ "mean radius" + "mean texture" + "mean concave points"', "cancer", progress=False
    )
    assert model.stats["converged"] and not model.stats["separation"] and not model.warnings


@pytest.mark.parametrize("slope", [1000.0, -1000.0, 1e6])
def test_log_likelihood_is_exact_for_huge_linear_predictors(con, slope):
    # Common practice: log(1 + exp(eta)) must not overflow; reference: numpy.logaddexp on the same eta.
    con.execute(
        "CREATE TABLE big AS SELECT (i % 3 = 0)::INTEGER AS y, (i % 5) - 2.0 AS x FROM range(40) r(i)"
    )
    frame = con.execute("SELECT y, x FROM big").df()
    eta = slope * frame.x.to_numpy()
    expected = float(np.sum(frame.y * eta - np.logaddexp(0.0, eta)))
    reports = []
    dbfit.fit(con, "y ~ x - 1", "big", start=[slope], max_iter=1, progress=reports.append)
    assert reports[0].deviance == pytest.approx(-2.0 * expected, rel=1e-12)
    assert np.isfinite(reports[0].deviance)


def test_start_that_saturates_every_row_restarts_from_default(con):
    con.execute(
        "CREATE TABLE big AS SELECT (i % 3 = 0)::INTEGER AS y, (i % 5) - 2.0 AS x FROM range(40) r(i)"
    )
    model = dbfit.fit(con, "y ~ x", "big", start={"intercept": 5000.0, "x": 0.0}, progress=False)
    cold = dbfit.fit(con, "y ~ x", "big", progress=False)
    assert model.stats["converged"]
    assert_close(model.estimates, cold.estimates, 1e-8, "same optimum after restart")


def test_centring_keeps_precision_for_large_offsets_in_predictors(con, spector):
    # Reference: statsmodels on the raw data; a predictor shifted by 1e6 must give the same slope.
    frame = spector.assign(GPA_shifted=spector.GPA + 1e6)
    load_frame(con, "shifted", frame)
    model = dbfit.fit(con, "GRADE ~ GPA_shifted + PSI", "shifted", progress=False)
    reference = sm.Logit(spector.GRADE, sm.add_constant(spector[["GPA", "PSI"]])).fit(disp=0, tol=1e-12)
    assert_close(model.estimate("GPA_shifted"), reference.params["GPA"], 1e-6, "slope")
    assert_close(model.coefficients["std_error"].to_numpy()[1], reference.bse["GPA"], 1e-6, "slope se")


def test_progress_reports_iteration_deviance_and_time(con, spector):
    reports = []
    model = dbfit.fit(con, "GRADE ~ GPA", "spector", progress=reports.append)
    assert [r.iteration for r in reports] == list(range(1, model.stats["iterations"] + 1))
    assert all(r.elapsed >= 0 for r in reports)
    assert reports[-1].deviance == pytest.approx(model.stats["deviance"])
    assert reports[0].deviance > reports[-1].deviance


def test_warm_start_from_a_fit_needs_fewer_passes(con, spector):
    cold = dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", progress=False)
    warm = dbfit.fit(
        con,
        "GRADE ~ GPA + TUCE + PSI",
        "spector",
        progress=False,
        start=dict(zip(cold.labels, cold.estimates)),
    )
    assert warm.stats["iterations"] < cold.stats["iterations"]
    assert_close(warm.estimates, cold.estimates, 1e-8, "same optimum")


def test_summary_shows_terms_and_warnings(con, spector):
    model = dbfit.fit(con, "GRADE ~ GPA + GPA * 1", "spector", progress=False)
    text = model.summary()
    assert "GPA * 1" in text and "aliased" in text and "deviance" in text
