"""Scoring by segment: one SELECT that scores every row with the model of its own segment.

The models of one ``by=`` fit share a design (the same columns, levels, centre and scale; only the estimates
differ), so one linear predictor serves them all: each row is LEFT JOINed by its segment value to a VALUES
relation of its segment's estimates. A row whose segment has no model (not fitted, or new) scores NULL; an
estimate that is NULL in a segment (aliased there) contributes nothing, as in a single model's scoring SQL.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import duckdb
from sqlglot import exp

from dbfit.deployment.scoring import Coefficient, check_reasons, scoring_query
from dbfit.deployment.views import NOT_GIVEN, check_score_columns, source_and_view
from dbfit.errors import StoreError
from dbfit.expressions import builders as sb
from dbfit.expressions.formula import parse_expression
from dbfit.expressions.names import model_name, relation_name
from dbfit.expressions.source import source_relation
from dbfit.fitting.segments import segment_literal
from dbfit.model.fitted import Model
from dbfit.model.segmented import SegmentedFit
from dbfit.store.model_store import load_model, names_starting_with, publish_view

SEGMENT_ALIAS = "dbfit_segment_estimates"
KEY = "dbfit_segment"


def segment_scoring_query(
    models: dict[Any, Model],
    by: exp.Expression,
    source: str,
    *,
    unseen: str = "null",
    reasons: int | bool | None = 0,
    baseline: Mapping[str, Any] | None = None,
) -> exp.Select:
    """Every column of ``source`` plus ``linear_predictor`` and ``probability`` from each row's segment model
    (and reason codes against ``baseline``: the segments share a design, so the baseline row is the same and
    each row's contributions use its own segment's estimates)."""
    if not models:
        raise StoreError("there is no segment model to score with")
    first = next(iter(models.values()))
    for value, model in models.items():
        if model.labels != first.labels or model.formula != first.formula:
            raise StoreError(
                f"segment {value!r} has terms {model.labels} ({model.formula}), not those of the other "
                f"segments {first.labels} ({first.formula}): they are not one by= fit"
            )
    estimates = _estimates_relation(models, len(first.labels))
    on = exp.EQ(this=exp.Paren(this=by.copy()), expression=exp.column(KEY, table=SEGMENT_ALIAS, quoted=True))
    return scoring_query(
        first,
        source_relation(source),
        coefficient=_joined_coefficients(),
        joined=estimates,
        join_on=on,
        unseen=unseen,
        reasons=reasons,
        baseline=baseline,
    )


def stored_segments(con: duckdb.DuckDBPyConnection, name: str) -> tuple[dict[Any, Model], exp.Expression]:
    """The current version of every stored ``name.<segment>`` model of one by= fit, and its by expression."""
    model_name(name)
    models: dict[Any, Model] = {}
    by_texts = set()
    for stored in names_starting_with(con, name + "."):
        model = load_model(con, stored)
        segment = model.options.get("segment") or {}
        if segment.get("by"):
            models[segment["value"]] = model
            by_texts.add(segment["by"])
    if not models:
        raise StoreError(
            f"no stored segment models named '{name}.<segment>': fit them with by= and name='{name}'"
        )
    if len(by_texts) > 1:
        raise StoreError(
            f"the models '{name}.<segment>' come from fits by different expressions: {sorted(by_texts)}"
        )
    return models, parse_expression(by_texts.pop(), "by expression")


def publish_segments(
    con: duckdb.DuckDBPyConnection,
    fitted: str | SegmentedFit,
    *given: str | None,
    source: str | None = NOT_GIVEN,
    view: str = NOT_GIVEN,
    unseen: str = "null",
    replace: bool = False,
    reasons: int | bool | None = 0,
    baseline: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """``publish_segments(con, fitted, source, view)``: create ``view`` (or replace the one dbfit published
    under that name) scoring each row of ``source`` with its segment's model, estimates pinned. Another view
    of that name is refused unless ``replace=True``.

    ``fitted`` is a :class:`SegmentedFit` (``source`` None: the source it was fitted on) or the name the
    segment models were stored under (then ``source`` is required). The earlier order
    ``publish_segments(con, fitted, view, source=None)`` works for one more release with a DeprecationWarning,
    told apart as in :func:`dbfit.deployment.views.source_and_view`.
    """
    source, view = source_and_view(con, "publish_segments", given, source, view)
    target = relation_name(view, "view name")
    if isinstance(fitted, SegmentedFit):
        models, by, source = fitted.models, fitted.by_expression, source or fitted.source
        if by is None:
            raise StoreError("this segmented fit does not know its by expression")
    else:
        if source is None:
            raise StoreError("publishing stored segment models needs the source to score")
        models, by = stored_segments(con, fitted)
    check_score_columns(con, source_relation(source), False, check_reasons(reasons))
    statement = publish_view(
        con,
        target,
        segment_scoring_query(models, by, source, unseen=unseen, reasons=reasons, baseline=baseline),
        {"model": fitted if isinstance(fitted, str) else None, "version": None, "mode": "pinned"},
        replace=replace,
    )
    return {
        "view": target.sql("duckdb"),
        "segments": len(models),
        "mode": "pinned",
        "sql": statement.sql("duckdb"),
    }


def _estimates_relation(models: dict[Any, Model], size: int) -> exp.Expression:
    """VALUES (segment, c0, c1, ...): NULL for an aliased estimate; the first row's casts make every column DOUBLE."""
    rows = []
    for index, (value, model) in enumerate(models.items()):
        numbers = [sb.number(float(v)) if v == v else exp.Null() for v in model.estimates]
        if index == 0:
            numbers = [sb.as_double(n) for n in numbers]
        rows.append(exp.Tuple(expressions=[segment_literal(value), *numbers]))
    columns = [exp.to_identifier(KEY, quoted=True)] + [
        exp.to_identifier(f"dbfit_c{k}", quoted=True) for k in range(size)
    ]
    return exp.Values(
        expressions=rows, alias=exp.TableAlias(this=exp.to_identifier(SEGMENT_ALIAS), columns=columns)
    )


def _joined_coefficients() -> Coefficient:
    """The joined estimate of a parameter: 0 where it is aliased in that segment, NULL where no segment matched."""

    def coefficient(parameter: int) -> exp.Expression:
        matched = exp.Not(
            this=exp.Is(this=exp.column(KEY, table=SEGMENT_ALIAS, quoted=True), expression=exp.Null())
        )
        value = exp.Coalesce(
            this=exp.column(f"dbfit_c{parameter}", table=SEGMENT_ALIAS, quoted=True),
            expressions=[sb.as_double(sb.number(0.0))],
        )
        return exp.Case(ifs=[exp.If(this=matched, true=value)])

    return coefficient
