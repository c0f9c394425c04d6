"""Drift: a training snapshot of each variable's distribution, and the population stability index against new rows.

At save time the training rows give decile edges (``quantile_cont`` in the database) of the linear predictor
(``score``) and of each numeric predictor, with the share of rows in each bin (one grouped count), and the
share of each level of each categorical. ``psi_table`` bins a new source on the same edges and levels and
reports, per variable, PSI = sum over bins of (a - e) * ln(a / e), a and e the new and training shares
(Siddiqi 2006, "Credit Risk Scorecards", Wiley). Shares below FLOOR count as FLOOR, so an empty bin gives a
finite term (common practice). Bins are (-inf, e1], (e1, e2], ..., (e9, inf) over the rows where the variable
is not NULL; levels unseen in training pool into one bin with training share 0 (then FLOOR). Row weights are
not used: shares are of rows.
"""

from __future__ import annotations

import json
import math
from typing import Any

import pyarrow as pa
from sqlglot import exp

from dbfit.deployment.scoring import scoring_query
from dbfit.engines import engine_for
from dbfit.engines.base import Engine
from dbfit.errors import DbfitError, StoreError
from dbfit.expressions import builders as sb
from dbfit.expressions.basis_terms import SplineCall
from dbfit.expressions.source import source_relation
from dbfit.model.fitted import Model

FLOOR = 1e-4  # common practice
QUANTILES = [k / 10 for k in range(1, 10)]  # deciles
STABLE, LARGE = 0.1, 0.25  # reading bands: common practice
SCORE = "score"
SCORED = "dbfit_scored"


def reading(psi: float) -> str:
    """The usual reading of a PSI value (common practice: below 0.1 stable, 0.1-0.25 some shift, above large)."""
    if psi < STABLE:
        return "stable"
    return "some shift" if psi <= LARGE else "large shift"


def psi(actual: list[float], expected: list[float]) -> float:
    """Sum of (a - e) ln(a / e) over bins, each share floored at FLOOR."""
    total = 0.0
    for a, e in zip(actual, expected):
        a, e = max(a, FLOOR), max(e, FLOOR)
        total += (a - e) * math.log(a / e)
    return total


def _variables(model: Model) -> list[tuple[str, str, exp.Expression]]:
    """(name, kind, expression over the scored rows) of the score and of each predictor."""
    score = exp.column("linear_predictor", table=SCORED, quoted=True)
    found = [(SCORE, "score", score)]
    # a spline's basis columns drift as its one variable; a bins term as its own bins (its levels)
    calls = {term.texts[0]: term.call for term in model.design.formula.terms if term.call is not None}
    for factor in model.design.factors:
        call = calls.get(factor.text)
        if isinstance(call, SplineCall):
            if call.name not in [name for name, _, _ in found]:
                found.append((call.name, "numeric", sb.as_double(call.argument.copy())))
            continue
        found.append((call.name if call is not None else factor.text, factor.kind, factor.expression.copy()))
    return found


def _scored(model: Model, source: str) -> exp.Expression:
    return scoring_query(model, source_relation(source)).subquery(SCORED)


def _bin_number(value: exp.Expression, edges: list[float]) -> exp.Expression:
    """0 .. len(edges): how many edges lie strictly below ``value`` (NULL stays NULL)."""
    count: exp.Expression = sb.number(0)
    for edge in edges:
        below = exp.Cast(
            this=exp.GT(this=value.copy(), expression=sb.number(edge)), to=exp.DataType.build("INTEGER")
        )
        count = exp.Add(this=count, expression=below)
    return count


def _numeric_counts(
    engine: Engine,
    scored: exp.Expression,
    variables: list[tuple[str, exp.Expression]],
    edges: dict[str, list[float]],
) -> dict[str, list[int]]:
    """One scan: the rows in each bin of each numeric variable (each row's bin numbered once, then counted)."""
    columns, layout, bins = [], [], []
    for index, (name, value) in enumerate(variables):
        alias = f"dbfit_bin_{index}"
        bins.append(exp.alias_(_bin_number(value, edges[name]), alias, quoted=True))
        for k in range(len(edges[name]) + 1):
            columns.append(
                exp.Sum(
                    this=exp.If(
                        this=exp.EQ(this=sb.column(alias), expression=sb.number(k)),
                        true=sb.number(1),
                        false=sb.number(0),
                    )
                )
            )
            layout.append(name)
    if not columns:
        return {}
    numbered = exp.select(*bins).from_(scored.copy()).subquery("dbfit_bins")
    row = engine.fetch(exp.select(*columns).from_(numbered))[0]
    counts: dict[str, list[int]] = {name: [] for name, _ in variables}
    for name, value in zip(layout, row):
        counts[name].append(int(value or 0))
    return counts


