"""The ``dbfit.`` SQL functions (filled in below)."""

from __future__ import annotations

import duckdb


def register(con: duckdb.DuckDBPyConnection) -> None:
    """Attach the in-memory ``dbfit`` catalog and create the table macros and their Python functions."""
