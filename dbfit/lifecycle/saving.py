"""Saving fitted models to the store together with what later checks need: the source's fingerprint (for
``refit --skip-unchanged``) and the drift snapshot of the training rows, written in the version's transaction.

The data and the store are usually one database (DuckDB or PostgreSQL). A model fitted on Spark, which holds
no store, is saved with ``store=`` naming a DuckDB or psycopg connection: the fingerprint and the snapshot are
computed on the engine that holds the data, the version is written in the store's database."""

from __future__ import annotations

from typing import Any

import duckdb

from dbfit.errors import AbortedTransactionError, DbfitError, StoreError
from dbfit.lifecycle.drift import training_snapshot
from dbfit.lifecycle.fingerprint import fingerprint, origin_source, segment_fingerprints
from dbfit.model.fitted import Model
from dbfit.model.segmented import SegmentedFit
from dbfit.store.model_store import Extra, save_models, store_of


def save_time_rows(con: duckdb.DuckDBPyConnection, model: Model) -> Extra:
    """The fingerprint of the source the user gave and the drift snapshot of the training rows, computed before the
    version's transaction; none when the source cannot be read here (a model moved in as JSON)."""
    try:
        source = origin_source(model.options, model.source_or_own(None))
        return {
            "fingerprints": {k: [v] for k, v in fingerprint(con, source).items()},
            "drift_bins": training_snapshot(con, model),
        }
    except AbortedTransactionError:
        raise
    except DbfitError:
        return {}


def save_model(
    con: duckdb.DuckDBPyConnection, model: Model, name: str, *, promote: bool = True, store: Any = None
) -> int:
    """Store ``model`` as the next version of ``name`` with its fingerprint and drift snapshot (computed on
    ``con``) in ``store`` (default: ``con``'s own database); return the version. ``promote=False`` stores a
    candidate that becomes current only through ``dbfit.promote``."""
    target = con if store is None else store
    return save_models(target, [(model, name, save_time_rows(con, model))], promote=promote)[0]


def save_segments(
    con: duckdb.DuckDBPyConnection,
    fitted: SegmentedFit,
    name: str,
    *,
    promote: bool = True,
    store: Any = None,
) -> dict[Any, tuple[str, int]]:
    """Store every segment's model as the next version of ``name.segment``, all in one transaction;
    returns ``{segment: (model name, version)}``. Each model's source is its segment's rows."""
    names = fitted.model_names(name)
    if fitted.by_expression is None:
        raise StoreError("this segmented fit does not know its by expression and cannot be stored")
    try:
        prints = segment_fingerprints(
            con,
            fitted.source,
            fitted.by_expression,
            {value: model.source for value, model in fitted.models.items()},
        )
    except DbfitError:
        prints = {}  # the source cannot be read here (fitted on another engine): no fingerprints, as for one model
    # No drift snapshot per segment: one per segment would scan the source once per segment.
    entries = [
        (model, names[value], {"fingerprints": {k: [v] for k, v in prints[value].items()}} if prints else {})
        for value, model in fitted.models.items()
    ]
    versions = save_models(con if store is None else store, entries, promote=promote)
    return {value: (names[value], version) for value, version in zip(fitted.models, versions)}


def save(
    con: duckdb.DuckDBPyConnection,
    fitted: Model | SegmentedFit,
    name: str,
    *,
    promote: bool = True,
    store: Any = None,
) -> int | dict[Any, tuple[str, int]]:
    """Store a fitted model (its version number back) or every model of a ``by=`` fit (``{segment: (name,
    version)}`` back), in ``store`` when given (the data on ``con``, the store elsewhere)."""
    store_of(con if store is None else store)  # refused before the save-time scans when it holds no store
    if isinstance(fitted, SegmentedFit):
        return save_segments(con, fitted, name, promote=promote, store=store)
    return save_model(con, fitted, name, promote=promote, store=store)
