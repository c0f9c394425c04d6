"""Bad input campaign: every channel (Python options, SQL functions, command line, model documents, sources,
scoring calls) answers bad input with dbfit's own error naming the problem, never a traceback or a raw
database error. Checks are on dbfit's own behaviour (common practice: a message names what to change)."""

from __future__ import annotations

import copy
import json
import threading

import duckdb
import pytest

import dbfit
from dbfit.fitting import statistics as statsquery
from dbfit.fitting.streamed import StreamedStatisticsPass
from dbfit.interfaces.cli import main

OPTION_CASES = [
    # (options of dbfit.fit, words the message must hold)
    ({"max_iter": "10"}, ["max_iter", "'10'"]),
    ({"max_iter": None}, ["max_iter", "None"]),
    ({"max_iter": 2.5}, ["max_iter", "2.5"]),
    ({"max_iter": True}, ["max_iter", "True"]),
    ({"max_iter": [5]}, ["max_iter"]),
    ({"max_iter": "abc"}, ["max_iter", "abc"]),
    ({"tol": "x"}, ["tol", "'x'"]),
    ({"tol": None}, ["tol", "None"]),
    ({"tol": float("inf")}, ["tol", "inf"]),
    ({"tol": True}, ["tol", "True"]),
    ({"tol": "1e-8"}, ["tol", "1e-8"]),
    ({"reference": ["a", "b"]}, ["reference", "list"]),
    ({"reference": "g"}, ["reference", "'g'"]),
    ({"reference": ("g", "a")}, ["reference", "tuple"]),
    ({"tol": [1e-8]}, ["tol", "[1e-08]"]),
    ({"max_iter": float("nan")}, ["max_iter", "nan"]),
    ({"start": "abc"}, ["start", "abc"]),
    ({"start": {"x": "abc"}}, ["start", "'x'", "abc"]),
    ({"start": [1.0, "b", 3.0]}, ["start", "'b'"]),
    ({"start": 5}, ["start", "5"]),
    ({"start": {"x": [1.0]}}, ["start", "'x'", "[1.0]"]),
    ({"positive": 1.5}, ["positive", "1.5"]),
    ({"firth": "yes"}, ["firth", "yes"]),
    ({"firth": 1}, ["firth", "1"]),
    ({"folds": 1}, ["folds", "1"]),
    ({"folds": "5"}, ["folds", "'5'"]),
    ({"folds": 2.5}, ["folds", "2.5"]),
    ({"folds": None}, ["folds", "None"]),
    ({"l1_share": 2}, ["l1_share", "2"]),
    ({"l1_share": -0.1}, ["l1_share", "-0.1"]),
    ({"l1_share": "0.5"}, ["l1_share", "0.5"]),
    ({"l1_share": None}, ["l1_share", "None"]),
    ({"weights": 3}, ["weights", "3"]),
    ({"weights": ["x"]}, ["weights", "list"]),
    ({"offset": 1.5}, ["offset", "1.5"]),
    ({"trials": 2}, ["trials", "2"]),
    ({"by": 3}, ["by", "3"]),
    ({"robust": "cluster", "cluster": 5}, ["cluster", "5"]),
    ({"shrinkage": "cv", "split_key": 7}, ["split_key", "7"]),
    ({"positive": 5}, ["positive", "5"]),
    ({"positive": ["a"]}, ["positive", "['a']"]),
    ({"positive": {"a": 1}}, ["positive"]),
    ({"nosuch": 1}, ["nosuch"]),
    ({"max_iters": 10}, ["max_iters", "max_iter"]),
    ({"progress": "yes"}, ["progress", "yes"]),
]


@pytest.fixture
def deliveries(con):
    con.execute("""CREATE TABLE t AS SELECT y, x::DOUBLE AS x, g, z::DOUBLE AS z FROM (VALUES
        (1, 2.0, 'a', 0.5), (0, 1.0, 'b', 0.1), (1, 3.5, 'a', 0.7), (0, 0.5, 'b', 0.3),
        (1, 2.2, 'b', 0.9), (0, 1.1, 'a', 0.2), (1, 0.9, 'a', 0.4), (0, 2.7, 'b', 0.6),
        (1, 1.7, 'b', 0.8), (0, 1.9, 'a', 0.35)) v(y, x, g, z)""")
    return con


