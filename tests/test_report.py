"""The HTML report: contents and escaping from real fits, and the page rendered in headless Chromium.

Data: the Spector and Mazzeo grades data bundled with statsmodels (statsmodels.datasets.spector), fitted by
dbfit; the assessment tables come from dbfit.assessment.metrics over rows scored with the fitted estimates.
"""

from __future__ import annotations

import dataclasses
import json
import re
from html import escape
from html.parser import HTMLParser
from pathlib import Path

import pytest
import statsmodels.api as sm
from browser import dump_dom, find_chromium, screenshot
from conftest import load_frame
from sqlglot import exp

import dbfit
from dbfit.assessment import metrics as assess
from dbfit.assessment.report import render_report, write_report
from dbfit.assessment.report_format import number, p_value, share
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import DbfitError

FORMULA = "GRADE ~ GPA + TUCE + PSI"


@pytest.fixture
def spector(con):
    frame = sm.datasets.spector.load_pandas().data
    frame["GPA_TWICE"] = 2 * frame["GPA"]  # aliased with GPA
    frame["GPA_MILLI"] = frame["GPA"] / 1000  # odds ratio per unit beyond any axis
    load_frame(con, "spector", frame)
    return con


def scored_assessment(con, model: dbfit.Model) -> dict:
    """Score the spector rows with the model's estimates in SQL and compute every assessment table."""
    b = {label: float(value) for label, value in zip(model.labels, model.estimates)}
    con.execute(
        "CREATE OR REPLACE VIEW scored_view AS SELECT GRADE::DOUBLE AS y, "
        f"1 / (1 + exp(-({b['intercept']!r} + {b['GPA']!r} * GPA + {b['TUCE']!r} * TUCE + {b['PSI']!r} * PSI)))"
        " AS p FROM spector"
    )
    engine, scored = DuckDBEngine(con), exp.Table(this=exp.to_identifier("scored_view"))
    return {
        "metrics": assess.metrics(engine, scored).table(),
        "curve": assess.curve_points(engine, scored),
        "calibration": assess.calibration_table(engine, scored),
        "gains": assess.gains_table(engine, scored),
    }


@pytest.fixture
def fitted(spector):
    model = dbfit.fit(spector, FORMULA, "spector", progress=False)
    return model, scored_assessment(spector, model)


