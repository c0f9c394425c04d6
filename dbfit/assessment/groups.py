"""Assessment by group: per value of a row-wise SQL expression, the discrimination, calibration and rates of a
model on its scored rows, and the gaps between each group and a reference group.

One grouped scan gives every count-based figure of every group (AUC by ranks over the distinct scores within
the group, as :mod:`dbfit.assessment.metrics` does for all rows); the calibration slope and intercept of each
group (the logistic fit of the outcome on the model's linear predictor) take one grouped aggregate query per
Newton pass, all groups at once, each group's 2 x 2 system solved in numpy.

AUC by ranks: Hanley and McNeil (1982), Radiology 143(1), 29-36, doi:10.1148/radiology.143.1.7063747.
Calibration slope and intercept: Cox (1958), "Two further applications of a model for binary regression",
Biometrika 45(3/4), 562-565, doi:10.2307/2333203.
Newton's method with step-halving: Nocedal and Wright, Numerical Optimization, 2nd ed. (Springer 2006), ch. 3.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa
from sqlglot import exp, parse_one

from dbfit.assessment.metrics import check_threshold, scored_relation
from dbfit.engines.base import Engine
from dbfit.errors import FitError
from dbfit.expressions import builders as sb
from dbfit.expressions.formula import parse_expression
from dbfit.solver.tolerances import FINAL_STEP, MAX_HALVINGS, RISE_TOLERANCE, SINGULAR_RATIO

MIN_GROUP_ROWS = 30  # groups with fewer rows get counts and rates only; their other figures are withheld
MAX_CALIBRATION_PASSES = 50
MAX_GROUPS = 10_000  # more groups than this is almost surely a key, not a grouping: refused

OK, TOO_FEW_ROWS, ONE_CLASS = "ok", "too_few_rows", "one_class"
RATES = ("positive_rate", "true_positive_rate", "false_positive_rate")
GROUP_COLUMNS: dict[str, pa.DataType] = {
    "group": pa.string(),
    "status": pa.string(),
    "is_reference": pa.bool_(),
    "rows": pa.int64(),
    "events": pa.int64(),
    "mean_predicted": pa.float64(),
    "observed_rate": pa.float64(),
    "auc": pa.float64(),
    "log_loss": pa.float64(),
    "brier_score": pa.float64(),
    "true_positive_rate": pa.float64(),
    "false_positive_rate": pa.float64(),
    "positive_rate": pa.float64(),
    "calibration_slope": pa.float64(),
    "calibration_intercept": pa.float64(),
    **{f"{rate}_{kind}": pa.float64() for rate in RATES for kind in ("ratio", "difference")},
    "note": pa.string(),
}

# Per group and distinct score: counts, the row sums of log loss and Brier terms, and the rows below the score
# within the group (for the rank sum). Then per group: every sum the figures need, from this one scan.
_BY_GROUP_AND_SCORE = """
SELECT g, p, count(*) AS c, sum(y) AS c1,
       sum(CASE WHEN y = 1 THEN ln(p) ELSE ln(1 - p) END) AS log_sum,
       sum((p - y) * (p - y)) AS brier_sum,
       sum(CASE WHEN y NOT IN (0, 1) OR p < 0 OR p > 1 THEN 1 ELSE 0 END) AS bad
FROM dbfit_scored GROUP BY g, p"""
_RANKED = """
SELECT *, coalesce(sum(c) OVER (PARTITION BY g ORDER BY p ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING), 0)
          AS below
FROM dbfit_by_score"""
_PER_GROUP = """
SELECT g, sum(c) AS n, sum(c1) AS events, sum(c * p) AS p_sum, -sum(log_sum) AS log_loss_sum,
       sum(brier_sum) AS brier_sum,
       sum(CASE WHEN p >= {t} THEN c1 ELSE 0 END) AS tp,
       sum(CASE WHEN p >= {t} THEN c - c1 ELSE 0 END) AS fp,
       sum(c1 * (below + (c + 1) / 2.0)) AS rank_sum, sum(bad) AS bad
