"""What an expression may compute: only pure, deterministic, row-wise scalars, on every entry point and
engine.

Dataset: statsmodels' bundled spector data (Spector and Mazzeo 1980). The allowed expressions are checked by
fitting the same model on a view that computes them first (the estimates must agree); every refused one must
raise a DbfitError and leave sequences, settings, views, files and other stored models as they were.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import uuid
from pathlib import Path

import duckdb
import numpy as np
import pytest
import statsmodels.api as sm
from conftest import load_frame
from pg_server import superuser_connection

import dbfit
from dbfit.expressions.formula import parse_expression
from dbfit.expressions.rules import ALLOWED_FUNCTIONS, ALLOWED_NODES

SPECTOR = sm.datasets.spector.load_pandas().data
ROOT = Path(__file__).resolve().parents[1]


def spector_database(path: Path) -> duckdb.DuckDBPyConnection:
    """A DuckDB file with spector, a sequence, a variable, a user's view, a stored model of two versions."""
    con = dbfit.connect(str(path))
    load_frame(con, "spector", SPECTOR)
    con.execute("CREATE SEQUENCE seq").fetchall()
    con.execute("SELECT nextval('seq')").fetchall()
    con.execute("SET VARIABLE secret = 'token-1234'").fetchall()
    con.execute("CREATE VIEW user_view AS SELECT GPA AS kept FROM spector").fetchall()
    for _ in range(2):
        dbfit.fit(con, "GRADE ~ GPA", "spector", name="other_model", progress=False)
    return con


def duckdb_state(con: duckdb.DuckDBPyConnection) -> tuple:
    """What an injection could change or reveal: sequence, store versions, the view, settings, variable."""
    return (
        con.execute("SELECT last_value FROM duckdb_sequences() WHERE sequence_name = 'seq'").fetchall(),
        con.execute("SELECT model, version FROM dbfit_store.versions ORDER BY ALL").fetchall(),
        con.execute("SELECT sql FROM duckdb_views() WHERE view_name = 'user_view'").fetchall(),
        con.execute("SELECT current_setting('search_path'), getvariable('secret')").fetchall(),
    )


@pytest.fixture
def spector_db(tmp_path):
    con = spector_database(tmp_path / "spector.duckdb")
    yield con
    con.close()


def assert_same_fit(con, formula: str, computed: str, reference_formula: str, **options) -> None:
    """``formula`` over spector equals ``reference_formula`` over a view computing the expressions first."""
    con.execute(f"CREATE OR REPLACE VIEW computed AS SELECT *, {computed} FROM spector").fetchall()
    model = dbfit.fit(con, formula, "spector", progress=False, **options)
    reference = dbfit.fit(con, reference_formula, "computed", progress=False, **options)
    np.testing.assert_allclose(model.estimates, reference.estimates, rtol=1e-10, atol=0)


def refused(con, formula: str, message: str = "is not allowed", **options) -> None:
    before = duckdb_state(con)
    with pytest.raises(dbfit.DbfitError, match=message):
        dbfit.fit(con, formula, "spector", progress=False, **options)
    assert duckdb_state(con) == before


# --- one test per category ----------------------------------------------------------------------------------


def test_dbfit_own_sql_helpers_are_refused(spector_db):
    refused(
        spector_db,
        "GRADE ~ GPA + len(dbfit_sql_drop('other_model', NULL))",
        "function dbfit_sql_drop in term 2 of the formula is not allowed",
    )
    refused(
        spector_db,
        "GRADE ~ GPA + CASE WHEN GPA > 0 THEN len(dbfit_sql_fit('other_model', 'spector', "
        "'GRADE ~ TUCE', NULL, NULL, NULL, NULL, NULL, 50, 1e-8, 32, NULL, NULL, false, NULL, NULL, "
        "0.0, NULL)) END",
        "function dbfit_sql_fit in term 2",
    )
    refused(
        spector_db,
        "GRADE ~ GPA",
        "function dbfit_sql_publish in weights",
        weights="1 + 0 * len(dbfit_sql_publish('other_model', 'spector', 'user_view', NULL, false, 'null'))",
    )
    # allowed in the same place: plain arithmetic and math functions
    assert_same_fit(
        spector_db,
        "GRADE ~ GPA + ln(TUCE) + sqrt(TUCE) + abs(GPA - 3)",
        "ln(TUCE) AS a, sqrt(TUCE) AS b, abs(GPA - 3) AS c",
        "GRADE ~ GPA + a + b + c",
    )


