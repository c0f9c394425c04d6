"""A standalone HTML report of a fitted model: no external assets, inline CSS and inline SVG, no script.

``render_report(model, assessment)`` returns the page; ``assessment`` is an optional dict of the pyarrow tables
of ``dbfit.assessment.metrics`` (``metrics``, ``curve``, ``calibration``, ``gains``), and ``groups`` of
``dbfit.assessment.groups`` when the assessment was made by group. Every piece of user text is escaped.
Run ``python -m dbfit.assessment.report --screenshot report.html out.png`` to look at a written report.
"""

from __future__ import annotations

import math
from html import escape
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pyarrow as pa

from dbfit.assessment.report_plots import (
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


def _number(value: Any, digits: int = 4) -> str:
    """A number for a table cell: thousands separators for counts, ``digits`` significant digits otherwise."""
    if value is None:
        return "\u2013"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    value = float(value)
    if math.isnan(value):
        return "\u2013"
    if math.isinf(value):
        return "\u221e" if value > 0 else "-\u221e"
    if value != 0 and (abs(value) >= 1e6 or abs(value) < 1e-4):
        return f"{value:.{digits - 1}e}"
    return f"{value:,.{digits}g}" if abs(value) >= 1e4 else f"{value:.{digits}g}"


def _p_value(value: float | None) -> str:
    if value is None or math.isnan(value):
        return "\u2013"
    return "< 1e-300" if value < 1e-300 else ("< 0.0001" if value < 1e-4 else f"{value:.4f}")


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


def _warnings_section(warnings: list[str]) -> str:
    if not warnings:
        return '<section class="warnings clean"><h2>Warnings</h2><p>The fit raised no warnings.</p></section>'
    items = "".join(f"<li>{escape(w)}</li>" for w in warnings)
    return (
        f'<section class="warnings" role="alert"><h2>Warnings ({len(warnings)}): read these before the '
        f"numbers</h2><ul>{items}</ul></section>"
    )


def _statistics_section(model: Model) -> str:
    stats = model.stats
    tiles = []
    for key, label in STATISTICS:
        value = stats.get(key)
        bad = ' class="bad"' if key == "converged" and value is False else ""
        tiles.append(f"<div><dt>{escape(label)}</dt><dd{bad}>{_number(value, 6)}</dd></div>")
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
            f'<tr>{term}<td>{_number(row["estimate"])}</td><td class="note" colspan="3">{note}</td>'
            f"<td>{_number(row['odds_ratio'])}</td><td>\u2013</td></tr>"
        )
    interval = f"{_number(row['odds_ratio_low'])} to {_number(row['odds_ratio_high'])}"
    cells = [
        _number(row["estimate"]),
        _number(row["std_error"]),
        _number(row["wald_z"], 3),
        _p_value(row["p_value"]),
        _number(row["odds_ratio"]),
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
        f"line is no effect. Values beyond {_number(1e-3)} or {_number(1e3)} are drawn at the edge and marked "
        f"\u25c0 or \u25b6; hollow dots are penalised estimates without interval.</figcaption></figure>"
        if forest
        else '<p class="hint">The model has only an intercept: there is no odds ratio to plot.</p>'
    )
    return (
        f'<section><h2>Coefficients</h2><table class="coefficients"><thead>{head}</thead><tbody>{body}'
        f'</tbody></table><p class="hint">{hint}</p></section><section><h2>Odds ratios</h2>{figure}</section>'
    )


def _metrics_table(metrics: pa.Table) -> str:
    rows = []
    for row in metrics.to_pylist():
        name = METRIC_NAMES.get(row["metric"], row["metric"])
        value = row["value"]
        shown = _number(
            int(value)
            if row["metric"] in ("rows", "positives", "hosmer_lemeshow_df") and value is not None
            else value
        )
        rows.append(
            f'<tr><td>{escape(name)}</td><td>{shown}</td><td class="note">{escape(row["note"] or "")}'
            f"</td></tr>"
        )
    return (
        '<table class="metrics"><thead><tr><th>metric</th><th>value</th><th>note</th></tr></thead>'
        f"<tbody>{''.join(rows)}</tbody></table>"
    )


def _auc(metrics: pa.Table) -> float | None:
    for row in metrics.to_pylist():
        if row["metric"] == "auc":
            return row["value"]
    return None


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
    notes = dict(zip(assessment["metrics"]["metric"].to_pylist(), assessment["metrics"]["note"].to_pylist()))
    rows = notes.get("rows") or "rows the caller scored (the assessment does not say which)"
    return (
        f'<section><h2>Assessment</h2><p class="rows">Rows assessed: {escape(rows)}.</p>'
        f"{_metrics_table(assessment['metrics'])}</section>"
        f'<section><h2>Discrimination and calibration</h2><div class="charts">{figures}</div></section>'
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
            + "".join(f"<td>{_number(row[key])}</td>" for key, _ in columns)
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
    """The report page as one HTML string."""
    from dbfit import __version__

    parts = [
        f'<header><p class="kicker">dbfit model report</p><h1>{escape(model.formula)}</h1>'
        f'<p class="job">{job_sentence(model)}</p></header>',
        _warnings_section(list(model.warnings)),
        _statistics_section(model),
        _coefficients_section(model.coefficients),
    ]
    if assessment is not None:
        parts.append(_assessment_section(assessment))
        if "groups" in assessment:
            parts.append(_groups_section(assessment["groups"]))
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
