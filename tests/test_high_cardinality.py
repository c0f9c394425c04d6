"""A categorical with many levels is fitted by blocks from one grouped query, not by dense indicator sums."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from conftest import assert_close
from sqlglot import exp

import dbfit
import dbfit.fitting.blocks
from dbfit.design.layout import build_design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.expressions.formula import parse_formula
from dbfit.expressions.source import source_relation
from dbfit.fitting.blocks import BlockedStatisticsPass, blocked_factor


def stores(con, levels: int, rows: int) -> None:
    con.execute(f"""CREATE OR REPLACE TABLE visits AS
        SELECT 'shop' || lpad((hash(i, 1) % {levels})::VARCHAR, 5, '0') AS shop,
               (hash(i, 2) % 1000) / 1000.0 AS distance, (hash(i, 3) % 1000) / 500.0 AS wait,
               ((hash(i, 4) % 10000) / 10000.0 < 1 / (1 + exp(-(-0.4 + distance - 0.5 * wait
                   + ((hash(i, 1) % {levels})::DOUBLE - {levels / 2}) / {levels / 2}))))::INTEGER AS bought
        FROM range({rows}) r(i)""")


def test_blocked_fit_equals_dense_fit_and_statsmodels(con, monkeypatch):
    # Reference: statsmodels GLM Binomial with treatment-coded shops (data generated here only as input).
    stores(con, 60, 6000)
    blocked = dbfit.fit(con, "bought ~ distance + shop + wait", "visits", progress=False)
    design = build_design(
        DuckDBEngine(con), parse_formula("bought ~ distance + shop + wait"), source_relation("visits")
    )
    assert blocked_factor(design) == 1
    monkeypatch.setattr(dbfit.fitting.blocks, "HIGH_CARDINALITY_LEVELS", 10_000)
    dense = dbfit.fit(con, "bought ~ distance + shop + wait", "visits", progress=False)
    assert blocked.labels == dense.labels
    assert_close(blocked.estimates, dense.estimates, 1e-9, "blocked vs dense estimates")
    assert_close(blocked.covariance, dense.covariance, 1e-8, "blocked vs dense covariance")
    frame = con.execute("SELECT * FROM visits").df()
    reference = sm.GLM.from_formula(
        "bought ~ distance + C(shop) + wait", frame, family=sm.families.Binomial()
    ).fit(tol=1e-13)
    order = (
        ["Intercept", "distance"]
        + [f"C(shop)[T.{label.split('=')[1]}]" for label in blocked.labels[2:-1]]
        + ["wait"]
    )
    assert_close(blocked.estimates, reference.params[order].values, 1e-6, "estimates")
    assert_close(
        blocked.coefficients["std_error"].to_numpy(), reference.bse[order].values, 1e-6, "standard errors"
    )


def test_blocked_fit_with_no_intercept_and_an_aliased_dense_term(con):
    stores(con, 55, 4000)
    model = dbfit.fit(con, "bought ~ shop + distance + (distance * 2) - 1", "visits", progress=False)
    assert np.isnan(model.estimate("(distance * 2)"))
    frame = con.execute("SELECT * FROM visits").df()
    # Reference: statsmodels GLM with one indicator per shop and no intercept.
    reference = sm.GLM.from_formula(
        "bought ~ C(shop) + distance - 1", frame, family=sm.families.Binomial()
    ).fit(tol=1e-13)
    assert_close(model.estimates[:-1], reference.params.values, 1e-6, "estimates")


def aggregate_count(con, levels: int) -> int:
    stores(con, levels, 20 * levels)
    design = build_design(
        DuckDBEngine(con), parse_formula("bought ~ shop + distance + wait"), source_relation("visits")
    )
    factor = blocked_factor(design)
    parameters = list(range(len(design.labels)))
    query = BlockedStatisticsPass(DuckDBEngine(con), design, factor).query(
        parameters, np.zeros(len(parameters))
    )
    return len(list(query.find_all(exp.Sum)))


def test_statistics_query_size_does_not_grow_with_levels(con):
    assert aggregate_count(con, 5000) == aggregate_count(con, 100)
    assert aggregate_count(con, 100) < 20


@pytest.mark.parametrize("levels", [80])
def test_level_with_one_outcome_is_reported_as_separation(con, levels):
    stores(con, levels, 8000)
    con.execute("UPDATE visits SET bought = 1 WHERE shop = 'shop00007'")
    model = dbfit.fit(con, "bought ~ distance + shop", "visits", progress=False)
    warning = [w for w in model.warnings if "separation" in w]
    assert warning and "shop=shop00007" in warning[0]
