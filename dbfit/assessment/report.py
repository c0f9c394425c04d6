"""A standalone HTML report of a fitted model: no external assets, inline CSS and inline SVG, no script.

``render_report(model, assessment)`` returns the page; ``assessment`` is an optional dict of the pyarrow tables
of ``dbfit.assessment.metrics`` (``metrics``, ``curve``, ``calibration``, ``gains``), and ``groups`` of
``dbfit.assessment.groups`` when the assessment was made by group. Every piece of user text is escaped.
Run ``python -m dbfit.assessment.report --screenshot report.html out.png`` to look at a written report.
"""

from __future__ import annotations

from html import escape
from pathlib import Path
from typing import TYPE_CHECKING

import pyarrow as pa

from dbfit.assessment.report_format import count, fixed, number, p_value, share
from dbfit.assessment.report_plots import (
    ODDS_CEILING,
    ODDS_FLOOR,
    calibration_plot,
    forest_plot,
    gains_plot,
    group_rates_plot,
    roc_plot,
)
from dbfit.assessment.report_style import STYLE
from dbfit.errors import DbfitError

if TYPE_CHECKING:
    from dbfit.model.fitted import Model

ASSESSMENT_KEYS = ("metrics", "curve", "calibration", "gains")
STATISTICS = (
    ("n_used", "rows used"),
    ("n_excluded", "rows left out (NULLs)"),
    ("log_likelihood", "log-likelihood"),
    ("deviance", "deviance"),
    ("null_deviance", "intercept-only deviance"),
    ("aic", "AIC"),
    ("bic", "BIC"),
    ("iterations", "Newton passes"),
    ("converged", "converged"),
)
METRIC_NAMES = {
    "rows": "rows",
    "positives": "events",
    "auc": "AUC (area under the ROC curve)",
    "log_loss": "log loss",
    "brier_score": "Brier score",
    "accuracy": "accuracy",
    "precision": "precision",
    "recall": "recall",
    "specificity": "specificity",
    "f1": "F1",
    "matthews_correlation": "Matthews correlation",
    "ks_statistic": "Kolmogorov-Smirnov statistic",
    "hosmer_lemeshow": "Hosmer-Lemeshow statistic",
    "hosmer_lemeshow_df": "Hosmer-Lemeshow degrees of freedom",
    "hosmer_lemeshow_p": "Hosmer-Lemeshow p-value",
}
CAUTIONS = (
    "Before this model informs credit, medical, insurance, hiring or other high-stakes decisions: validate it "
    "on held-out rows, not the rows it was fitted on; check its calibration and its fairness across the groups "
    "the decision affects; monitor its inputs and scores for drift and refit on a schedule. A model is not a "
    "decision: its probabilities inform people who stay accountable. Local regulation and licensed professional "
    "practice come first."
)


def job_sentence(model: Model) -> str:
    """What the model predicts, from which source, on how many rows, as escaped HTML."""
    target = escape(model.design.formula.target_text)
    options = model.options
    if options.get("trials"):
        outcome = f"the share of successes <code>{target}</code> out of <code>{escape(str(options['trials']))}</code>"
    elif options.get("positive") is not None:
        outcome = (
            f"the probability that <code>{target}</code> is <code>{escape(str(options['positive']))}</code>"
        )
    else:
        outcome = f"the probability of the event <code>{target}</code>"
    terms = sum(1 for label in model.labels if label != "intercept")
    stats = model.stats
    excluded = (
        f", after leaving out {stats['n_excluded']:,} with missing values" if stats["n_excluded"] else ""
    )
    filled = stats.get("missing_filled") or {}
    if filled:  # missing= kept these rows: their NULLs were filled (numeric) or made a level (categorical)
        counts = ", ".join(f"<code>{escape(term)}</code> on {rows:,} rows" for term, rows in filled.items())
        excluded += f"; NULLs filled in {counts}"
    split = model.split
    held = (
        (
            f" (its training rows: a share {split.share:g} was held out by the hash of "
            f"<code>{escape(split.key)}</code>)"
        )
        if split is not None
        else ""
    )
    return (
        f"A logistic regression that estimates {outcome} from {terms} term{'s' if terms != 1 else ''}, "
        f"fitted on {stats['n_used']:,} rows of <code>{escape(model.source)}</code>{held}{excluded}."
    )


