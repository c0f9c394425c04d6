"""The versioned model store: tables in schema ``dbfit_store`` of the user's own database.

``models`` (one row per name), ``versions`` (one row per stored fit: summary statistics, the training-source
fingerprint and the full model document), ``coefficients`` (the coefficient table of each version),
``factors`` (each expression's kind, SQL type, levels and reference level), ``encodings`` (each internal
column: numeric factors, level indicators, centre and scale) and ``covariance`` (long format); per version
also ``fingerprints`` (the training source's row count and row checksum) and ``drift_bins`` (the training
snapshot of :mod:`dbfit.lifecycle.drift`). ``current_versions`` names the promoted version of each model (the one that
loads without a version and that live views read; a model without a row there reads its latest version),
``gates`` holds each model's promotion gates and ``decisions`` the audit trail of every promotion decision;
``published_views`` records each view dbfit published (with DuckDB's text of it), so that publishing again
replaces only a view dbfit made and that nobody has changed since.
Every write is one transaction on a connection of its own (the caller's connection and its open transaction
are never used for it): an error, a KeyboardInterrupt or a killed process leaves either the whole version or
none of it. After the commit a CHECKPOINT moves the write from the write-ahead log into the database file,
so that a copy of the file alone holds it even when the writing session never closes its connection.
Model names travel as bound parameters.
"""

from __future__ import annotations

import json
import random
import time
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from typing import Any

import duckdb
import pyarrow as pa
from sqlglot import exp

from dbfit.engines.duckdb_engine import connection_lock
from dbfit.errors import StoreConflictError, StoreError
from dbfit.expressions.names import model_name, model_version
from dbfit.model.document import to_document
from dbfit.model.fitted import Model
from dbfit.model.inference import COEFFICIENT_COLUMNS
from dbfit.model.reading import from_document

SCHEMA = "dbfit_store"
WRITE_ATTEMPTS = 40
MAX_BACKOFF_SECONDS = 0.25
_KEY = "model VARCHAR NOT NULL, version INTEGER NOT NULL"
_TABLES = {
    "models": "model VARCHAR PRIMARY KEY, created_at TIMESTAMP NOT NULL",
    "versions": f"""{_KEY}, created_at TIMESTAMP NOT NULL, formula VARCHAR NOT NULL, source VARCHAR NOT NULL,
        source_rows BIGINT NOT NULL, rows_used BIGINT NOT NULL, fitted_at TIMESTAMP NOT NULL, deviance DOUBLE,
        aic DOUBLE, converged BOOLEAN NOT NULL, warnings_count INTEGER NOT NULL, document VARCHAR NOT NULL,
        PRIMARY KEY (model, version)""",
    "coefficients": f"{_KEY}, position INTEGER NOT NULL, "
    + ", ".join(f"{c} {'VARCHAR' if c == 'term' else 'DOUBLE'}" for c in COEFFICIENT_COLUMNS)
    + ", PRIMARY KEY (model, version, position)",
    "factors": f"""{_KEY}, position INTEGER NOT NULL, expression VARCHAR NOT NULL, kind VARCHAR NOT NULL,
        sql_type VARCHAR NOT NULL, levels VARCHAR NOT NULL, reference VARCHAR, PRIMARY KEY (model, version, position)""",
    "encodings": f"""{_KEY}, position INTEGER NOT NULL, label VARCHAR NOT NULL, term VARCHAR NOT NULL,
        numeric_factors VARCHAR NOT NULL, indicators VARCHAR NOT NULL, centre DOUBLE NOT NULL, scale DOUBLE NOT NULL,
        PRIMARY KEY (model, version, position)""",
    "covariance": f"{_KEY}, row_term VARCHAR NOT NULL, column_term VARCHAR NOT NULL, value DOUBLE",
    "fingerprints": f"{_KEY}, source VARCHAR NOT NULL, source_rows BIGINT NOT NULL, checksum VARCHAR, "
    "PRIMARY KEY (model, version)",
    "drift_bins": f"""{_KEY}, variable VARCHAR NOT NULL, kind VARCHAR NOT NULL, position INTEGER NOT NULL,
        lower DOUBLE, upper DOUBLE, level VARCHAR, rows BIGINT NOT NULL, share DOUBLE NOT NULL,
        PRIMARY KEY (model, version, variable, position)""",
    "current_versions": "model VARCHAR PRIMARY KEY, version INTEGER NOT NULL, promoted_at TIMESTAMP NOT NULL",
    "gates": "model VARCHAR PRIMARY KEY, settings VARCHAR NOT NULL, set_at TIMESTAMP NOT NULL",
    "decisions": """decided_at TIMESTAMP NOT NULL, model VARCHAR NOT NULL, candidate_version INTEGER,
        current_version INTEGER, decision VARCHAR NOT NULL, reason VARCHAR NOT NULL, figures VARCHAR NOT NULL""",
    "published_views": """database_name VARCHAR NOT NULL, schema_name VARCHAR NOT NULL, view_name VARCHAR NOT NULL,
        model VARCHAR, version INTEGER, mode VARCHAR NOT NULL, definition VARCHAR NOT NULL,
        published_at TIMESTAMP NOT NULL, PRIMARY KEY (database_name, schema_name, view_name)""",
}
VERSION_TABLES = (
    "drift_bins",
    "fingerprints",
    "covariance",
    "encodings",
    "factors",
    "coefficients",
    "versions",
)
Extra = dict[str, dict[str, list[Any]]]  # more per-version rows, column-wise by table (the key is added)


