"""Connections with dbfit installed."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import duckdb

from dbfit.errors import StoreError

_LOCK_HOLDER = re.compile(r"held in (.+?) \(PID (\d+)\)")


POSTGRES_URI = re.compile(r"^postgres(?:ql)?://", re.IGNORECASE)


def connect(database: str = ":memory:", **config: Any) -> Any:
    """Open a DuckDB connection (``config`` as in ``duckdb.connect``) and install dbfit on it; a
    ``postgresql://`` URI opens a psycopg connection (autocommit) to that database instead."""
    if POSTGRES_URI.match(database):
        return _connect_postgres(database, **config)
    read_only = bool(config.pop("read_only", False))
    try:
        con = duckdb.connect(database, read_only=read_only, config=config)
    except duckdb.IOException as err:
        raise _lock_error(database, err) from None
    try:
        return install(con)
    except StoreError:
        con.close()
        raise


def connect_existing(database: str, **config: Any) -> Any:
    """As :func:`connect`, but refuse a database file that does not exist instead of creating an empty one
    (a mistyped path would otherwise list no models, or run a script on a new empty file)."""
    if database != ":memory:" and not POSTGRES_URI.match(database) and not Path(database).exists():
        raise StoreError(
            f"the database file '{database}' does not exist: check the path (only 'dbfit fit' creates "
            "a database file)"
        )
    return connect(database, **config)


def _connect_postgres(uri: str, **config: Any) -> Any:
    """A psycopg connection to the PostgreSQL database of ``uri`` (``config``: more libpq parameters)."""
    try:
        import psycopg
    except ImportError:
        raise StoreError("a postgresql:// database needs psycopg: pip install 'psycopg[binary]'") from None
    try:
        return psycopg.connect(uri, autocommit=True, **config)
    except psycopg.Error as err:
        first = (str(err).strip().splitlines() or [type(err).__name__])[0]
        raise StoreError(f"the PostgreSQL database could not be opened: {first}") from None


def install(con: duckdb.DuckDBPyConnection) -> duckdb.DuckDBPyConnection:
    """Install dbfit on an existing connection (the ``dbfit.`` SQL functions) and return it."""
    from dbfit.interfaces.sql_surface import register

    try:
        register(con)
    except duckdb.CatalogException as err:
        if "already exists" not in str(err):
            raise
        raise StoreError(
            "dbfit is already installed on this database in this process: it is already open through dbfit "
            "(an earlier dbfit.connect or dbfit.install of the same file, for example in a notebook cell run "
            "twice); use that connection, or close it first"
        ) from None
    return con


def _lock_error(database: str, err: duckdb.IOException) -> Exception:
    message = str(err)
    if "lock" not in message.lower():
        return StoreError(f"the database file '{database}' cannot be opened: {message.splitlines()[0]}")
    holder = _LOCK_HOLDER.search(message)
    who = f"process {holder.group(2)} ({holder.group(1)})" if holder else "another process"
    return StoreError(
        f"the database file '{database}' is locked by {who}: DuckDB lets one process write a file at a time. "
        "Close the other connection, or open the file with read_only=True from every process that only reads"
    )