HOSMER_LEMESHOW_ALARM = 0.001
CALIBRATION_SLOPE_BAND = (0.8, 1.2)
LARGE_SHIFT = 0.25  # PSI above this reads as a large shift (common practice, as dbfit.lifecycle.drift)
WARNING_RULES = (
    f"The assessment warns when the Hosmer-Lemeshow p-value is below {HOSMER_LEMESHOW_ALARM:g}, when the "
    f"calibration slope lies outside [{CALIBRATION_SLOPE_BAND[0]:g}, {CALIBRATION_SLOPE_BAND[1]:g}] (below: "
    "the predictions are too extreme for these rows; above: too timid), and when a variable's population "
    f"stability index exceeds {LARGE_SHIFT:g}. These are the report's own conventions, not statistical law."
)


def _metric_values(metrics: pa.Table) -> dict[str, float | None]:
    return dict(zip(metrics["metric"].to_pylist(), metrics["value"].to_pylist()))


def assessment_warnings(assessment: dict[str, pa.Table] | None) -> list[str]:
    """The warnings the assessment raises by the rules of :data:`WARNING_RULES`."""
    if assessment is None:
        return []
    found = []
    values = _metric_values(assessment["metrics"])
    p = values.get("hosmer_lemeshow_p")
    if p is not None and p < HOSMER_LEMESHOW_ALARM:
        found.append(
            f"Hosmer-Lemeshow p {p_value(p)} (statistic {number(values['hosmer_lemeshow'])} on "
            f"{count(values['hosmer_lemeshow_df'])} degrees of freedom): the predicted probabilities do not "
            "match the observed event rates across the score groups of the assessed rows."
        )
    line = assessment.get("calibration_line")
    slope = line["slope"][0].as_py() if line is not None else None
    low, high = CALIBRATION_SLOPE_BAND
    if slope is not None and not low <= slope <= high:
        direction = "too extreme (overfitted, or a different population)" if slope < low else "too timid"
        found.append(
            f"Calibration slope {number(slope)}, outside [{low:g}, {high:g}]: on the assessed rows the "
            f"predictions are {direction}; the model needs recalibrating or refitting before use."
        )
    drift = assessment.get("drift")
    if drift is not None and drift.num_rows:
        for row in drift.to_pylist():
            if row["psi"] > LARGE_SHIFT:
                found.append(
                    f"Large shift of {row['variable']} against the training rows (population stability index "
                    f"{number(row['psi'])} > {LARGE_SHIFT:g})."
                )
    return found


def _warnings_section(fit: list[str], assessed: list[str], has_assessment: bool) -> str:
    rules = f'<p class="hint">{escape(WARNING_RULES)}</p>' if has_assessment else ""
    if not fit and not assessed:
        checked = "the fit nor the assessment" if has_assessment else "the fit (no assessment was given)"
        return (
            f'<section class="warnings clean"><h2>Warnings</h2><p>Neither {checked} raised a warning.</p>'
            f"{rules}</section>"
        )
    parts = []
    for title, items in (("From the fit", fit), ("From the assessment", assessed)):
        if items:
            listed = "".join(f"<li>{escape(w)}</li>" for w in items)
            parts.append(f"<h3>{title}</h3><ul>{listed}</ul>")
    return (
        f'<section class="warnings" role="alert"><h2>Warnings ({len(fit) + len(assessed)}): read these '
        f"before the numbers</h2>{''.join(parts)}{rules}</section>"
    )


