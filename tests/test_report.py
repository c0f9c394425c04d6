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
from dbfit.assessment.report_format import number
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
