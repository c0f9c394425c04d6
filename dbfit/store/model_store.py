"""The versioned model store: tables in schema ``dbfit_store`` of the user's database (DuckDB or PostgreSQL).

``models`` (one row per name), ``versions`` (one row per stored fit: summary statistics, the training-source
fingerprint and the full model document), ``coefficients`` (the coefficient table of each version),
``factors`` (each expression's kind, SQL type, levels and reference level), ``encodings`` (each internal
column: numeric factors, level indicators, centre and scale) and ``covariance`` (long format); per version
also ``fingerprints`` (the training source's row count and row checksum) and ``drift_bins`` (the training
snapshot of :mod:`dbfit.lifecycle.drift`). ``current_versions`` names the promoted version of each model (the one that
loads without a version and that live views read; a model without a row there reads its latest version),
``gates`` holds each model's promotion gates and ``decisions`` the audit trail of every promotion decision;
``published_views`` records each view dbfit published (with the engine's text of it), so that publishing again
replaces only a view dbfit made and that nobody has changed since. The tables are described in
:mod:`dbfit.store.tables`; what differs between engines (catalog queries, inserts, locks, errors) is in
:mod:`dbfit.store.duckdb_store` and :mod:`dbfit.store.postgres_store`.
Every write is one transaction on a connection of its own (the caller's connection and its open transaction
are never used for it): an error, a KeyboardInterrupt or a killed process leaves either the whole version or
none of it. Model names travel as bound parameters.
"""

from __future__ import annotations

import json
import random
import time
from typing import Any

import duckdb
from sqlglot import exp

from dbfit.errors import StoreConflictError, StoreError
from dbfit.expressions.names import model_name, model_version
from dbfit.model.fitted import Model
from dbfit.model.inference import COEFFICIENT_COLUMNS
from dbfit.model.reading import from_document
from dbfit.store.backend import StoreDatabase
from dbfit.store.duckdb_store import DuckDBStore
from dbfit.store.postgres_store import PostgresStore
from dbfit.store.tables import SCHEMA, VERSION_TABLES, Extra, now_utc, rows_of_version, stacked

WRITE_ATTEMPTS = 40
MAX_BACKOFF_SECONDS = 0.25
Connection = Any  # a DuckDB connection, a psycopg connection, or a StoreDatabase


def store_of(con: Connection) -> StoreDatabase:
    """The store's view of ``con``: a DuckDB connection or a psycopg connection (or one already wrapped)."""
    if isinstance(con, StoreDatabase):
        return con
    if isinstance(con, duckdb.DuckDBPyConnection):
        return DuckDBStore(con)
    if type(con).__module__.startswith("psycopg"):
        return PostgresStore(con)
    raise StoreError(
        f"the model store lives in a DuckDB or PostgreSQL database: give a DuckDB connection or a psycopg "
        f"connection, not a {type(con).__name__} (a fit on Spark names its store with store=<one of them>)"
    )


def save_model(
    con: Connection, model: Model, name: str, *, promote: bool = True, extra: Extra | None = None
) -> int:
    """Write ``model`` as the next version of ``name`` in one transaction; return the version number.

    ``promote=True`` makes it the current version in the same transaction; ``promote=False`` stores a candidate.
    ``extra`` adds rows to per-version tables (``fingerprints``, ``drift_bins``) in the same transaction.
    """
    return save_models(con, [(model, name, extra)], promote=promote)[0]


def save_models(
    con: Connection, entries: list[tuple[Model, str, Extra | None]], *, promote: bool = True
) -> list[int]:
    """Write each ``(model, name, extra)`` as the next version of its name, all in one transaction: every one
    of them or none. Returns the version numbers in order."""
    names = [model_name(name) for _, name, _ in entries]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise StoreError(f"model names given more than once in one save: {', '.join(repeated[:5])}")
    extras = [extra or {} for _, _, extra in entries]
    store = store_of(con)
    for attempt in range(WRITE_ATTEMPTS):
        versions: list[int] = []
        try:
            with store.transaction(names) as writer:
                versions = _next_versions(writer, names)
                _write_versions(writer, [model for model, _, _ in entries], names, versions, extras, promote)
            break
        except StoreConflictError:
            if (
                attempt == WRITE_ATTEMPTS - 1
                or not versions
                or any(_orphan_rows(store, n, v) for n, v in zip(names, versions))
            ):
                raise
            # Randomised exponential back-off: with several busy writers a fixed short wait can lose every round.
            time.sleep(random.uniform(0.0, min(MAX_BACKOFF_SECONDS, 0.002 * 2**attempt)))
    for (model, _, _), name, version in zip(entries, names, versions):
        model.name, model.version = name, version
    return versions