@pytest.mark.parametrize(
    "call",
    [
        "nextval('seq')",
        "random()",
        "setseed(0.5)",
        "getvariable('secret')",
        "current_setting('search_path')",
        "now()",
        "current_date",
        "uuid()",
    ],
)
def test_volatile_and_session_functions_are_refused(spector_db, call):
    refused(
        spector_db,
        f"GRADE ~ GPA + TUCE + CAST(({call}) AS VARCHAR)",
        "in term 3 of the formula is not allowed",
    )
    assert_same_fit(
        spector_db,
        "GRADE ~ GPA + CASE WHEN TUCE > 20 THEN 'high' ELSE 'low' END",
        "CASE WHEN TUCE > 20 THEN 'high' ELSE 'low' END AS band",
        "GRADE ~ GPA + band",
    )


def test_nextval_message_names_function_and_term(spector_db):
    with pytest.raises(
        dbfit.FormulaError,
        match=r"^function nextval in term 3 of the formula is not allowed: dbfit "
        r"accepts row-wise computations only; compute it in a view first$",
    ):
        dbfit.fit(spector_db, "GRADE ~ GPA + TUCE + nextval('seq')", "spector", progress=False)
    with pytest.raises(dbfit.FormulaError, match="function nextval in the target"):
        dbfit.fit(spector_db, "CASE WHEN nextval('seq') > 0 THEN GRADE END ~ GPA", "spector", progress=False)


@pytest.mark.parametrize(
    "call",
    [
        "pg_read_file('PG_VERSION')",
        "lo_import('/etc/hostname')",
        "lo_export(lo_from_bytea(0, 'x'), '/tmp/x')",
        "set_config('search_path', 'x', false)",
        "query_to_xml('SELECT 1', true, true, '')",
        "read_text('/etc/hostname')",
        "pg_sleep(1)",
        "currval('seq')",
    ],
)
def test_file_setting_and_other_table_functions_are_refused(call):
    for where in ("weights", "split_key", "cluster"):
        with pytest.raises(dbfit.FormulaError, match=f"in {where} is not allowed"):
            parse_expression(f"length(CAST(({call}) AS VARCHAR))", where)
    parse_expression(
        "length(CAST(x AS VARCHAR)) + date_part('year', d) + year(d) + date_diff('day', d, d)", "weights"
    )


def test_set_returning_functions_are_refused(spector_db):
    refused(spector_db, "GRADE ~ GPA + unnest([TUCE, PSI])", "function unnest in term 2")
    refused(spector_db, "GRADE ~ GPA + generate_series(1, 2)", "function generate_series in term 2")
    refused(spector_db, "GRADE ~ GPA + range(2)", "in term 2")
    model = dbfit.fit(
        spector_db, "GRADE ~ GPA + greatest(TUCE, 20) + coalesce(PSI, 0)", "spector", progress=False
    )
    assert model.stats["n_used"] == len(SPECTOR)


def test_star_and_columns_are_refused(spector_db):
    for formula, message, options in [
        ("GRADE ~ COLUMNS('TU.*')", "function columns in term 1", {}),
        ("GRADE ~ GPA + *", "in term 2", {}),
        ("GRADE ~ GPA", "in weights", {"weights": "spector.*"}),
    ]:
        refused(spector_db, formula, message, **options)
    assert_same_fit(
        spector_db,
        "GRADE ~ GPA + PSI::VARCHAR + TRY_CAST(TUCE AS DOUBLE)",
        "PSI::VARCHAR AS p, TRY_CAST(TUCE AS DOUBLE) AS t2",
        "GRADE ~ GPA + p + t2",
    )