def save_model(
    con: duckdb.DuckDBPyConnection,
    model: Model,
    name: str,
    *,
    promote: bool = True,
    extra: Extra | None = None,
) -> int:
    """Write ``model`` as the next version of ``name`` in one transaction; return the version number.

    ``promote=True`` makes it the current version in the same transaction; ``promote=False`` stores a candidate.
    ``extra`` adds rows to per-version tables (``fingerprints``, ``drift_bins``) in the same transaction.
    """
    return save_models(con, [(model, name, extra)], promote=promote)[0]


def save_models(
    con: duckdb.DuckDBPyConnection, entries: list[tuple[Model, str, Extra | None]], *, promote: bool = True
) -> list[int]:
    """Write each ``(model, name, extra)`` as the next version of its name, all in one transaction: every one
    of them or none. Returns the version numbers in order."""
    names = [model_name(name) for _, name, _ in entries]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise StoreError(f"model names given more than once in one save: {', '.join(repeated[:5])}")
    extras = [extra or {} for _, _, extra in entries]
    preamble = ensure_schema_statements(con)
    for attempt in range(WRITE_ATTEMPTS):
        versions: list[int] = []
        try:
            with _transaction(con, preamble) as writer:
                versions = _next_versions(writer, names)
                _write_versions(writer, [model for model, _, _ in entries], names, versions, extras, promote)
            break
        except StoreConflictError:
            if (
                attempt == WRITE_ATTEMPTS - 1
                or not versions
                or any(_orphan_rows(con, n, v) for n, v in zip(names, versions))
            ):
                raise
            # Randomised exponential back-off: with several busy writers a fixed short wait can lose every round.
            time.sleep(random.uniform(0.0, min(MAX_BACKOFF_SECONDS, 0.002 * 2**attempt)))
    for (model, _, _), name, version in zip(entries, names, versions):
        model.name, model.version = name, version
    return versions


def load_model(con: duckdb.DuckDBPyConnection, name: str, version: int | None = None) -> Model:
    """Read version ``version`` (default: the current one) of model ``name``."""
    name = model_name(name)
    version = resolve_version(con, name, version)
    rows = _fetch(
        con, f"SELECT document FROM {SCHEMA}.versions WHERE model = ? AND version = ?", [name, version]
    )
    return from_document(json.loads(rows[0][0]), name=name, version=version)


def resolve_version(con: duckdb.DuckDBPyConnection, name: str, version: int | None) -> int:
    """The stored version asked for (default: the current one), or a StoreError naming what exists."""
    version = model_version(version)
    versions = stored_versions(con, name)
    if not versions:
        known = (
            [row[0] for row in _fetch(con, f"SELECT model FROM {SCHEMA}.models ORDER BY model")]
            if store_exists(con)
            else []
        )
        listing = f"stored models: {', '.join(known)}" if known else "the store is empty"
        raise StoreError(f"model '{name}' is not in the store of this database ({listing})")
    if version is None:
        return current_version(con, name) or versions[-1]
    if version not in versions:
        raise StoreError(
            f"model '{name}' has no version {version} (stored versions: {', '.join(map(str, versions))})"
        )
    return int(version)


