"""Connections with dbfit installed."""

from __future__ import annotations

from typing import Any

import duckdb


def connect(database: str = ":memory:", **config: Any) -> duckdb.DuckDBPyConnection:
    """Open a DuckDB connection (``config`` as in ``duckdb.connect``) and install dbfit on it."""
    read_only = bool(config.pop("read_only", False))
    con = duckdb.connect(database, read_only=read_only, config=config)
    return install(con)


def install(con: duckdb.DuckDBPyConnection) -> duckdb.DuckDBPyConnection:
    """Install dbfit on an existing connection and return it."""
    return con