def test_unknown_and_user_defined_functions_are_refused(spector_db):
    spector_db.create_function(
        "double_it", lambda v: 2.0 * v, [duckdb.sqltype("DOUBLE")], duckdb.sqltype("DOUBLE")
    )
    spector_db.execute("CREATE MACRO triple(a) AS 3 * a").fetchall()
    for term, message in [
        ("double_it(TUCE)", "function double_it in term 2"),
        ("triple(TUCE)", "function triple in term 2"),
        ("TUCE::my_type", "cast to type"),
    ]:
        refused(spector_db, f"GRADE ~ GPA + {term}", message)
    refused(spector_db, "GRADE ~ GPA", "in by", by="nosuch_function(PSI)")
    assert_same_fit(
        spector_db,
        "GRADE ~ GPA + lower(CAST(PSI AS VARCHAR)) + length(CAST(TUCE AS VARCHAR))",
        "lower(CAST(PSI AS VARCHAR)) AS l, length(CAST(TUCE AS VARCHAR)) AS n",
        "GRADE ~ GPA + l + n",
    )


def test_queries_aggregates_windows_lambdas_and_placeholders_are_refused(spector_db):
    for term in (
        "(SELECT max(GPA) FROM spector)",
        "avg(GPA)",
        "avg(GPA) OVER ()",
        "list_transform([GPA], v -> v)",
        "GPA * ?",
        "GPA * $1",
        "GPA IN (SELECT GPA FROM spector)",
    ):
        refused(spector_db, f"GRADE ~ TUCE + {term}", "in term 2")


def test_dates_are_allowed(spector_db):
    spector_db.execute(
        "CREATE VIEW dated AS SELECT *, DATE '2020-01-01' + CAST(TUCE AS INTEGER) AS d FROM spector"
    )
    model = dbfit.fit(
        spector_db,
        "GRADE ~ GPA + date_part('day', d) + month(d) + extract(dow FROM d)",
        "dated",
        progress=False,
    )
    spector_db.execute(
        "CREATE VIEW parts AS SELECT *, date_part('day', d) AS a, month(d) AS b, "
        "extract(dow FROM d) AS c FROM dated"
    )
    reference = dbfit.fit(spector_db, "GRADE ~ GPA + a + b + c", "parts", progress=False)
    np.testing.assert_allclose(model.estimates, reference.estimates, rtol=1e-10, atol=0)
    refused(spector_db, "GRADE ~ GPA + date_diff('day', current_date, DATE '2020-01-01')", "current_date")


def test_allowlist_sizes_are_stated():
    # Guards against an accidental catch-all entry (exp.Func, exp.Expression) in the allowlist.
    from sqlglot import exp

    assert (
        exp.Func not in ALLOWED_NODES
        and exp.Anonymous not in ALLOWED_NODES
        and exp.Expression not in ALLOWED_NODES
    )
    assert not any(name.startswith("dbfit") for names in ALLOWED_FUNCTIONS.values() for name in names)


# --- sources ------------------------------------------------------------------------------------------------