def load_model(con: Connection, name: str, version: int | None = None) -> Model:
    """Read version ``version`` (default: the current one) of model ``name``."""
    store = store_of(con)
    name = model_name(name)
    version = resolve_version(store, name, version)
    rows = store.fetch(
        f"SELECT document FROM {SCHEMA}.versions WHERE model = ? AND version = ?", [name, version]
    )
    return from_document(json.loads(rows[0][0]), name=name, version=version)


def resolve_version(con: Connection, name: str, version: int | None) -> int:
    """The stored version asked for (default: the current one), or a StoreError naming what exists."""
    store = store_of(con)
    version = model_version(version)
    versions = stored_versions(store, name)
    if not versions:
        known = (
            [row[0] for row in store.fetch(f"SELECT model FROM {SCHEMA}.models ORDER BY model")]
            if store_exists(store)
            else []
        )
        listing = f"stored models: {', '.join(known)}" if known else "the store is empty"
        raise StoreError(f"model '{name}' is not in the store of this database ({listing})")
    if version is None:
        return current_version(store, name) or versions[-1]
    if version not in versions:
        raise StoreError(
            f"model '{name}' has no version {version} (stored versions: {', '.join(map(str, versions))})"
        )
    return int(version)


def current_version(con: Connection, name: str) -> int | None:
    """The promoted version of ``name``, or None (a model saved before promotions existed: its latest counts)."""
    store = store_of(con)
    if not has_table(store, "current_versions"):
        return None
    rows = store.fetch(f"SELECT version FROM {SCHEMA}.current_versions WHERE model = ?", [name])
    return int(rows[0][0]) if rows else None


def has_table(con: Connection, table: str) -> bool:
    return table in store_of(con).tables()


def stored_versions(con: Connection, name: str) -> list[int]:
    store = store_of(con)
    if not store_exists(store):
        return []
    rows = store.fetch(f"SELECT version FROM {SCHEMA}.versions WHERE model = ? ORDER BY version", [name])
    return [int(r[0]) for r in rows]


def names_starting_with(con: Connection, prefix: str) -> list[str]:
    """The stored model names that begin with ``prefix`` (such as the ``name.<segment>`` models of a by= fit)."""
    store = store_of(con)
    if not store_exists(store):
        return []
    rows = store.fetch(
        f"SELECT DISTINCT model FROM {SCHEMA}.versions WHERE starts_with(model, ?) ORDER BY model", [prefix]
    )
    return [r[0] for r in rows]


def store_exists(con: Connection) -> bool:
    return has_table(con, "versions")


def version_rows(con: Connection) -> list[dict[str, Any]]:
    """One dict per stored version (name, version, times, formula, source, rows, deviance, AIC, converged, warnings)."""
    store = store_of(con)
    tables = store.tables()
    if "versions" not in tables:
        return []
    columns = [
        "model",
        "version",
        "created_at",
        "formula",
        "source",
        "source_rows",
        "rows_used",
        "deviance",
        "aic",
        "converged",
        "warnings_count",
    ]
    rows = store.fetch(f"SELECT {', '.join(columns)} FROM {SCHEMA}.versions ORDER BY model, version")
    listed = [dict(zip(columns, row)) for row in rows]
    current = {m: None for m in {row["model"] for row in listed}}
    if "current_versions" in tables:
        current.update(dict(store.fetch(f"SELECT model, version FROM {SCHEMA}.current_versions")))
    latest = {row["model"]: row["version"] for row in listed}
    for row in listed:
        row["current"] = row["version"] == (current.get(row["model"]) or latest[row["model"]])
    return listed


def coefficient_rows(con: Connection, name: str, version: int | None = None) -> list[dict[str, Any]]:
    """The stored coefficient table of one version, with ``model`` and ``version``."""
    store = store_of(con)
    name = model_name(name)
    version = resolve_version(store, name, version)
    rows = store.fetch(
        f"SELECT model, version, {', '.join(COEFFICIENT_COLUMNS)} FROM {SCHEMA}.coefficients "
        "WHERE model = ? AND version = ? ORDER BY position",
        [name, version],
    )
    return [dict(zip(("model", "version") + COEFFICIENT_COLUMNS, row)) for row in rows]


def drop_model(con: Connection, name: str, version: int | None = None) -> list[tuple[str, int]]:
    """Delete one version (or, without ``version``, every version) of ``name`` in one transaction."""
    store = store_of(con)
    name = model_name(name)
    versions = (
        [resolve_version(store, name, version)] if version is not None else stored_versions(store, name)
    )
    if not versions:
        resolve_version(store, name, None)
    placeholders = ", ".join("?" for _ in versions)
    with store.transaction([name]) as writer:
        for table in (*VERSION_TABLES, "current_versions"):
            writer.fetch(
                f"DELETE FROM {SCHEMA}.{table} WHERE model = ? AND version IN ({placeholders})",
                [name, *versions],
            )
        writer.fetch(
            f"DELETE FROM {SCHEMA}.models WHERE model = ? AND NOT EXISTS "
            f"(SELECT 1 FROM {SCHEMA}.versions WHERE model = ?)",
            [name, name],
        )
    return [(name, v) for v in versions]