@pytest.fixture
def stored(deliveries):
    dbfit.fit(deliveries, "y ~ x + g", "t", name="m", progress=False)
    return deliveries


def refused(call, words: list[str]) -> dbfit.DbfitError:
    with pytest.raises(dbfit.DbfitError) as caught:
        call()
    for word in words:
        assert word in str(caught.value), (word, str(caught.value))
    return caught.value


@pytest.mark.parametrize("options, words", OPTION_CASES)
def test_python_fit_option_is_refused_by_name(deliveries, options, words):
    refused(lambda: dbfit.fit(deliveries, "y ~ x + g", "t", **{"progress": False, **options}), words)


def test_holdout_share_as_text_is_refused(deliveries):
    refused(
        lambda: dbfit.fit(deliveries, "y ~ x", "t", split=dbfit.Holdout("x", "0.2"), progress=False),
        ["share", "0.2"],
    )


VERSION_CALLS = {
    "load": lambda con, v: dbfit.load(con, "m", version=v),
    "score": lambda con, v: dbfit.score(con, "m", "t", version=v),
    "assess": lambda con, v: dbfit.assess(con, "m", "t", version=v),
    "drift": lambda con, v: dbfit.drift(con, "m", "t", version=v),
    "assessment_tables": lambda con, v: dbfit.assessment_tables(con, "m", "t", version=v),
}


@pytest.mark.parametrize("version", ["1", 0, 1.0, True])
@pytest.mark.parametrize("call", sorted(VERSION_CALLS))
def test_version_that_is_not_a_whole_number_is_refused(stored, call, version):
    refused(lambda: VERSION_CALLS[call](stored, version), ["version must be a whole number", repr(version)])


SCORING_CASES = {
    "score level as text": (
        lambda con: dbfit.score(con, "m", "t", standard_error=True, level="x"),
        ["level", "'x'"],
    ),
    "score standard_error as text": (
        lambda con: dbfit.score(con, "m", "t", standard_error="yes"),
        ["standard_error", "yes"],
    ),
    "publish live as text": (lambda con: dbfit.publish(con, "m", "t", "scored", live="yes"), ["live", "yes"]),
    "report to a missing folder": (
        lambda con: dbfit.write_report(dbfit.load(con, "m"), "/no/such/dir/r.html"),
        ["/no/such/dir/r.html"],
    ),
    "k folds as text": (
        lambda con: dbfit.cross_validate(con, "y ~ x", "t", dbfit.KFold("x", "3")),
        ["folds", "'3'"],
    ),
}


@pytest.mark.parametrize("case", sorted(SCORING_CASES))
def test_scoring_and_report_bad_input_is_refused(stored, case):
    call, words = SCORING_CASES[case]
    refused(lambda: call(stored), words)


SQL_CASES = [
    ("SELECT * FROM dbfit.fit('m2', 'y ~ x', 't', max_iter := 'abc')", ["max_iter", "abc"]),
    ("SELECT * FROM dbfit.fit('m2', 'y ~ x', 't', max_iter := 'ten')", ["max_iter", "ten"]),
    ("SELECT * FROM dbfit.fit('m2', 'y ~ x', 't', max_iter := 2.5)", ["max_iter", "2.5"]),
    ("SELECT * FROM dbfit.fit('m2', 'y ~ x', 't', tol := 'x')", ["tol", "'x'"]),
    ("SELECT * FROM dbfit.fit('m2', 'y ~ x', 't', firth := 'yes')", ["firth", "yes"]),
    ("SELECT * FROM dbfit.fit('m2', 'y ~ x', 't', shrinkage := 1, l1_share := 'half')", ["l1_share", "half"]),
    ("SELECT * FROM dbfit.fit('m2', 'y ~ x', 't', population_rate := 'rare')", ["population_rate", "rare"]),
    ("SELECT * FROM dbfit.fit('m2', 'y ~ x', 't', shrinkage := 'lots')", ["shrinkage", "lots"]),
    ("SELECT * FROM dbfit.fit('m2', 'y ~ x', '/no/such/rows.csv')", ["/no/such/rows.csv"]),
    ("SELECT * FROM dbfit.fit('m2', 'y ~ x', '/no/such/rows.parquet')", ["/no/such/rows.parquet"]),
    ("SELECT * FROM dbfit.fit('m2', 'y ~ x', 't', positive := '5')", ["positive", "5"]),
    ("SELECT * FROM dbfit.assess('m', 't', threshold := 'abc')", ["threshold", "abc"]),
    ("SELECT * FROM dbfit.confusion('m', 't', threshold := 'x')", ["threshold", "'x'"]),
    ("SELECT * FROM dbfit.score('m', 't', level := 'x')", ["level", "'x'"]),
    ("SELECT * FROM dbfit.score('m', '/no/such/rows.csv')", ["/no/such/rows.csv"]),
    ("SELECT * FROM dbfit.score('m', '/no/such/rows.parquet')", ["/no/such/rows.parquet"]),
]


