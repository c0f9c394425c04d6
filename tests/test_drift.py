"""Drift: the training snapshot and the population stability index.

Data: the invented courier scenario of dbfit.interfaces.demo. The PSI reference is an independent computation from the
definition, PSI = sum over bins (a - e) ln(a / e) (Siddiqi 2006, "Credit Risk Scorecards", Wiley), in numpy
on rows fetched from the database and binned on the stored edges; the reading bands are common practice.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

import dbfit
from dbfit.interfaces.demo import FORMULA, REFERENCE, build_deliveries
from dbfit.lifecycle.drift import FLOOR, reading

SHIFTED = "SELECT * REPLACE (distance_km * 1.4 AS distance_km, tier = 'express' OR depot = 'East' AS rain) FROM fresh"


@pytest.fixture
def con(tmp_path):
    connection = dbfit.connect(str(tmp_path / "drift.duckdb"))
    build_deliveries(connection, 60_000, "all_rows")
    connection.execute("CREATE TABLE training AS SELECT * FROM all_rows WHERE delivery_id % 2 = 0").fetchall()
    connection.execute("CREATE TABLE fresh AS SELECT * FROM all_rows WHERE delivery_id % 2 = 1").fetchall()
    dbfit.fit(connection, FORMULA, "training", reference=REFERENCE, name="late", progress=False)
    yield connection
    connection.close()


def _bins(con, variable: str) -> list[dict]:
    cursor = con.execute(
        "SELECT kind, lower, upper, level, share FROM dbfit_store.drift_bins WHERE model = 'late' "
        "AND version = 1 AND variable = ? ORDER BY position",
        [variable],
    )
    return [dict(zip(("kind", "lower", "upper", "level", "share"), row)) for row in cursor.fetchall()]


def _definition(actual: np.ndarray, expected: np.ndarray) -> float:
    """Independent computation from the definition, each share floored at 1e-4."""
    a, e = np.maximum(actual, 1e-4), np.maximum(expected, 1e-4)
    return float(np.sum((a - e) * np.log(a / e)))


def _numeric_shares(values: np.ndarray, edges: list[float]) -> np.ndarray:
    values = values[~np.isnan(values)]
    number = np.searchsorted(np.asarray(edges), values, side="left")  # edges strictly below the value
    return np.bincount(number, minlength=len(edges) + 1) / values.size


def test_psi_equals_an_independent_computation_from_the_definition(con):
    table = {row["variable"]: row for row in dbfit.drift(con, "late", SHIFTED).to_pylist()}
    assert set(table) == {"score", "distance_km", "parcel_kg", "depot", "tier", "dispatch_hour", "rain"}
    training = con.execute("SELECT distance_km, parcel_kg FROM training").fetchnumpy()
    new = con.execute(f"SELECT distance_km, parcel_kg, rain FROM ({SHIFTED})").fetchnumpy()
    for variable in ("distance_km", "parcel_kg"):
        bins = _bins(con, variable)
        edges = [b["upper"] for b in bins[:-1]]
        assert len(edges) == 9 and edges == sorted(edges)
        as_float = lambda column: np.asarray(
            column.astype(float) if not hasattr(column, "filled") else column.astype(float).filled(np.nan)
        )
        expected = _numeric_shares(as_float(training[variable]), edges)
        np.testing.assert_allclose([b["share"] for b in bins], expected, rtol=0, atol=1e-15)
        actual = _numeric_shares(as_float(new[variable]), edges)
        assert table[variable]["psi"] == pytest.approx(_definition(actual, expected), rel=1e-12, abs=1e-15)
    bins = _bins(con, "rain")
    levels = [json.loads(b["level"]) for b in bins]
    rain = np.asarray(new["rain"])
    actual = np.array([np.mean(rain == level) for level in levels] + [0.0])
    expected = np.array([b["share"] for b in bins] + [0.0])  # the pooled bin of unseen levels
    assert table["rain"]["psi"] == pytest.approx(_definition(actual, expected), rel=1e-12)
    assert table["distance_km"]["psi"] > 0.25 and table["distance_km"]["reading"] == "large shift"


def test_psi_is_near_zero_for_two_samples_of_one_distribution(con):
    table = dbfit.drift(con, "late", "fresh").to_pylist()
    assert max(row["psi"] for row in table) < 0.01
    assert {row["reading"] for row in table} == {"stable"}
    assert all(row["new_rows"] > 29000 for row in table)


def test_sql_drift_gives_the_python_figures(con):
    python = dbfit.drift(con, "late", SHIFTED).to_pylist()
    sql = con.execute("SELECT * FROM dbfit.drift('late', ?)", [SHIFTED]).fetchall()
    assert [tuple(row.values()) for row in python] == sql


def test_unseen_levels_pool_into_one_bin_and_bad_input_is_named(con):
    table = {
        row["variable"]: row
        for row in dbfit.drift(
            con,
            "late",
            "SELECT * REPLACE (CASE WHEN depot = 'East' THEN 'Airport' ELSE depot END AS depot) FROM fresh",
        ).to_pylist()
    }
    east = 0.2  # the East share is about a fifth; all of it moves to a level of training share 0 (floored)
    assert table["depot"]["psi"] == pytest.approx(
        east * math.log(east / FLOOR) + (FLOOR - east) * math.log(FLOOR / east), rel=0.1
    )
    with pytest.raises(dbfit.SourceError):
        dbfit.drift(con, "late", "no_such_table")
    with pytest.raises(dbfit.FormulaError):
        dbfit.drift(con, "late", "SELECT 1 AS late")


def test_reading_bands_are_the_common_practice_ones():
    assert [reading(v) for v in (0.0, 0.099, 0.1, 0.25, 0.26)] == [
        "stable",
        "stable",
        "some shift",
        "some shift",
        "large shift",
    ]


def test_drift_on_an_empty_source_is_refused_with_the_count(con):
    # common practice: a stability index needs rows on both sides; an empty source is no evidence of a shift.
    con.execute("CREATE TABLE nothing_yet AS SELECT * FROM fresh LIMIT 0").fetchall()
    with pytest.raises(dbfit.DbfitError, match="nothing_yet has 0 rows"):
        dbfit.drift(con, "late", "nothing_yet")
