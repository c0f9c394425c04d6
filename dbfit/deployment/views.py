"""Publishing: a view in the user's database that scores a source in plain SQL (no dbfit needed to query it).

A pinned view carries one version's estimates as constants; a live view reads the estimates of the current
(promoted) version from ``dbfit_store.coefficients`` by term label (the latest version for a model that has
none promoted), so a promoted refit of the same formula flows through and a refused candidate does not (terms or levels a later version adds are not in the published encoding; republish for those).
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping
from typing import Any

import duckdb
from sqlglot import exp

from dbfit.deployment.scoring import (
    INTERVAL_COLUMNS,
    SCORE_COLUMNS,
    Coefficient,
    check_reasons,
    reason_columns,
    scoring_query,
)
from dbfit.deployment.spark_views import is_published_spark_view, publish_spark_view
from dbfit.engines import engine_for
from dbfit.errors import DbfitError, StoreError
from dbfit.expressions import builders as sb
from dbfit.expressions import dialects
from dbfit.expressions.names import model_name, model_version, relation_name
from dbfit.expressions.source import source_relation
from dbfit.model.fitted import Model
from dbfit.store.model_store import SCHEMA, is_published_view, load_model, publish_view

LIVE_ALIAS = "dbfit_coefficients"


def resolve_model(con: duckdb.DuckDBPyConnection, model: str | Model, version: int | None) -> Model:
    """A Model as given, or the stored version of a model name."""
    version = model_version(version)
    if isinstance(model, Model):
        if version is not None and version != model.version:
            raise StoreError(
                f"version={version} was given with a Model object (version {model.version}); pass the name"
            )
        return model
    return load_model(con, model, version)


def build_scoring(
    con: duckdb.DuckDBPyConnection | None,
    model: Model,
    source: str | None,
    *,
    live: bool = False,
    unseen: str = "null",
    standard_error: bool = False,
    level: float = 0.95,
    reasons: int | bool | None = 0,
    baseline: Mapping[str, Any] | None = None,
) -> exp.Select:
    """The scoring query of ``model`` over ``source`` in the dialect of ``con``'s engine (DuckDB without one),
    after checking the source's columns on ``con``; ``reasons`` and ``baseline`` add reason codes (see
    :mod:`dbfit.deployment.scoring`)."""
    check_scoring_options(live=live, standard_error=standard_error, level=level)
    relation = source_relation(model.source_or_own(source))
    if con is not None:
        check_score_columns(con, relation, standard_error, check_reasons(reasons))
    coefficient, joined = None, None
    if live:
        if model.name is None:
            raise StoreError(
                "a live view reads the store: save the model first (dbfit.save(con, model, name)) or pass its name"
            )
        coefficient, joined = _live_coefficients(model)
    return scoring_query(
        model,
        relation,
        coefficient=coefficient,
        joined=joined,
        unseen=unseen,
        with_standard_error=standard_error,
        level=level,
        reasons=reasons,
        baseline=baseline,
        dialect=dialects.dialect("duckdb" if con is None else engine_for(con).dialect),
    )


def check_scoring_options(*, live: Any = False, standard_error: Any = False, level: Any = 0.95) -> None:
    """Refuse scoring options of the wrong type or range, naming the option."""
    for name, flag in (("live", live), ("standard_error", standard_error)):
        if not isinstance(flag, bool):
            raise DbfitError(f"{name} must be True or False (got {type(flag).__name__} {flag!r})")
    if isinstance(level, bool) or not isinstance(level, (int, float)) or not 0.0 < level < 1.0:
        raise DbfitError(f"level must be a number strictly between 0 and 1, e.g. 0.95 (got {level!r})")


def check_score_columns(
    con: duckdb.DuckDBPyConnection, relation: exp.Expression, standard_error: bool, reasons: int = 0
) -> None:
    """Refuse a source that already has a column the scoring query adds."""
    taken = SCORE_COLUMNS + (INTERVAL_COLUMNS if standard_error else ()) + reason_columns(reasons)
    names = [name for name, _ in engine_for(con).describe(exp.select("*").from_(relation.copy()))]
    clashes = [name for name in names if name.lower() in taken]
    if clashes:
        raise DbfitError(
            f"the source already has column(s) {', '.join(clashes)}, which scoring adds; rename them in a SELECT"
        )


class _NotGiven:
    def __repr__(self) -> str:
        return "<not given>"


NOT_GIVEN: Any = _NotGiven()


def publish(
    con: duckdb.DuckDBPyConnection,
    model: str | Model,
    *given: str | None,
    source: str | None = NOT_GIVEN,
    view: str = NOT_GIVEN,
    version: int | None = None,
    live: bool = False,
    unseen: str = "null",
    replace: bool = False,
    reasons: int | bool | None = 0,
    baseline: Mapping[str, Any] | None = None,
    store: Any = None,
) -> dict[str, Any]:
    """``publish(con, model, source, view)``: create ``view``, or replace the one dbfit published under that
    name: every column of ``source`` (None: the source the model was fitted on) plus ``linear_predictor``
    and ``probability`` (and with ``reasons=k`` the reason codes ``reason_1``, ``reason_1_contribution``, ...
    against ``baseline``, see :mod:`dbfit.deployment.scoring`).

    ``model`` is a stored model's name (``version`` picks one; default the current one) or a Model object.
    ``live=True`` reads the current version's stored estimates at query time instead of writing them in as
    constants. A view of that name that dbfit did not publish (or that was changed since) is refused unless
    ``replace=True``.

    On a SparkSession the view is a persistent view of the session's catalog, pinned (see
    :mod:`dbfit.deployment.spark_views`); a model given by name is read from ``store`` (the DuckDB or psycopg
    connection of the store it was saved in).

    The order of earlier releases, ``publish(con, model, view, source=None)``, works for one more release
    with a DeprecationWarning; see :func:`source_and_view` for how the two orders are told apart.
    """
    written = engine_for(con).dialect
    if written == "spark" and live is True:
        raise StoreError(
            "a live view reads the store's tables in the database that holds it, and Spark holds no store: "
            "publish a pinned view (live=False) and publish it again after a promotion"
        )
    source, view = source_and_view(con, "publish", given, source, view)
    target = relation_name(view, "view name")
    resolved = resolve_model(con if store is None else store, model, version)
    query = build_scoring(con, resolved, source, live=live, unseen=unseen, reasons=reasons, baseline=baseline)
    record = {
        "model": resolved.name,
        "version": None if live else resolved.version,
        "mode": "live" if live else "pinned",
    }
    if written == "spark":
        statement = publish_spark_view(con, target, query, record, replace=replace)
    else:
        statement = publish_view(con, target, query, record, replace=replace).sql(written)
    return {
        "view": target.sql(written),
        **record,
        "rows": resolved.rows_note("all", source),
        "sql": statement,
    }


def source_and_view(
    con: duckdb.DuckDBPyConnection, call: str, given: tuple[Any, ...], source: Any, view: Any
) -> tuple[str | None, str]:
    """The source and view of a publishing call, in today's order (source, view) or in the earlier one.

    ``source=`` and ``view=`` by keyword always mean what they say. One positional without ``view=`` is the
    earlier order's view. With two positionals, the second is the view (today's order) when it names a view
    dbfit published or no relation yet; failing that, the first is the view (earlier order) when it does;
    failing both, today's order holds and the usual checks explain what is wrong. The earlier order warns.
    """
    keywords = {name for name, value in (("source", source), ("view", view)) if value is not NOT_GIVEN}
    twice = (len(given) == 2 and keywords) or (len(given) == 1 and keywords == {"source", "view"})
    if len(given) > 2 or twice:
        raise DbfitError(f"{call} takes the source and the view once each: {call}(con, model, source, view)")
    earlier = False
    if len(given) == 2:
        earlier = not _may_become_view(con, given[1]) and _may_become_view(con, given[0])
        source, view = (given[1], given[0]) if earlier else given
    elif len(given) == 1:
        earlier = "view" not in keywords
        source, view = (source, given[0]) if earlier else (given[0], view)
    if view is NOT_GIVEN:
        raise DbfitError(f"{call} needs the name of the view to create: {call}(con, model, source, view)")
    if earlier:
        warnings.warn(
            f"{call}(con, model, view, source) is deprecated and goes in the next release; "
            f"write {call}(con, model, source, view)",
            DeprecationWarning,
            stacklevel=3,
        )
    return (None if source is NOT_GIVEN else source), view


def _may_become_view(con: duckdb.DuckDBPyConnection, text: Any) -> bool:
    """Whether ``text`` is a plain relation name that is free or a view dbfit published."""
    try:
        target = relation_name(text, "view name")
    except StoreError:
        return False
    engine = engine_for(con)
    try:
        engine.describe(exp.select("*").from_(target))
    except DbfitError:
        return True
    return (
        is_published_spark_view(con, target) if engine.dialect == "spark" else is_published_view(con, target)
    )


def _live_coefficients(model: Model) -> tuple[Coefficient, exp.Expression]:
    """A one-row subquery with the current version's stored estimate of each label, and references to it."""
    name = exp.Literal.string(model_name(model.name))
    store = lambda table: exp.Table(
        this=exp.to_identifier(table, quoted=True), db=exp.to_identifier(SCHEMA, quoted=True)
    )
    newest = (
        exp.select(exp.Max(this=sb.column("version")))
        .from_(store("versions"))
        .where(exp.EQ(this=sb.column("model"), expression=name.copy()))
    )
    promoted = (
        exp.select(sb.column("version"))
        .from_(store("current_versions"))
        .where(exp.EQ(this=sb.column("model"), expression=name.copy()))
    )
    latest = exp.select(exp.Coalesce(this=promoted.subquery(), expressions=[newest.subquery()]))
    picks = [
        exp.alias_(
            exp.Max(
                this=exp.Case(
                    ifs=[
                        exp.If(
                            this=exp.EQ(this=sb.column("term"), expression=exp.Literal.string(label)),
                            true=sb.column("estimate"),
                        )
                    ]
                )
            ),
            f"c{k}",
            quoted=True,
        )
        for k, label in enumerate(model.labels)
    ]
    rows = exp.alias_(exp.Count(this=exp.Star()), "terms_found", quoted=True)
    subquery = (
        exp.select(*picks, rows)
        .from_(store("coefficients"))
        .where(
            exp.and_(
                exp.EQ(this=sb.column("model"), expression=name.copy()),
                exp.EQ(this=sb.column("version"), expression=latest.subquery()),
            )
        )
        .subquery(LIVE_ALIAS)
    )

    def coefficient(parameter: int) -> exp.Expression:
        found = exp.column("terms_found", table=LIVE_ALIAS, quoted=True)
        value = exp.Coalesce(
            this=exp.column(f"c{parameter}", table=LIVE_ALIAS, quoted=True), expressions=[sb.number(0.0)]
        )
        return exp.Case(ifs=[exp.If(this=exp.GT(this=found, expression=sb.number(0)), true=value)])

    return coefficient, subquery