def _level_counts(
    engine: Engine, scored: exp.Expression, variables: list[tuple[str, exp.Expression]]
) -> dict[str, dict[str, int]]:
    """One scan (GROUPING SETS): rows per level (as JSON text of the value) of each categorical, NULLs left out."""
    if not variables:
        return {}
    aliases = [f"dbfit_level_{k}" for k in range(len(variables))]
    inner = exp.select(
        *[exp.alias_(value.copy(), alias, quoted=True) for (_, value), alias in zip(variables, aliases)]
    )
    sets = exp.GroupingSets(expressions=[exp.Tuple(expressions=[sb.column(a)]) for a in aliases])
    query = (
        exp.select(*[sb.column(a) for a in aliases], exp.Count(this=exp.Star()))
        .from_(inner.from_(scored.copy()).subquery("dbfit_levels"))
        .group_by(sets)
    )
    counts: dict[str, dict[str, int]] = {name: {} for name, _ in variables}
    for row in engine.fetch(query):
        present = [k for k in range(len(variables)) if row[k] is not None]
        if len(present) == 1:  # a NULL level of one set shows as a row of NULLs: left out
            counts[variables[present[0]][0]][json.dumps(_plain(row[present[0]]))] = int(row[-1])
    return counts


def _plain(value: Any) -> Any:
    return value if isinstance(value, (bool, int, float, str)) else str(value)


def training_snapshot(con: Any, model: Model) -> dict[str, list[Any]]:
    """The ``drift_bins`` rows (column-wise) of ``model`` on its training rows: edges, levels and shares."""
    engine = engine_for(con)
    scored = _scored(model, model.rows_source("training"))
    variables = _variables(model)
    numeric = [(name, value) for name, kind, value in variables if kind != "categorical"]
    rows: dict[str, list[Any]] = {
        k: [] for k in ("variable", "kind", "position", "lower", "upper", "level", "rows", "share")
    }
    edges: dict[str, list[float]] = {}
    if numeric:
        quantiles = exp.Array(expressions=[sb.number(q) for q in QUANTILES])
        found = engine.fetch(
            exp.select(
                *[
                    exp.Anonymous(
                        this="quantile_cont",
                        expressions=[
                            exp.Cast(this=value.copy(), to=exp.DataType.build("DOUBLE")),
                            quantiles.copy(),
                        ],
                    )
                    for _, value in numeric
                ]
            ).from_(scored.copy())
        )[0]
        for (name, _), values in zip(numeric, found):
            edges[name] = sorted({float(v) for v in (values or []) if v is not None and math.isfinite(v)})
        counts = _numeric_counts(engine, scored, numeric, edges)
        for name, kind, _ in variables:
            if name not in edges:
                continue
            total = sum(counts[name]) or 1
            bounds = [None, *edges[name], None]
            for k, n in enumerate(counts[name]):
                _append(rows, name, kind, k, bounds[k], bounds[k + 1], None, n, n / total)
    categorical = _level_counts(
        engine, scored, [(name, value) for name, kind, value in variables if kind == "categorical"]
    )
    for name, levels in categorical.items():
        total = sum(levels.values()) or 1
        for k, (level, n) in enumerate(sorted(levels.items())):
            _append(rows, name, "categorical", k, None, None, level, n, n / total)
    return rows


def _append(rows: dict[str, list[Any]], *values: Any) -> None:
    for key, value in zip(rows, values):
        rows[key].append(value)


def _check_new_rows(source: str, rows: dict[str, int]) -> None:
    """Refuse a comparison with no new rows: a PSI against zero rows reads as a shift that is not there."""
    empty = [name for name, n in rows.items() if n == 0]
    if rows and len(empty) == len(rows):
        raise DbfitError(
            f"the source {source} has 0 rows with values of the model's variables; drift "
            "compares new rows with the training snapshot and needs some"
        )
    if empty:
        raise DbfitError(
            f"the source {source} has 0 rows with a value of {', '.join(empty)}; drift needs "
            "new rows for every variable"
        )