FROM dbfit_ranked GROUP BY g"""
_SUMS = ("n", "events", "p_sum", "log_loss_sum", "brier_sum", "tp", "fp", "rank_sum", "bad")


@dataclass
class GroupAssessment:
    """The table of :func:`assess_groups` and how it was made (scans and Newton passes run)."""

    table: pa.Table
    reference: str | None
    scans: int
    calibration_passes: int
    notes: dict[str, str] = field(default_factory=dict)


def group_expression(by: str) -> exp.Expression:
    """The ``by`` text parsed and checked against the expression allowlist (never spliced as text)."""
    return parse_expression(by, "by")


def assess_groups(
    engine: Engine,
    model: Any,
    source: str,
    by: str,
    *,
    reference: Any = None,
    threshold: float = 0.5,
    min_rows: int = MIN_GROUP_ROWS,
    rows_note: str | None = None,
) -> GroupAssessment:
    """Per value of ``by`` on the scored rows of ``source``: rows, events, mean predicted probability, observed
    rate, AUC, log loss, Brier score, true- and false-positive rate and positive rate at ``threshold``, the
    calibration slope and intercept, and ratio and difference of the three rates against ``reference`` (the
    text of a group's value; default: the group with the most rows).

    Groups are the text of the value of ``by`` (``CAST(... AS VARCHAR)``); NULL is a group of its own. A group
    with fewer than ``min_rows`` rows keeps its counts, mean predicted and observed rate and nothing else; a
    group of one class has no AUC, no calibration fit and no rate whose denominator it lacks.
    """
    threshold = check_threshold(threshold)
    if isinstance(min_rows, bool) or not isinstance(min_rows, int) or min_rows < 1:
        raise FitError(f"min_rows must be a whole number of at least 1 (got {min_rows!r})")
    scored = scored_relation(model, source, by=group_expression(by), engine=engine)
    scans_before = engine.scans
    groups = _group_sums(engine, scored, threshold)
    if not groups:
        raise FitError("no rows to assess: every row of the source has a NULL target or predictor")
    if len(groups) > MAX_GROUPS:
        raise FitError(
            f"by {by!r} gives {len(groups):,} groups, more than the {MAX_GROUPS:,} dbfit assesses at once: "
            "group by a coarser expression (a band, a prefix, a CASE)"
        )
    bad = sum(int(g["bad"]) for g in groups.values())
    if bad:
        raise FitError(f"{bad} rows have a target outside 0/1 or a probability outside [0, 1]")
    rows = {key: _figures(key, sums, min_rows) for key, sums in groups.items()}
    chosen = _reference(rows, reference)
    eligible = [key for key, row in rows.items() if row["status"] == OK]
    fits, passes = calibration_fits(engine, scored, eligible)
    for key, (slope, intercept, note) in fits.items():
        rows[key]["calibration_slope"], rows[key]["calibration_intercept"] = slope, intercept
        if note:
            rows[key]["note"] = _joined(rows[key]["note"], note)
    _disparities(rows, chosen)
    ordered = sorted(rows, key=lambda key: (key is None, key or ""))
    table = pa.table(
        {
            name: pa.array([rows[key][name] for key in ordered], type=kind)
            for name, kind in GROUP_COLUMNS.items()
        }
    )
    notes = {
        "rows": rows_note or "",
        "by": by,
        "reference": "NULL" if chosen is None else chosen,
        "threshold": repr(threshold),
        "min_rows": str(min_rows),
    }
    table = table.replace_schema_metadata({f"dbfit_{k}".encode(): v.encode() for k, v in notes.items()})
    return GroupAssessment(table, chosen, engine.scans - scans_before, passes, notes)


def _group_sums(engine: Engine, scored: exp.Expression, threshold: float) -> dict[str | None, dict]:
    by_score = parse_one(_BY_GROUP_AND_SCORE, read="duckdb").from_(scored.copy())
    ranked = parse_one(_RANKED, read="duckdb").from_(by_score.subquery("dbfit_by_score"))
    per_group = parse_one(_PER_GROUP.replace("{t}", repr(threshold)), read="duckdb")
    per_group = per_group.from_(ranked.subquery("dbfit_ranked"))
    return {row[0]: dict(zip(_SUMS, row[1:])) for row in engine.fetch(per_group)}


def _figures(group: str | None, sums: dict[str, Any], min_rows: int) -> dict[str, Any]:
    """The figures of one group from its sums; what its rows cannot support is None, with the reason."""
    n, events = int(sums["n"]), int(sums["events"])
    non_events = n - events
    tp, fp = int(sums["tp"]), int(sums["fp"])
    row: dict[str, Any] = {name: None for name in GROUP_COLUMNS}
    row.update(
        group=group,
        rows=n,
        events=events,
        mean_predicted=float(sums["p_sum"]) / n,
        observed_rate=events / n,
        is_reference=False,
        status=OK,
    )
    if n < min_rows:
        row["status"] = TOO_FEW_ROWS
        row["note"] = (
            f"{n} rows, fewer than min_rows={min_rows}: only counts, mean predicted and observed rate"
        )
        return row
    row.update(
        log_loss=float(sums["log_loss_sum"]) / n,
        brier_score=float(sums["brier_sum"]) / n,
        positive_rate=(tp + fp) / n,
        true_positive_rate=tp / events if events else None,
        false_positive_rate=fp / non_events if non_events else None,
    )
    if events and non_events:
        row["auc"] = (float(sums["rank_sum"]) - events * (events + 1) / 2.0) / (events * non_events)
    else:
        row["status"] = ONE_CLASS
        row["note"] = (
            f"one class only ({events} events, {non_events} non-events): no AUC, no calibration fit, "
            f"no {'true' if not events else 'false'}-positive rate"
        )
    return row


def calibration_fits(
    engine: Engine, scored: exp.Expression, groups: list[str | None]
) -> tuple[dict[str | None, tuple[float | None, float | None, str | None]], int]:
    """Per group, the logistic fit of y on the linear predictor: (slope, intercept, note), and the passes run.

    Each pass is one grouped aggregate query over the scored rows for all groups still iterating, with each
    group's current (intercept, slope) joined from a VALUES list; it returns per group the log-likelihood, the
    score and the 2 x 2 information. Every group starts at intercept 0, slope 1 (a calibrated model) and takes
    Newton steps, halved while its log-likelihood falls.
    """
    if not groups:
        return {}, 0
    template = _calibration_pass(engine, scored)
    current = {g: np.array([0.0, 1.0]) for g in groups}
    accepted: dict[str | None, np.ndarray] = {}
    best = {g: -math.inf for g in groups}
    halvings = {g: 0 for g in groups}
    done: dict[str | None, tuple[float | None, float | None, str | None]] = {}
    passes = 0
    while len(done) < len(groups) and passes < MAX_CALIBRATION_PASSES:
        active = [g for g in groups if g not in done]
        values = [(g, _key_literal(g), list(current[g])) for g in active]
        passes += 1
        for g, *sums in engine.fetch_sql(template.render(values), []):
            loglik, score, info = _pass_sums(sums)
            rise = RISE_TOLERANCE * (1.0 + abs(best[g]))
            if loglik < best[g] - rise and halvings[g] < MAX_HALVINGS:
                current[g] = (current[g] + accepted[g]) / 2.0
                halvings[g] += 1
                continue
            accepted[g], best[g], halvings[g] = current[g].copy(), loglik, 0
            eigenvalues = np.linalg.eigvalsh(info)
            if not np.all(np.isfinite(info)) or eigenvalues[0] <= SINGULAR_RATIO * max(eigenvalues[1], 0.0):
                done[g] = (None, None, "no calibration fit: the linear predictor does not vary in this group")
                continue
            step = np.linalg.solve(info, score)
            current[g] = current[g] + step
            if np.max(np.abs(step)) <= FINAL_STEP * (1.0 + np.max(np.abs(current[g]))):
                done[g] = (float(current[g][1]), float(current[g][0]), None)
    for g in groups:
        if g not in done:
            done[g] = (
                None,
                None,
                f"no calibration fit: not converged in {MAX_CALIBRATION_PASSES} passes (the linear predictor "
                "may separate the classes in this group)",
            )
    return done, passes


def _calibration_pass(engine: Engine, scored: exp.Expression) -> sb.ValuesTemplate:
    """The grouped query of one Newton pass around a placeholder for the VALUES list (g, a, b)."""
    a, b = exp.column("a", table="dbfit_cal"), exp.column("b", table="dbfit_cal")
    eta, y = exp.column("eta", table="dbfit_rows"), exp.column("y", table="dbfit_rows")
    t = sb.paren(sb.add(a, sb.mul(b, eta)))
    e = sb.exp_neg_abs(t.copy())
    mu = sb.paren(sb.stable_sigmoid(t.copy(), e))
    weight = sb.mul(mu, sb.paren(sb.sub(exp.Literal.number(1), mu.copy())))
    residual = sb.paren(sb.sub(y.copy(), mu.copy()))
    loglik = sb.sub(sb.mul(y.copy(), t.copy()), sb.paren(sb.stable_log1pexp(t.copy(), e.copy())))
    group = exp.column("g", table="dbfit_rows")
    query = (
        exp.select(
            group,
            sb.agg_sum(loglik),
            sb.agg_sum(residual),
            sb.agg_sum(sb.mul(residual.copy(), eta.copy())),
            sb.agg_sum(weight),
            sb.agg_sum(sb.mul(weight.copy(), eta.copy())),
            sb.agg_sum(sb.mul(weight.copy(), eta.copy(), eta.copy())),
        )
        .from_(scored.this.copy().subquery("dbfit_rows"))
        .join(
            sb.ValuesTemplate.placeholder("dbfit_cal"),
            on=exp.NullSafeEQ(this=group.copy(), expression=exp.column("g", table="dbfit_cal")),
        )
        .group_by(group.copy())
    )
    placeholder = engine.sql(sb.ValuesTemplate.placeholder("dbfit_cal"))
    return sb.ValuesTemplate(engine.sql(query), placeholder, "dbfit_cal", ["g", "a", "b"], engine.dialect)


def _pass_sums(sums: list[Any]) -> tuple[float, np.ndarray, np.ndarray]:
    loglik, r, r_eta, w, w_eta, w_eta2 = (float(s) for s in sums)
    return loglik, np.array([r, r_eta]), np.array([[w, w_eta], [w_eta, w_eta2]])


def _key_literal(group: str | None) -> exp.Expression:
    text = exp.DataType.build("VARCHAR")
    return exp.Cast(this=exp.Null() if group is None else exp.Literal.string(group), to=text)


def _reference(rows: dict[str | None, dict[str, Any]], reference: Any) -> str | None:
    if reference is None:
        return max(rows, key=lambda key: rows[key]["rows"])
    # the text DuckDB gives the value: true/false for a boolean, str() of a number matches its cast
    wanted = str(reference).lower() if isinstance(reference, bool) else str(reference)
    if wanted not in rows:
        shown = ", ".join(
            "NULL" if k is None else repr(k) for k in sorted(rows, key=lambda k: (k is None, k or ""))
        )
        raise FitError(f"reference group {reference!r} is not among the groups of by: {shown[:400]}")
    return wanted


def _disparities(rows: dict[str | None, dict[str, Any]], reference: str | None) -> None:
    """Ratio (group / reference) and difference (group - reference) of each rate, where both are defined."""
    base = rows[reference]
    base["is_reference"] = True
    for row in rows.values():
        for rate in RATES:
            mine, theirs = row[rate], base[rate]
            if mine is None or theirs is None:
                continue
            row[f"{rate}_difference"] = mine - theirs
            row[f"{rate}_ratio"] = mine / theirs if theirs else None


def _joined(first: str | None, second: str) -> str:
    return f"{first}; {second}" if first else second
