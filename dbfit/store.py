"""The versioned model store: tables in schema ``dbfit_store`` of the user's own database.

``models`` (one row per name), ``versions`` (one row per stored fit: summary statistics, the training-source
fingerprint and the full model document), ``coefficients`` (the coefficient table of each version),
``factors`` (each expression's kind, SQL type, levels and reference level), ``encodings`` (each internal
column: numeric factors, level indicators, centre and scale) and ``covariance`` (long format).
Every version is written in one transaction on a connection of its own: an error, a KeyboardInterrupt or a
killed process leaves either the whole version or none of it. Model names travel as bound parameters.
"""

from __future__ import annotations

import json
import random
import time
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import datetime, timezone
from typing import Any

import duckdb
import pyarrow as pa

from dbfit.errors import StoreConflictError, StoreError
from dbfit.model import Model
from dbfit.names import model_name
from dbfit.serialize import from_document, to_document, to_json

SCHEMA = "dbfit_store"
WRITE_ATTEMPTS = 10
COEFFICIENT_COLUMNS = ("term", "estimate", "std_error", "wald_z", "p_value", "ci_low", "ci_high",
                       "odds_ratio", "odds_ratio_low", "odds_ratio_high")
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
}
VERSION_TABLES = ("covariance", "encodings", "factors", "coefficients", "versions")


def save_model(con: duckdb.DuckDBPyConnection, model: Model, name: str) -> int:
    """Write ``model`` as the next version of ``name`` in one transaction; return the version number."""
    name = model_name(name)
    preamble = [] if store_exists(con) else _schema_statements()
    for attempt in range(WRITE_ATTEMPTS):
        version = None
        try:
            with _transaction(con, preamble) as writer:
                version = _next_version(writer, name)
                _write_version(writer, model, name, version)
            break
        except StoreConflictError:
            if attempt == WRITE_ATTEMPTS - 1 or version is None or _orphan_rows(con, name, version):
                raise
            time.sleep(random.uniform(0.001, 0.02) * (attempt + 1))
    model.name, model.version = name, version
    return version


def load_model(con: duckdb.DuckDBPyConnection, name: str, version: int | None = None) -> Model:
    """Read version ``version`` (default: the latest) of model ``name``."""
    name = model_name(name)
    version = resolve_version(con, name, version)
    rows = _fetch(con, f"SELECT document FROM {SCHEMA}.versions WHERE model = ? AND version = ?", [name, version])
    return from_document(json.loads(rows[0][0]), name=name, version=version)


def resolve_version(con: duckdb.DuckDBPyConnection, name: str, version: int | None) -> int:
    """The stored version asked for (default: the latest), or a StoreError naming what exists."""
    versions = stored_versions(con, name)
    if not versions:
        known = [row[0] for row in _fetch(con, f"SELECT model FROM {SCHEMA}.models ORDER BY model")] if store_exists(con) else []
        listing = f"stored models: {', '.join(known)}" if known else "the store is empty"
        raise StoreError(f"model '{name}' is not in the store of this database ({listing})")
    if version is None:
        return versions[-1]
    if version not in versions:
        raise StoreError(f"model '{name}' has no version {version} (stored versions: {', '.join(map(str, versions))})")
    return int(version)


def stored_versions(con: duckdb.DuckDBPyConnection, name: str) -> list[int]:
    if not store_exists(con):
        return []
    rows = _fetch(con, f"SELECT version FROM {SCHEMA}.versions WHERE model = ? ORDER BY version", [name])
    return [int(r[0]) for r in rows]


def store_exists(con: duckdb.DuckDBPyConnection) -> bool:
    rows = _fetch(
        con,
        "SELECT count(*) FROM duckdb_tables() WHERE database_name = current_database() AND schema_name = ? "
        "AND table_name = 'versions'",
        [SCHEMA],
    )
    return rows[0][0] > 0


def version_rows(con: duckdb.DuckDBPyConnection) -> list[dict[str, Any]]:
    """One dict per stored version (name, version, times, formula, source, rows, deviance, AIC, converged, warnings)."""
    if not store_exists(con):
        return []
    columns = ["model", "version", "created_at", "formula", "source", "source_rows", "rows_used", "deviance", "aic",
               "converged", "warnings_count"]
    rows = _fetch(con, f"SELECT {', '.join(columns)} FROM {SCHEMA}.versions ORDER BY model, version")
    return [dict(zip(columns, row)) for row in rows]


def coefficient_rows(con: duckdb.DuckDBPyConnection, name: str, version: int | None = None) -> list[dict[str, Any]]:
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


def drop_model(con: duckdb.DuckDBPyConnection, name: str, version: int | None = None) -> list[tuple[str, int]]:
    """Delete one version (or, without ``version``, every version) of ``name`` in one transaction."""
    name = model_name(name)
    versions = [resolve_version(con, name, version)] if version is not None else stored_versions(con, name)
    if not versions:
        resolve_version(con, name, None)
    placeholders = ", ".join("?" for _ in versions)
    with _transaction(con) as writer:
        for table in VERSION_TABLES:
            _run(writer, [f"DELETE FROM {SCHEMA}.{table} WHERE model = ? AND version IN ({placeholders})"], [name, *versions])
        _run(writer, [f"DELETE FROM {SCHEMA}.models WHERE model = ? AND NOT EXISTS "
                      f"(SELECT 1 FROM {SCHEMA}.versions WHERE model = ?)"], [name, name])
    return [(name, v) for v in versions]