def _identity_section(model: Model, assessment: dict[str, pa.Table] | None) -> str:
    """Which model this is, what it was fitted on, and which rows the assessment used."""
    from dbfit import __version__

    stats = model.stats
    split = model.split
    rows_note = None
    if assessment is not None:
        rows_note = _metric_notes(assessment["metrics"]).get("rows") or "rows the caller scored"
    threshold = None
    if assessment is not None and "confusion" in assessment:
        made = assessment["confusion"].schema.metadata or {}
        threshold = made.get(b"dbfit_threshold", b"").decode() or None
    items = [
        ("model", escape(model.name) if model.name else "not stored (no name)"),
        ("version", count(model.version) if model.version is not None else "\u2013"),
        ("fitted at", escape(model.fitted_at.strftime("%Y-%m-%d %H:%M:%S %Z").strip())),
        ("formula", f"<code>{escape(model.formula)}</code>"),
        ("source", f"<code>{escape(model.source)}</code>"),
        (
            "rows fitted on",
            (
                f"{count(stats['n_used'])} used, {count(stats['n_excluded'])} left out (a NULL in a used column)"
            ),
        ),
        (
            "split",
            f"held out: share {split.share:g} by the hash of <code>{escape(split.key)}</code>"
            if split is not None
            else "none: the model was fitted on every complete row of the source",
        ),
        ("rows assessed", escape(rows_note) if rows_note else "none: no assessment was given"),
        ("threshold", f"flagged when p &gt;= {escape(threshold)}" if threshold else "\u2013"),
        ("written by", f"dbfit {escape(__version__)}"),
    ]
    rows = "".join(f"<tr><th>{label}</th><td>{value}</td></tr>" for label, value in items)
    return f'<section class="identity"><h2>Model</h2><table class="identity"><tbody>{rows}</tbody></table></section>'


LEVELS_SHOWN = 6
WHOLE_NUMBER_TYPES = {
    "TINYINT",
    "SMALLINT",
    "INTEGER",
    "BIGINT",
    "HUGEINT",
    "UTINYINT",
    "USMALLINT",
    "UINTEGER",
    "UBIGINT",
    "UHUGEINT",
}


def _levels_text(levels: list[dict], present: int) -> str:
    shown = ", ".join(
        f"<code>{escape(row['level'])}</code> {share(row['share'])}" for row in levels[:LEVELS_SHOWN]
    )
    rest = levels[LEVELS_SHOWN:]
    if rest:
        others = sum(row["rows"] for row in rest)
        shown += f", {len(rest):,} more levels {share(others / present if present else None)}"
    return shown


def _data_section(summary: pa.Table, levels: pa.Table) -> str:
    """One row per variable: type, rows, NULLs, range and mean or levels and their shares."""
    by_variable: dict[str, list[dict]] = {}
    for row in levels.to_pylist():
        by_variable.setdefault(row["variable"], []).append(row)
    body = []
    for row in summary.to_pylist():
        kind = row["kind"] + (f" ({row['sql_type'].lower()})" if row["sql_type"] else "")
        if row["kind"] == "categorical":
            values = _levels_text(by_variable.get(row["variable"], []), row["rows"] - row["nulls"])
            mean = "\u2013"
        else:
            whole = count if row["sql_type"].upper() in WHOLE_NUMBER_TYPES else number
            values = f"{whole(row['minimum'])} to {whole(row['maximum'])}"
            mean = number(row["mean"])
        body.append(
            f"<tr><td><code>{escape(row['variable'])}</code></td><td>{escape(row['role'])}</td>"
            f"<td>{escape(kind)}</td><td>{count(row['nulls'])}</td><td>{mean}</td>"
            f'<td class="values">{values}</td></tr>'
        )
    rows = count(summary["rows"][0].as_py()) if summary.num_rows else "0"
    return (
        '<section class="data"><h2>Data</h2><table class="data"><thead><tr><th>variable</th><th>role</th>'
        "<th>type</th><th>NULLs</th><th>mean</th><th>range, or levels and their shares</th></tr></thead>"
        f'<tbody>{"".join(body)}</tbody></table><p class="hint">Over the {rows} rows the model was '
        "fitted on (its training rows, NULLs included; shares are of the rows with a value).</p></section>"
    )