@pytest.mark.parametrize("call, words", SQL_CASES)
def test_sql_function_bad_input_reaches_dbfit(stored, call, words):
    with pytest.raises(duckdb.Error) as caught:
        stored.execute(call).fetchall()
    message = str(caught.value)
    assert any(
        f"{kind}: " in message for kind in ("FitError", "SourceError", "StoreError", "FormulaError")
    ), message
    for word in words:
        assert word in message, (word, message)
    assert [n for (n,) in stored.execute("SELECT model FROM dbfit.models()").fetchall()] == ["m"]


@pytest.fixture
def database(tmp_path):
    path = tmp_path / "store.duckdb"
    con = dbfit.connect(str(path))
    con.execute(
        "CREATE TABLE t AS SELECT (i % 3 = 0)::INT AS y, (i % 7)::DOUBLE AS x, "
        "CASE WHEN i % 2 = 0 THEN 'a' ELSE 'b' END AS g FROM range(60) r(i)"
    )
    dbfit.fit(con, "y ~ x + g", "t", name="m", progress=False)
    con.close()
    return str(path)


def cli_refused(capsys, argv: list[str], words: list[str]) -> None:
    code = main(argv)
    err = capsys.readouterr().err
    assert code != 0
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    for word in words:
        assert word in lines[0], (word, err)


def spec_file(tmp_path, database: str, **settings) -> str:
    path = tmp_path / "spec.json"
    path.write_text(
        json.dumps({"database": database, "name": "m", "formula": "y ~ x + g", "source": "t", **settings})
    )
    return str(path)


CLI_CASES = [
    (
        lambda db, tmp: ["report", "m", "--database", db, "--output", "/no/such/dir/r.html"],
        ["/no/such/dir/r.html"],
    ),
    (lambda db, tmp: ["sql", str(tmp / "nope.sql"), "--database", db], ["nope.sql"]),
    (lambda db, tmp: ["sql", str(tmp), "--database", db], ["cannot be read"]),
    (
        lambda db, tmp: ["assess", "m", "--database", db, "--version", "0"],
        ["version must be a whole number", "0"],
    ),
    (
        lambda db, tmp: ["publish", "m", "--database", db, "--view", "v", "--version", "0"],
        ["version must be a whole number", "0"],
    ),
    (
        lambda db, tmp: ["drift", "m", "--database", db, "--source", "t", "--version", "-1"],
        ["version must be a whole number", "-1"],
    ),
    (
        lambda db, tmp: ["report", "m", "--database", db, "--output", str(tmp)],
        ["cannot be written", "directory"],
    ),
    (lambda db, tmp: ["fit", "--spec", spec_file(tmp, db, positive="late")], ["positive", "late"]),
    (
        lambda db, tmp: [
            "fit",
            "--database",
            db,
            "--name",
            "m",
            "--formula",
            "y ~ x",
            "--source",
            "t",
            "--positive",
            "7",
        ],
        ["positive", "7"],
    ),
    (
        lambda db, tmp: ["report", "m", "--database", db, "--output", spec_file(tmp, db) + "/r.html"],
        ["r.html"],
    ),
]


@pytest.mark.parametrize("case", range(len(CLI_CASES)))
def test_cli_bad_input_is_one_line_without_traceback(capsys, tmp_path, database, case):
    argv, words = CLI_CASES[case]
    cli_refused(capsys, argv(database, tmp_path), words)


def tamper(document: dict, change) -> str:
    copied = copy.deepcopy(document)
    change(copied)
    return json.dumps(copied)


