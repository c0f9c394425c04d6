"""The same fitter on PostgreSQL and Spark SQL: coefficients and standard errors equal DuckDB's to 1e-9.

PostgreSQL runs as a real server started by the tests (as the unprivileged postgres user when root); Spark as
a local-mode SparkSession shared by the Spark tests.
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import assert_close, load_frame
from engine_sessions import birthwt_frame as birthwt_data
from engine_sessions import copy_table
from pg_server import fresh_database

import dbfit

FORMULA = "low ~ age + lwt + race_name + smoke + age:race_name + ln(lwt)"


@pytest.fixture(scope="module")
def birthwt_frame():
    return birthwt_data()


@pytest.fixture
def duckdb_fit(con, birthwt_frame):
    load_frame(con, "birthwt", birthwt_frame)

    def fit(formula: str = FORMULA, **options):
        return dbfit.fit(con, formula, "birthwt", progress=False, **options)

    return fit


@pytest.fixture(scope="module")
def postgres(pg_server, birthwt_frame):
    import psycopg

    with fresh_database(pg_server, "dbfit_engines") as keywords:
        connection = psycopg.connect(**keywords, autocommit=True)
        columns = (
            "low integer, age integer, lwt integer, race_name text, smoke integer, visits double precision"
        )
        copy_table(connection, "birthwt", columns, birthwt_frame.itertuples(index=False))
        yield connection
        connection.close()


def test_postgres_fit_equals_duckdb(postgres, duckdb_fit):
    # Reference: the same fit in DuckDB (itself checked against statsmodels in test_reference_fits).
    on_duckdb = duckdb_fit()
    on_postgres = dbfit.fit(postgres, FORMULA, "birthwt", progress=False)
    assert on_postgres.labels == on_duckdb.labels
    assert_close(on_postgres.estimates, on_duckdb.estimates, 1e-9, "estimates")
    assert_close(
        on_postgres.coefficients["std_error"].to_numpy(),
        on_duckdb.coefficients["std_error"].to_numpy(),
        1e-9,
        "standard errors",
    )
    assert on_postgres.stats["log_likelihood"] == pytest.approx(on_duckdb.stats["log_likelihood"], rel=1e-12)


def test_postgres_weights_offset_and_huge_linear_predictors(postgres, duckdb_fit):
    options = dict(weights="1 + visits", offset="(lwt - 120) / 100.0")
    on_duckdb = duckdb_fit("low ~ age + smoke", **options)
    on_postgres = dbfit.fit(postgres, "low ~ age + smoke", "birthwt", progress=False, **options)
    assert_close(on_postgres.estimates, on_duckdb.estimates, 1e-9, "estimates with weights and offset")
    assert on_postgres.stats["null_deviance"] == pytest.approx(on_duckdb.stats["null_deviance"], rel=1e-10)
    # eta of +/-1000 would make exp() raise in PostgreSQL without the clamp in dbfit.expressions.dialects.rewrite.
    reports = []
    dbfit.fit(postgres, "low ~ age - 1", "birthwt", start=[40.0], max_iter=1, progress=reports.append)
    assert np.isfinite(reports[0].deviance)


def test_postgres_errors_are_translated(postgres):
    with pytest.raises(dbfit.FormulaError):
        dbfit.fit(postgres, "low ~ no_such_column", "birthwt", progress=False)
    with pytest.raises(dbfit.SourceError):
        dbfit.fit(postgres, "low ~ age", "no_such_table", progress=False)


@pytest.fixture(scope="module")
def spark(spark_session, birthwt_frame):
    spark_session.createDataFrame(birthwt_frame).createOrReplaceTempView("birthwt")
    yield spark_session
    spark_session.catalog.dropTempView("birthwt")


def test_spark_fit_equals_duckdb(spark, duckdb_fit):
    # Reference: the same fit in DuckDB; Spark runs only plain SQL aggregates (no machine-learning library).
    on_duckdb = duckdb_fit()
    on_spark = dbfit.fit(spark, FORMULA, "birthwt", progress=False)
    assert on_spark.labels == on_duckdb.labels
    assert_close(on_spark.estimates, on_duckdb.estimates, 1e-9, "estimates")
    assert_close(
        on_spark.coefficients["std_error"].to_numpy(),
        on_duckdb.coefficients["std_error"].to_numpy(),
        1e-9,
        "standard errors",
    )
    exported = dbfit.from_json(on_spark.to_json())
    assert_close(exported.estimates, on_spark.estimates, 1e-15, "model exported from Spark as JSON")


def _assert_segments_equal(elsewhere: dbfit.SegmentedFit, on_duckdb: dbfit.SegmentedFit, engine: str) -> None:
    assert list(elsewhere.models) == list(on_duckdb.models) and elsewhere.failures == on_duckdb.failures
    for value, model in on_duckdb.models.items():
        other = elsewhere.models[value]
        assert_close(other.estimates, model.estimates, 1e-9, f"{engine} estimates for {value}")
        assert_close(
            other.coefficients["std_error"].to_numpy(),
            model.coefficients["std_error"].to_numpy(),
            1e-9,
            f"{engine} standard errors for {value}",
        )
    assert elsewhere.passes == on_duckdb.passes


def test_postgres_segments_equal_duckdb(postgres, duckdb_fit):
    # Reference: the same by= fit in DuckDB (checked per segment against statsmodels in test_segments).
    on_duckdb = duckdb_fit("low ~ age + lwt + smoke", by="race_name", weights="1 + visits / 10")
    on_postgres = dbfit.fit(
        postgres,
        "low ~ age + lwt + smoke",
        "birthwt",
        by="race_name",
        weights="1 + visits / 10",
        progress=False,
    )
    _assert_segments_equal(on_postgres, on_duckdb, "PostgreSQL")
    assert on_postgres.models["white"].source == 'SELECT * FROM "birthwt" WHERE ("race_name") = \'white\''
    store = (
        dbfit.connect()
    )  # a DuckDB store that cannot read the PostgreSQL source: stored without fingerprints
    dbfit.save(store, on_postgres, "pg_low")
    assert_close(
        dbfit.load(store, "pg_low.black").estimates, on_duckdb.models["black"].estimates, 1e-9, "stored"
    )
    assert store.execute("SELECT count(*) FROM dbfit_store.fingerprints").fetchone() == (0,)


def test_spark_spline_and_bins_terms_equal_duckdb(spark, duckdb_fit):
    # Reference: the same fit in DuckDB (checked against patsy's cr() in test_spline_terms); the knots and edges
    # come from Spark's percentile(x, array(...)), which interpolates as DuckDB's quantile_cont does.
    formula = "low ~ spline(lwt, 4) + bins(age, 3) + age"
    on_duckdb = duckdb_fit(formula)
    on_spark = dbfit.fit(spark, formula, "birthwt", progress=False)
    assert on_spark.formula == on_duckdb.formula and on_spark.labels == on_duckdb.labels
    assert_close(on_spark.estimates, on_duckdb.estimates, 1e-8, "estimates")


def test_spark_segments_equal_duckdb(spark, duckdb_fit):
    # Reference: the same by= fit in DuckDB; on Spark the segments' sums come from one GROUP BY per pass.
    on_duckdb = duckdb_fit("low ~ age + lwt + smoke", by="race_name")
    on_spark = dbfit.fit(spark, "low ~ age + lwt + smoke", "birthwt", by="race_name", progress=False)
    _assert_segments_equal(on_spark, on_duckdb, "Spark")