class Collect(HTMLParser):
    """Tags with their attributes, and the text outside tags."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def parse(page: str) -> Collect:
    collected = Collect()
    collected.feed(page)
    return collected


def test_page_holds_the_job_statistics_coefficients_and_cautions(fitted):
    model, assessment = fitted
    page = render_report(model, assessment)
    text = " ".join(" ".join(parse(page).text).split())
    assert "estimates the probability of the event GRADE from 3 terms, fitted on 32 rows of spector" in text
    for key in ("deviance", "null_deviance", "aic", "bic", "log_likelihood"):
        assert number(model.stats[key], 6) in text, key
    assert "Newton passes 6" in text and "converged yes" in text
    for row in model.coefficients.to_pylist():
        assert number(row["odds_ratio"]) in text and f"{number(row['odds_ratio_low'])} to" in text
    auc = next(r["value"] for r in assessment["metrics"].to_pylist() if r["metric"] == "auc")
    assert f"AUC {auc:.3f}" in text
    assert "validate it on held-out rows" in text and "A model is not a decision" in text
    assert "Neither the fit nor the assessment raised a warning." in text


def test_page_has_no_external_asset_and_no_script(fitted):
    page = render_report(*fitted)
    tags = parse(page).tags
    assert not [t for t, _ in tags if t in ("script", "link", "img", "iframe", "object", "embed")]
    for tag, attrs in tags:
        for name in ("src", "href"):
            assert name not in attrs, (tag, attrs)
    assert "url(" not in page and "@import" not in page
    assert set(re.findall(r"https?://[^\"' )]+", page)) == {"http://www.w3.org/2000/svg"}  # the SVG namespace


def test_user_text_is_escaped(spector):
    source = "SELECT * FROM spector WHERE TUCE < 1000 AND '<b>' <> '&'"
    model = dbfit.fit(spector, "GRADE ~ GPA + (TUCE < 20)", source, progress=False)
    model = dataclasses.replace(model, warnings=["<script>alert('x')</script> & <img src=x>"])
    page = render_report(model)
    assert not [t for t, _ in parse(page).tags if t in ("script", "img", "b")]
    assert "&lt;script&gt;alert(&#x27;x&#x27;)&lt;/script&gt; &amp; &lt;img src=x&gt;" in page
    assert escape(source) in page
    assert "TUCE &lt; 20" in page
    text = " ".join(parse(page).text)
    assert "<script>alert('x')</script>" in text and "Warnings (1)" in text


def test_aliased_term_is_shown_as_such(spector):
    model = dbfit.fit(spector, "GRADE ~ GPA + TUCE + PSI + GPA_TWICE", "spector", progress=False)
    page = render_report(model)
    text = " ".join(" ".join(parse(page).text).split())
    assert "GPA_TWICE aliased: no estimate (constant, or a linear combination of earlier terms)" in text
    forest = page[page.index('<svg class="chart forest"') :]
    forest = forest[: forest.index("</svg>")]
    assert "aliased: no estimate" in forest
    assert forest.count('class="estimate"') == 3  # GPA, TUCE, PSI; no marker for the aliased term
    assert "Warnings (1)" in text and "GPA_TWICE" in model.warnings[0]


def test_penalised_estimates_have_no_interval(spector):
    model = dbfit.fit(spector, FORMULA, "spector", shrinkage=0.01, progress=False)
    assert all(r["std_error"] is None for r in model.coefficients.to_pylist())
    page = render_report(model)
    text = " ".join(" ".join(parse(page).text).split())
    assert text.count("penalised fit: no standard error") == 4
    assert page.count('class="estimate penalised"') == 3 and 'class="interval"' not in page
    assert "Penalised estimates carry no Wald standard error" in text


def test_single_class_rows_say_the_curve_is_undefined(spector, fitted):
    model, _ = fitted
    spector.execute("CREATE TABLE spector_failed AS SELECT * FROM spector WHERE GRADE = 0")
    spector.execute("ALTER TABLE spector RENAME TO spector_all")
    spector.execute("ALTER TABLE spector_failed RENAME TO spector")
    assessment = scored_assessment(spector, model)
    page = render_report(model, assessment)
    text = " ".join(" ".join(parse(page).text).split())
    assert (
        "undefined: the rows hold only one class" in text
        and "AUC (area under the ROC curve) \u2013 undefined" in text
    )
    roc = page[page.index('<svg class="chart roc"') :]
    assert '<polyline class="curve"' not in roc[: roc.index("</svg>")]


def test_absurd_odds_ratios_are_cut_off_at_the_axis_edge(spector):
    model = dbfit.fit(spector, "GRADE ~ GPA_MILLI + PSI", "spector", progress=False)
    row = model.coefficients.to_pylist()[1]
    assert row["odds_ratio_high"] > 1e300 or row["odds_ratio_high"] == float("inf")
    page = render_report(model)
    forest = page[page.index('<svg class="chart forest"') :]
    assert "\u25b6<title>cut off" in forest[: forest.index("</svg>")]
    ticks = re.findall(r'class="tick"[^>]*>([^<]+)<', forest[: forest.index("</svg>")])
    assert ticks and max(float(t) for t in ticks) <= 1e3


def test_without_assessment_and_with_an_incomplete_one(fitted):
    model, assessment = fitted
    page = render_report(model)
    assert "No assessment was given" in page and 'class="chart roc"' not in page
    with pytest.raises(DbfitError, match="gains"):
        render_report(model, {k: v for k, v in assessment.items() if k != "gains"})


def test_model_report_writes_the_rendered_page(fitted, tmp_path):
    model, assessment = fitted
    path = dbfit.write_report(model, tmp_path / "report.html", assessment)
    assert path.read_text(encoding="utf-8") == render_report(model, assessment)


# ---- headless Chromium ------------------------------------------------------------------------------------

needs_chromium = pytest.mark.skipif(
    find_chromium() is None, reason="Chromium not found on PATH (apt-get install chromium)"
)

PROBE_HEAD = """<script>window.dbfitErrors = [];
window.addEventListener('error', e => window.dbfitErrors.push(String(e.message || (e.target && e.target.outerHTML))), true);
const dbfitConsoleError = console.error;
console.error = (...a) => { window.dbfitErrors.push(a.join(' ')); dbfitConsoleError(...a); };</script>"""
PROBE_TAIL = """<pre id="dbfit-probe"></pre><script>
window.addEventListener('load', () => {
const out = {errors: window.dbfitErrors, charts: {}};
for (const svg of document.querySelectorAll('svg.chart')) {
  const name = [...svg.classList].find(c => c !== 'chart');
  const box = el => { const b = el.getBBox(); return [b.x, b.y, b.width, b.height]; };
  out.charts[name] = {
    frame: box(svg.querySelector('rect.frame')),
    markers: [...svg.querySelectorAll('circle.estimate')].map(box),
    intervals: [...svg.querySelectorAll('line.interval')].map(box),
    curves: [...svg.querySelectorAll('polyline.curve')].map(box),
    bars: [...svg.querySelectorAll('rect.step')].map(box),
    points: [...svg.querySelectorAll('circle')].map(box),
    shown: svg.getBoundingClientRect().width,
  };
}
document.getElementById('dbfit-probe').textContent = JSON.stringify(out);
});
</script>"""


def probe(page_path: Path, tmp_path: Path) -> tuple[dict, list[str]]:
    """Open a test-only copy of the page with a measuring script; return the measures and console lines."""
    page = page_path.read_text(encoding="utf-8")
    copy = tmp_path / "probed.html"
    copy.write_text(
        page.replace("<head>", "<head>" + PROBE_HEAD, 1).replace("</body>", PROBE_TAIL + "</body>", 1),
        encoding="utf-8",
    )
    run = dump_dom(copy)
    found = re.search(r'<pre id="dbfit-probe">(.*?)</pre>', run.dom, re.S)
    assert found and found.group(1), "the probe script did not run"
    return json.loads(found.group(1).replace("&quot;", '"').replace("&amp;", "&")), run.console_lines()


@needs_chromium
def test_page_loads_in_chromium_with_non_empty_plots(fitted, tmp_path):
    model, assessment = fitted
    measures, console = probe(write_report(model, tmp_path / "report.html", assessment), tmp_path)
    assert console == [] and measures["errors"] == []
    charts = measures["charts"]
    assert set(charts) == {"forest", "roc", "calibration", "gains"}
    assert all(chart["shown"] > 0 for chart in charts.values())
    forest = charts["forest"]
    assert len(forest["markers"]) == 3 and all(w > 0 and h > 0 for _, _, w, h in forest["markers"])
    assert len(forest["intervals"]) == 3 and all(w > 0 for _, _, w, _ in forest["intervals"])
    frame_x, frame_y, frame_w, frame_h = charts["roc"]["frame"]
    ((x, y, w, h),) = charts["roc"]["curves"]
    # the ROC curve runs from (0, 0) to (1, 1): its box is the whole frame
    assert (x, y, w, h) == pytest.approx((frame_x, frame_y, frame_w, frame_h), abs=0.6)
    calibration = charts["calibration"]
    groups = assessment["calibration"].num_rows
    assert len(calibration["markers"]) == groups and len(calibration["intervals"]) == groups
    assert calibration["curves"][0][2] > 0 and calibration["curves"][0][3] > 0
    gains = charts["gains"]
    assert len(gains["bars"]) == assessment["gains"].num_rows and all(
        b[2] > 0 and b[3] > 0 for b in gains["bars"]
    )
    assert gains["curves"][0][2] == pytest.approx(gains["frame"][2], abs=0.6)


@needs_chromium
def test_the_probe_sees_console_errors_and_empty_geometry(fitted, tmp_path):
    # Negative control: broken SVG attributes reach the console, an external image fails to load (no host name
    # resolves), and an empty curve measures 0 x 0.
    model, assessment = fitted
    page = render_report(model, assessment)
    broken = re.sub(r'(<polyline class="curve") points="[^"]*"', r'\1 points="x,y"', page, count=1)
    path = tmp_path / "broken.html"
    broken = broken.replace('<line class="no-effect"', '<line class="no-effect" x1="oops"', 1)
    path.write_text(
        broken.replace("</main>", '<img src="http://assets.example.com/logo.png"></main>', 1),
        encoding="utf-8",
    )
    measures, console = probe(path, tmp_path)
    assert any("attribute x1" in line for line in console) and any(
        "attribute points" in line for line in console
    )
    assert any("logo.png" in error for error in measures["errors"])  # the external image did not load
    assert measures["charts"]["roc"]["curves"][0][2:] == [0, 0]


@needs_chromium
def test_screenshot_step(fitted, tmp_path):
    model, assessment = fitted
    png = screenshot(
        write_report(model, tmp_path / "report.html", assessment),
        tmp_path / "report.png",
        width=900,
        height=1200,
    )
    data = png.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 20_000
    width, height = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
    assert (width, height) == (900, 1200)


def test_job_sentence_names_a_text_event_and_grouped_trials(spector):
    spector.execute(
        "CREATE TABLE spector_text AS SELECT *, CASE WHEN GRADE = 1 THEN 'up' ELSE 'same' END AS change "
        "FROM spector"
    )
    model = dbfit.fit(spector, "change ~ GPA + PSI", "spector_text", positive="up", progress=False)
    text = " ".join(" ".join(parse(render_report(model)).text).split())
    assert (
        "estimates the probability that change is up from 2 terms, fitted on 32 rows of spector_text" in text
    )
    spector.execute(
        "CREATE TABLE spector_grouped AS SELECT PSI, sum(GRADE) AS improved, count(*) AS students "
        "FROM spector GROUP BY PSI"
    )
    grouped = dbfit.fit(spector, "improved ~ PSI", "spector_grouped", trials="students", progress=False)
    text = " ".join(" ".join(parse(render_report(grouped)).text).split())
    assert "the share of successes improved out of students from 1 term, fitted on 2 rows" in text


def test_axes_map_ticks_and_clamp():
    from dbfit.assessment.svg import Axis

    linear = Axis(0.0, 1.0, 50.0, 450.0)
    assert linear(0.0) == 50.0 and linear(1.0) == 450.0 and linear(0.25) == pytest.approx(150.0)
    assert linear(-3.0) == 50.0 and linear(7.0) == 450.0  # clamped to the frame
    assert linear.ticks() == pytest.approx([0.0, 0.2, 0.4, 0.6, 0.8, 1.0])
    log = Axis(0.01, 100.0, 0.0, 400.0, log=True)
    assert log(1.0) == pytest.approx(200.0) and log(0.1) == pytest.approx(100.0)
    assert log(float("inf")) == 400.0 and log(0.0) == 0.0
    assert log.ticks() == pytest.approx([0.01, 0.1, 1.0, 10.0, 100.0])
    assert Axis(0.5, 20.0, 0.0, 1.0, log=True).ticks() == pytest.approx([0.5, 1, 2, 5, 10, 20])


def test_report_command_assesses_the_stored_model_by_default(tmp_path):
    import statsmodels.api as sm

    import dbfit
    from dbfit.interfaces.cli import main

    database = str(tmp_path / "school.duckdb")
    con = dbfit.connect(database)
    con.register("frame", sm.datasets.spector.load_pandas().data)
    con.execute("CREATE TABLE spector AS SELECT * FROM frame")
    dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", name="grade", progress=False)
    con.close()
    out = tmp_path / "grade.html"
    assert main(["report", "grade", "--database", database, "--out", str(out)]) == 0
    page = out.read_text()
    assert "ROC curve" in page and "Calibration" in page and "GRADE ~ GPA + TUCE + PSI" in page


# ---- the sections a reviewer signs off ----------------------------------------------------------------------


def page_text(page: str) -> str:
    return " ".join(" ".join(parse(page).text).split())


def section(page: str, css_class: str) -> str:
    start = page.index(f'<section class="{css_class}"')
    return page[start : page.index("</section>", start)]


def test_number_formats():
    from dbfit.assessment.report_format import count, fixed, p_value, share

    # common practice: thousands separators and fixed decimals for large figures, one style of small p
    assert number(1229141.1875) == "1,229,141.19" and number(-614570.59) == "-614,570.59"
    assert number(25.779256) == "25.78" and number(0.0123456) == "0.01235" and number(1.0) == "1.000"
    assert (
        number(2.213e-06) == "2.213 \u00d7 10\u207b\u2076" and number(3.2e13) == "3.200 \u00d7 10\u00b9\u00b3"
    )
    assert number(12345) == "12,345" and number(None) == "\u2013" and number(float("nan")) == "\u2013"
    assert number(True) == "yes" and number(float("inf")) == "\u221e" and number(0.0) == "0"
    assert p_value(3e-9) == "< 0.0001" and p_value(0.0) == "< 0.0001" and p_value(1e-300) == "< 0.0001"
    assert p_value(0.045671) == "0.0457" and p_value(0.0001) == "0.0001" and p_value(None) == "\u2013"
    assert fixed(-1e-17) == "0.0000" and fixed(0.83456) == "0.8346" and count(474466.0) == "474,466"
    assert share(0.2199) == "22.0%"


def test_no_number_on_the_page_is_in_e_notation(spector):
    # a weight of 100,000 per row multiplies the deviance to about 2.6 million
    spector.execute("CREATE TABLE spector_heavy AS SELECT *, 100000 AS w FROM spector")
    model = dbfit.fit(spector, FORMULA, "spector_heavy", weights="w", progress=False)
    assert model.stats["deviance"] > 1e6
    page = render_report(model, scored_assessment(spector, model))
    body = page[page.index("<body>") :]
    assert not re.findall(r"\d[eE][+-]?\d", page_text(body)), "a number in e notation"
    assert f"{model.stats['deviance']:,.2f}" in page_text(page)
    # every p-value is written one way: four decimals or "< 0.0001"
    coefficients = page[page.index('<table class="coefficients"') :]
    p_cells = re.findall(r"<td>([^<]*)</td><td>[^<]*</td><td>[^<]*</td></tr>", coefficients)
    assert p_cells and all(re.fullmatch(r"&lt; 0\.0001|\d\.\d{4}", cell) for cell in p_cells), p_cells


@pytest.fixture
def stored_holdout(spector):
    """The spector grades with NULLs in GPA, fitted with a holdout split and stored as 'grades'."""
    spector.execute("CREATE TABLE spector_ids AS SELECT row_number() OVER () AS student, * FROM spector")
    spector.execute("UPDATE spector_ids SET GPA = NULL WHERE student IN (3, 17)")
    model = dbfit.fit(
        spector,
        "GRADE ~ GPA + TUCE + PSI",
        "spector_ids",
        name="grades",
        split=dbfit.Holdout("student", 0.3),
        progress=False,
    )
    return spector, model


def test_identity_names_the_model_its_rows_and_the_assessed_rows(stored_holdout):
    con, model = stored_holdout
    tables = dbfit.report_assessment(con, "grades")
    text = page_text(section(render_report(model, tables), "identity"))
    assert "model grades version 1" in text
    assert f"fitted at {model.fitted_at.strftime('%Y-%m-%d %H:%M:%S')}" in text
    assert "source spector_ids" in text
    stats = model.stats
    assert f"rows fitted on {stats['n_used']} used, {stats['n_excluded']} left out" in text
    assert "split held out: share 0.3 by the hash of student" in text
    assert "rows assessed held-out rows of spector_ids (split on the hash of student" in text
    assert "threshold flagged when p >= 0.5" in text
    other = dbfit.report_assessment(con, "grades", "SELECT * FROM spector_ids WHERE PSI = 1")
    text = page_text(section(render_report(model, other), "identity"))
    assert "rows assessed all rows of the given source SELECT * FROM spector_ids WHERE PSI = 1" in text


def test_data_summary_matches_pandas_on_the_training_rows(stored_holdout):
    con, model = stored_holdout
    tables = dbfit.report_assessment(con, "grades")
    frame = dbfit.score(con, model, rows="training").to_pandas()
    assert len(frame) == tables["data_summary"]["rows"][0].as_py()
    summary = {row["variable"]: row for row in tables["data_summary"].to_pylist()}
    for column in ("GPA", "TUCE", "PSI"):
        values = frame[column]
        assert summary[column]["nulls"] == values.isna().sum()
        assert summary[column]["minimum"] == values.min() and summary[column]["maximum"] == values.max()
        assert summary[column]["mean"] == pytest.approx(values.mean(), rel=1e-12)
    assert summary["GRADE"]["kind"] == "categorical" and summary["GRADE"]["nulls"] == 0
    levels = {row["level"]: row for row in tables["data_levels"].to_pylist() if row["variable"] == "GRADE"}
    shares = frame["GRADE"].value_counts(normalize=True)
    assert {k: v["share"] for k, v in levels.items()} == pytest.approx({"0": shares[0], "1": shares[1]})
    text = page_text(section(render_report(model, tables), "data"))
    assert f"GPA predictor numeric (double) {frame['GPA'].isna().sum()}" in text
    assert f"0 {share(shares[0])}, 1 {share(shares[1])}" in text


def test_data_summary_of_a_categorical_shows_its_largest_levels(spector):
    spector.execute(
        "CREATE TABLE spector_classes AS SELECT *, 'class ' || (row_number() OVER () % 9) AS class "
        "FROM spector"
    )
    spector.execute("UPDATE spector_classes SET class = NULL WHERE TUCE = 21")
    model = dbfit.fit(spector, "GRADE ~ GPA + class", "spector_classes", progress=False)
    tables = dbfit.report_assessment(spector, model)
    frame = spector.sql("SELECT class FROM spector_classes").to_df()["class"]
    row = next(r for r in tables["data_summary"].to_pylist() if r["variable"] == "class")
    assert row["nulls"] == frame.isna().sum() and row["levels"] == frame.nunique()
    levels = [r for r in tables["data_levels"].to_pylist() if r["variable"] == "class"]
    counts = frame.value_counts()
    assert [r["rows"] for r in levels] == sorted(counts.tolist(), reverse=True)
    text = page_text(section(render_report(model, tables), "data"))
    assert f"{frame.nunique() - 6} more levels" in text
    assert "TUCE" not in text  # only the formula's variables
    spector.execute("CREATE TABLE spector_int AS SELECT *, TUCE::INTEGER AS tuce_int FROM spector")
    whole = dbfit.fit(spector, "GRADE ~ tuce_int", "spector_int", progress=False)
    text = page_text(section(render_report(whole, dbfit.report_assessment(spector, whole)), "data"))
    tuce = sm.datasets.spector.load_pandas().data["TUCE"]
    assert (
        f"tuce_int predictor numeric (integer) 0 {number(tuce.mean())} {tuce.min():.0f} to {tuce.max():.0f}"
        in text
    )


def test_confusion_matrix_equals_scikit_learn_on_the_scored_rows(stored_holdout):
    from sklearn.metrics import confusion_matrix

    con, model = stored_holdout
    for threshold in (0.5, 0.3):
        tables = dbfit.report_assessment(con, "grades", rows="all", threshold=threshold)
        scored = dbfit.score(con, model).to_pandas().dropna(subset=["probability"])
        (tn, fp), (fn, tp) = confusion_matrix(scored["GRADE"], scored["probability"] >= threshold)
        page = render_report(model, tables)
        confusion = page[page.index('<table class="confusion"') :]
        cells = re.findall(r'<td class="(?:hit|miss)">([\d,]+)<span>', confusion)
        assert [int(c.replace(",", "")) for c in cells] == [tp, fn, fp, tn]
        assert f"Confusion matrix at the threshold {threshold}" in page_text(page)


def test_training_and_held_out_metrics_side_by_side_equal_scikit_learn(stored_holdout):
    from sklearn.metrics import log_loss, roc_auc_score

    con, model = stored_holdout
    tables = dbfit.report_assessment(con, "grades")
    split = {row["metric"]: row for row in tables["split_metrics"].to_pylist()}
    for rows, column in (("training", "training"), ("held_out", "held_out")):
        scored = dbfit.score(con, model, rows=rows).to_pandas().dropna(subset=["probability"])
        assert split["rows"][column] == len(scored)
        assert split["auc"][column] == pytest.approx(roc_auc_score(scored["GRADE"], scored["probability"]))
        assert split["log_loss"][column] == pytest.approx(log_loss(scored["GRADE"], scored["probability"]))
    text = page_text(render_report(model, tables))
    assert "Training and held-out rows side by side" in text
    assert (
        f"AUC (area under the ROC curve) {number(split['auc']['training'])} {number(split['auc']['held_out'])}"
        in text
    )
    unsplit = dbfit.fit(con, FORMULA, "spector", progress=False)
    assert "split_metrics" not in dbfit.report_assessment(con, unsplit)


def shifted_populations(con) -> None:
    """Two invented populations of one predictor: 'home' with log-odds -0.5 + 1.0 x, 'away' with 1.5 + 0.3 x."""
    import numpy as np
    import pandas as pd

    generator = np.random.default_rng(20261203)
    for name, (a, b) in {"home": (-0.5, 1.0), "away": (1.5, 0.3), "home_again": (-0.5, 1.0)}.items():
        x = generator.normal(0.0, 2.0, 4000)
        y = (generator.random(4000) < 1 / (1 + np.exp(-(a + b * x)))).astype(int)
        load_frame(con, name, pd.DataFrame({"x": x, "y": y}))


def test_warning_box_warns_for_a_shifted_population_and_not_for_its_own(con):
    import numpy as np

    shifted_populations(con)
    model = dbfit.fit(con, "y ~ x", "home", name="home_model", progress=False)
    same = dbfit.report_assessment(con, "home_model", "home_again")
    shifted = dbfit.report_assessment(con, "home_model", "away")
    quiet = section(render_report(model, same), "warnings clean")
    assert "Neither the fit nor the assessment raised a warning" in page_text(quiet)
    loud = page_text(section(render_report(model, shifted), "warnings"))
    line = shifted["calibration_line"].to_pylist()[0]
    assert line["slope"] < 0.8
    assert f"Calibration slope {number(line['slope'])}, outside [0.8, 1.2]" in loud
    assert "Hosmer-Lemeshow p < 0.0001" in loud and "Warnings (2)" in loud
    # the calibration line equals statsmodels' logistic fit of y on the linear predictor of the away rows
    scored = dbfit.score(con, model, "away").to_pandas()
    reference = sm.Logit(scored["y"], sm.add_constant(scored["linear_predictor"])).fit(disp=0)
    assert [line["intercept"], line["slope"]] == pytest.approx(np.asarray(reference.params), abs=1e-8)


def test_drift_against_the_training_snapshot_for_a_new_source(con):
    shifted_populations(con)
    model = dbfit.fit(con, "y ~ x", "home", name="home_model", progress=False)
    spread = "SELECT 3 * x AS x, y FROM away"
    tables = dbfit.report_assessment(con, "home_model", spread)
    expected = dbfit.drift(con, "home_model", spread).to_pylist()
    assert tables["drift"].to_pylist() == expected
    page = render_report(model, tables)
    text = page_text(section(page, "drift"))
    for row in expected:
        assert (
            f"{row['variable']} {row['kind']} {row['bins']} {row['training_rows']:,} {row['new_rows']:,} {number(row['psi'])} {row['reading']}"
            in text
        )
    assert any(row["psi"] > 0.25 for row in expected)
    assert "Large shift of x against the training rows" in page_text(section(page, "warnings"))
    assert "drift" not in dbfit.report_assessment(con, "home_model")
    unstored = dbfit.fit(con, "y ~ x", "home", progress=False)
    text = page_text(
        section(render_report(unstored, dbfit.report_assessment(con, unstored, "away")), "drift")
    )
    assert "Not computed: drift compares with the training snapshot in the store" in text


def test_report_command_takes_a_source_and_a_threshold(tmp_path):
    from dbfit.interfaces.cli import main

    database = str(tmp_path / "shift.duckdb")
    con = dbfit.connect(database)
    shifted_populations(con)
    dbfit.fit(con, "y ~ x", "home", name="home_model", progress=False)
    con.close()
    out = tmp_path / "away.html"
    assert (
        main(
            [
                "report",
                "home_model",
                "--database",
                database,
                "--output",
                str(out),
                "--source",
                "away",
                "--threshold",
                "0.3",
            ]
        )
        == 0
    )
    text = page_text(out.read_text())
    assert "Confusion matrix at the threshold 0.3" in text and "Drift against the training rows" in text
    assert "rows assessed all rows of the given source away" in text


@needs_chromium
def test_the_full_report_loads_in_chromium_with_every_chart_drawn(con, tmp_path):
    shifted_populations(con)
    con.execute("CREATE TABLE home_ids AS SELECT row_number() OVER () AS id, * FROM home")
    model = dbfit.fit(
        con, "y ~ x", "home_ids", name="home_model", split=dbfit.Holdout("id", 0.25), progress=False
    )
    tables = dbfit.report_assessment(con, "home_model", "away", by="x > 0")
    assert {"groups", "drift", "data_summary", "confusion", "calibration_line"} <= set(tables)
    path = write_report(model, tmp_path / "full.html", tables)
    measures, console = probe(path, tmp_path)
    assert console == [] and measures["errors"] == []
    charts = measures["charts"]
    assert set(charts) == {"forest", "roc", "calibration", "gains", "group-rates"}
    for name, chart in charts.items():
        assert chart["shown"] > 0 and all(side > 0 for side in chart["frame"][2:]), name
        marks = chart["points"] + chart["curves"] + chart["bars"]
        assert marks and all(w > 0 and h > 0 for _, _, w, h in marks if (w, h) != (0, 0)), name
        assert any(w > 0 and h > 0 for _, _, w, h in marks), name
    assert len(charts["group-rates"]["points"]) == 3 * tables["groups"].num_rows
    png = screenshot(path, tmp_path / "full.png", width=1100, height=4200)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_tests_per_term_and_effects_on_the_probability_match_statsmodels(spector):
    # statsmodels' Logit on the spector grades: a one-column term's Wald chi-square is its z squared, and
    # get_margeff(at="overall") gives the average marginal effects with delta-method standard errors
    model = dbfit.fit(spector, FORMULA, "spector", name="grades", progress=False)
    tables = dbfit.report_assessment(spector, "grades", likelihood_ratio=True)
    frame = sm.datasets.spector.load_pandas().data
    reference = sm.Logit(frame["GRADE"], sm.add_constant(frame[["GPA", "TUCE", "PSI"]])).fit(disp=0)
    margins = reference.get_margeff(at="overall")
    page = render_report(model, tables)
    tests = page_text(section(page, "term-tests"))
    effects = page_text(section(page, "effects"))
    for k, term in enumerate(("GPA", "TUCE", "PSI")):
        chi_square = (reference.params[term] / reference.bse[term]) ** 2
        row = tables["term_tests"].to_pylist()[k]
        assert row["term"] == term and row["wald_chi_square"] == pytest.approx(chi_square, rel=1e-6)
        reduced = sm.Logit(
            frame["GRADE"], sm.add_constant(frame[[c for c in ("GPA", "TUCE", "PSI") if c != term]])
        ).fit(disp=0)
        assert row["deviance_difference"] == pytest.approx(2 * (reference.llf - reduced.llf), rel=1e-6)
        assert f"{term} 1 {number(row['wald_chi_square'])} {p_value(row['wald_p_value'])}" in tests
        effect = tables["effects"].to_pylist()[k]
        assert effect["effect"] == pytest.approx(margins.margeff[k], abs=1e-6)
        assert effect["std_error"] == pytest.approx(margins.margeff_se[k], abs=1e-6)
        assert f"{term} per unit {number(effect['effect'])} {number(effect['std_error'])}" in effects
    assert "refit the model without each term" in tests
    plain = section(render_report(model, dbfit.report_assessment(spector, "grades")), "term-tests")
    assert "deviance difference" not in plain and "no likelihood-ratio test was asked for" in page_text(plain)


def test_sections_say_why_a_model_has_no_effects_or_term_tests(spector):
    shared = dbfit.fit(spector, "GRADE ~ GPA + power(GPA, 2) + PSI", "spector", progress=False)
    tables = dbfit.report_assessment(spector, shared)
    assert tables["effects"].num_rows == 0 and tables["term_tests"].num_rows == 3
    text = page_text(section(render_report(shared, tables), "effects"))
    assert text.startswith("Effects on the probability Not computed:") and "GPA" in text
    intercept_only = dbfit.fit(spector, "GRADE ~ 1", "spector", progress=False)
    text = page_text(
        section(render_report(intercept_only, dbfit.report_assessment(spector, intercept_only)), "term-tests")
    )
    assert "Not computed: the model has no formula terms to test (intercept only)" in text


def test_rows_of_one_class_get_no_calibration_line(spector):
    model = dbfit.fit(spector, FORMULA, "spector", name="grades", progress=False)
    tables = dbfit.report_assessment(spector, "grades", "SELECT * FROM spector WHERE GRADE = 0")
    assert tables["calibration_line"].to_pylist() == [
        {"slope": None, "intercept": None, "passes": 0, "note": "undefined: the rows hold only one class"}
    ]
    text = page_text(render_report(model, tables))
    assert "calibration slope \u2013 undefined: the rows hold only one class" in text