DOCUMENT_CASES = [
    (lambda d: d["estimates"].__setitem__(1, "abc"), ["estimate 1", "abc"]),
    (lambda d: d["estimates"].__setitem__(0, [1.0]), ["estimate 0", "[1.0]"]),
    (lambda d: d["estimates"].pop(), ["estimates", "labels"]),
    (lambda d: d["covariance"][0].pop(), ["covariance"]),
    (lambda d: d["covariance"][0].__setitem__(0, "x"), ["covariance"]),
    (lambda d: d.__setitem__("covariance", "x"), ["covariance", "list"]),
    (lambda d: d.__setitem__("intercept", "yes"), ["intercept", "bool"]),
    (lambda d: d.__setitem__("warnings", "none"), ["warnings", "list"]),
    (lambda d: d.__setitem__("labels", "ab"), ["labels", "list"]),
    (lambda d: d.__setitem__("stats", [1, 2]), ["stats", "dict"]),
    (lambda d: d.__setitem__("formula", 5), ["formula", "str"]),
    (lambda d: d.__setitem__("options", None), ["options", "dict"]),
]


@pytest.mark.parametrize("case", range(len(DOCUMENT_CASES)))
def test_tampered_model_document_is_refused_naming_the_key(stored, case):
    change, words = DOCUMENT_CASES[case]
    document = json.loads(dbfit.load(stored, "m").to_json())
    refused(lambda: dbfit.from_json(tamper(document, change)), words)


def test_threads_sharing_a_connection_get_correct_results_or_dbfit_errors(stored):
    from dbfit.lifecycle.fingerprint import fingerprint

    model = dbfit.load(stored, "m")
    expected_print = fingerprint(stored, "t")
    expected_psi = dbfit.drift(stored, model, "t").to_pylist()
    failures: list[BaseException] = []

    def work() -> None:
        for _ in range(25):
            try:
                assert fingerprint(stored, "t") == expected_print
                assert dbfit.drift(stored, model, "t").to_pylist() == expected_psi
            except dbfit.DbfitError:
                pass
            except (
                BaseException
            ) as err:  # IndexError, KeyError, a wrong answer: one thread read the other's rows
                failures.append(err)

    threads = [threading.Thread(target=work) for _ in range(2)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert failures == []


def test_unknown_column_hint_lists_all_columns_and_the_closest(con):
    columns = ", ".join(f"(range * {k})::DOUBLE AS reading_{k}" for k in range(55))
    con.execute(f"CREATE TABLE wide AS SELECT (range % 2)::INT AS y, {columns} FROM range(10)")
    error = refused(
        lambda: dbfit.fit(con, "y ~ reading_1 + reading_54x", "wide", progress=False),
        ["unknown column 'reading_54x'", "closest: reading_54", "56 columns"],
    )
    assert all(f"reading_{k}" in str(error) for k in range(55))


def test_thousand_predictors_are_refused_before_any_statistics_pass(con, monkeypatch):
    columns = ", ".join(f"(((range + {k}) * 7919) % 101)::DOUBLE AS x{k}" for k in range(1000))
    con.execute(f"CREATE TABLE wide AS SELECT (range % 2)::INT AS y, {columns} FROM range(30)")
    passes = []
    for kind in (statsquery.StatisticsPass, StreamedStatisticsPass):
        original = kind.run
        monkeypatch.setattr(kind, "run", lambda *a, _run=original, **k: passes.append(1) or _run(*a, **k))
    formula = "y ~ " + " + ".join(f"x{k}" for k in range(1000))
    refused(lambda: dbfit.fit(con, formula, "wide", progress=False), ["1000 columns", "fewer columns"])
    assert passes == []


def test_postgres_date_column_is_described_by_its_type_name(pg_server):
    import psycopg
    from pg_server import fresh_database

    with (
        fresh_database(pg_server, "dbfit_bad_input") as keywords,
        psycopg.connect(**keywords, autocommit=True) as connection,
    ):
        connection.execute(
            "CREATE TABLE visits AS SELECT (i % 2) AS y, DATE '2024-01-01' + i AS day, i::float8 AS x "
            "FROM generate_series(1, 20) AS i"
        )
        error = refused(
            lambda: dbfit.fit(connection, "y ~ x + day", "visits", progress=False), ["SQL type DATE"]
        )
        assert "OID" not in str(error)