def current_version(con: duckdb.DuckDBPyConnection, name: str) -> int | None:
    """The promoted version of ``name``, or None (a model saved before promotions existed: its latest counts)."""
    if not has_table(con, "current_versions"):
        return None
    rows = _fetch(con, f"SELECT version FROM {SCHEMA}.current_versions WHERE model = ?", [name])
    return int(rows[0][0]) if rows else None


def has_table(con: duckdb.DuckDBPyConnection, table: str) -> bool:
    rows = _fetch(
        con,
        "SELECT count(*) FROM duckdb_tables() WHERE database_name = current_database() AND schema_name = ? "
        "AND table_name = ?",
        [SCHEMA, table],
    )
    return rows[0][0] > 0


def ensure_schema_statements(con: duckdb.DuckDBPyConnection) -> list[str]:
    """The CREATE statements still needed (none once every store table exists; a store of an older dbfit gets
    its new tables)."""
    rows = _fetch(
        con,
        "SELECT count(*) FROM duckdb_tables() WHERE database_name = current_database() AND schema_name = ?",
        [SCHEMA],
    )
    return [] if rows[0][0] >= len(_TABLES) else _schema_statements()


def stored_versions(con: duckdb.DuckDBPyConnection, name: str) -> list[int]:
    if not store_exists(con):
        return []
    rows = _fetch(con, f"SELECT version FROM {SCHEMA}.versions WHERE model = ? ORDER BY version", [name])
    return [int(r[0]) for r in rows]


def names_starting_with(con: duckdb.DuckDBPyConnection, prefix: str) -> list[str]:
    """The stored model names that begin with ``prefix`` (such as the ``name.<segment>`` models of a by= fit)."""
    if not store_exists(con):
        return []
    rows = _fetch(
        con,
        f"SELECT DISTINCT model FROM {SCHEMA}.versions WHERE starts_with(model, ?) ORDER BY model",
        [prefix],
    )
    return [r[0] for r in rows]


def store_exists(con: duckdb.DuckDBPyConnection) -> bool:
    return has_table(con, "versions")


def version_rows(con: duckdb.DuckDBPyConnection) -> list[dict[str, Any]]:
    """One dict per stored version (name, version, times, formula, source, rows, deviance, AIC, converged, warnings)."""
    if not store_exists(con):
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
    rows = _fetch(con, f"SELECT {', '.join(columns)} FROM {SCHEMA}.versions ORDER BY model, version")
    listed = [dict(zip(columns, row)) for row in rows]
    current = {m: None for m in {row["model"] for row in listed}}
    if has_table(con, "current_versions"):
        current.update(dict(_fetch(con, f"SELECT model, version FROM {SCHEMA}.current_versions")))
    latest = {row["model"]: row["version"] for row in listed}
    for row in listed:
        row["current"] = row["version"] == (current.get(row["model"]) or latest[row["model"]])
    return listed


def coefficient_rows(
    con: duckdb.DuckDBPyConnection, name: str, version: int | None = None
) -> list[dict[str, Any]]:
    """The stored coefficient table of one version, with ``model`` and ``version``."""
    name = model_name(name)
    version = resolve_version(con, name, version)
    rows = _fetch(
        con,
        f"SELECT model, version, {', '.join(COEFFICIENT_COLUMNS)} FROM {SCHEMA}.coefficients "
        "WHERE model = ? AND version = ? ORDER BY position",
        [name, version],
    )
    return [dict(zip(("model", "version") + COEFFICIENT_COLUMNS, row)) for row in rows]


def drop_model(
    con: duckdb.DuckDBPyConnection, name: str, version: int | None = None
) -> list[tuple[str, int]]:
    """Delete one version (or, without ``version``, every version) of ``name`` in one transaction."""
    name = model_name(name)
    versions = [resolve_version(con, name, version)] if version is not None else stored_versions(con, name)
    if not versions:
        resolve_version(con, name, None)
    placeholders = ", ".join("?" for _ in versions)
    with _transaction(con) as writer:
        for table in VERSION_TABLES:
            _run(
                writer,
                [f"DELETE FROM {SCHEMA}.{table} WHERE model = ? AND version IN ({placeholders})"],
                [name, *versions],
            )
        if has_table(writer, "current_versions"):
            _run(
                writer,
                [f"DELETE FROM {SCHEMA}.current_versions WHERE model = ? AND version IN ({placeholders})"],
                [name, *versions],
            )
        _run(
            writer,
            [
                f"DELETE FROM {SCHEMA}.models WHERE model = ? AND NOT EXISTS "
                f"(SELECT 1 FROM {SCHEMA}.versions WHERE model = ?)"
            ],
            [name, name],
        )
    return [(name, v) for v in versions]


