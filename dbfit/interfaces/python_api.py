"""The Python entry points that touch the store: fit-and-save, load, move as JSON, publish, list, drop."""

from __future__ import annotations

import uuid
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa

from dbfit.assessment import groups, report, report_tables
from dbfit.assessment import metrics as assessment
from dbfit.assessment.effects import OVERALL
from dbfit.assessment.effects import marginal_effects as effects_of
from dbfit.assessment.screening import bin_screening as screening_of
from dbfit.deployment import scoring
from dbfit.deployment import views as deploy
from dbfit.deployment.segment_views import segment_scoring_query
from dbfit.engines import engine_for
from dbfit.engines.duckdb_engine import translate_error
from dbfit.errors import DbfitError, FitError, SourceError, StoreError
from dbfit.expressions.names import model_name
from dbfit.expressions.splits import Holdout, KFold, part_source
from dbfit.fitting import driver as fitting
from dbfit.fitting.likelihood_ratio_terms import term_tests as tests_of
from dbfit.fitting.options import FitOptions
from dbfit.interfaces.old_spellings import version_by_keyword, warn_renamed
from dbfit.lifecycle import refit as refitting
from dbfit.lifecycle import saving, training
from dbfit.lifecycle.drift import psi_table
from dbfit.model import reading
from dbfit.model.fitted import Model
from dbfit.model.segmented import SegmentedFit
from dbfit.model.spline_curves import spline_curve as curve_of
from dbfit.store import model_store as store


def fit(
    con: duckdb.DuckDBPyConnection,
    formula: str,
    source: str,
    *,
    name: str | None = None,
    split: Holdout | None = None,
    threshold: float = 0.5,
    store: Any = None,
    **options: Any,
) -> Model | SegmentedFit:
    """Fit as :func:`dbfit.fitting.driver.fit`; with ``name=...`` also store the model as that name's next version
    (in ``con``'s database, or with ``store=`` in the database of that DuckDB or psycopg connection: a fit on
    Spark, which holds no store, names one this way; the data stay where they are).

    With ``split=dbfit.Holdout(key, share)`` the model is fitted on the training part only and its held-out
    metrics (at ``threshold``) go to ``model.stats["holdout"]``. ``model.source`` stays the whole source and
    ``model.split`` the rule; ``assess`` and reports then default to the held-out rows, ``score`` scores all
    rows.
    """
    progress = options.pop("progress", None)
    chosen = FitOptions.of(**options)
    with frame_source(con, source) as text:
        return fit_options(
            con,
            formula,
            text,
            chosen,
            name=name,
            split=split,
            threshold=threshold,
            progress=progress,
            store=store,
        )


def fit_options(
    con: duckdb.DuckDBPyConnection,
    formula: str,
    source: str,
    options: FitOptions,
    *,
    name: str | None = None,
    split: Holdout | None = None,
    threshold: float = 0.5,
    progress: fitting.Progress = None,
    store: Any = None,
) -> Model | SegmentedFit:
    """:func:`fit` with the fit's options already checked (the command line, spec files and refit build them)."""
    return training.fit_and_store(
        con,
        formula,
        source,
        options,
        name=name,
        split=split,
        threshold=threshold,
        progress=progress,
        store=store,
    )


def assess(
    con: duckdb.DuckDBPyConnection,
    model: str | Model,
    source: str | None = None,
    *,
    rows: str | None = None,
    threshold: float = 0.5,
    version: int | None = None,
    by: str | None = None,
    reference: Any = None,
    min_rows: int = groups.MIN_GROUP_ROWS,
) -> pa.Table:
    """One row per metric (metric, value, note) of ``model``; the note of metric ``rows`` says which rows.

    Default: the held-out rows of a holdout fit, else all rows of the model's source (in-sample). ``source``
    assesses all rows of another source; ``rows`` ("held_out", "training", "all") picks a part of the split.

    With ``by`` (a row-wise SQL expression): one row per group instead, with the rates compared against the
    group ``reference`` (default: the largest); see :func:`dbfit.assessment.groups.assess_groups`.
    """
    with frame_source(con, source) as text:
        if by is None:
            return training.assess(con, model, text, rows=rows, threshold=threshold, version=version)
        resolved = deploy.resolve_model(con, model, version)
        assessed, note = resolved.assessed_rows(text, rows)
        return groups.assess_groups(
            engine_for(con),
            resolved,
            assessed,
            by,
            reference=reference,
            threshold=threshold,
            min_rows=min_rows,
            rows_note=note,
        ).table