def psi_table(con: Any, model: Model, source: str) -> pa.Table:
    """One row per variable: kind, bins, training and new rows, PSI and its reading (common-practice bands).

    On DuckDB the training snapshot is the one stored with the model's version. On PostgreSQL it is the one
    stored with the version when this database's store holds it (a model saved here); a model stored elsewhere
    (or not at all), and any model on Spark, which holds no store, gets the snapshot of its training rows taken
    on that engine now, in the same query forms, so it equals the one stored for the same rows.
    """
    engine = engine_for(con)
    stored = (
        _stored_snapshot(con, model) if engine.dialect == "duckdb" else _snapshot_here(con, engine, model)
    )
    return _psi_against(engine, model, source, stored)


def _snapshot_here(con: Any, engine: Engine, model: Model) -> list[dict[str, Any]]:
    """The snapshot stored with ``model``'s version in this PostgreSQL database, else that of its training rows
    taken now on ``engine``; ordered by variable and position, as the store orders them."""
    if engine.dialect == "postgres" and model.name is not None and model.version is not None:
        from dbfit.store.model_store import version_table

        stored = version_table(con, "drift_bins", model.name, model.version, order="variable, position")
        if stored:
            return stored
    snapshot = training_snapshot(engine, model)
    rows = [dict(zip(snapshot, values)) for values in zip(*snapshot.values())]
    return sorted(rows, key=lambda row: (row["variable"], row["position"]))


def _stored_snapshot(con: Any, model: Model) -> list[dict[str, Any]]:
    """The ``drift_bins`` rows stored with the model's version, ordered by variable and position."""
    from dbfit.store.model_store import version_table

    if model.name is None or model.version is None:
        raise StoreError(
            "drift compares with the training snapshot in the store: save the model first or pass its name"
        )
    stored = version_table(con, "drift_bins", model.name, model.version, order="variable, position")
    if not stored and (model.options.get("segment") or {}).get("by"):
        raise StoreError(
            f"model '{model.name}' is one segment of a by= fit, which records no training snapshot (that "
            "would take a scan per segment): fit the segment on its own source to record one"
        )
    if not stored:
        raise StoreError(
            f"model '{model.name}' version {model.version} has no training snapshot (saved by an older "
            "dbfit, or its source was unreadable at save time): refit it to record one"
        )
    return stored


def _psi_against(engine: Engine, model: Model, source: str, stored: list[dict[str, Any]]) -> pa.Table:
    """The PSI table of the new rows of ``source`` against the snapshot rows ``stored``."""
    scored = _scored(model, source)
    by_variable: dict[str, list[dict[str, Any]]] = {}
    for row in stored:
        by_variable.setdefault(row["variable"], []).append(row)
    expressions = {name: (kind, value) for name, kind, value in _variables(model)}
    numeric = [
        (name, expressions[name][1])
        for name, bins in by_variable.items()
        if bins[0]["kind"] != "categorical" and name in expressions
    ]
    edges = {name: [b["upper"] for b in by_variable[name][:-1]] for name, _ in numeric}
    counts = _numeric_counts(engine, scored, numeric, edges)
    categorical = _level_counts(
        engine,
        scored,
        [
            (name, expressions[name][1])
            for name, bins in by_variable.items()
            if bins[0]["kind"] == "categorical" and name in expressions
        ],
    )
    out: dict[str, list[Any]] = {
        k: [] for k in ("variable", "kind", "bins", "training_rows", "new_rows", "psi", "reading")
    }
    _check_new_rows(
        source,
        {
            name: sum(counts[name]) if name in counts else sum(categorical.get(name, {}).values())
            for name in by_variable
            if name in expressions
        },
    )
    for name, bins in by_variable.items():
        expected = [b["share"] for b in bins]
        if bins[0]["kind"] == "categorical":
            levels = categorical[name]
            known = [b["level"] for b in bins]
            new = [levels.get(level, 0) for level in known] + [
                sum(n for lv, n in levels.items() if lv not in known)
            ]
            expected = expected + [0.0]
        else:
            new = counts[name]
        total = sum(new)
        actual = [n / total if total else 0.0 for n in new]
        value = psi(actual, expected)
        for key, item in zip(
            out,
            (
                name,
                bins[0]["kind"],
                len(expected),
                sum(b["rows"] for b in bins),
                total,
                value,
                reading(value),
            ),
        ):
            out[key].append(item)
    return pa.table(out)
