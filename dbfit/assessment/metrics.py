"""Discrimination and calibration computed by SQL over scored rows (columns ``y`` in {0, 1} and ``p``).

Nothing but per-metric numbers and small tables leaves the database. Ranks, cumulative counts and
probability groups are computed over the distinct scores, so tied scores are handled exactly.
AUC by ranks: Hanley and McNeil (1982), Radiology 143(1), 29-36, doi:10.1148/radiology.143.1.7063747.
Hosmer-Lemeshow: Hosmer and Lemeshow, Applied Logistic Regression, 2nd ed. (Wiley 2000), section 5.2.2.
Wilson interval: Wilson (1927), JASA 22(158), 209-212, doi:10.1080/01621459.1927.10502953.
Matthews correlation: Matthews (1975), doi:10.1016/0005-2795(75)90109-9.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from statistics import NormalDist

import pyarrow as pa
from sqlglot import exp, parse_one

from dbfit.engines.base import Engine
from dbfit.errors import FitError
from dbfit.expressions import builders as sb

GROUPS = 10
MAX_CURVE_POINTS = 1000
Z_95 = NormalDist().inv_cdf(0.975)


def chi_square_tail(statistic: float, df: float) -> float:
    """P(X > statistic) for X chi-square with ``df`` degrees of freedom.

    scipy is loaded here, at the first tail probability, not when dbfit is imported.
    """
    from scipy.stats import chi2

    return float(chi2.sf(statistic, df))


def check_threshold(threshold: float) -> float:
    if not isinstance(threshold, (int, float)) or not 0.0 < float(threshold) < 1.0:
        raise FitError(f"threshold must lie strictly between 0 and 1 (got {threshold!r})")
    return float(threshold)


def _by_score(scored: exp.Expression) -> exp.Select:
    """One row per distinct score: count, positives, and the counts of all lower scores (cumulative)."""
    grouped = parse_one("SELECT p, count(*) AS c, sum(y) AS c1 FROM dbfit_scored GROUP BY p", read="duckdb")
    grouped = grouped.from_(scored.copy())
    return parse_one(
        """SELECT p, c, c1, c - c1 AS c0,
                  coalesce(sum(c) OVER (ORDER BY p ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING), 0) AS below,
                  coalesce(sum(c1) OVER (ORDER BY p DESC ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW), 0) AS tp,
                  coalesce(sum(c - c1) OVER (ORDER BY p DESC ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW), 0) AS fp
           FROM dbfit_grouped""",
        read="duckdb",
    ).from_(grouped.subquery("dbfit_grouped"))


@dataclass
class Metrics:
    """Named metric values; ``notes`` says why a metric is missing."""

    values: dict[str, float | None]
    notes: dict[str, str]

    def table(self) -> pa.Table:
        names = list(self.values)
        return pa.table(
            {
                "metric": pa.array(names, type=pa.string()),
                "value": pa.array([self.values[n] for n in names], type=pa.float64()),
                "note": pa.array([self.notes.get(n) for n in names], type=pa.string()),
            }
        )


def metrics(
    engine: Engine,
    scored: exp.Expression,
    threshold: float = 0.5,
    rows_note: str | None = None,
    calibration: pa.Table | None = None,
) -> Metrics:
    """Every metric of the assessment from three scans of the scored rows (two when the ``calibration`` table
    of the same rows is given); ``rows_note`` says which rows."""
    threshold = check_threshold(threshold)
    point = parse_one(
        f"""SELECT count(*) AS n, sum(y) AS positives,
                  -avg(CASE WHEN y = 1 THEN ln(p) ELSE ln(1 - p) END) AS log_loss,
                  avg((p - y) * (p - y)) AS brier,
                  sum(CASE WHEN p >= {threshold!r} AND y = 1 THEN 1 ELSE 0 END) AS tp,
                  sum(CASE WHEN p >= {threshold!r} AND y = 0 THEN 1 ELSE 0 END) AS fp,
                  sum(CASE WHEN p < {threshold!r} AND y = 0 THEN 1 ELSE 0 END) AS tn,
                  sum(CASE WHEN p < {threshold!r} AND y = 1 THEN 1 ELSE 0 END) AS fn,
                  sum(CASE WHEN y NOT IN (0, 1) OR p < 0 OR p > 1 THEN 1 ELSE 0 END) AS bad
           FROM dbfit_scored""",
        read="duckdb",
    )
    point = point.from_(scored.copy())
    row = dict(
        zip(["n", "positives", "log_loss", "brier", "tp", "fp", "tn", "fn", "bad"], engine.fetch(point)[0])
    )
    if not row["n"]:
        raise FitError("no rows to assess: every row of the source has a NULL target or predictor")
    if row["bad"]:
        raise FitError(f"{row['bad']} rows have a target outside 0/1 or a probability outside [0, 1]")
    n, positives = int(row["n"]), int(row["positives"])
    negatives = n - positives
    tp, fp, tn, fn = (int(row[k]) for k in ("tp", "fp", "tn", "fn"))
    values: dict[str, float | None] = {
        "rows": float(n),
        "positives": float(positives),
        "log_loss": float(row["log_loss"]),
        "brier_score": float(row["brier"]),
        "accuracy": (tp + tn) / n,
        "precision": _ratio(tp, tp + fp),
        "recall": _ratio(tp, tp + fn),
        "specificity": _ratio(tn, tn + fp),
    }
    precision, recall = values["precision"], values["recall"]
    values["f1"] = (
        (2 * precision * recall / (precision + recall))
        if precision and recall
        else (0.0 if precision is not None and recall is not None else None)
    )
    denominator = math.sqrt(float((tp + fp) * (tp + fn) * (tn + fp) * (tn + fn)))
    values["matthews_correlation"] = (tp * tn - fp * fn) / denominator if denominator else None
    notes: dict[str, str] = {"rows": rows_note} if rows_note else {}
    for name in ("precision", "recall", "specificity", "f1", "matthews_correlation"):
        if values[name] is None:
            notes[name] = "undefined: a count in its denominator is zero at this threshold"
    if positives == 0 or negatives == 0:
        for name in ("auc", "ks_statistic", "hosmer_lemeshow", "hosmer_lemeshow_df", "hosmer_lemeshow_p"):
            values[name] = None
            notes[name] = (
                f"undefined: the rows hold only one class ({positives} positives, {negatives} negatives)"
            )
        return Metrics(values, notes)
    ranks = parse_one(
        """SELECT sum(c1 * (below + (c + 1) / 2.0)) AS rank_sum,
                  max(abs(tp / {P} - fp / {N})) AS ks
           FROM dbfit_by_score""".replace("{P}", repr(float(positives))).replace(
            "{N}", repr(float(negatives))
        ),
        read="duckdb",
    ).from_(_by_score(scored).subquery("dbfit_by_score"))
    rank_sum, ks = engine.fetch(ranks)[0]
    values["auc"] = (float(rank_sum) - positives * (positives + 1) / 2.0) / (positives * negatives)
    values["ks_statistic"] = float(ks)
    statistic, df = hosmer_lemeshow(engine, scored, calibration=calibration)
    values["hosmer_lemeshow"], values["hosmer_lemeshow_df"] = statistic, float(df)
    values["hosmer_lemeshow_p"] = chi_square_tail(statistic, df) if df > 0 else None
    if df <= 0:
        notes["hosmer_lemeshow_p"] = "undefined: fewer than three probability groups"
    return Metrics(values, notes)


def _ratio(a: int, b: int) -> float | None:
    return a / b if b else None


def probability_groups(scored: exp.Expression, groups: int = GROUPS) -> exp.Select:
    """Rows grouped into about ``groups`` equal-count groups of predicted probability; tied scores stay together.

    A distinct score goes to group floor(groups * (rows below it + half its own rows) / all rows).
    """
    return parse_one(
        f"""SELECT least(floor({groups} * (below + c / 2.0) / sum(c) OVER ())::INTEGER, {groups - 1}) AS grp,
                   c, c1, p FROM dbfit_by_score""",
        read="duckdb",
    ).from_(_by_score(scored).subquery("dbfit_by_score"))


def calibration_table(engine: Engine, scored: exp.Expression, groups: int = GROUPS) -> pa.Table:
    """Per probability group: rows, mean predicted, observed rate and its 95 % Wilson interval."""
    query = parse_one(
        """SELECT grp, sum(c) AS n, sum(c1) AS observed, sum(c * p) AS expected, min(p) AS low, max(p) AS high
           FROM dbfit_groups GROUP BY grp ORDER BY grp""",
        read="duckdb",
    ).from_(probability_groups(scored, groups).subquery("dbfit_groups"))
    rows = engine.fetch(query)
    out = {
        "group": [],
        "rows": [],
        "mean_predicted": [],
        "observed_rate": [],
        "wilson_low": [],
        "wilson_high": [],
        "lowest_score": [],
        "highest_score": [],
    }
    for grp, whole, observed, expected, low, high in rows:
        n = int(whole)  # PostgreSQL's sum of counts is NUMERIC
        rate = float(observed) / n
        wilson_low, wilson_high = wilson_interval(float(observed), float(n))
        for key, value in zip(
            out,
            (
                int(grp) + 1,
                int(n),
                float(expected) / n,
                rate,
                wilson_low,
                wilson_high,
                float(low),
                float(high),
            ),
        ):
            out[key].append(value)
    return pa.table(out)


def wilson_interval(successes: float, n: float, z: float = Z_95) -> tuple[float, float]:
    rate = successes / n
    centre = (rate + z * z / (2 * n)) / (1 + z * z / n)
    half = z * math.sqrt(rate * (1 - rate) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    return centre - half, centre + half


def hosmer_lemeshow(
    engine: Engine, scored: exp.Expression, groups: int = GROUPS, calibration: pa.Table | None = None
) -> tuple[float, int]:
    """Sum over groups of (O - E)^2 / (E (1 - E / n)), on (number of groups - 2) degrees of freedom; from the
    ``calibration`` table of the rows when given, else from a scan."""
    table = (
        calibration if calibration is not None else calibration_table(engine, scored, groups)
    ).to_pydict()
    statistic = 0.0
    for n, rate, mean in zip(table["rows"], table["observed_rate"], table["mean_predicted"]):
        expected, observed = mean * n, rate * n
        variance = expected * (1 - expected / n)
        if variance > 0:
            statistic += (observed - expected) ** 2 / variance
    return statistic, len(table["rows"]) - 2


def confusion_table(engine: Engine, scored: exp.Expression, threshold: float = 0.5) -> pa.Table:
    """Counts of actual by predicted class at ``threshold`` (predicted positive when p >= threshold)."""
    threshold = check_threshold(threshold)
    query = parse_one(
        f"""SELECT y::INTEGER AS actual, (p >= {threshold!r})::INTEGER AS predicted, count(*) AS n
            FROM dbfit_scored GROUP BY 1, 2 ORDER BY actual, predicted""",
        read="duckdb",
    )
    query = query.from_(scored.copy())
    counts = {(a, b): n for a, b, n in engine.fetch(query)}
    cells = [(a, b) for a in (0, 1) for b in (0, 1)]
    return pa.table(
        {
            "actual": [a for a, _ in cells],
            "predicted": [b for _, b in cells],
            "rows": [int(counts.get(c, 0)) for c in cells],
        }
    )


def curve_points(engine: Engine, scored: exp.Expression, max_points: int = MAX_CURVE_POINTS) -> pa.Table:
    """Cut-offs at distinct scores (thinned to at most about ``max_points``) with the rates at each.

    Each row: threshold, true and false positive rate (ROC), precision, recall, specificity, share flagged.
    """
    query = parse_one(
        """SELECT p, tp, fp, sum(c1) OVER () AS positives_all, sum(c) OVER () AS N_all,
                   row_number() OVER (ORDER BY p DESC) AS k, count(*) OVER () AS m
            FROM dbfit_by_score""",
        read="duckdb",
    ).from_(_by_score(scored).subquery("dbfit_by_score"))
    thinned = parse_one(
        f"SELECT * FROM dbfit_points WHERE k = m OR k % greatest(1, ceil(m / {max_points})::BIGINT) = 0 ORDER BY p DESC",
        read="duckdb",
    )
    thinned = thinned.from_(query.subquery("dbfit_points"))
    rows = engine.fetch(thinned)
    out = {
        "threshold": [1.0],
        "true_positive_rate": [0.0],
        "false_positive_rate": [0.0],
        "precision": [None],
        "recall": [0.0],
        "specificity": [1.0],
        "share_flagged": [0.0],
    }
    for p, tp, fp, positives, whole, _, _ in rows:
        total = int(whole)  # PostgreSQL's sum of counts is NUMERIC
        negatives = total - positives
        tpr, fpr = float(tp) / positives if positives else None, float(fp) / negatives if negatives else None
        for key, value in zip(
            out,
            (
                float(p),
                tpr,
                fpr,
                _ratio(int(tp), int(tp + fp)),
                tpr,
                None if fpr is None else 1 - fpr,
                float(tp + fp) / total,
            ),
        ):
            out[key].append(value)
    return pa.table(out)


def gains_table(
    engine: Engine, scored: exp.Expression, groups: int = GROUPS, calibration: pa.Table | None = None
) -> pa.Table:
    """Cumulative gains and lift by group, from the highest scores down (from ``calibration`` when given)."""
    calibration = (
        calibration if calibration is not None else calibration_table(engine, scored, groups)
    ).to_pydict()
    order = list(range(len(calibration["group"])))[::-1]
    total_rows = sum(calibration["rows"])
    total_positive = sum(r * n for r, n in zip(calibration["observed_rate"], calibration["rows"]))
    out = {"group": [], "share_of_rows": [], "share_of_positives": [], "lift": [], "cumulative_lift": []}
    rows = positives = 0.0
    base = total_positive / total_rows
    for rank, index in enumerate(order, start=1):
        n, rate = calibration["rows"][index], calibration["observed_rate"][index]
        rows += n
        positives += rate * n
        for key, value in zip(
            out,
            (
                rank,
                rows / total_rows,
                positives / total_positive if total_positive else None,
                rate / base if base else None,
                (positives / rows) / base if base else None,
            ),
        ):
            out[key].append(value)
    return pa.table(out)


def scored_relation(
    model, source: str | None, by: exp.Expression | None = None, *, engine: Engine | None = None
) -> exp.Expression:
    """The rows of ``source`` (default: all rows of the model's source) as (y, p), complete rows only.

    ``model`` is a :class:`dbfit.Model`; the scoring query is the one a published view runs. With ``by`` (a
    checked expression tree over the source's columns) also the linear predictor ``eta`` and the group ``g``,
    the text of ``by``'s value (NULL stays NULL). ``engine``, when given, is asked the target's type (no scan):
    PostgreSQL casts no boolean to DOUBLE, so a boolean target is written as a CASE there and everywhere.
    """
    from dbfit.deployment.scoring import scoring_query
    from dbfit.expressions.source import source_relation

    design = model.design
    if design.trials is not None:
        raise FitError("assessment needs a 0/1 target; this model counts successes out of trials")
    target = design.formula.target.copy()
    relation = source_relation(model.source_or_own(source))
    if design.positive is not None:
        y = sb.truth_as_double(exp.EQ(this=sb.paren(target), expression=exp.Literal.string(design.positive)))
    elif engine is not None and _is_boolean(engine, target, relation):
        y = sb.truth_as_double(target)
    else:
        y = sb.as_double(target)
    scored = scoring_query(model, relation)
    rows = exp.select(
        exp.alias_(y, "y", quoted=True), exp.alias_(exp.column("probability", quoted=True), "p", quoted=True)
    )
    if by is not None:
        rows = rows.select(
            exp.alias_(exp.column("linear_predictor", quoted=True), "eta", quoted=True),
            exp.alias_(exp.Cast(this=by.copy(), to=exp.DataType.build("VARCHAR")), "g", quoted=True),
        )
    rows = rows.from_(scored.subquery("dbfit_scored_rows"))
    complete = (
        exp.select("*")
        .from_(rows.subquery("dbfit_yp"))
        .where(
            exp.and_(
                exp.Not(this=exp.Is(this=exp.column("y", quoted=True), expression=exp.Null())),
                exp.Not(this=exp.Is(this=exp.column("p", quoted=True), expression=exp.Null())),
            )
        )
    )
    return complete.subquery("dbfit_scored")


def _is_boolean(engine: Engine, target: exp.Expression, relation: exp.Expression) -> bool:
    """Whether ``target`` is a boolean over ``relation``, as the engine types it (described, not read)."""
    probe = exp.select(exp.alias_(target.copy(), "dbfit_target", quoted=True)).from_(relation.copy())
    return engine.describe(probe)[0][1].upper() == "BOOLEAN"


def assessment_tables(
    engine: Engine, scored: exp.Expression, threshold: float = 0.5, rows_note: str | None = None
) -> dict[str, pa.Table]:
    """Every table of the assessment: metrics, confusion, the cut-off curve, calibration and gains (five scans:
    the calibration groups are computed once, for the Hosmer-Lemeshow test, the plot and the gains)."""
    calibration = calibration_table(engine, scored)
    return {
        "metrics": metrics(engine, scored, threshold, rows_note, calibration).table(),
        "confusion": confusion_table(engine, scored, threshold),
        "curve": curve_points(engine, scored),
        "calibration": calibration,
        "gains": gains_table(engine, scored, calibration=calibration),
    }