def _statistics_section(model: Model) -> str:
    stats = model.stats
    tiles = []
    for key, label in STATISTICS:
        value = stats.get(key)
        bad = ' class="bad"' if key == "converged" and value is False else ""
        tiles.append(f"<div><dt>{escape(label)}</dt><dd{bad}>{number(value, 6)}</dd></div>")
    used = {
        k: v
        for k, v in model.options.items()
        if v not in (None, False, {}, []) and k not in ("max_iter", "tol")
    }
    extra = "".join(f"<li>{escape(str(note))}</li>" for note in stats.get("notes", []))
    options = ", ".join(f"<code>{escape(k)}={escape(repr(v))}</code>" for k, v in used.items())
    return (
        f'<section><h2>Fit</h2><dl class="tiles">{"".join(tiles)}'
        f"</dl>{f'<p class=hint>Options: {options}</p>' if options else ''}"
        f"{f'<ul class=hint>{extra}</ul>' if extra else ''}</section>"
    )


def _coefficient_row(row: dict) -> str:
    term = f"<td><code>{escape(row['term'])}</code></td>"
    if row["estimate"] is None:
        return (
            f'<tr class="aliased">{term}<td class="note" colspan="6">aliased: no estimate (constant, or a '
            f"linear combination of earlier terms)</td></tr>"
        )
    if row["std_error"] is None:
        note = (
            "exactly 0: removed by the penalty"
            if row["estimate"] == 0
            else "penalised fit: no standard error"
        )
        return (
            f'<tr>{term}<td>{number(row["estimate"])}</td><td class="note" colspan="3">{note}</td>'
            f"<td>{number(row['odds_ratio'])}</td><td>\u2013</td></tr>"
        )
    interval = f"{number(row['odds_ratio_low'])} to {number(row['odds_ratio_high'])}"
    cells = [
        number(row["estimate"]),
        number(row["std_error"]),
        number(row["wald_z"], 3),
        escape(p_value(row["p_value"])),
        number(row["odds_ratio"]),
        interval,
    ]
    return f"<tr>{term}{''.join(f'<td>{c}</td>' for c in cells)}</tr>"


def _coefficients_section(coefficients: pa.Table) -> str:
    head = (
        "<tr><th>term</th><th>log-odds effect</th><th>std. error</th><th>z</th><th>p</th>"
        "<th>odds ratio</th><th>95% interval of the odds ratio</th></tr>"
    )
    rows = coefficients.to_pylist()
    body = "".join(_coefficient_row(row) for row in rows)
    wald = any(row["std_error"] is not None for row in rows)
    hint = (
        "p-values and intervals are Wald's, from the standard errors shown."
        if wald
        else "Penalised estimates carry no Wald standard error, so no p-value or interval is shown."
    )
    forest = forest_plot(coefficients)
    figure = (
        f'<figure class="forest-figure">{forest}<figcaption>Each dot is a term\'s odds ratio (the factor on '
        f"the odds per unit, or per level against the reference) with its 95% Wald interval; the dashed "
        f"line is no effect. Values beyond {ODDS_FLOOR:g} or {ODDS_CEILING:,g} are drawn at the edge and marked "
        f"\u25c0 or \u25b6; hollow dots are penalised estimates without interval.</figcaption></figure>"
        if forest
        else '<p class="hint">The model has only an intercept: there is no odds ratio to plot.</p>'
    )
    return (
        f'<section><h2>Coefficients</h2><table class="coefficients"><thead>{head}</thead><tbody>{body}'
        f'</tbody></table><p class="hint">{hint}</p></section><section><h2>Odds ratios</h2>{figure}</section>'
    )


COUNT_METRICS = ("rows", "positives", "hosmer_lemeshow_df")


def _metric_cell(metric: str, value: float | None) -> str:
    if value is not None and metric in COUNT_METRICS:
        return count(value)
    return escape(p_value(value)) if metric.endswith("_p") else number(value)


def _metric_notes(metrics: pa.Table) -> dict[str, str | None]:
    return dict(zip(metrics["metric"].to_pylist(), metrics["note"].to_pylist()))


