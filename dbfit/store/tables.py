"""The store's tables as data, and a model's rows in them: the part of the store that sends no SQL.

The column types are written once in DuckDB's spelling; :func:`schema_statements` writes them in an engine's
dialect through sqlglot (PostgreSQL: ``TEXT``, ``DOUBLE PRECISION``, ``INT``).
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from typing import Any

import sqlglot

from dbfit.model.document import to_document
from dbfit.model.fitted import Model
from dbfit.model.inference import COEFFICIENT_COLUMNS

SCHEMA = "dbfit_store"
_KEY = "model VARCHAR NOT NULL, version INTEGER NOT NULL"
TABLES = {
    "models": "model VARCHAR PRIMARY KEY, created_at TIMESTAMP NOT NULL",
    "versions": f"""{_KEY}, created_at TIMESTAMP NOT NULL, formula VARCHAR NOT NULL, source VARCHAR NOT NULL,
        source_rows BIGINT NOT NULL, rows_used BIGINT NOT NULL, fitted_at TIMESTAMP NOT NULL, deviance DOUBLE,
        aic DOUBLE, converged BOOLEAN NOT NULL, warnings_count INTEGER NOT NULL, document VARCHAR NOT NULL,
        PRIMARY KEY (model, version)""",
    "coefficients": f"{_KEY}, position INTEGER NOT NULL, "
    + ", ".join(f"{c} {'VARCHAR' if c == 'term' else 'DOUBLE'}" for c in COEFFICIENT_COLUMNS)
    + ", PRIMARY KEY (model, version, position)",
    "factors": f"""{_KEY}, position INTEGER NOT NULL, expression VARCHAR NOT NULL, kind VARCHAR NOT NULL,
        sql_type VARCHAR NOT NULL, levels VARCHAR NOT NULL, reference VARCHAR,
        PRIMARY KEY (model, version, position)""",
    "encodings": f"""{_KEY}, position INTEGER NOT NULL, label VARCHAR NOT NULL, term VARCHAR NOT NULL,
        numeric_factors VARCHAR NOT NULL, indicators VARCHAR NOT NULL, centre DOUBLE NOT NULL,
        scale DOUBLE NOT NULL, PRIMARY KEY (model, version, position)""",
    "covariance": f"{_KEY}, row_term VARCHAR NOT NULL, column_term VARCHAR NOT NULL, value DOUBLE",
    "fingerprints": f"{_KEY}, source VARCHAR NOT NULL, source_rows BIGINT NOT NULL, checksum VARCHAR, "
    "PRIMARY KEY (model, version)",
    "drift_bins": f"""{_KEY}, variable VARCHAR NOT NULL, kind VARCHAR NOT NULL, position INTEGER NOT NULL,
        lower DOUBLE, upper DOUBLE, level VARCHAR, rows BIGINT NOT NULL, share DOUBLE NOT NULL,
        PRIMARY KEY (model, version, variable, position)""",
    "current_versions": "model VARCHAR PRIMARY KEY, version INTEGER NOT NULL, promoted_at TIMESTAMP NOT NULL",
    "gates": "model VARCHAR PRIMARY KEY, settings VARCHAR NOT NULL, set_at TIMESTAMP NOT NULL",
    "decisions": """decided_at TIMESTAMP NOT NULL, model VARCHAR NOT NULL, candidate_version INTEGER,
        current_version INTEGER, decision VARCHAR NOT NULL, reason VARCHAR NOT NULL,
        figures VARCHAR NOT NULL""",
    "published_views": """database_name VARCHAR NOT NULL, schema_name VARCHAR NOT NULL,
        view_name VARCHAR NOT NULL, model VARCHAR, version INTEGER, mode VARCHAR NOT NULL,
        definition VARCHAR NOT NULL,
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


def schema_statements(dialect: str) -> list[str]:
    """CREATE SCHEMA and every CREATE TABLE (IF NOT EXISTS) of the store, in ``dialect``."""
    written = [f"CREATE SCHEMA IF NOT EXISTS {SCHEMA}"] + [
        f"CREATE TABLE IF NOT EXISTS {SCHEMA}.{table} ({columns})" for table, columns in TABLES.items()
    ]
    if dialect == "duckdb":
        return written
    return [sqlglot.transpile(statement, read="duckdb", write=dialect)[0] for statement in written]


def now_utc() -> datetime:
    """The time the store records: UTC without a zone (TIMESTAMP columns)."""
    return datetime.now(UTC).replace(tzinfo=None)


def stacked(parts: list[dict[str, list[Any]]]) -> dict[str, list[Any]]:
    """Column-wise rows of several versions as one: each part's one-element (key) lists repeated first."""
    result: dict[str, list[Any]] = {}
    for part in parts:
        rows = max(len(v) for v in part.values())
        if rows == 0 or any(len(v) == 0 for v in part.values()):
            continue
        for column, values in part.items():
            result.setdefault(column, []).extend(values * rows if len(values) == 1 else values)
    return result


def rows_of_version(model: Model, name: str, version: int, now: datetime) -> dict[str, dict[str, list[Any]]]:
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
            "deviance": [finite(stats.get("deviance"))],
            "aic": [finite(stats.get("aic"))],
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
        "value": [finite(v) for v in model.covariance.ravel()],
    }
    return rows


def finite(value: Any) -> float | None:
    return None if value is None or value != value or value in (float("inf"), float("-inf")) else float(value)
