"""Assessment metrics computed in SQL, against scikit-learn's metrics on the same scores (ties included)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from sklearn import metrics as sk
from sqlglot import exp

import dbfit
from dbfit.assessment.metrics import (
    calibration_table,
    confusion_table,
    curve_points,
    gains_table,
    hosmer_lemeshow,
    metrics,
)
from dbfit.engines.duckdb_engine import DuckDBEngine


def scored_table(con, y: np.ndarray, p: np.ndarray) -> exp.Expression:
    con.execute(
        "CREATE OR REPLACE TABLE scored AS SELECT unnest(?) AS y, unnest(?) AS p", [y.tolist(), p.tolist()]
    )
    return exp.Table(this=exp.to_identifier("scored"))


@pytest.fixture(params=["tied", "distinct"])
def scores(request):
    generator = np.random.default_rng(20261201)
    p = generator.uniform(0.01, 0.99, 4000)
    if request.param == "tied":
        p = np.round(p, 2)  # about 100 distinct scores: many ties
    y = (generator.uniform(size=p.size) < p).astype(float)
    return y, p


@pytest.mark.parametrize("threshold", [0.3, 0.5, 0.77])
def test_metrics_equal_scikit_learn(con, scores, threshold):
    # Reference: scikit-learn's metrics on the same labels and scores, to 1e-12.
    y, p = scores
    values = metrics(DuckDBEngine(con), scored_table(con, y, p), threshold).values
    flagged = p >= threshold
    expected = {
        "auc": sk.roc_auc_score(y, p),
        "log_loss": sk.log_loss(y, p),
        "brier_score": sk.brier_score_loss(y, p),
        "accuracy": sk.accuracy_score(y, flagged),
        "precision": sk.precision_score(y, flagged),
        "recall": sk.recall_score(y, flagged),
        "f1": sk.f1_score(y, flagged),
        "matthews_correlation": sk.matthews_corrcoef(y, flagged),
        "specificity": sk.recall_score(1 - y, ~flagged),
    }
    for name, value in expected.items():
        assert values[name] == pytest.approx(value, rel=1e-12, abs=1e-15), name
    fpr, tpr, _ = sk.roc_curve(y, p)
    assert values["ks_statistic"] == pytest.approx(np.max(tpr - fpr), rel=1e-12)
    assert values["rows"] == len(y) and values["positives"] == y.sum()


def test_confusion_counts_equal_scikit_learn(con, scores):
    # Reference: sklearn.metrics.confusion_matrix.
    y, p = scores
    table = confusion_table(DuckDBEngine(con), scored_table(con, y, p), 0.5).to_pydict()
    matrix = sk.confusion_matrix(y, p >= 0.5)
    for actual, predicted, rows in zip(table["actual"], table["predicted"], table["rows"]):
        assert rows == matrix[actual, predicted]


def test_roc_points_are_thinned_but_auc_stays_exact(con):
    # Reference: scikit-learn's roc_curve; the thinned curve keeps its end points and stays under 1,001 rows.
    generator = np.random.default_rng(7)
    p = generator.uniform(size=20000)
    y = (generator.uniform(size=p.size) < p).astype(float)
    engine, relation = DuckDBEngine(con), scored_table(con, y, p)
    curve = curve_points(engine, relation).to_pydict()
    assert len(curve["threshold"]) <= 1002
    assert curve["true_positive_rate"][-1] == 1.0 and curve["false_positive_rate"][-1] == 1.0
    fpr, tpr, thresholds = sk.roc_curve(y, p, drop_intermediate=False)
    where = {t: k for k, t in enumerate(thresholds)}
    for t, ours_tpr, ours_fpr in zip(
        curve["threshold"][1:], curve["true_positive_rate"][1:], curve["false_positive_rate"][1:]
    ):
        assert ours_tpr == pytest.approx(tpr[where[t]], rel=1e-12) and ours_fpr == pytest.approx(
            fpr[where[t]], rel=1e-12
        )
    assert metrics(engine, relation).values["auc"] == pytest.approx(sk.roc_auc_score(y, p), rel=1e-12)


def independent_hosmer_lemeshow(y: np.ndarray, p: np.ndarray, groups: int = 10) -> tuple[float, int]:
    """Independent computation from the definition (marked as such): distinct scores kept together, each
    assigned to group floor(g * (rows below + half its rows) / n); statistic sum (O - E)^2 / (E (1 - E / n_g))."""
    values, counts = np.unique(p, return_counts=True)
    below = np.concatenate([[0], np.cumsum(counts)[:-1]])
    group_of_value = np.minimum(np.floor(groups * (below + counts / 2) / len(p)).astype(int), groups - 1)
    group = group_of_value[np.searchsorted(values, p)]
    statistic = 0.0
    used = np.unique(group)
    for g in used:
        mask = group == g
        observed, expected, n = y[mask].sum(), p[mask].sum(), mask.sum()
        statistic += (observed - expected) ** 2 / (expected * (1 - expected / n))
    return statistic, len(used) - 2


def test_hosmer_lemeshow_equals_an_independent_computation(con, scores):
    # No published worked example could be reproduced from shipped data: independent computation in this test.
    y, p = scores
    statistic, df = hosmer_lemeshow(DuckDBEngine(con), scored_table(con, y, p))
    expected, expected_df = independent_hosmer_lemeshow(y, p)
    assert statistic == pytest.approx(expected, rel=1e-10) and df == expected_df == 8
    values = metrics(DuckDBEngine(con), scored_table(con, y, p)).values
    assert values["hosmer_lemeshow_p"] == pytest.approx(stats.chi2.sf(expected, 8), rel=1e-10)


def test_calibration_and_gains_tables(con, scores):
    # Common practice: a calibrated score has observed rates close to the mean prediction in every group, and
    # the cumulative share of positives reaches 1 in the last group.
    y, p = scores
    engine, relation = DuckDBEngine(con), scored_table(con, y, p)
    calibration = calibration_table(engine, relation).to_pydict()
    assert sum(calibration["rows"]) == len(y)
    for low, rate, high in zip(
        calibration["wilson_low"], calibration["observed_rate"], calibration["wilson_high"]
    ):
        assert low <= rate <= high
    assert np.allclose(calibration["mean_predicted"], calibration["observed_rate"], atol=0.08)
    gains = gains_table(engine, relation).to_pydict()
    assert gains["share_of_positives"][-1] == pytest.approx(1.0) and gains["cumulative_lift"][
        -1
    ] == pytest.approx(1.0)
    assert gains["lift"][0] > 1.5


def test_single_class_rows_say_auc_is_undefined(con):
    values = metrics(DuckDBEngine(con), scored_table(con, np.ones(50), np.linspace(0.1, 0.9, 50)))
    assert values.values["auc"] is None and "only one class" in values.notes["auc"]
    table = values.table().to_pydict()
    assert table["note"][table["metric"].index("auc")].startswith("undefined")


@pytest.mark.parametrize("threshold", [0, 1, -0.1, 1.5])
def test_threshold_outside_the_open_unit_interval_is_refused(con, threshold):
    with pytest.raises(dbfit.FitError, match="strictly between 0 and 1"):
        metrics(DuckDBEngine(con), scored_table(con, np.array([0.0, 1.0]), np.array([0.2, 0.8])), threshold)
