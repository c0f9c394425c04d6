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