def test_select_source_may_not_call_dbfit_or_state_functions(spector_db, tmp_path):
    for source in (
        "SELECT *, len(dbfit_sql_drop('other_model', NULL)) AS n FROM spector",
        "SELECT *, nextval('seq') AS n FROM spector",
        "SELECT *, getvariable('secret') AS n FROM spector",
        "SELECT * FROM query('SELECT * FROM spector')",
        "SELECT * FROM spector WHERE random() < 2",
    ):
        before = duckdb_state(spector_db)
        with pytest.raises(dbfit.SourceError, match="calls"):
            dbfit.fit(spector_db, "GRADE ~ GPA", source, progress=False)
        assert duckdb_state(spector_db) == before
    # a source is a query: aggregates, windows and file readers are allowed
    path = tmp_path / "spector.parquet"
    spector_db.execute(f"COPY spector TO '{path}' (FORMAT parquet)").fetchall()
    plain = dbfit.fit(
        spector_db,
        "GRADE ~ GPA + centred",
        "SELECT *, GPA - avg(GPA) OVER () AS centred FROM spector",
        progress=False,
    )
    read = dbfit.fit(
        spector_db,
        "GRADE ~ GPA + centred",
        f"SELECT *, GPA - (SELECT avg(GPA) FROM spector) AS centred FROM read_parquet('{path}')",
        progress=False,
    )
    np.testing.assert_allclose(plain.estimates, read.estimates, rtol=1e-10, atol=0)
    stacked = dbfit.fit(
        spector_db, "GRADE ~ v", "SELECT GRADE, unnest([GPA, TUCE]) AS v FROM spector", progress=False
    )
    assert stacked.stats["n_used"] == 2 * len(
        SPECTOR
    )  # the user's own query may return more rows than a table


# --- stored models and model documents ----------------------------------------------------------------------


@pytest.mark.parametrize("place", ["factor", "formula", "weights", "cluster", "split"])
def test_tampered_model_document_is_refused_by_from_json(spector_db, place):
    model = dbfit.fit(
        spector_db,
        "GRADE ~ GPA + PSI::VARCHAR",
        "spector",
        weights="1 + 0 * TUCE",
        robust="cluster",
        cluster="PSI",
        split=dbfit.Holdout("TUCE", 0.25),
        progress=False,
    )
    document = json.loads(model.to_json())
    if place == "factor":
        document["factors"][1]["expression"] = "nextval('seq')::VARCHAR"
    elif place == "formula":
        document["formula"] = "GRADE ~ GPA + nextval('seq')::VARCHAR"
    elif place == "split":
        document["options"]["split"]["key"] = "nextval('seq')"
    else:
        document["options"][place] = "nextval('seq')"
    before = duckdb_state(spector_db)
    with pytest.raises(dbfit.DbfitError, match="function nextval in .* is not allowed"):
        dbfit.from_json(json.dumps(document))
    assert duckdb_state(spector_db) == before
    dbfit.from_json(model.to_json())  # the untouched document still reads


def test_tampered_stored_model_is_refused_by_load(spector_db):
    spector_db.execute(
        "UPDATE dbfit_store.versions SET document = replace(document, '\"GPA\"', "
        "'\"len(dbfit_sql_drop(''other_model'', NULL))\"') WHERE version = 2"
    ).fetchall()
    before = duckdb_state(spector_db)
    with pytest.raises(dbfit.FormulaError, match="function dbfit_sql_drop in factor 1 of the model document"):
        dbfit.load(spector_db, "other_model", version=2)
    with pytest.raises(dbfit.FormulaError, match="dbfit_sql_drop"):
        dbfit.score(spector_db, "other_model", "spector", version=2)
    assert duckdb_state(spector_db) == before
    assert dbfit.load(spector_db, "other_model", version=1).labels[-1] == "GPA"


def test_document_source_is_data_not_a_query(spector_db):
    model = dbfit.fit(spector_db, "GRADE ~ GPA", "spector", progress=False)
    document = json.loads(model.to_json())
    document["source"] = document["fingerprint"]["source"] = (
        "SELECT *, getvariable('secret') AS GPA2 FROM spector"
    )
    with pytest.raises(dbfit.SourceError, match="getvariable"):
        dbfit.from_json(json.dumps(document))
    moved = dbfit.from_json(model.to_json())
    with pytest.raises(dbfit.DbfitError, match="read from a JSON document.*source"):
        dbfit.score(spector_db, moved)
    with pytest.raises(dbfit.DbfitError, match="read from a JSON document"):
        dbfit.scoring_sql(moved)
    with pytest.raises(dbfit.DbfitError, match="read from a JSON document"):
        dbfit.assess(spector_db, moved)
    scored = dbfit.score(spector_db, moved, "spector")
    np.testing.assert_allclose(
        scored["probability"].to_numpy(), dbfit.score(spector_db, model)["probability"].to_numpy(), rtol=1e-12
    )
    assert dbfit.score(spector_db, "other_model").num_rows == len(SPECTOR)  # stored models keep their source