def record_decision(
    con: duckdb.DuckDBPyConnection,
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
    now = datetime.now(UTC).replace(tzinfo=None)
    with _transaction(con, ensure_schema_statements(con)) as writer:
        if promote:
            rows = _fetch(writer, f"SELECT version FROM {SCHEMA}.current_versions WHERE model = ?", [name])
            now_current = int(rows[0][0]) if rows else (stored_versions(writer, name) or [None])[-1]
            if rows and now_current != current:
                raise StoreConflictError(
                    f"model '{name}': version {now_current} became current while candidate {candidate} was checked "
                    f"against version {current}; candidate {candidate} stays stored, not current (run the refit again)"
                )
        _run(
            writer,
            [f"INSERT INTO {SCHEMA}.decisions VALUES (?, ?, ?, ?, ?, ?, ?)"],
            [now, name, candidate, current, decision, reason, json.dumps(figures, default=str)],
        )
        if promote and candidate is not None:
            _set_current(writer, name, candidate)


def decision_rows(con: duckdb.DuckDBPyConnection, name: str | None = None) -> list[dict[str, Any]]:
    """The audit trail, oldest first (optionally of one model)."""
    if not has_table(con, "decisions"):
        return []
    columns = ["decided_at", "model", "candidate_version", "current_version", "decision", "reason", "figures"]
    where, parameters = ("WHERE model = ? ", [name]) if name is not None else ("", None)
    rows = _fetch(
        con, f"SELECT {', '.join(columns)} FROM {SCHEMA}.decisions {where}ORDER BY decided_at", parameters
    )
    return [dict(zip(columns, row)) | {"figures": json.loads(row[-1])} for row in rows]


def write_setting(con: duckdb.DuckDBPyConnection, table: str, name: str, settings: dict[str, Any]) -> None:
    """Replace the JSON settings row of ``name`` in a per-model settings table (``gates``)."""
    now = datetime.now(UTC).replace(tzinfo=None)
    with _transaction(con, ensure_schema_statements(con)) as writer:
        _run(writer, [f"DELETE FROM {SCHEMA}.{table} WHERE model = ?"], [name])
        _run(writer, [f"INSERT INTO {SCHEMA}.{table} VALUES (?, ?, ?)"], [name, json.dumps(settings), now])


def read_setting(con: duckdb.DuckDBPyConnection, table: str, name: str) -> dict[str, Any] | None:
    if not has_table(con, table):
        return None
    rows = _fetch(con, f"SELECT settings FROM {SCHEMA}.{table} WHERE model = ?", [name])
    return json.loads(rows[0][0]) if rows else None


def publish_view(
    con: duckdb.DuckDBPyConnection,
    target: exp.Table,
    query: exp.Select,
    record: dict[str, Any],
    *,
    replace: bool = False,
) -> exp.Create:
    """Create or replace the view ``target`` AS ``query`` and record it in ``published_views``, one transaction.

    An existing view is replaced only when dbfit published it and DuckDB's text of it is still the recorded
    one; any other view (one the user wrote, or changed since) is refused, naming it, unless ``replace``.
    ``record`` holds the view's ``model``, ``version`` and ``mode``. The view is made on the store's own
    connection, in the caller's current database and schema when ``target`` does not name them.
    """
    here, schema = _fetch(con, "SELECT current_database(), current_schema()")[0]
    database = target.catalog or here
    qualified = exp.Table(
        this=exp.to_identifier(target.name, quoted=True),
        db=exp.to_identifier(target.db or schema, quoted=True),
        catalog=exp.to_identifier(database, quoted=True),
    )
    statement = exp.Create(this=target.copy(), kind="VIEW", replace=True, expression=query)
    shown = target.sql("duckdb")
    with _transaction(con, ensure_schema_statements(con)) as writer:
        key = [database if database.lower() != here.lower() else "", target.db or schema, target.name]
        found = _view_text(writer, database, key[1], key[2])
        if found is not None and not replace:
            recorded = _fetch(
                writer,
                f"SELECT definition FROM {SCHEMA}.published_views WHERE database_name = ? "
                "AND lower(schema_name) = lower(?) AND lower(view_name) = lower(?)",
                key,
            )
            if not recorded or recorded[0][0] != found:
                raise StoreError(
                    f"view {shown} already exists and was not published by dbfit (or was changed "
                    "since): choose another name, or pass replace=True to replace it"
                )
        try:
            writer.execute(
                exp.Create(this=qualified, kind="VIEW", replace=True, expression=query).sql("duckdb")
            )
        except duckdb.Error as err:
            first = (str(err).strip().splitlines() or [type(err).__name__])[0]
            raise StoreError(f"view {shown} cannot be created or replaced: {first}") from None
        now = datetime.now(UTC).replace(tzinfo=None)
        _run(
            writer,
            [
                f"DELETE FROM {SCHEMA}.published_views WHERE database_name = ? AND lower(schema_name) = "
                "lower(?) AND lower(view_name) = lower(?)"
            ],
            key,
        )
        _run(
            writer,
            [f"INSERT INTO {SCHEMA}.published_views VALUES (?, ?, ?, ?, ?, ?, ?, ?)"],
            key
            + [
                record.get("model"),
                record.get("version"),
                record["mode"],
                _view_text(writer, database, key[1], key[2]),
                now,
            ],
        )
    return statement


def is_published_view(con: duckdb.DuckDBPyConnection, target: exp.Table) -> bool:
    """Whether ``target`` is a view that dbfit published (recorded in ``published_views`` and still there)."""
    if not has_table(con, "published_views"):
        return False
    here, schema = _fetch(con, "SELECT current_database(), current_schema()")[0]
    database = target.catalog or here
    key = [database if database.lower() != here.lower() else "", target.db or schema, target.name]
    recorded = _fetch(
        con,
        f"SELECT count(*) FROM {SCHEMA}.published_views WHERE database_name = ? "
        "AND lower(schema_name) = lower(?) AND lower(view_name) = lower(?)",
        key,
    )
    return recorded[0][0] > 0 and _view_text(con, database, key[1], key[2]) is not None


def _view_text(connection: duckdb.DuckDBPyConnection, database: str, schema: str, view: str) -> str | None:
    """DuckDB's text of a view (None when there is no such view); names compare as DuckDB compares them."""
    rows = _fetch(
        connection,
        "SELECT sql FROM duckdb_views() WHERE lower(database_name) = lower(?) AND "
        "lower(schema_name) = lower(?) AND lower(view_name) = lower(?)",
        [database, schema, view],
    )
    return rows[0][0] if rows else None


def version_table(
    con: duckdb.DuckDBPyConnection, table: str, name: str, version: int, order: str = ""
) -> list[dict[str, Any]]:
    """The rows of one version in a per-version table (``fingerprints``, ``drift_bins``) as dicts."""
    if table not in VERSION_TABLES:
        raise StoreError(f"no per-version store table {table!r}")
    if not has_table(con, table):
        return []
    with connection_lock(con):
        cursor = con.execute(
            f"SELECT * FROM {SCHEMA}.{table} WHERE model = ? AND version = ?"
            + (f" ORDER BY {order}" if order else ""),
            [name, version],
        )
        names = [d[0] for d in cursor.description]
        return [dict(zip(names, row)) for row in cursor.fetchall()]


def _set_current(writer: duckdb.DuckDBPyConnection, name: str, version: int) -> None:
    _set_current_versions(writer, [name], [version], datetime.now(UTC).replace(tzinfo=None))


def _set_current_versions(
    writer: duckdb.DuckDBPyConnection, names: list[str], versions: list[int], now: datetime
) -> None:
    _run(writer, [f"DELETE FROM {SCHEMA}.current_versions WHERE model IN (SELECT unnest(?))"], [names])
    _insert(
        writer, "current_versions", {"model": names, "version": versions, "promoted_at": [now] * len(names)}
    )


@contextmanager
def _transaction(
    con: duckdb.DuckDBPyConnection, preamble: list[str] | None = None
) -> Iterator[duckdb.DuckDBPyConnection]:
    """A connection of its own with one open transaction: committed on success, rolled back on any exit else."""
    writer = con.cursor()
    try:
        _run(writer, preamble or [])
        _run(writer, ["BEGIN TRANSACTION"])
        try:
            yield writer
            _run(writer, ["COMMIT"])
        except BaseException:
            _rollback(writer)
            raise
        _checkpoint(writer)
    finally:
        writer.close()


def _checkpoint(writer: duckdb.DuckDBPyConnection) -> None:
    """Move committed writes from the write-ahead log into the database file. Never FORCE (that aborts the
    transactions of other connections); when DuckDB declines, the commit stays safe in the log."""
    try:
        writer.execute("CHECKPOINT").fetchall()
    except duckdb.Error:
        pass


def _orphan_rows(con: duckdb.DuckDBPyConnection, name: str, version: int) -> bool:
    """Whether committed rows of ``version`` exist without its ``versions`` row: never written by dbfit, which
    commits a version whole, so a key clash then is not a race with another writer (and retrying cannot help).
    One statement, so both counts come from one snapshot."""
    others = " UNION ALL ".join(
        f"SELECT 1 FROM {SCHEMA}.{table} WHERE model = $1 AND version = $2"
        for table in VERSION_TABLES
        if table != "versions"
    )
    query = (
        f"SELECT (SELECT count(*) FROM {SCHEMA}.versions WHERE model = $1 AND version = $2), "
        f"(SELECT count(*) FROM ({others}))"
    )
    with con.cursor() as fresh:
        headers, parts = _fetch(fresh, query, [name, version])[0]
    return headers == 0 and parts > 0


def _schema_statements() -> list[str]:
    return [f"CREATE SCHEMA IF NOT EXISTS {SCHEMA}"] + [
        f"CREATE TABLE IF NOT EXISTS {SCHEMA}.{table} ({columns})" for table, columns in _TABLES.items()
    ]


def _next_versions(writer: duckdb.DuckDBPyConnection, names: list[str]) -> list[int]:
    rows = _fetch(
        writer,
        f"SELECT model, max(version) FROM {SCHEMA}.versions WHERE model IN (SELECT unnest(?)) GROUP BY model",
        [names],
    )
    latest = dict(rows)
    return [int(latest.get(name) or 0) + 1 for name in names]


def _write_versions(
    writer: duckdb.DuckDBPyConnection,
    models: list[Model],
    names: list[str],
    versions: list[int],
    extras: list[Extra],
    promote: bool,
) -> None:
    """All rows of all the versions, one INSERT per table (a store of many segment models writes in seconds)."""
    now = datetime.now(UTC).replace(tzinfo=None)
    batches: dict[str, list[dict[str, list[Any]]]] = {}
    for model, name, version, extra in zip(models, names, versions, extras):
        for table, columns in _version_rows(model, name, version, now).items():
            batches.setdefault(table, []).append(columns)
        for table, columns in extra.items():
            batches.setdefault(table, []).append({"model": [name], "version": [version], **columns})
    _run(
        writer,
        [
            f"INSERT INTO {SCHEMA}.models SELECT name, ? FROM (SELECT unnest(?) AS name) "
            f"WHERE name NOT IN (SELECT model FROM {SCHEMA}.models)"
        ],
        [now, names],
    )
    for table, parts in batches.items():
        _insert(writer, table, _stacked(parts))
    if promote:
        _set_current_versions(writer, names, versions, now)


def _stacked(parts: list[dict[str, list[Any]]]) -> dict[str, list[Any]]:
    """Column-wise rows of several versions as one: each part's one-element (key) lists repeated first."""
    stacked: dict[str, list[Any]] = {}
    for part in parts:
        rows = max(len(v) for v in part.values())
        if rows == 0 or any(len(v) == 0 for v in part.values()):
            continue
        for column, values in part.items():
            stacked.setdefault(column, []).extend(values * rows if len(values) == 1 else values)
    return stacked


def _version_rows(model: Model, name: str, version: int, now: datetime) -> dict[str, dict[str, list[Any]]]:
    """The rows of one version in each of its tables, column-wise."""
    document = to_document(model)
    stats = model.stats
    key = {"model": [name], "version": [version]}
    rows: dict[str, dict[str, list[Any]]] = {
        "versions": {
            **key,
            "created_at": [now],
            "formula": [model.formula],
            "source": [model.source],
            "source_rows": [int(model.design.rows_total)],
            "rows_used": [int(stats["n_used"])],
            "fitted_at": [model.fitted_at.astimezone(UTC).replace(tzinfo=None)],
            "deviance": [_finite(stats.get("deviance"))],
            "aic": [_finite(stats.get("aic"))],
            "converged": [bool(stats["converged"])],
            "warnings_count": [len(model.warnings)],
            "document": [json.dumps(document, allow_nan=False, sort_keys=False)],
        }
    }
    coefficients = model.coefficients
    rows["coefficients"] = {
        **key,
        "position": list(range(coefficients.num_rows)),
        **{c: coefficients[c].to_pylist() for c in COEFFICIENT_COLUMNS},
    }
    factors = document["factors"]
    rows["factors"] = {
        **key,
        "position": list(range(len(factors))),
        "expression": [f["expression"] for f in factors],
        "kind": [f["kind"] for f in factors],
        "sql_type": [f["sql_type"] for f in factors],
        "levels": [json.dumps(f["levels"]) for f in factors],
        "reference": [None if f["reference"] is None else json.dumps(f["reference"]) for f in factors],
    }
    columns = model.design.columns
    texts = [f.text for f in model.design.factors]
    rows["encodings"] = {
        **key,
        "position": list(range(len(columns))),
        "label": [c.label for c in columns],
        "term": [c.term for c in columns],
        "numeric_factors": [json.dumps([texts[i] for i in c.numeric]) for c in columns],
        "indicators": [json.dumps([[texts[i], level] for i, level in c.indicators]) for c in columns],
        "centre": [c.centre for c in columns],
        "scale": [c.scale for c in columns],
    }
    labels = model.labels
    rows["covariance"] = {
        **key,
        "row_term": [a for a in labels for _ in labels],
        "column_term": [b for _ in labels for b in labels],
        "value": [_finite(v) for v in model.covariance.ravel()],
    }
    return rows


def _insert(writer: duckdb.DuckDBPyConnection, table: str, columns: dict[str, list[Any]]) -> None:
    """Append rows given column-wise; one-element lists (the key) are repeated to the row count."""
    rows = max(len(v) for v in columns.values())
    if rows == 0 or any(len(v) == 0 for v in columns.values()):
        return
    data = pa.table({k: (v * rows if len(v) == 1 else v) for k, v in columns.items()})
    writer.register("dbfit_incoming_rows", data)
    try:
        _run(writer, [f"INSERT INTO {SCHEMA}.{table} BY NAME SELECT * FROM dbfit_incoming_rows"])
    finally:
        try:
            writer.unregister("dbfit_incoming_rows")
        except duckdb.Error:
            pass  # the transaction is aborted; the rollback that follows drops the registration


def _finite(value: Any) -> float | None:
    return None if value is None or value != value or value in (float("inf"), float("-inf")) else float(value)


def _rollback(writer: duckdb.DuckDBPyConnection) -> None:
    try:
        writer.execute("ROLLBACK").fetchall()
    except duckdb.Error:
        pass


def _run(
    connection: duckdb.DuckDBPyConnection, statements: list[str], parameters: list[Any] | None = None
) -> None:
    for statement in statements:
        _fetch(connection, statement, parameters)


def _fetch(
    connection: duckdb.DuckDBPyConnection, sql: str, parameters: list[Any] | None = None
) -> list[tuple[Any, ...]]:
    try:
        with connection_lock(connection):
            return (
                connection.execute(sql, parameters).fetchall()
                if parameters
                else connection.execute(sql).fetchall()
            )
    except duckdb.Error as err:
        raise store_error(err) from None


def store_error(err: duckdb.Error) -> StoreError:
    """A DuckDB error met while reading or writing the store, in plain words."""
    first = (str(err).strip().splitlines() or [type(err).__name__])[0]
    if isinstance(err, duckdb.ConstraintException):
        return StoreConflictError(
            f"the model store already holds a row with this key (written by another connection "
            f"meanwhile, or left there by hand): {first}"
        )
    if isinstance(err, duckdb.TransactionException) or "conflict" in first.lower():
        return StoreConflictError(
            f"another connection wrote to the model store at the same time; retry ({first})"
        )
    if "read-only" in first.lower() or "read only" in first.lower():
        return StoreError(f"the database is open read-only, so the model store cannot be written ({first})")
    if isinstance(err, duckdb.IOException) and "lock" in first.lower():
        return StoreError(f"the database file is locked by another process ({first})")
    return StoreError(f"the model store could not be used: {first}")
