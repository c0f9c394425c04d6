"""The tables of the HTML report beyond the assessment itself, each from as few scans as it can.

* ``data_summary``: per variable of the model (the outcome and each factor of the formula) its type, NULL
  count, range and mean, or its levels and their shares, over the rows the model was fitted on; one grouped
  scan (GROUPING SETS: the grand total and one set per categorical).
* ``calibration_line``: the logistic fit of the outcome on the linear predictor over the assessed rows (slope
  and intercept; Cox 1958, Biometrika 45(3/4), 562-565), by the Newton passes of the assessment by group.
* ``split_metrics``: the metrics of the training rows and of the held-out rows side by side.
* ``term_tests`` and ``effects``: the tests per term (:mod:`dbfit.fitting.likelihood_ratio_terms`) and the
  average marginal effects over the fitted rows (:mod:`dbfit.assessment.effects`); a table without rows whose
  schema metadata ``dbfit_note`` says why, when the model has none.

``report_tables`` gathers these with :func:`dbfit.assessment.metrics.assessment_tables`; the layers above add
what they own (drift against the training snapshot) before the page is rendered.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import pyarrow as pa
from sqlglot import exp

from dbfit.assessment import groups as by_group
from dbfit.assessment import metrics as assessment
from dbfit.assessment.effects import marginal_effects
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import DbfitError
from dbfit.expressions.source import source_relation
from dbfit.fitting.likelihood_ratio_terms import term_tests

if TYPE_CHECKING:
    from dbfit.model.fitted import Model

ALL_ROWS = "all"
SUMMARY_COLUMNS = {
    "variable": pa.string(),
    "role": pa.string(),
    "kind": pa.string(),
    "sql_type": pa.string(),
    "rows": pa.int64(),
    "nulls": pa.int64(),
    "minimum": pa.float64(),
    "maximum": pa.float64(),
    "mean": pa.float64(),
    "levels": pa.int64(),
}
LEVEL_COLUMNS = {"variable": pa.string(), "level": pa.string(), "rows": pa.int64(), "share": pa.float64()}


def _summary_variables(model: Model) -> list[tuple[str, str, str, str, exp.Expression]]:
    """(name, role, kind, type, expression over the source) of the outcome and of each factor."""
    design = model.design
    target = design.formula.target.copy()
    kind = "numeric" if design.trials is not None else "categorical"
    found = [(design.formula.target_text, "outcome", kind, "", target)]
    for factor in design.factors:
        found.append((factor.text, "predictor", factor.kind, factor.sql_type, factor.expression.copy()))
    return found


def _level_text(value: Any) -> str:
    """A level as DuckDB writes it as text (``true``; a whole double without its ``.0``)."""
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def data_summary(engine: DuckDBEngine, model: Model) -> dict[str, pa.Table]:
    """``{"summary": one row per variable, "levels": one row per level of each categorical}``, one scan over
    the rows the model was fitted on (its training rows, rows with NULLs included)."""
    variables = _summary_variables(model)
    aliases = [exp.to_identifier(f"dbfit_v{k}", quoted=True) for k in range(len(variables))]
    inner = exp.select(
        *[
            exp.alias_(
                value if kind == "categorical" else exp.Cast(this=value, to=exp.DataType.build("DOUBLE")),
                alias,
            )
            for (_, _, kind, _, value), alias in zip(variables, aliases)
        ]
    ).from_(source_relation(model.rows_source("training")))
    levelled = [k for k, variable in enumerate(variables) if variable[2] == "categorical"]
    columns: list[exp.Expression] = [exp.column(aliases[k].copy()) for k in levelled]
    if levelled:
        columns.append(
            exp.Anonymous(this="GROUPING", expressions=[exp.column(aliases[k].copy()) for k in levelled])
        )
    columns.append(exp.Count(this=exp.Star()))
    for k, (_, _, kind, _, _) in enumerate(variables):
        value = exp.column(aliases[k].copy())
        columns.append(exp.Count(this=value.copy()))
        if kind != "categorical":
            columns += [exp.Min(this=value.copy()), exp.Max(this=value.copy()), exp.Avg(this=value.copy())]
    query = exp.select(*columns).from_(inner.subquery("dbfit_summary_rows"))
    if levelled:
        sets = [exp.Tuple(expressions=[])]
        sets += [exp.Tuple(expressions=[exp.column(aliases[k].copy())]) for k in levelled]
        query = query.group_by(exp.GroupingSets(expressions=sets))
    offset = len(levelled) + 1 if levelled else 0
    total: tuple[Any, ...] = ()
    level_rows: dict[int, list[tuple[str, int]]] = {k: [] for k in levelled}
    for row in engine.fetch(query):
        figures = row[offset:]
        outside = [j for j in range(len(levelled)) if not row[len(levelled)] >> (len(levelled) - 1 - j) & 1]
        if not outside:
            total = figures
        elif row[outside[0]] is not None:  # the NULL level is counted once, among the NULLs
            level_rows[levelled[outside[0]]].append((_level_text(row[outside[0]]), int(figures[0])))
    return _summary_tables(variables, total, level_rows)


def _summary_tables(
    variables: list[tuple[str, str, str, str, exp.Expression]],
    total: tuple[Any, ...],
    level_rows: dict[int, list[tuple[str, int]]],
) -> dict[str, pa.Table]:
    """The summary and levels tables from the grand-total figures and the rows per level."""
    rows = int(total[0])
    summary: dict[str, list[Any]] = {name: [] for name in SUMMARY_COLUMNS}
    levels: dict[str, list[Any]] = {name: [] for name in LEVEL_COLUMNS}
    position = 1
    for k, (name, role, kind, sql_type, _) in enumerate(variables):
        present = int(total[position])
        position += 1
        low = high = mean = None
        if kind != "categorical":
            low, high, mean = (None if v is None else float(v) for v in total[position : position + 3])
            position += 3
        for key, value in zip(
            SUMMARY_COLUMNS,
            (name, role, kind, sql_type, rows, rows - present, low, high, mean, len(level_rows.get(k, []))),
        ):
            summary[key].append(value)
        for level, n in sorted(level_rows.get(k, []), key=lambda item: (-item[1], item[0])):
            for key, value in zip(LEVEL_COLUMNS, (name, level, n, n / present if present else None)):
                levels[key].append(value)
    return {
        "summary": pa.table({k: pa.array(v, type=SUMMARY_COLUMNS[k]) for k, v in summary.items()}),
        "levels": pa.table({k: pa.array(v, type=LEVEL_COLUMNS[k]) for k, v in levels.items()}),
    }


def calibration_line(engine: DuckDBEngine, model: Model, source: str) -> pa.Table:
    """One row: slope and intercept of the logistic fit of y on the linear predictor over ``source``'s rows,
    the Newton passes (scans) it took, and a note when there is no fit."""
    scored = assessment.scored_relation(model, source, by=exp.Literal.string(ALL_ROWS))
    fits, passes = by_group.calibration_fits(engine, scored, [ALL_ROWS])
    return _line(*fits[ALL_ROWS], passes)


def _line(slope: float | None, intercept: float | None, note: str | None, passes: int) -> pa.Table:
    return pa.table(
        {
            "slope": pa.array([slope], type=pa.float64()),
            "intercept": pa.array([intercept], type=pa.float64()),
            "passes": pa.array([passes], type=pa.int64()),
            "note": pa.array([note], type=pa.string()),
        }
    )


def _no_line(note: str) -> pa.Table:
    return _line(None, None, note, 0)


def split_metrics(
    engine: DuckDBEngine, model: Model, threshold: float, known: dict[str, pa.Table]
) -> pa.Table:
    """The metrics of a holdout model's training rows and held-out rows side by side; ``known`` holds the
    metrics table of either part when the assessment already computed it (by its rows note)."""
    parts = {}
    for rows in ("training", "held_out"):
        note = model.rows_note(rows)
        table = known.get(note)
        if table is None:
            scored = assessment.scored_relation(model, model.rows_source(rows))
            table = assessment.metrics(engine, scored, threshold, rows_note=note).table()
        parts[rows] = table
    return pa.table(
        {
            "metric": parts["training"]["metric"],
            "training": parts["training"]["value"],
            "held_out": parts["held_out"]["value"],
        }
    )


def report_tables(
    engine: DuckDBEngine,
    model: Model,
    source: str,
    rows_note: str,
    threshold: float = 0.5,
    likelihood_ratio: bool = False,
) -> dict[str, pa.Table]:
    """Every table the report shows about ``model`` on the rows of ``source`` (``rows_note`` says which),
    except those of higher layers: the assessment tables, the calibration line, the data summary of the
    training rows, the tests per term (with ``likelihood_ratio`` also by refits) and the average marginal
    effects, and for a holdout model the training and held-out metrics side by side."""
    scored = assessment.scored_relation(model, source)
    tables = assessment.assessment_tables(engine, scored, threshold, rows_note=rows_note)
    tables["confusion"] = tables["confusion"].replace_schema_metadata(
        {b"dbfit_threshold": repr(float(threshold)).encode()}
    )
    values = dict(zip(tables["metrics"]["metric"].to_pylist(), tables["metrics"]["value"].to_pylist()))
    if 0 < values["positives"] < values["rows"]:
        tables["calibration_line"] = calibration_line(engine, model, source)
    else:
        tables["calibration_line"] = _no_line("undefined: the rows hold only one class")
    tables["term_tests"] = _or_note(lambda: term_tests(engine, model, likelihood_ratio=likelihood_ratio))
    if model.source_is_data:  # a model read from a document: its training rows are not a query to run
        return tables
    tables["effects"] = _or_note(lambda: marginal_effects(engine, model))
    summary = data_summary(engine, model)
    tables["data_summary"], tables["data_levels"] = summary["summary"], summary["levels"]
    if model.split is not None:
        tables["split_metrics"] = split_metrics(engine, model, threshold, {rows_note: tables["metrics"]})
    return tables


def _or_note(make: Callable[[], pa.Table]) -> pa.Table:
    """The table ``make`` returns, or when dbfit refuses it an empty table whose metadata says why."""
    try:
        return make()
    except DbfitError as err:
        return pa.table({"term": pa.array([], type=pa.string())}).replace_schema_metadata(
            {b"dbfit_note": str(err).encode()}
        )