# --- entry points -------------------------------------------------------------------------------------------


def test_sql_fit_macro_refuses_injections(spector_db):
    calls = [
        "SELECT * FROM dbfit.fit('m', 'GRADE ~ GPA + len(dbfit_sql_drop(''other_model'', NULL))', 'spector')",
        "SELECT * FROM dbfit.fit('m', 'GRADE ~ GPA', 'spector', weights := '1 + 0 * nextval(''seq'')')",
        "SELECT * FROM dbfit.fit('m', 'GRADE ~ GPA', 'spector', by := 'getvariable(''secret'')')",
        "SELECT * FROM dbfit.fit('m', 'GRADE ~ GPA', 'SELECT *, nextval(''seq'') AS n FROM spector')",
    ]
    for call in calls:
        before = duckdb_state(spector_db)
        with pytest.raises(duckdb.Error, match="(is not allowed|calls function)"):
            spector_db.execute(call).fetchall()
        assert duckdb_state(spector_db) == before, call


def test_cli_spec_file_refuses_injections(tmp_path):
    path = tmp_path / "cli.duckdb"
    spector_database(path).close()
    specs = [
        {"formula": "GRADE ~ GPA + nextval('seq')"},
        {"formula": "GRADE ~ GPA", "weights": "1 + 0 * len(dbfit_sql_drop('other_model', NULL))"},
        {"formula": "GRADE ~ GPA", "holdout_key": "getvariable('secret')"},
    ]
    for k, extra in enumerate(specs):
        con = dbfit.connect(str(path))
        before = duckdb_state(con)
        con.close()
        spec = tmp_path / f"spec{k}.json"
        spec.write_text(json.dumps({"database": str(path), "name": "m", "source": "spector", **extra}))
        done = subprocess.run(
            [sys.executable, "-m", "dbfit", "fit", "--spec", str(spec), "--json"],
            capture_output=True,
            text=True,
            timeout=600,
            env={**os.environ, "PYTHONPATH": str(ROOT)},
        )
        assert done.returncode == 4, done.stderr
        assert "is not allowed" in done.stdout + done.stderr
        con = dbfit.connect(str(path))
        assert duckdb_state(con) == before
        con.close()


# --- the injection campaign ---------------------------------------------------------------------------------

CHANNELS = (
    "term",
    "target",
    "weights",
    "offset",
    "trials",
    "cluster",
    "by",
    "split_key",
    "holdout_key",
    "source",
)
DUCKDB_PAYLOADS = (
    "len(dbfit_sql_drop('other_model', NULL))",
    "len(dbfit_sql_publish('other_model', 'spector', 'user_view', NULL, false, 'null'))",
    "nextval('seq')",
    "length(getvariable('secret'))",
    "len(dbfit_sql_fit('other_model', 'spector', 'GRADE ~ TUCE', NULL, NULL, NULL, NULL, NULL, 50, 1e-8, "
    "32, NULL, NULL, false, NULL, NULL, 0.0, NULL))",
    "currval('seq')",
)
REFUSAL = "(is not allowed|which a source may not call)"
FILE_MARK = f"/tmp/dbfit-expression-safety-{uuid.uuid4().hex}"
POSTGRES_PAYLOADS = (
    "length(pg_read_file('PG_VERSION'))",
    f"lo_export(lo_from_bytea(0, 'written'), '{FILE_MARK}')",
    "length(query_to_xml('SELECT * FROM secrets', true, true, '')::VARCHAR)",
    "length(set_config('search_path', 'evil', false))",
    "nextval('seq')",
    "length(lo_import('/etc/passwd')::VARCHAR)",
)
# trials, cluster and split_key (shrinkage) are refused on PostgreSQL before any expression is read
POSTGRES_CHANNELS = ("term", "target", "weights", "offset", "by", "holdout_key", "source")