def assessment_tables(
    con: duckdb.DuckDBPyConnection,
    model: str | Model,
    source: str | None = None,
    *,
    rows: str | None = None,
    threshold: float = 0.5,
    version: int | None = None,
    by: str | None = None,
    reference: Any = None,
    min_rows: int = groups.MIN_GROUP_ROWS,
) -> dict[str, pa.Table]:
    """Metrics, confusion counts, cut-off curve, calibration and gains of ``model`` (rows as ``assess``); with
    ``by`` also ``groups``, the table of ``assess(..., by=by)``."""
    resolved = deploy.resolve_model(con, model, version)
    text, note = resolved.assessed_rows(source, rows)
    engine = engine_for(con)
    scored = assessment.scored_relation(resolved, text, engine=engine)
    tables = assessment.assessment_tables(engine, scored, threshold, rows_note=note)
    if by is not None:
        tables["groups"] = assess(
            con,
            resolved,
            source,
            rows=rows,
            threshold=threshold,
            by=by,
            reference=reference,
            min_rows=min_rows,
        )
    return tables


def report_assessment(
    con: duckdb.DuckDBPyConnection,
    model: str | Model,
    source: str | None = None,
    *,
    rows: str | None = None,
    threshold: float = 0.5,
    version: int | None = None,
    by: str | None = None,
    reference: Any = None,
    likelihood_ratio: bool = False,
) -> dict[str, pa.Table]:
    """Every table of the report (see :func:`dbfit.assessment.report_tables.report_tables`; rows as
    ``assess``), with ``by`` the assessment by group, and with a ``source`` of new rows the drift of a stored
    model against its training snapshot (an empty ``drift`` table says why when there is none);
    ``likelihood_ratio`` adds the likelihood-ratio test per term (one warm-started refit per term)."""
    resolved = deploy.resolve_model(con, model, version)
    text, note = resolved.assessed_rows(source, rows)
    tables = report_tables.report_tables(
        engine_for(con), resolved, text, note, threshold, likelihood_ratio=likelihood_ratio
    )
    if by is not None:
        tables["groups"] = assess(
            con, resolved, source, rows=rows, threshold=threshold, by=by, reference=reference
        )
    if source is not None:
        try:
            drift_table = psi_table(con, resolved, source)
        except DbfitError as err:
            drift_table = pa.table({"variable": pa.array([], type=pa.string())}).replace_schema_metadata(
                {b"dbfit_note": str(err).encode()}
            )
        tables["drift"] = drift_table.replace_schema_metadata(
            {**(drift_table.schema.metadata or {}), b"dbfit_source": source.encode()}
        )
    return tables


