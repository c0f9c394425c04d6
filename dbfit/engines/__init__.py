"""Engines: the only code that runs SQL (DuckDB, PostgreSQL, Spark) and the factory that picks one."""

from __future__ import annotations

from typing import Any

import duckdb

from dbfit.engines.base import Engine
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.engines.postgres_engine import PostgresEngine
from dbfit.engines.spark_engine import SparkEngine
from dbfit.errors import DbfitError


def engine_for(connection: Any) -> Any:
    """The engine for a DuckDB connection, a psycopg connection or a SparkSession (or an engine, as given)."""
    if hasattr(connection, "fetch") and hasattr(connection, "dialect"):
        return connection
    if isinstance(connection, duckdb.DuckDBPyConnection):
        return DuckDBEngine(connection)
    module = type(connection).__module__
    if module.startswith("psycopg"):
        return PostgresEngine(connection)
    if module.startswith("pyspark"):
        return SparkEngine(connection)
    raise DbfitError(
        f"cannot fit on a {type(connection).__name__}: give a DuckDB connection, a psycopg connection or a SparkSession"
    )


__all__ = ["DuckDBEngine", "Engine", "PostgresEngine", "SparkEngine", "engine_for"]