@contextmanager
def _transaction(con: duckdb.DuckDBPyConnection, preamble: list[str] | None = None) -> Iterator[duckdb.DuckDBPyConnection]:
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
    finally:
        writer.close()


def _orphan_rows(con: duckdb.DuckDBPyConnection, name: str, version: int) -> bool:
    """Whether committed rows of ``version`` exist without its ``versions`` row: never written by dbfit, which
    commits a version whole, so a key clash then is not a race with another writer (and retrying cannot help).
    One statement, so both counts come from one snapshot."""
    others = " UNION ALL ".join(
        f"SELECT 1 FROM {SCHEMA}.{table} WHERE model = $1 AND version = $2" for table in VERSION_TABLES if table != "versions"
    )
    query = (f"SELECT (SELECT count(*) FROM {SCHEMA}.versions WHERE model = $1 AND version = $2), "
             f"(SELECT count(*) FROM ({others}))")
    with con.cursor() as fresh:
        headers, parts = _fetch(fresh, query, [name, version])[0]
    return headers == 0 and parts > 0


def _schema_statements() -> list[str]:
    return [f"CREATE SCHEMA IF NOT EXISTS {SCHEMA}"] + [
        f"CREATE TABLE IF NOT EXISTS {SCHEMA}.{table} ({columns})" for table, columns in _TABLES.items()
    ]


def _next_version(writer: duckdb.DuckDBPyConnection, name: str) -> int:
    rows = _fetch(writer, f"SELECT coalesce(max(version), 0) + 1 FROM {SCHEMA}.versions WHERE model = ?", [name])
    return int(rows[0][0])


def _write_version(writer: duckdb.DuckDBPyConnection, model: Model, name: str, version: int) -> None:
    now = datetime.now(timezone.utc).replace(tzinfo=None)
    document = to_document(model)
    stats = model.stats
    _run(writer, [f"INSERT INTO {SCHEMA}.models SELECT ?, ? WHERE NOT EXISTS (SELECT 1 FROM {SCHEMA}.models WHERE model = ?)"],
         [name, now, name])
    _run(
        writer,
        [f"INSERT INTO {SCHEMA}.versions VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)"],
        [name, version, now, model.formula, model.source, int(model.design.rows_total), int(stats["n_used"]),
         model.fitted_at.astimezone(timezone.utc).replace(tzinfo=None), _finite(stats.get("deviance")),
         _finite(stats.get("aic")), bool(stats["converged"]), len(model.warnings), to_json(model)],
    )
    key = {"model": [name], "version": [version]}
    coefficients = model.coefficients
    _insert(writer, "coefficients", {**key, "position": list(range(coefficients.num_rows)),
                                     **{c: coefficients[c].to_pylist() for c in COEFFICIENT_COLUMNS}})
    factors = document["factors"]
    _insert(writer, "factors", {**key, "position": list(range(len(factors))),
                                "expression": [f["expression"] for f in factors], "kind": [f["kind"] for f in factors],
                                "sql_type": [f["sql_type"] for f in factors],
                                "levels": [json.dumps(f["levels"]) for f in factors],
                                "reference": [None if f["reference"] is None else json.dumps(f["reference"]) for f in factors]})
    columns = model.design.columns
    texts = [f.text for f in model.design.factors]
    _insert(writer, "encodings", {**key, "position": list(range(len(columns))), "label": [c.label for c in columns],
                                  "term": [c.term for c in columns],
                                  "numeric_factors": [json.dumps([texts[i] for i in c.numeric]) for c in columns],
                                  "indicators": [json.dumps([[texts[i], level] for i, level in c.indicators]) for c in columns],
                                  "centre": [c.centre for c in columns], "scale": [c.scale for c in columns]})
    labels = model.labels
    _insert(writer, "covariance", {**key, "row_term": [a for a in labels for _ in labels],
                                   "column_term": [b for _ in labels for b in labels],
                                   "value": [_finite(v) for v in model.covariance.ravel()]})


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


def _run(connection: duckdb.DuckDBPyConnection, statements: list[str], parameters: list[Any] | None = None) -> None:
    for statement in statements:
        _fetch(connection, statement, parameters)


def _fetch(connection: duckdb.DuckDBPyConnection, sql: str, parameters: list[Any] | None = None) -> list[tuple[Any, ...]]:
    try:
        return connection.execute(sql, parameters).fetchall() if parameters else connection.execute(sql).fetchall()
    except duckdb.Error as err:
        raise store_error(err) from None


def store_error(err: duckdb.Error) -> StoreError:
    """A DuckDB error met while reading or writing the store, in plain words."""
    first = (str(err).strip().splitlines() or [type(err).__name__])[0]
    if isinstance(err, duckdb.ConstraintException):
        return StoreConflictError(f"the model store already holds a row with this key (written by another connection "
                                  f"meanwhile, or left there by hand): {first}")
    if isinstance(err, duckdb.TransactionException) or "conflict" in first.lower():
        return StoreConflictError(f"another connection wrote to the model store at the same time; retry ({first})")
    if "read-only" in first.lower() or "read only" in first.lower():
        return StoreError(f"the database is open read-only, so the model store cannot be written ({first})")
    if isinstance(err, duckdb.IOException) and "lock" in first.lower():
        return StoreError(f"the database file is locked by another process ({first})")
    return StoreError(f"the model store could not be used: {first}")