def cross_validate(
    con: duckdb.DuckDBPyConnection,
    formula: str,
    source: str,
    split: KFold,
    *,
    threshold: float = 0.5,
    **options: Any,
) -> pa.Table:
    """k-fold cross-validation in the database: fit on k - 1 folds, assess on the held fold, for each fold.

    Returns one row per metric: the mean over folds, their standard deviation, and each fold's value.
    """
    if not isinstance(split, KFold):
        raise FitError("cross_validate takes split=dbfit.KFold(key, folds)")
    if isinstance(split.folds, bool) or not isinstance(split.folds, int) or split.folds < 2:
        raise FitError(f"KFold folds must be a whole number of at least 2 (got {split.folds!r})")
    assessment.check_threshold(threshold)
    progress = options.pop("progress", False)
    chosen = FitOptions.of(**options)
    per_fold: list[dict[str, float | None]] = []
    for fold in range(split.folds):
        model = fitting.fit_with(con, formula, part_source(source, split, fold, keep=False), chosen, progress)
        table = assess(con, model, part_source(source, split, fold), threshold=threshold)
        per_fold.append(dict(zip(table["metric"].to_pylist(), table["value"].to_pylist())))
    names = list(per_fold[0])
    columns: dict[str, list[Any]] = {"metric": names, "mean": [], "std_dev": []}
    for fold in range(split.folds):
        columns[f"fold_{fold}"] = [per_fold[fold][n] for n in names]
    for name in names:
        values = [f[name] for f in per_fold if f[name] is not None]
        columns["mean"].append(float(np.mean(values)) if values else None)
        columns["std_dev"].append(float(np.std(values, ddof=1)) if len(values) > 1 else None)
    return pa.table(columns)


fit.__doc__ = (fitting.fit.__doc__ or "") + (
    "\n    name : store the fitted model as the next version of this name.\n"
    "    source may also be a pandas or polars DataFrame or an Arrow table (see :func:`frame_source`).\n"
)


@version_by_keyword(2)
def load(con: duckdb.DuckDBPyConnection, name: str, *, version: int | None = None) -> Model:
    """The stored model ``name`` at ``version`` (default: the current, promoted one)."""
    return store.load_model(con, name, version)


def from_json(text: str) -> Model:
    """A model from the JSON of :meth:`Model.to_json` (format ``dbfit-model`` 1)."""
    return reading.from_json(text)


def score(
    con: duckdb.DuckDBPyConnection,
    model: str | Model,
    source: Any = None,
    *,
    rows: str = "all",
    version: int | None = None,
    standard_error: bool = False,
    level: float = 0.95,
    unseen: str = "null",
    reasons: int | bool | None = 0,
    baseline: Mapping[str, Any] | None = None,
) -> pa.Table:
    """Every column of the rows plus the score columns, as a pyarrow table; its schema metadata ``dbfit_rows``
    says which rows (default: all rows of ``source``, else of the model's whole source).

    ``model`` is a stored model's name or a Model; ``rows`` picks a part of a holdout model's split
    ("held_out", "training", "all"); ``reasons=k`` (True: 4) adds ``reason_1``, ``reason_1_contribution``, ...
    against ``baseline`` (see :mod:`dbfit.deployment.scoring`); the other options are those of
    :meth:`Model.scoring_sql`. ``source`` may also be a pandas or polars DataFrame or an Arrow table.
    """
    resolved = deploy.resolve_model(con, model, version)
    with frame_source(con, source) as given:
        text, note = resolved.assessed_rows(given, rows)
        query = deploy.build_scoring(
            con,
            resolved,
            text,
            unseen=unseen,
            standard_error=standard_error,
            level=level,
            reasons=reasons,
            baseline=baseline,
        )
        try:
            table = con.sql(query.sql("duckdb")).to_arrow_table()
        except duckdb.Error as err:
            raise translate_error(err) from None
    return table.replace_schema_metadata({**(table.schema.metadata or {}), b"dbfit_rows": note.encode()})


def marginal_effects(
    con: duckdb.DuckDBPyConnection,
    model: str | Model,
    source: str | None = None,
    *,
    at: str | dict[str, Any] = OVERALL,
    variables: list[str] | None = None,
    version: int | None = None,
) -> pa.Table:
    """Effects of the model's factors on the probability with delta-method standard errors (one row per
    numeric factor and per non-reference level of each categorical), see :mod:`dbfit.assessment.effects`.

    ``at``: ``"overall"`` (average marginal effects over the fitted rows, or the rows of ``source``; one
    scan), ``"means"`` (at their means; one scan) or ``{factor: value}`` (that point, other factors at their
    means). ``variables``: the factors to take effects of (default: all).
    """
    resolved = deploy.resolve_model(con, model, version)
    return effects_of(engine_for(con), resolved, source, at=at, variables=variables)