def _metrics_table(metrics: pa.Table, line: pa.Table | None) -> str:
    rows = []
    for row in metrics.to_pylist():
        name = METRIC_NAMES.get(row["metric"], row["metric"])
        note = "" if row["metric"] == "rows" else escape(row["note"] or "")
        rows.append(
            f"<tr><td>{escape(name)}</td><td>{_metric_cell(row['metric'], row['value'])}</td>"
            f'<td class="note">{note}</td></tr>'
        )
    if line is not None:
        fitted = line.to_pylist()[0]
        passes = f"{fitted['passes']} Newton pass{'es' if fitted['passes'] != 1 else ''}"
        note = fitted["note"] or (
            f"logistic fit of the outcome on the linear predictor ({passes}); 1 and 0 when calibrated"
        )
        for key in ("slope", "intercept"):
            rows.append(
                f"<tr><td>calibration {key}</td><td>{fixed(fitted[key])}</td>"
                f'<td class="note">{escape(note)}</td></tr>'
            )
    return (
        '<table class="metrics"><thead><tr><th>metric</th><th>value</th><th>note</th></tr></thead>'
        f"<tbody>{''.join(rows)}</tbody></table>"
    )


def _split_table(split: pa.Table) -> str:
    rows = "".join(
        f"<tr><td>{escape(METRIC_NAMES.get(row['metric'], row['metric']))}</td>"
        f"<td>{_metric_cell(row['metric'], row['training'])}</td>"
        f"<td>{_metric_cell(row['metric'], row['held_out'])}</td></tr>"
        for row in split.to_pylist()
    )
    return (
        "<h3>Training and held-out rows side by side</h3>"
        '<table class="metrics split"><thead><tr><th>metric</th><th>training rows (in-sample)</th>'
        f"<th>held-out rows (out-of-sample)</th></tr></thead><tbody>{rows}</tbody></table>"
        '<p class="hint">A held-out figure clearly worse than its training figure suggests overfitting.</p>'
    )


def _confusion_table(confusion: pa.Table) -> str:
    """Actual by predicted class at the threshold, with each cell's share of all rows."""
    cells = {(r["actual"], r["predicted"]): r["rows"] for r in confusion.to_pylist()}
    total = sum(cells.values())
    made = confusion.schema.metadata or {}
    threshold = escape(made.get(b"dbfit_threshold", b"the threshold").decode())

    def cell(actual: int, predicted: int, css: str) -> str:
        n = cells.get((actual, predicted), 0)
        return f'<td class="{css}">{count(n)}<span>{share(n / total if total else None)}</span></td>'

    return (
        f"<h3>Confusion matrix at the threshold {threshold}</h3>"
        '<table class="confusion"><thead><tr><th></th><th>flagged (p &gt;= threshold)</th>'
        "<th>not flagged</th><th>total</th></tr></thead><tbody>"
        f"<tr><th>event (outcome 1)</th>{cell(1, 1, 'hit')}{cell(1, 0, 'miss')}"
        f"<td>{count(cells.get((1, 1), 0) + cells.get((1, 0), 0))}</td></tr>"
        f"<tr><th>no event (outcome 0)</th>{cell(0, 1, 'miss')}{cell(0, 0, 'hit')}"
        f"<td>{count(cells.get((0, 1), 0) + cells.get((0, 0), 0))}</td></tr>"
        f"<tr><th>total</th><td>{count(cells.get((1, 1), 0) + cells.get((0, 1), 0))}</td>"
        f"<td>{count(cells.get((1, 0), 0) + cells.get((0, 0), 0))}</td><td>{count(total)}</td></tr>"
        '</tbody></table><p class="hint">Each cell: rows, and their share of all assessed rows. True '
        "positives top left, true negatives bottom right.</p>"
    )


def _auc(metrics: pa.Table) -> float | None:
    return _metric_values(metrics).get("auc")