def record_decision(
    con: Connection,
    name: str,
    candidate: int | None,
    current: int | None,
    decision: str,
    reason: str,
    figures: dict[str, Any],
    *,
    promote: bool,
) -> None:
    """One audit row in ``decisions`` and, when ``promote``, the candidate made current: one transaction.

    A promotion checks in the same transaction that ``current`` is still the current version: when another
    refit promoted meanwhile, nothing is written and a StoreConflictError names the version now current.
    """
    with store_of(con).transaction([name]) as writer:
        if promote:
            rows = writer.fetch(f"SELECT version FROM {SCHEMA}.current_versions WHERE model = ?", [name])
            now_current = int(rows[0][0]) if rows else (stored_versions(writer, name) or [None])[-1]
            if rows and now_current != current:
                raise StoreConflictError(
                    f"model '{name}': version {now_current} became current while candidate {candidate} was checked "
                    f"against version {current}; candidate {candidate} stays stored, not current (run the refit again)"
                )
        writer.fetch(
            f"INSERT INTO {SCHEMA}.decisions VALUES (?, ?, ?, ?, ?, ?, ?)",
            [now_utc(), name, candidate, current, decision, reason, json.dumps(figures, default=str)],
        )
        if promote and candidate is not None:
            _set_current_versions(writer, [name], [candidate])


def decision_rows(con: Connection, name: str | None = None) -> list[dict[str, Any]]:
    """The audit trail, oldest first (optionally of one model)."""
    store = store_of(con)
    if not has_table(store, "decisions"):
        return []
    columns = ["decided_at", "model", "candidate_version", "current_version", "decision", "reason", "figures"]
    where, parameters = ("WHERE model = ? ", [name]) if name is not None else ("", None)
    rows = store.fetch(
        f"SELECT {', '.join(columns)} FROM {SCHEMA}.decisions {where}ORDER BY decided_at", parameters
    )
    return [dict(zip(columns, row)) | {"figures": json.loads(row[-1])} for row in rows]


def write_setting(con: Connection, table: str, name: str, settings: dict[str, Any]) -> None:
    """Replace the JSON settings row of ``name`` in a per-model settings table (``gates``)."""
    with store_of(con).transaction([name]) as writer:
        writer.fetch(f"DELETE FROM {SCHEMA}.{table} WHERE model = ?", [name])
        writer.fetch(
            f"INSERT INTO {SCHEMA}.{table} VALUES (?, ?, ?)", [name, json.dumps(settings), now_utc()]
        )


def read_setting(con: Connection, table: str, name: str) -> dict[str, Any] | None:
    store = store_of(con)
    if not has_table(store, table):
        return None
    rows = store.fetch(f"SELECT settings FROM {SCHEMA}.{table} WHERE model = ?", [name])
    return json.loads(rows[0][0]) if rows else None


def publish_view(
    con: Connection,
    target: exp.Table,
    query: exp.Select,
    record: dict[str, Any],
    *,
    replace: bool = False,
) -> exp.Create:
    """Create or replace the view ``target`` AS ``query`` and record it in ``published_views``, one transaction.

    An existing view is replaced only when dbfit published it and the engine's text of it is still the
    recorded one; any other view (one the user wrote, or changed since) is refused, naming it, unless
    ``replace``. ``record`` holds the view's ``model``, ``version`` and ``mode``. The view is made on the
    store's own connection, in the caller's current database and schema when ``target`` does not name them.
    """
    store = store_of(con)
    here, schema = store.fetch("SELECT current_database(), current_schema()")[0]
    database = target.catalog or here
    qualified = exp.Table(
        this=exp.to_identifier(target.name, quoted=True),
        db=exp.to_identifier(target.db or schema, quoted=True),
        catalog=exp.to_identifier(database, quoted=True),
    )
    statement = exp.Create(this=target.copy(), kind="VIEW", replace=True, expression=query)
    shown = target.sql(store.dialect)
    key = [database if database.lower() != here.lower() else "", target.db or schema, target.name]
    with store.transaction([]) as writer:
        found = writer.view_text(database, key[1], key[2])
        if found is not None and not replace:
            recorded = writer.fetch(
                f"SELECT definition FROM {SCHEMA}.published_views WHERE database_name = ? "
                "AND lower(schema_name) = lower(?) AND lower(view_name) = lower(?)",
                key,
            )
            if not recorded or recorded[0][0] != found:
                raise StoreError(
                    f"view {shown} already exists and was not published by dbfit (or was changed "
                    "since): choose another name, or pass replace=True to replace it"
                )
        writer.create_view(
            exp.Create(this=qualified, kind="VIEW", replace=True, expression=query).sql(store.dialect), shown
        )
        writer.fetch(
            f"DELETE FROM {SCHEMA}.published_views WHERE database_name = ? AND lower(schema_name) = "
            "lower(?) AND lower(view_name) = lower(?)",
            key,
        )
        writer.fetch(
            f"INSERT INTO {SCHEMA}.published_views VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            key
            + [
                record.get("model"),
                record.get("version"),
                record["mode"],
                writer.view_text(database, key[1], key[2]),
                now_utc(),
            ],
        )
    return statement


