"""The report's four charts as inline SVG: odds-ratio forest plot, ROC curve, calibration plot, gains chart.

Each takes plain pyarrow tables (the model's coefficient table, or the assessment tables) and returns SVG text.
"""

from __future__ import annotations

import math
from html import escape

import pyarrow as pa

from dbfit.assessment.report_format import count, number
from dbfit.assessment.svg import MARGIN_BOTTOM, MARGIN_TOP, Chart, num

ODDS_FLOOR, ODDS_CEILING = 1e-3, 1e3  # odds ratios beyond these are drawn at the edge, marked as cut off
ROW_HEIGHT = 26
FOREST_WIDTH = 760
CHAR_WIDTH = 6.6
LABEL_CHARS = 28


def _short(label: str) -> str:
    return label if len(label) <= LABEL_CHARS else label[: LABEL_CHARS - 1] + "\u2026"


def _odds_range(rows: list[dict]) -> tuple[float, float]:
    values = [1.0]
    for row in rows:
        for key in ("odds_ratio", "odds_ratio_low", "odds_ratio_high"):
            value = row.get(key)
            if value is not None and math.isfinite(value) and value > 0:
                values.append(min(max(value, ODDS_FLOOR), ODDS_CEILING))
    low, high = min(values), max(values)
    low, high = 10 ** (math.floor(math.log10(low) * 2) / 2), 10 ** (math.ceil(math.log10(high) * 2) / 2)
    if high / low < 10:
        centre = math.sqrt(low * high)
        low, high = max(centre / 3.2, ODDS_FLOOR), min(centre * 3.2, ODDS_CEILING)
    return low, high


def forest_plot(coefficients: pa.Table) -> str | None:
    """Odds ratios with their 95 % intervals on a log axis, one row per term; None when only an intercept."""
    rows = [r for r in coefficients.to_pylist() if r["term"] != "intercept"]
    if not rows:
        return None
    labels = max(len(_short(r["term"])) for r in rows)
    left = min(40 + labels * CHAR_WIDTH, 230)
    height = MARGIN_TOP + MARGIN_BOTTOM + ROW_HEIGHT * len(rows)
    chart = Chart.make(
        _odds_range(rows),
        (0, len(rows)),
        "Odds ratios with 95% intervals (log scale)",
        "odds ratio (log scale; 1 = no effect)",
        "",
        "forest",
        x_log=True,
        height=height,
        left=left,
        width=FOREST_WIDTH,
    )
    chart.segment((1.0, 0), (1.0, len(rows)), "no-effect")
    for index, row in enumerate(rows):
        middle = len(rows) - index - 0.5  # the first term at the top
        y = num(chart.y(middle) + 4)
        chart.raw(
            f'<text class="term" x="{num(left - 8)}" y="{y}" text-anchor="end">{escape(_short(row["term"]))}'
            f"<title>{escape(row['term'])}</title></text>"
        )
        if row["estimate"] is None:
            chart.raw(
                f'<text class="aliased-note" x="{num(chart.x(1.0) + 8)}" y="{y}">aliased: no estimate</text>'
            )
            continue
        odds = row["odds_ratio"]
        low, high = row.get("odds_ratio_low"), row.get("odds_ratio_high")
        has_interval = row["std_error"] is not None and low is not None and high is not None
        if has_interval:
            chart.segment((low, middle), (high, middle), "interval")
        least = min(odds, low) if has_interval else odds
        most = max(odds, high) if has_interval else odds
        for beyond, limit, mark in (
            (least < chart.x.low, chart.x.low, "\u25c0"),
            (most > chart.x.high, chart.x.high, "\u25b6"),
        ):
            if beyond:
                chart.raw(
                    f'<text class="cut-off" x="{num(chart.x(limit))}" y="{y}" text-anchor="middle">'
                    f"{mark}<title>cut off: the value lies beyond the axis</title></text>"
                )
        tip = f"{row['term']}: odds ratio {number(odds)}"
        tip += f" [{number(low)}, {number(high)}]" if has_interval else " (penalised: no interval)"
        chart.point(odds, middle, "estimate" if has_interval else "estimate penalised", tip, radius=4.5)
    return chart.svg(y_ticks=False)