def _assessment_section(assessment: dict[str, pa.Table]) -> str:
    missing = [key for key in ASSESSMENT_KEYS if key not in assessment]
    if missing:
        raise DbfitError(
            f"the assessment lacks the table(s) {', '.join(missing)}; give all of "
            f"{', '.join(ASSESSMENT_KEYS)} (from dbfit.assessment.metrics)"
        )
    charts = [
        (
            "ROC curve",
            roc_plot(assessment["curve"], _auc(assessment["metrics"])),
            "How well the scores rank events above non-events at every cut-off; the dashed line is chance.",
        ),
        (
            "Calibration",
            calibration_plot(assessment["calibration"]),
            "Observed event rate per score group against the mean predicted probability, with 95% Wilson "
            "intervals; a calibrated model stays on the dashed diagonal.",
        ),
        (
            "Cumulative gains",
            gains_plot(assessment["gains"]),
            "Share of all events found when taking the highest-scored rows first; the bars are the score groups.",
        ),
    ]
    figures = "".join(
        f"<figure><h3>{name}</h3>{svg}<figcaption>{caption}</figcaption></figure>"
        for name, svg, caption in charts
    )
    rows = (
        _metric_notes(assessment["metrics"]).get("rows")
        or "rows the caller scored (the assessment does not say which)"
    )
    confusion = _confusion_table(assessment["confusion"]) if "confusion" in assessment else ""
    split = _split_table(assessment["split_metrics"]) if "split_metrics" in assessment else ""
    return (
        f'<section><h2>Assessment</h2><p class="rows">Rows assessed: {escape(rows)}.</p>'
        f"{_metrics_table(assessment['metrics'], assessment.get('calibration_line'))}{confusion}{split}</section>"
        f'<section><h2>Discrimination and calibration</h2><div class="charts">{figures}</div></section>'
    )


def _note_of(table: pa.Table) -> str | None:
    made = table.schema.metadata or {}
    return made[b"dbfit_note"].decode() if b"dbfit_note" in made else None


def _term_tests_section(tests: pa.Table) -> str:
    """The joint Wald test of each formula term (all its columns at once), and the likelihood-ratio test from
    a refit without the term when it was asked for."""
    note = _note_of(tests)
    if note is not None:
        return f'<section class="term-tests"><h2>Tests per term</h2><p class="hint">Not computed: {escape(note)}</p></section>'
    ratio = "lr_p_value" in tests.column_names
    head = "<th>term</th><th>df</th><th>Wald chi-square</th><th>p</th>"
    if ratio:
        head += "<th>deviance difference</th><th>p (likelihood ratio)</th><th>note</th>"
    body = []
    for row in tests.to_pylist():
        cells = [count(row["df"]), number(row["wald_chi_square"]), escape(p_value(row["wald_p_value"]))]
        if ratio:
            cells += [number(row["deviance_difference"]), escape(p_value(row["lr_p_value"]))]
        extra = f'<td class="note">{escape(row.get("note") or "")}</td>' if ratio else ""
        body.append(
            f"<tr><td><code>{escape(row['term'])}</code></td>{''.join(f'<td>{c}</td>' for c in cells)}{extra}</tr>"
        )
    made = tests.schema.metadata or {}
    scans = made.get(b"dbfit_scans", b"0").decode()
    how = (
        f"the likelihood-ratio tests refit the model without each term, warm-started ({escape(scans)} scans)"
        if ratio
        else "no likelihood-ratio test was asked for (it refits the model once per term)"
    )
    return (
        '<section class="term-tests"><h2>Tests per term</h2><table class="term-tests"><thead><tr>'
        f'{head}</tr></thead><tbody>{"".join(body)}</tbody></table><p class="hint">Each row tests all '
        "columns of one formula term at once (a categorical's levels, an interaction's products): the Wald "
        f"test from the estimates' covariance, no scan; {how}.</p></section>"
    )


def _effects_section(effects: pa.Table) -> str:
    """Average marginal effects on the probability with their delta-method standard errors."""
    note = _note_of(effects)
    if note is not None:
        return f'<section class="effects"><h2>Effects on the probability</h2><p class="hint">Not computed: {escape(note)}</p></section>'
    body = []
    for row in effects.to_pylist():
        what = (
            f"<code>{escape(row['term'])}</code> = <code>{escape(row['level'])}</code> against "
            f"<code>{escape(row['reference'])}</code>"
            if row["level"] is not None
            else f"<code>{escape(row['term'])}</code> per unit"
        )
        interval = (
            f"{number(row['ci_low'])} to {number(row['ci_high'])}"
            if row["std_error"] is not None
            else "\u2013"
        )
        cells = [number(row["effect"]), number(row["std_error"]), escape(p_value(row["p_value"])), interval]
        body.append(f"<tr><td>{what}</td>{''.join(f'<td>{c}</td>' for c in cells)}</tr>")
    made = {k.decode(): v.decode() for k, v in (effects.schema.metadata or {}).items()}
    rows = escape(made.get("dbfit_rows", "the rows"))
    return (
        '<section class="effects"><h2>Effects on the probability</h2><table class="effects"><thead><tr>'
        "<th>effect of</th><th>change in probability</th><th>std. error</th><th>p</th><th>95% interval</th>"
        f'</tr></thead><tbody>{"".join(body)}</tbody></table><p class="hint">Average marginal effects '
        f"(over {rows}): for a numeric term the mean over rows of the derivative of the probability "
        "per unit, for a level of a categorical the mean change in probability from the reference level, "
        "every other variable as observed. Standard errors by the delta method.</p></section>"
    )