def term_tests(
    con: duckdb.DuckDBPyConnection,
    model: str | Model,
    *,
    likelihood_ratio: bool = False,
    version: int | None = None,
) -> pa.Table:
    """One row per formula term: df, joint Wald chi-square and p-value (from the covariance, no scan); with
    ``likelihood_ratio=True`` also the likelihood-ratio test from a warm-started refit without each term
    (column ``refit_scans`` and metadata ``dbfit_scans`` say what it cost)."""
    resolved = deploy.resolve_model(con, model, version)
    return tests_of(engine_for(con), resolved, likelihood_ratio=likelihood_ratio)


def spline_curve(
    con: duckdb.DuckDBPyConnection | None,
    model: str | Model,
    term: str,
    *,
    points: int = 50,
    level: float = 0.95,
    version: int | None = None,
) -> pa.Table:
    """The fitted curve of spline ``term`` (``spline(x)`` or ``x``): log-odds on a grid from the lower to the
    upper boundary knot with a pointwise ``level`` band (delta method), see
    :mod:`dbfit.model.spline_curves`. ``con`` may be None for a :class:`Model` in hand (no query runs)."""
    resolved = model if isinstance(model, Model) else deploy.resolve_model(con, model, version)
    return curve_of(resolved, term, points=points, level=level)


def bin_screening(
    con: Any,
    source: str,
    target: str,
    variable: str,
    *,
    bins: int = 10,
    edges: list[float] | None = None,
    missing_bin: bool = False,
) -> pa.Table:
    """Weight of evidence and information value of ``variable`` against the 0/1 ``target`` per bin (``bins``
    quantile bins from one scan, or at ``edges``), see :mod:`dbfit.assessment.screening`; the total
    information value is the sum of the ``iv`` column."""
    return screening_of(
        engine_for(con), source, target, variable, bins=bins, edges=edges, missing_bin=missing_bin
    )


@contextmanager
def frame_source(con: duckdb.DuckDBPyConnection, source: Any) -> Iterator[Any]:
    """A pandas or polars DataFrame or an Arrow table given as ``source``: registered with DuckDB under a
    generated name for the call (DuckDB reads it in place, no row-by-row copy) and unregistered afterwards.
    Anything else passes through unchanged."""
    package = type(source).__module__.split(".")[0]
    if source is None or isinstance(source, str) or package not in ("pandas", "polars", "pyarrow"):
        yield source
        return
    if isinstance(source, pa.RecordBatchReader):
        raise SourceError(
            "a pyarrow RecordBatchReader can be read once, and dbfit reads its source several times: "
            "pass a pyarrow Table (reader.read_all()) instead"
        )
    if not isinstance(con, duckdb.DuckDBPyConnection):
        raise SourceError(
            f"a {package} {type(source).__name__} can be a source on a DuckDB connection only; on "
            f"{type(con).__name__} give a table name or a SELECT"
        )
    name = f"dbfit_frame_{uuid.uuid4().hex[:12]}"
    try:
        con.register(name, source)
    except (duckdb.Error, TypeError, ValueError) as err:
        raise SourceError(
            f"the {package} {type(source).__name__} given as source cannot be read: {err}"
        ) from None
    try:
        yield name
    finally:
        con.unregister(name)


def models(con: duckdb.DuckDBPyConnection) -> list[dict[str, Any]]:
    """One dict per stored version in ``con``'s database."""
    return store.version_rows(con)


@version_by_keyword(2)
def drop_model(
    con: duckdb.DuckDBPyConnection, name: str, *, version: int | None = None
) -> list[tuple[str, int]]:
    """Delete one version, or every version, of a stored model; returns what was deleted."""
    return store.drop_model(con, name, version)