def roc_plot(curve: pa.Table, auc: float | None) -> str:
    """True against false positive rate over the thresholds, with the chance diagonal."""
    table = curve.to_pydict()
    points = [
        (f, t)
        for f, t in zip(table["false_positive_rate"], table["true_positive_rate"])
        if f is not None and t is not None
    ]
    title = "ROC curve" + (f" (AUC {auc:.3f})" if auc is not None else "")
    chart = Chart.make(
        (0, 1), (0, 1), title, "false positive rate (1 - specificity)", "true positive rate (recall)", "roc"
    )
    chart.segment((0, 0), (1, 1), "chance")
    if len(points) < 2:
        chart.raw(
            f'<text class="aliased-note" x="{num(chart.x(0.5))}" y="{num(chart.y(0.5))}" '
            'text-anchor="middle">undefined: the rows hold only one class</text>'
        )
    else:
        chart.polyline(points, "curve")
    if auc is not None:
        chart.raw(
            f'<text class="badge" x="{num(chart.x(0.96))}" y="{num(chart.y(0.06))}" text-anchor="end">'
            f"AUC {auc:.3f}</text>"
        )
    return chart.svg()


def calibration_plot(calibration: pa.Table) -> str:
    """Observed event rate against mean predicted probability per score group, with Wilson intervals."""
    table = calibration.to_pylist()
    top = max([r["wilson_high"] for r in table] + [r["mean_predicted"] for r in table] + [0.1])
    top = min(1.0, math.ceil(top * 10 + 1e-9) / 10)
    chart = Chart.make(
        (0, top),
        (0, top),
        "Calibration by score group",
        "mean predicted probability",
        "observed event rate",
        "calibration",
    )
    chart.segment((0, 0), (top, top), "chance")
    chart.polyline([(r["mean_predicted"], r["observed_rate"]) for r in table], "curve")
    for row in table:
        chart.segment(
            (row["mean_predicted"], row["wilson_low"]),
            (row["mean_predicted"], row["wilson_high"]),
            "interval",
        )
        chart.point(
            row["mean_predicted"],
            row["observed_rate"],
            "estimate",
            f"group {row['group']}: {count(row['rows'])} rows, predicted {row['mean_predicted']:.3f}, "
            f"observed {row['observed_rate']:.3f} [{row['wilson_low']:.3f}, {row['wilson_high']:.3f}]",
        )
    return chart.svg()


def gains_plot(gains: pa.Table) -> str:
    """Cumulative share of events found against share of rows taken, highest scores first."""
    table = gains.to_pylist()
    chart = Chart.make(
        (0, 1),
        (0, 1),
        "Cumulative gains",
        "share of rows, highest scores first",
        "share of all events found",
        "gains",
    )
    for row, before in zip(table, [0.0] + [r["share_of_rows"] for r in table]):
        if row["lift"] is not None:
            chart.bar(
                before,
                row["share_of_rows"],
                row["share_of_positives"] or 0.0,
                "step",
                f"group {row['group']}: lift {row['lift']:.2f}, cumulative lift {row['cumulative_lift']:.2f}",
            )
    chart.segment((0, 0), (1, 1), "chance")
    chart.polyline(
        [(0.0, 0.0)] + [(r["share_of_rows"], r["share_of_positives"] or 0.0) for r in table], "curve"
    )
    return chart.svg()


GROUP_RATE_MARKS = (
    ("positive_rate", "estimate", "share flagged"),
    ("true_positive_rate", "rate tpr", "true-positive rate"),
    ("false_positive_rate", "rate fpr", "false-positive rate"),
)


def group_rates_plot(groups: pa.Table) -> str:
    """Per group (one row each, the first at the top): share flagged, true- and false-positive rate at the
    threshold, on a 0-1 axis; a group whose rates are withheld shows a note instead."""
    rows = groups.to_pylist()
    names = ["NULL" if r["group"] is None else str(r["group"]) for r in rows]
    labels = max(len(_short(n)) for n in names)
    left = min(40 + labels * CHAR_WIDTH, 230)
    chart = Chart.make(
        (0, 1),
        (0, len(rows)),
        "Rates at the threshold by group",
        "rate (filled: share flagged; amber: true-positive rate; hollow: false-positive rate)",
        "",
        "group-rates",
        height=MARGIN_TOP + MARGIN_BOTTOM + ROW_HEIGHT * len(rows),
        left=left,
        width=FOREST_WIDTH,
    )
    for index, (row, name) in enumerate(zip(rows, names)):
        middle = len(rows) - index - 0.5
        y = num(chart.y(middle) + 4)
        shown = _short(name) + (" (ref.)" if row["is_reference"] else "")
        chart.raw(
            f'<text class="term" x="{num(left - 8)}" y="{y}" text-anchor="end">{escape(shown)}'
            f"<title>{escape(name)}</title></text>"
        )
        marks = [(key, css, title) for key, css, title in GROUP_RATE_MARKS if row[key] is not None]
        if not marks:
            chart.raw(
                f'<text class="aliased-note" x="{num(chart.x(0.02))}" y="{y}">{escape(row["status"])}: '
                "rates withheld</text>"
            )
        for key, css, title in marks:
            chart.point(row[key], middle, css, f"{name}: {title} {number(row[key])}", radius=4.5)
    return chart.svg(y_ticks=False)