def attempt(con, channel: str, payload: str, table: str) -> None:
    """One fit with ``payload`` in ``channel``; each channel's text is a scalar expression around it."""
    as_text = f"CAST(({payload}) AS VARCHAR)"
    formula, source, options = "GRADE ~ GPA", table, {}
    if channel == "term":
        formula = f"GRADE ~ GPA + {payload}"
    elif channel == "target":
        formula = f"CASE WHEN {as_text} IS NULL THEN GRADE ELSE GRADE END ~ GPA"
    elif channel in ("weights", "trials"):
        options[channel] = f"1 + 0 * length({as_text})"
    elif channel == "offset":
        options["offset"] = f"0 * length({as_text})"
    elif channel == "cluster":
        options.update(robust="cluster", cluster=as_text)
    elif channel == "by":
        options["by"] = as_text
    elif channel == "split_key":
        options.update(shrinkage="cv", split_key=as_text)
    elif channel == "holdout_key":
        options["split"] = dbfit.Holdout(as_text, 0.25)
    else:
        source = f"SELECT *, {payload} AS injected FROM {table}"
    dbfit.fit(con, formula, source, progress=False, **options)


@pytest.mark.parametrize("channel", CHANNELS)
@pytest.mark.parametrize("payload", DUCKDB_PAYLOADS)
def test_duckdb_injection_campaign(spector_db, channel, payload):
    before = duckdb_state(spector_db)
    with pytest.raises(dbfit.DbfitError, match=REFUSAL):
        attempt(spector_db, channel, payload, "spector")
    assert duckdb_state(spector_db) == before


@pytest.fixture(scope="module")
def postgres():
    with superuser_connection() as connection:
        with connection.cursor() as cursor:
            cursor.execute(
                "CREATE TABLE spector (gpa double precision, tuce double precision, psi double precision, "
                "grade double precision)"
            )
            cursor.executemany(
                "INSERT INTO spector VALUES (%s, %s, %s, %s)",
                [
                    tuple(map(float, r))
                    for r in SPECTOR[["GPA", "TUCE", "PSI", "GRADE"]].itertuples(index=False)
                ],
            )
            cursor.execute("CREATE TABLE secrets (token text); INSERT INTO secrets VALUES ('token-1234')")
            cursor.execute("CREATE SEQUENCE seq; SELECT nextval('seq')")
            cursor.execute("CREATE VIEW user_view AS SELECT gpa AS kept FROM spector")
        yield connection


def postgres_state(connection) -> tuple:
    with connection.cursor() as cursor:
        cursor.execute(
            "SELECT (SELECT last_value FROM seq), current_setting('search_path'), "
            "pg_get_viewdef('user_view'), (SELECT count(*) FROM pg_largeobject_metadata)"
        )
        return (*cursor.fetchone(), Path(FILE_MARK).exists())


def test_postgres_server_is_superuser(postgres):
    with postgres.cursor() as cursor:
        cursor.execute("SELECT rolsuper FROM pg_roles WHERE rolname = current_user")
        assert cursor.fetchone() == (True,)
    model = dbfit.fit(
        postgres,
        "GRADE ~ GPA + ln(TUCE) + CASE WHEN PSI > 0 THEN 'yes' ELSE 'no' END",
        "spector",
        progress=False,
    )
    assert model.stats["n_used"] == len(SPECTOR)


@pytest.mark.parametrize("channel", POSTGRES_CHANNELS)
@pytest.mark.parametrize("payload", POSTGRES_PAYLOADS)
def test_postgres_injection_campaign(postgres, channel, payload):
    before = postgres_state(postgres)
    assert before[-1] is False
    with pytest.raises(dbfit.DbfitError, match=REFUSAL):
        attempt(postgres, channel, payload, "spector")
    assert postgres_state(postgres) == before