def _drift_section(drift: pa.Table) -> str:
    """Population stability per variable between the training snapshot and the new source."""
    made = {k.decode(): v.decode() for k, v in (drift.schema.metadata or {}).items()}
    source = escape(made.get("dbfit_source", "the new source"))
    if not drift.num_rows:
        reason = escape(made.get("dbfit_note", "no variable to compare"))
        return f'<section class="drift"><h2>Drift</h2><p class="hint">Not computed: {reason}</p></section>'
    shifted = ' class="shifted"'
    body = "".join(
        f"<tr{shifted if row['psi'] > LARGE_SHIFT else ''}><td><code>{escape(row['variable'])}"
        f"</code></td><td>{escape(row['kind'])}</td><td>{count(row['bins'])}</td>"
        f"<td>{count(row['training_rows'])}</td><td>{count(row['new_rows'])}</td><td>{number(row['psi'])}</td>"
        f"<td>{escape(row['reading'])}</td></tr>"
        for row in drift.to_pylist()
    )
    return (
        f'<section class="drift"><h2>Drift against the training rows</h2><p class="rows">New rows: '
        f"<code>{source}</code>, binned on the deciles (numeric) and levels (categorical) recorded from the "
        'training rows when the model was saved.</p><table class="drift"><thead><tr><th>variable</th>'
        "<th>kind</th><th>bins</th><th>training rows</th><th>new rows</th><th>PSI</th><th>reading</th></tr>"
        f'</thead><tbody>{body}</tbody></table><p class="hint">Population stability index (Siddiqi 2006); '
        "readings by common practice: below 0.1 stable, 0.1 to 0.25 some shift, above 0.25 a large "
        "shift. <code>score</code> is the linear predictor.</p></section>"
    )


GROUP_FIGURES = (
    ("rows", "rows"),
    ("events", "events"),
    ("mean_predicted", "mean predicted"),
    ("observed_rate", "observed rate"),
    ("auc", "AUC"),
    ("log_loss", "log loss"),
    ("brier_score", "Brier score"),
    ("calibration_slope", "calibration slope"),
    ("calibration_intercept", "calibration intercept"),
)
GROUP_RATES = (
    ("positive_rate", "flagged"),
    ("true_positive_rate", "true-positive rate"),
    ("false_positive_rate", "false-positive rate"),
)
GROUP_CAUTION = (
    "These figures describe how this model scores these rows, group by group. They do not establish that the "
    "model or a decision based on it is fair, lawful or unlawful, nor why the groups differ (base rates, the "
    "data collected, the model). Which groups, which threshold and which gap matter are policy choices; local "
    "regulation and licensed professional practice come first."
)


