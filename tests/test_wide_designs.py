"""Wide designs: the statistics pass streamed through numpy on DuckDB gives the SQL sums' numbers.

Reference library: statsmodels GLM Binomial, on generated data and on statsmodels' bundled star98 data
(California STAR test, successes NABOVE out of NABOVE + NBELOW).
"""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import assert_close, load_frame

import dbfit
from dbfit.design.layout import build_design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import AbortedTransactionError, FitError, FormulaError
from dbfit.expressions.formula import parse_formula
from dbfit.expressions.source import source_relation
from dbfit.fitting import driver
from dbfit.fitting.statistics import MAX_DENSE_COLUMNS, StatisticsPass
from dbfit.fitting.streamed import StreamedStatisticsPass

SAME = 1e-12  # the streamed sums against the SQL sums, relative to the largest entry


def wide_frame(rows: int, columns: int, seed: int) -> pd.DataFrame:
    """Generated rows: ``columns`` numeric predictors on different scales, weights, an offset, trials
    and successes drawn from the logistic model, and ``sep``, which separates the outcome perfectly."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(rows, columns)) * np.linspace(0.5, 20.0, columns) + np.linspace(-3.0, 40.0, columns)
    frame = pd.DataFrame(x, columns=[f"x{j}" for j in range(columns)])
    standard = (x - x.mean(axis=0)) / x.std(axis=0)
    eta = -0.4 + standard @ (rng.normal(size=columns) * 0.15)
    frame["off"] = rng.normal(size=rows) * 0.2
    frame["w"] = rng.integers(1, 4, size=rows).astype(float)
    frame["trials"] = rng.integers(1, 6, size=rows)
    frame["wins"] = rng.binomial(frame["trials"], 1.0 / (1.0 + np.exp(-(eta + frame["off"]))))
    frame["yes"] = (frame["wins"] > 0).astype(int)
    frame["sep"] = np.where(frame["yes"] == 1, 1.0, -1.0) + rng.uniform(-0.5, 0.5, size=rows)
    return frame


def passes(con, formula: str, **options: str) -> tuple[StatisticsPass, StreamedStatisticsPass, int]:
    engine = DuckDBEngine(con)
    design = build_design(engine, parse_formula(formula), source_relation("wide"), **options)
    return StatisticsPass(engine, design), StreamedStatisticsPass(engine, design), len(design.labels)


def assert_same_pass(sql, streamed) -> None:
    gram_sql, gram_streamed = sql.gram.as_array(), streamed.gram.as_array()
    np.testing.assert_allclose(gram_streamed, gram_sql, rtol=SAME, atol=SAME * np.abs(gram_sql).max())
    np.testing.assert_allclose(
        streamed.score,
        sql.score,
        rtol=SAME,
        atol=SAME * np.abs(gram_sql).max() * (1.0 + np.abs(sql.score).max()),
    )
    assert streamed.loglik == pytest.approx(sql.loglik, rel=SAME)
    assert (streamed.extreme, streamed.misfit_extreme) == (sql.extreme, sql.misfit_extreme)


@pytest.mark.parametrize("separating", [0.0, 40.0, -40.0])
def test_streamed_pass_equals_sql_sums_with_weights_offset_trials(con, separating):
    # 64 columns, prior weights, an offset and trials; with a large coefficient on the separating column the
    # rows sit beyond |eta| = 17, some at the wrong extreme (y < n at the top, y > 0 at the bottom).
    load_frame(con, "wide", wide_frame(3000, 63, seed=5))
    formula = "wins ~ " + " + ".join(f"x{j}" for j in range(63)) + " + sep"
    sql, streamed, size = passes(con, formula, weights="w", offset="off", trials="trials")
    assert size == 65
    beta = np.random.default_rng(7).normal(size=size) * 0.05
    beta[-1] = separating
    parameters = list(range(size))
    reference, result = sql(parameters, beta), streamed(parameters, beta)
    assert_same_pass(reference, result)
    if separating:
        assert result.extreme > 1000 and result.misfit_extreme > 100
    # Some parameters only, without the intercept: the same selection of columns.
    subset = [3, 10, 11, 40, 64]
    assert_same_pass(sql(subset, beta[subset]), streamed(subset, beta[subset]))


def test_streamed_score_only_pass_is_the_sql_one(con):
    load_frame(con, "wide", wide_frame(500, 30, seed=2))
    sql, streamed, size = passes(con, "yes ~ " + " + ".join(f"x{j}" for j in range(30)))
    beta = np.full(size, 0.01)
    reference, result = sql.score_only(list(range(size)), beta), streamed.score_only(list(range(size)), beta)
    assert result.gram.shape == (0, 0)
    np.testing.assert_array_equal(result.score, reference.score)


def test_wide_fit_streams_and_matches_statsmodels_glm(con, monkeypatch):
    # Reference: statsmodels GLM Binomial with (successes, failures), frequency weights and an offset.
    frame = wide_frame(4000, 60, seed=11)
    load_frame(con, "wide", frame)
    predictors = [f"x{j}" for j in range(60)]
    options = {"weights": "w", "offset": "off", "trials": "trials", "progress": False}
    model = dbfit.fit(con, "wins ~ " + " + ".join(predictors), "wide", **options)
    assert model.stats["statistics_path"] == "streamed"
    monkeypatch.setattr(driver, "STREAMED_MIN_COLUMNS", 10_000)
    dense = dbfit.fit(con, "wins ~ " + " + ".join(predictors), "wide", **options)
    assert dense.stats["statistics_path"] == "dense"
    assert_close(model.estimates, dense.estimates, 1e-10, "streamed against dense estimates")
    assert_close(model.stats["log_likelihood"], dense.stats["log_likelihood"], 1e-12, "log-likelihood")

    outcome = np.column_stack([frame["wins"], frame["trials"] - frame["wins"]])
    reference = sm.GLM(
        outcome,
        sm.add_constant(frame[predictors]),
        family=sm.families.Binomial(),
        offset=frame["off"],
        freq_weights=frame["w"],
    ).fit(tol=1e-13)
    assert_close(model.estimates, reference.params.values, 1e-7, "estimates")
    assert_close(model.coefficients["std_error"].to_numpy(), reference.bse.values, 1e-6, "standard errors")


def test_star98_streamed_matches_statsmodels_glm(con, monkeypatch):
    # Source: statsmodels.datasets.star98, 20 predictors, grouped binomial; reference: sm.GLM Binomial.
    data = sm.datasets.star98.load_pandas()
    load_frame(con, "star98", pd.concat([data.endog, data.exog], axis=1))
    monkeypatch.setattr(driver, "STREAMED_MIN_COLUMNS", 1)
    model = dbfit.fit(
        con, "NABOVE ~ " + " + ".join(data.exog.columns), "star98", trials="NABOVE + NBELOW", progress=False
    )
    reference = sm.GLM(data.endog, sm.add_constant(data.exog), family=sm.families.Binomial()).fit(tol=1e-13)
    assert model.stats["statistics_path"] == "streamed"
    assert_close(model.estimates, reference.params.values, 1e-6, "estimates")
    assert_close(model.coefficients["std_error"].to_numpy(), reference.bse.values, 1e-6, "standard errors")
    assert_close(model.stats["deviance"], reference.deviance, 1e-6, "deviance")


def test_narrow_fit_keeps_the_sql_sums(con):
    load_frame(con, "wide", wide_frame(300, 3, seed=1))
    model = dbfit.fit(con, "yes ~ x0 + x1 + x2", "wide", progress=False)
    assert model.stats["statistics_path"] == "dense"


def test_separating_column_is_reported_on_the_streamed_path(con, monkeypatch):
    load_frame(con, "wide", wide_frame(800, 24, seed=3))
    formula = "yes ~ " + " + ".join(f"x{j}" for j in range(24)) + " + sep"
    streamed = dbfit.fit(con, formula, "wide", progress=False)
    monkeypatch.setattr(driver, "STREAMED_MIN_COLUMNS", 10_000)
    dense = dbfit.fit(con, formula, "wide", progress=False)
    assert streamed.stats["statistics_path"] == "streamed" and streamed.stats["separation"]
    assert [w.split(":")[0] for w in streamed.warnings] == [w.split(":")[0] for w in dense.warnings]
    assert streamed.stats["iterations"] == dense.stats["iterations"]


def test_sample_start_and_firth_run_on_the_streamed_pass(con, monkeypatch):
    frame = wide_frame(3000, 22, seed=8)
    load_frame(con, "wide", frame)
    formula = "yes ~ " + " + ".join(f"x{j}" for j in range(22))
    monkeypatch.setattr(driver, "SAMPLE_START_ROWS", 1000)  # the sample (all 3,000 rows) starts the fit
    monkeypatch.setattr(driver, "SAMPLE_ROWS", 2000)
    sampled = dbfit.fit(con, formula, "wide", progress=False)
    firth = dbfit.fit(con, formula, "wide", firth=True, progress=False)
    monkeypatch.setattr(driver, "STREAMED_MIN_COLUMNS", 10_000)
    dense = dbfit.fit(con, formula, "wide", progress=False)
    dense_firth = dbfit.fit(con, formula, "wide", firth=True, progress=False)
    assert sampled.stats["statistics_path"] == firth.stats["statistics_path"] == "streamed"
    assert_close(sampled.estimates, dense.estimates, 1e-9, "sample-started estimates")
    assert_close(firth.estimates, dense_firth.estimates, 1e-9, "Firth estimates")


def test_more_columns_than_the_sql_limit_fit_streamed(con):
    # Past the SQL statistics query's limit, within the streamed one. Reference: statsmodels GLM.
    columns = MAX_DENSE_COLUMNS + 5
    frame = wide_frame(2000, columns, seed=4)
    load_frame(con, "wide", frame)
    predictors = [f"x{j}" for j in range(columns)]
    model = dbfit.fit(con, "yes ~ " + " + ".join(predictors), "wide", progress=False)
    assert model.stats["statistics_path"] == "streamed" and model.stats["converged"]
    reference = sm.GLM(frame["yes"], sm.add_constant(frame[predictors]), family=sm.families.Binomial()).fit(
        tol=1e-13
    )
    assert_close(model.estimates, reference.params.values, 1e-6, "estimates")
    with pytest.raises(FitError, match=f"at most {MAX_DENSE_COLUMNS}"):
        dbfit.fit(con, "yes ~ " + " + ".join(predictors), "wide", firth=True, progress=False)


def test_streamed_fit_inside_the_callers_transaction_leaves_it_open(con):
    load_frame(con, "wide", wide_frame(400, 25, seed=6))
    con.execute("BEGIN")
    con.execute("CREATE TABLE mine AS SELECT 1 AS k")
    model = dbfit.fit(con, "yes ~ " + " + ".join(f"x{j}" for j in range(25)), "wide", progress=False)
    assert model.stats["statistics_path"] == "streamed"
    assert con.execute("SELECT k FROM mine").fetchall() == [(1,)]
    con.execute("ROLLBACK")
    assert con.execute("SELECT count(*) FROM duckdb_tables() WHERE table_name = 'mine'").fetchall() == [(0,)]


FAILING_LATE = "SELECT CAST(CASE WHEN i = 5000 THEN 'x' ELSE '1' END AS INTEGER) AS v FROM range(9000) r(i)"


def test_a_value_failing_while_streamed_is_dbfits_error():
    # Arrow's reader reports the failure as an OSError carrying DuckDB's text; dbfit names it.
    connection = duckdb.connect()
    with pytest.raises(FormulaError, match="cannot be converted"):
        DuckDBEngine(connection).stream(FAILING_LATE, 1000, lambda batch: None)
    assert connection.execute("SELECT 1").fetchall() == [(1,)]
    connection.execute("BEGIN")
    with pytest.raises(AbortedTransactionError, match="ROLLBACK"):
        DuckDBEngine(connection).stream(FAILING_LATE, 1000, lambda batch: None)
    connection.execute("ROLLBACK")


def test_wider_than_the_streamed_limit_is_refused_before_any_pass(con, monkeypatch):
    load_frame(con, "wide", wide_frame(200, 12, seed=9))
    monkeypatch.setattr(driver, "MAX_DENSE_COLUMNS", 5)
    monkeypatch.setattr(driver, "MAX_STREAMED_COLUMNS", 10)
    monkeypatch.setattr(driver, "STREAMED_MIN_COLUMNS", 1)
    scans: list[int] = []
    monkeypatch.setattr(DuckDBEngine, "stream", lambda *args, **kwargs: scans.append(1))
    with pytest.raises(FitError, match="has 12 columns besides the intercept.*at most 10"):
        dbfit.fit(con, "yes ~ " + " + ".join(f"x{j}" for j in range(12)), "wide", progress=False)
    assert not scans


def test_streamed_pass_equals_sql_sums_with_categorical_indicators(con):
    # Indicator columns and a numeric-by-categorical interaction come from the same column expressions.
    frame = wide_frame(1500, 12, seed=12)
    frame["depot"] = np.array(["north", "south", "east", "west", "hub"])[np.arange(1500) % 5]
    load_frame(con, "wide", frame)
    formula = "yes ~ " + " + ".join(f"x{j}" for j in range(12)) + " + depot + x0:depot"
    sql, streamed, size = passes(con, formula, weights="w")
    assert size == 1 + 12 + 4 + 4
    beta = np.random.default_rng(3).normal(size=size) * 0.1
    assert_same_pass(sql(list(range(size)), beta), streamed(list(range(size)), beta))
