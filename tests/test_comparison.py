"""Comparing models: likelihood-ratio test against statsmodels, refusal on different rows or non-nested terms."""

from __future__ import annotations

import pytest
import statsmodels.api as sm
from conftest import load_frame
from scipy import stats

import dbfit
from dbfit.assessment.comparison import comparison_table, likelihood_ratio_test


@pytest.fixture
def spector(con):
    frame = sm.datasets.spector.load_pandas().data
    load_frame(con, "spector", frame)
    return frame


def test_likelihood_ratio_test_matches_statsmodels(con, spector):
    # Reference: statsmodels GLM log-likelihoods on statsmodels' spector data: 2 (llf_large - llf_small) on 2 df.
    small = dbfit.fit(con, "GRADE ~ GPA", "spector", progress=False)
    large = dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", progress=False)
    test = likelihood_ratio_test(small, large)
    family = sm.families.Binomial()
    ref_small = sm.GLM(spector.GRADE, sm.add_constant(spector[["GPA"]]), family=family).fit()
    ref_large = sm.GLM(spector.GRADE, sm.add_constant(spector[["GPA", "TUCE", "PSI"]]), family=family).fit()
    statistic = 2 * (ref_large.llf - ref_small.llf)
    p_value, df = stats.chi2.sf(statistic, 2), 2
    assert test["deviance_difference"] == pytest.approx(statistic, rel=1e-8)
    assert test["df"] == df == 2
    assert test["p_value"] == pytest.approx(p_value, rel=1e-6)
    table = comparison_table([small, large], ["gpa only", "full"]).to_pydict()
    assert table["aic"] == pytest.approx([ref_small.aic, ref_large.aic], rel=1e-8)
    assert table["holdout_auc"] == [None, None]


def test_models_on_different_rows_are_refused(con, spector):
    small = dbfit.fit(con, "GRADE ~ GPA", "spector", progress=False)
    other = dbfit.fit(con, "GRADE ~ GPA + TUCE", "SELECT * FROM spector WHERE GPA > 2.5", progress=False)
    with pytest.raises(dbfit.FitError, match="not fitted on the same rows"):
        likelihood_ratio_test(small, other)


def test_non_nested_models_are_refused(con, spector):
    a = dbfit.fit(con, "GRADE ~ GPA", "spector", progress=False)
    b = dbfit.fit(con, "GRADE ~ TUCE + PSI", "spector", progress=False)
    with pytest.raises(dbfit.FitError, match="not nested"):
        likelihood_ratio_test(a, b)