def drift(
    con: duckdb.DuckDBPyConnection, model: str | Model, source: str, *, version: int | None = None
) -> pa.Table:
    """Population stability index per variable between the stored training snapshot of ``model`` and
    ``source`` (see :mod:`dbfit.lifecycle.drift`); the SQL ``dbfit.drift`` and ``dbfit drift`` alike."""
    return psi_table(con, deploy.resolve_model(con, model, version), source)


def population_stability(
    con: duckdb.DuckDBPyConnection, model: str | Model, source: str, *, version: int | None = None
) -> pa.Table:
    """Deprecated name of :func:`drift`."""
    warn_renamed("dbfit.population_stability(con, model, source)", "dbfit.drift(con, model, source)")
    return drift(con, model, source, version=version)


@version_by_keyword(2)
def promote(
    con: duckdb.DuckDBPyConnection, name: str, *, version: int, force: bool = False
) -> dict[str, Any]:
    """Make stored ``version`` of ``name`` current after its gates (:func:`dbfit.lifecycle.refit.promote`)."""
    return refitting.promote(con, name, version=version, force=force)


def decisions(con: duckdb.DuckDBPyConnection, name: str | None = None) -> list[dict[str, Any]]:
    """The promotion audit trail (time, model, candidate and current versions, decision, reason, figures)."""
    return store.decision_rows(con, None if name is None else model_name(name))


def save(
    con: duckdb.DuckDBPyConnection,
    fitted: Model | SegmentedFit,
    name: str,
    *,
    promote: bool = True,
    store: Any = None,
) -> int | dict[Any, tuple[str, int]]:
    """Store ``fitted`` as the next version of ``name`` (its version number back); a ``by=`` fit stores every
    segment's model as ``name.segment`` in one transaction (``{segment: (name, version)}`` back).
    ``promote=False`` stores a candidate that becomes current only through ``dbfit.promote``. ``store``: the
    DuckDB or psycopg connection of the store when ``con`` (the data, such as a SparkSession) holds none."""
    return saving.save(con, fitted, name, promote=promote, store=store)


def scoring_sql(
    fitted: Model | SegmentedFit,
    dialect: str = "duckdb",
    *,
    source: str | None = None,
    unseen: str = "null",
    standard_error: bool = False,
    level: float = 0.95,
    reasons: int | bool | None = 0,
    baseline: Mapping[str, Any] | None = None,
) -> str:
    """A SELECT over ``source`` (default: the model's source) adding ``linear_predictor`` and ``probability``
    (and with ``reasons=k`` the reason codes against ``baseline``, see :mod:`dbfit.deployment.scoring`).

    ``unseen`` says what a categorical level never seen in training gives: ``"null"`` (NULL scores),
    ``"reference"`` (scored as the reference level) or ``"error"`` (the query fails; DuckDB, Spark, BigQuery).
    A ``by=`` fit scores each row with its own segment's model (DuckDB SQL).
    """
    if isinstance(fitted, SegmentedFit):
        if fitted.by_expression is None:
            raise StoreError("this segmented fit does not know its by expression")
        query = segment_scoring_query(
            fitted.models,
            fitted.by_expression,
            source or fitted.source,
            unseen=unseen,
            reasons=reasons,
            baseline=baseline,
        )
        return query.sql("duckdb")
    return scoring.scoring_sql(
        fitted,
        dialect,
        source=source,
        unseen=unseen,
        standard_error=standard_error,
        level=level,
        reasons=reasons,
        baseline=baseline,
    )


def write_report(model: Model, path: str | Path, assessment: dict[str, pa.Table] | None = None) -> Path:
    """Write a standalone HTML report of the fit (and of ``assessment``, see :func:`assessment_tables`)."""
    return report.write_report(model, path, assessment)
