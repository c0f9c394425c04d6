"""Dialects as data: the lookup, the exp limit against the IEEE 754 double range, and the fitting rewrites."""

from __future__ import annotations

import math
import sys

import pytest
import sqlglot

import dbfit
from dbfit.expressions.dialects import dialect, supported
from dbfit.expressions.dialects.rewrite import adapt


def test_unknown_dialect_names_the_supported_ones():
    with pytest.raises(dbfit.DbfitError) as raised:
        dialect("oracle")
    assert all(name in str(raised.value) for name in ("duckdb", "postgres", "spark", "tsql", "sqlite"))


def test_every_exp_limit_keeps_exp_a_finite_normal_double():
    # common practice (IEEE 754 double): exp overflows beyond 709.78; below 2.2e-308 a double is subnormal.
    for name in supported():
        limit = dialect(name).exp_limit
        assert math.isfinite(math.exp(limit)) and math.exp(-limit) >= sys.float_info.min, name


def test_fitting_rewrites_follow_the_dialect():
    text = "SELECT sum(exp(x)), count(*) FILTER (WHERE NOT isfinite(w)) FROM (SELECT * FROM t) s"
    query = sqlglot.parse_one(text, read="duckdb")
    assert adapt(query, dialect("duckdb")) is query
    postgres = adapt(query, dialect("postgres")).sql("postgres")
    assert "-708.0" in postgres and "OFFSET 0" in postgres and "ISFINITE" not in postgres.upper()
    spark = adapt(query, dialect("spark")).sql("spark")
    assert "ISNAN" in spark.upper() and "OFFSET" not in spark
    with pytest.raises(dbfit.DbfitError, match="scoring SQL for it only"):
        adapt(query, dialect("tsql"))


def test_number_texts_on_sqlite_read_as_duckdb_writes_them(con):
    # Reference: DuckDB's CAST(... AS VARCHAR) of the same values (the form number_text keeps); SQLite keeps
    # text and integers as they are. Values chosen inside the ranges number_text states as exact.
    import sqlite3

    from dbfit.expressions.dialects.number_text import write_number_texts

    values = [1.0, -3.0, 0.0, 0.5, 2.25, 123456789.0, 1e15, 12.0, "1.0", "a", 7, None]
    tree = sqlglot.parse_one("SELECT CAST(v AS VARCHAR) FROM t ORDER BY k", read="duckdb")
    con.execute("CREATE TABLE t (k INTEGER, v VARCHAR, kind VARCHAR)")
    rows = [
        (k, v if isinstance(v, str) or v is None else repr(v), type(v).__name__) for k, v in enumerate(values)
    ]
    con.executemany("INSERT INTO t VALUES (?, ?, ?)", rows)
    duck = con.execute(
        "SELECT CASE kind WHEN 'float' THEN CAST(CAST(v AS DOUBLE) AS VARCHAR) "
        "WHEN 'int' THEN CAST(CAST(v AS BIGINT) AS VARCHAR) ELSE v END FROM t ORDER BY k"
    ).fetchall()
    lite = sqlite3.connect(":memory:")
    lite.execute("CREATE TABLE t (k INTEGER, v)")  # no declared type: each value keeps its own
    lite.executemany("INSERT INTO t VALUES (?, ?)", list(enumerate(values)))
    written = write_number_texts(tree, "sqlite").sql(dialect="sqlite")
    assert lite.execute(written).fetchall() == duck
    assert write_number_texts(tree, "duckdb") is tree
    again = write_number_texts(write_number_texts(tree, "postgres"), "postgres").sql(dialect="postgres")
    assert again == write_number_texts(tree, "postgres").sql(dialect="postgres")  # written once only