def _groups_section(groups: pa.Table) -> str:
    """The assessment by group: each group's figures, then its rates and their gaps against the reference."""
    made = {k.decode(): v.decode() for k, v in (groups.schema.metadata or {}).items()}
    rows = groups.to_pylist()

    def name(row: dict) -> str:
        shown = "NULL" if row["group"] is None else escape(row["group"])
        return f"<b>{shown}</b> (reference)" if row["is_reference"] else shown

    def table(columns: list[tuple[str, str]], kind: str) -> str:
        head = "".join(f"<th>{escape(title)}</th>" for _, title in columns)
        body = "".join(
            f"<tr><td>{name(row)}</td><td>{escape(row['status'])}</td>"
            + "".join(f"<td>{number(row[key])}</td>" for key, _ in columns)
            + "</tr>"
            for row in rows
        )
        return (
            f'<table class="groups {kind}"><thead><tr><th>group</th><th>status</th>{head}</tr></thead>'
            f"<tbody>{body}</tbody></table>"
        )

    gaps: list[tuple[str, str]] = []
    for key, title in GROUP_RATES:
        gaps += [(key, title), (f"{key}_ratio", "ratio"), (f"{key}_difference", "difference")]
    notes = "".join(f"<li>{name(row)}: {escape(row['note'])}</li>" for row in rows if row["note"] is not None)
    threshold = escape(made.get("dbfit_threshold", "?"))
    return (
        f'<section class="by-group"><h2>Assessment by group</h2><p class="rows">Groups by '
        f"<code>{escape(made.get('dbfit_by', '?'))}</code> over {escape(made.get('dbfit_rows', 'the rows'))}; "
        f"flagged when p &gt;= {threshold}; groups of fewer than {escape(made.get('dbfit_min_rows', '?'))} "
        f"rows show counts only.</p>{table(list(GROUP_FIGURES), 'figures')}"
        f"<h3>Rates at the threshold, against the reference group</h3>{table(gaps, 'gaps')}"
        f"<figure>{group_rates_plot(groups)}</figure>"
        f'<p class="hint">Ratio = group / reference, difference = group - reference.</p>'
        + (f'<ul class="notes">{notes}</ul>' if notes else "")
        + f'<p class="hint">{GROUP_CAUTION}</p></section>'
    )


def render_report(model: Model, assessment: dict[str, pa.Table] | None = None) -> str:
    """The report page as one HTML string; ``assessment`` as made by :func:`report_tables` (its optional
    tables, when present, add their sections: ``confusion``, ``calibration_line``, ``split_metrics``,
    ``data_summary`` with ``data_levels``, ``term_tests``, ``effects``, ``groups``, ``drift``)."""
    from dbfit import __version__

    parts = [
        f'<header><p class="kicker">dbfit model report</p><h1>{escape(model.formula)}</h1>'
        f'<p class="job">{job_sentence(model)}</p></header>',
        _warnings_section(list(model.warnings), assessment_warnings(assessment), assessment is not None),
        _identity_section(model, assessment),
    ]
    if assessment is not None and "data_summary" in assessment:
        parts.append(_data_section(assessment["data_summary"], assessment["data_levels"]))
    parts += [_statistics_section(model), _coefficients_section(model.coefficients)]
    if assessment is not None and "term_tests" in assessment:
        parts.append(_term_tests_section(assessment["term_tests"]))
    if assessment is not None and "effects" in assessment:
        parts.append(_effects_section(assessment["effects"]))
    if assessment is not None:
        parts.append(_assessment_section(assessment))
        if "groups" in assessment:
            parts.append(_groups_section(assessment["groups"]))
        if "drift" in assessment:
            parts.append(_drift_section(assessment["drift"]))
    else:
        parts.append(
            '<section><h2>Assessment</h2><p class="hint">No assessment was given: this report shows the '
            "fit only. Score held-out rows and pass the assessment tables to see discrimination and "
            "calibration.</p></section>"
        )
    parts.append(
        f'<section class="cautions"><h2>Cautions for high-stakes use</h2><p>{CAUTIONS}</p></section>'
    )
    parts.append(
        f"<footer>Written by dbfit {escape(__version__)}. A self-contained file: no script, no "
        f"external resources.</footer>"
    )
    return (
        f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"><meta name="viewport" '
        f'content="width=device-width, initial-scale=1"><title>dbfit report: {escape(model.formula)}</title>'
        f"<style>{STYLE}</style></head><body><main>{''.join(parts)}</main></body></html>\n"
    )


def write_report(model: Model, path: str | Path, assessment: dict[str, pa.Table] | None = None) -> Path:
    """Write the report page to ``path`` (UTF-8) and return the path."""
    path = Path(path)
    page = render_report(model, assessment)
    try:
        path.write_text(page, encoding="utf-8")
    except OSError as err:
        raise DbfitError(f"the report cannot be written to {path}: {err.strerror or err}") from None
    return path