def is_published_view(con: Connection, target: exp.Table) -> bool:
    """Whether ``target`` is a view that dbfit published (recorded in ``published_views`` and still there)."""
    store = store_of(con)
    if not has_table(store, "published_views"):
        return False
    here, schema = store.fetch("SELECT current_database(), current_schema()")[0]
    database = target.catalog or here
    key = [database if database.lower() != here.lower() else "", target.db or schema, target.name]
    recorded = store.fetch(
        f"SELECT count(*) FROM {SCHEMA}.published_views WHERE database_name = ? "
        "AND lower(schema_name) = lower(?) AND lower(view_name) = lower(?)",
        key,
    )
    return recorded[0][0] > 0 and store.view_text(database, key[1], key[2]) is not None


def version_table(
    con: Connection, table: str, name: str, version: int, order: str = ""
) -> list[dict[str, Any]]:
    """The rows of one version in a per-version table (``fingerprints``, ``drift_bins``) as dicts."""
    if table not in VERSION_TABLES:
        raise StoreError(f"no per-version store table {table!r}")
    store = store_of(con)
    if not has_table(store, table):
        return []
    return store.fetch_dicts(
        f"SELECT * FROM {SCHEMA}.{table} WHERE model = ? AND version = ?"
        + (f" ORDER BY {order}" if order else ""),
        [name, version],
    )


def _set_current_versions(writer: StoreDatabase, names: list[str], versions: list[int]) -> None:
    writer.fetch(f"DELETE FROM {SCHEMA}.current_versions WHERE {writer.in_list('model')}", [names])
    writer.insert(
        "current_versions", {"model": names, "version": versions, "promoted_at": [now_utc()] * len(names)}
    )


def _orphan_rows(store: StoreDatabase, name: str, version: int) -> bool:
    """Whether committed rows of ``version`` exist without its ``versions`` row: never written by dbfit, which
    commits a version whole, so a key clash then is not a race with another writer (and retrying cannot help).
    One statement, so both counts come from one snapshot."""
    tables = [table for table in VERSION_TABLES if table != "versions"]
    others = " UNION ALL ".join(
        f"SELECT 1 FROM {SCHEMA}.{table} WHERE model = ? AND version = ?" for table in tables
    )
    query = (
        f"SELECT (SELECT count(*) FROM {SCHEMA}.versions WHERE model = ? AND version = ?), "
        f"(SELECT count(*) FROM ({others}) AS parts)"
    )
    headers, parts = store.fetch_fresh(query, [name, version] * (len(tables) + 1))[0]
    return headers == 0 and parts > 0


def _next_versions(writer: StoreDatabase, names: list[str]) -> list[int]:
    rows = writer.fetch(
        f"SELECT model, max(version) FROM {SCHEMA}.versions WHERE {writer.in_list('model')} GROUP BY model",
        [names],
    )
    latest = dict(rows)
    return [int(latest.get(name) or 0) + 1 for name in names]


def _write_versions(
    writer: StoreDatabase,
    models: list[Model],
    names: list[str],
    versions: list[int],
    extras: list[Extra],
    promote: bool,
) -> None:
    """All rows of all the versions, one INSERT per table (a store of many segment models writes in seconds)."""
    now = now_utc()
    batches: dict[str, list[dict[str, list[Any]]]] = {}
    for model, name, version, extra in zip(models, names, versions, extras):
        for table, columns in rows_of_version(model, name, version, now).items():
            batches.setdefault(table, []).append(columns)
        for table, columns in extra.items():
            batches.setdefault(table, []).append({"model": [name], "version": [version], **columns})
    known = {
        row[0]
        for row in writer.fetch(f"SELECT model FROM {SCHEMA}.models WHERE {writer.in_list('model')}", [names])
    }
    new = [name for name in names if name not in known]
    writer.insert("models", {"model": new, "created_at": [now] * len(new)})
    for table, parts in batches.items():
        writer.insert(table, stacked(parts))
    if promote:
        _set_current_versions(writer, names, versions)
