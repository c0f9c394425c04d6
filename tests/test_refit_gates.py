"""Refits and promotion gates on either engine that holds a store (a DuckDB file, a PostgreSQL database): warm
start, current version, audit trail, fingerprints.

Data: the invented courier scenario of dbfit.demo (generated in DuckDB from a fixed seed, copied into
PostgreSQL for its runs). The first 20,000 deliveries are the data of the first fit; refits see further rows
appended. Each test runs on both engines (the store's own tests, test_store, hold the store's guarantees).
"""

from __future__ import annotations

import duckdb
import pytest
from pg_server import fresh_database
from test_store import ENGINES, Database

import dbfit
from dbfit.interfaces.demo import FORMULA, REFERENCE, build_deliveries
from dbfit.store import model_store as store

HOLDOUT = dbfit.Holdout("delivery_id", 0.25)


@pytest.fixture(params=ENGINES)
def engine(request, tmp_path):
    """An empty test database on the engine under test."""
    if request.param == "duckdb":
        yield Database("duckdb", str(tmp_path / "refit.duckdb"))
        return
    with fresh_database(request.getfixturevalue("pg_server"), "dbfit_refit_test") as keywords:
        yield Database("postgres", keywords)


class Deliveries:
    """The test's connection with ``deliveries`` (the first ``rows`` deliveries); the rows appended later wait
    in an in-memory DuckDB database of their own."""

    def __init__(self, database: Database, rows: int, later: int = 0) -> None:
        self.database = database
        self.builder = duckdb.connect()
        build_deliveries(self.builder, rows + later, "all_deliveries")
        self.rows = rows
        self.con = database.connect()
        self.database.load(self.con, "deliveries", self.frame(f"delivery_id < {rows}"))

    def frame(self, condition: str, flip: bool = False):
        target = "NOT late AS late" if flip else "late AS late"
        return self.builder.execute(
            f"SELECT * REPLACE ({target}) FROM all_deliveries WHERE {condition} ORDER BY delivery_id"
        ).df()

    def append(self, flip: bool = False) -> None:
        """Append the later deliveries (with ``flip`` their outcomes reversed)."""
        self.database.load(self.con, "appended", self.frame(f"delivery_id >= {self.rows}", flip))
        self.query("INSERT INTO deliveries SELECT * FROM appended")
        self.query("DROP TABLE appended")

    def query(self, sql: str) -> list[tuple]:
        return self.database.query(self.con, sql)

    def live_scores(self) -> list[tuple]:
        return self.query("SELECT delivery_id, probability FROM late_live ORDER BY delivery_id")

    def close(self) -> None:
        self.con.close()
        self.builder.close()


@pytest.fixture
def database(engine):
    data = Deliveries(engine, 20_000, 20_000)
    dbfit.fit(
        data.con, FORMULA, "deliveries", reference=REFERENCE, name="late", split=HOLDOUT, progress=False
    )
    dbfit.publish(data.con, "late", "deliveries", "late_live", live=True)
    yield data
    data.close()


def test_refit_on_appended_rows_is_warm_started_and_promoted(database):
    con = database.con
    database.append()
    result = dbfit.refit(con, "late")
    cold = dbfit.fit(con, FORMULA, "deliveries", reference=REFERENCE, split=HOLDOUT, progress=False)
    assert (
        result["decision"] == "promoted"
        and result["candidate_version"] == 2
        and result["current_version"] == 1
    )
    assert result["figures"]["iterations"] < cold.stats["iterations"]
    assert result["figures"]["scans"] < cold.stats["scans"]
    assert dbfit.load(con, "late").version == 2
    warm = dbfit.load(con, "late", version=2)
    for label in warm.labels:  # the warm start reaches the same answer
        assert warm.estimate(label) == pytest.approx(cold.estimate(label), abs=1e-7)
    assert dbfit.decisions(con, "late")[-1]["decision"] == "promoted"


def test_gate_failure_leaves_current_version_and_live_view_untouched(database):
    con = database.con
    database.append(flip=True)  # the appended outcomes are the opposite of the scenario's
    before = [row for row in database.live_scores() if row[0] < 20000]
    result = dbfit.refit(con, "late")
    assert result["decision"] == "refused"
    assert any("moved" in reason for reason in result["reasons"])
    assert dbfit.load(con, "late").version == 1
    assert [row for row in database.live_scores() if row[0] < 20000] == before
    listed = {row["version"]: row["current"] for row in dbfit.models(con)}
    assert listed == {1: True, 2: False}
    audit = dbfit.decisions(con, "late")[-1]
    assert (audit["candidate_version"], audit["current_version"], audit["decision"]) == (2, 1, "refused")
    assert audit["figures"]["largest_shift"] > 5 and audit["reason"] == "; ".join(result["reasons"])
    with pytest.raises(dbfit.GateRefusedError, match="not promoted"):
        dbfit.promote(con, "late", version=2)
    assert dbfit.load(con, "late").version == 1
    dbfit.promote(con, "late", version=2, force=True)
    assert dbfit.load(con, "late").version == 2 and dbfit.decisions(con, "late")[-1]["reason"].startswith(
        "forced"
    )


def test_gates_are_stored_per_model_and_checked(database):
    con = database.con
    assert dbfit.gates_of(con, "late") == dbfit.Gates()
    dbfit.set_gates(con, "late", max_shift=None, auc_margin=0.5)
    assert dbfit.gates_of(con, "late") == dbfit.Gates(max_shift=None, auc_margin=0.5)
    with pytest.raises(dbfit.StoreError, match="unknown gate"):
        dbfit.set_gates(con, "late", auc=0.1)
    with pytest.raises(dbfit.StoreError, match="non-negative"):
        dbfit.set_gates(con, "late", log_loss_margin=-1.0)
    with pytest.raises(dbfit.StoreError, match="not in the store"):
        dbfit.set_gates(con, "other", auc_margin=0.1)
    dbfit.set_gates(con, "late", log_loss_margin=0.0, auc_margin=0.0)
    small = dbfit.fit(
        con,
        FORMULA,
        "SELECT * FROM deliveries WHERE delivery_id < 600",
        reference=REFERENCE,
        split=HOLDOUT,
        progress=False,
    )  # 11 estimates from about 450 rows: worse on unseen rows
    assert dbfit.save(con, small, "late", promote=False) == 2 and dbfit.load(con, "late").version == 1
    with pytest.raises(dbfit.GateRefusedError) as refused:
        dbfit.promote(con, "late", version=2)
    reasons = refused.value.result["reasons"]
    assert reasons and all("AUC" in r or "log loss" in r for r in reasons)
    figures = refused.value.result["figures"]
    assert (
        figures["candidate_log_loss"] > figures["current_log_loss"]
        or figures["candidate_auc"] < figures["current_auc"]
    )
    assert dbfit.load(con, "late").version == 1 and dbfit.decisions(con, "late")[-1]["decision"] == "refused"


def test_skip_unchanged_reads_the_fingerprint(database):
    con = database.con
    skipped = dbfit.refit(con, "late", skip_unchanged=True)
    assert skipped["decision"] == "skipped" and skipped["candidate_version"] is None
    assert [v["version"] for v in dbfit.models(con)] == [1]
    database.query("UPDATE deliveries SET parcel_kg = parcel_kg + 0.01 WHERE delivery_id = 7")
    changed = dbfit.refit(con, "late", skip_unchanged=True)  # same row count, one value changed
    assert changed["decision"] == "promoted" and changed["source_rows"] == 20000


def test_dropping_the_current_version_falls_back_to_the_latest(database):
    con = database.con
    database.append(flip=True)
    dbfit.refit(con, "late")
    dbfit.drop_model(con, "late", version=1)
    assert dbfit.load(con, "late").version == 2
    assert len(database.live_scores()) == 40000


def test_a_store_of_an_older_dbfit_gets_the_new_tables(engine):
    data = Deliveries(engine, 2000)
    con = data.con
    dbfit.fit(con, FORMULA, "deliveries", reference=REFERENCE, name="late", progress=False)
    for table in ("current_versions", "gates", "decisions", "fingerprints", "drift_bins"):
        data.query(f"DROP TABLE dbfit_store.{table}")
    assert dbfit.load(con, "late").version == 1  # no current_versions: the latest version counts
    dbfit.fit(con, FORMULA, "deliveries", reference=REFERENCE, name="late", progress=False)
    assert dbfit.load(con, "late").version == 2
    data.close()
    plain = duckdb.connect(engine.target, read_only=True) if engine.engine == "duckdb" else engine.connect()
    assert engine.query(plain, "SELECT model, version FROM dbfit_store.current_versions") == [("late", 2)]
    plain.close()


def test_a_promotion_checked_against_a_stale_current_version_is_refused_whole(database):
    con = database.con
    database.append()
    dbfit.refit(con, "late")  # version 2 is current now
    dbfit.save(
        con, dbfit.fit(con, FORMULA, "deliveries", reference=REFERENCE, progress=False), "late", promote=False
    )
    audited = len(dbfit.decisions(con, "late"))
    with pytest.raises(dbfit.StoreConflictError, match="version 2 became current"):
        store.record_decision(con, "late", 3, 1, "promoted", "passed every gate", {}, promote=True)
    assert dbfit.load(con, "late").version == 2 and len(dbfit.decisions(con, "late")) == audited


def test_refit_keeps_the_options_of_the_current_version(engine):
    data = Deliveries(engine, 6000)
    con = data.con
    late, ridge = {"robust": "HC1"}, {"shrinkage": 0.5}
    dbfit.fit(con, FORMULA, "deliveries", reference=REFERENCE, name="late", progress=False, **late)
    dbfit.fit(con, FORMULA, "deliveries", name="ridge", progress=False, **ridge)
    result = dbfit.refit(con, "late")
    refitted = dbfit.load(con, "late")
    assert result["decision"] == "promoted" and refitted.version == 2
    assert {k: refitted.options[k] for k in late} == late and refitted.options["reference"] == REFERENCE
    assert dbfit.refit(con, "ridge")["decision"] == "promoted"
    assert {k: dbfit.load(con, "ridge").options[k] for k in ridge} == ridge
    listed = [(row["model"], row["version"], row["current"]) for row in dbfit.models(con)]
    assert listed == [("late", 1, False), ("late", 2, True), ("ridge", 1, False), ("ridge", 2, True)]
    if engine.engine == "duckdb":  # and the SQL surface's listing, DuckDB's own
        sql = "SELECT model, version, current FROM dbfit.models() ORDER BY model, version"
        assert con.execute(sql).fetchall() == listed
    data.close()


def test_a_refit_leaves_the_callers_open_transaction_open_with_its_rows(database):
    # The candidate and the decision are written on the store's own connection: the caller's uncommitted row
    # stays, its transaction stays open, and its rollback does not take the promotion back.
    con = database.con
    database.query("CREATE TABLE notes (note VARCHAR)")
    if database.database.engine == "duckdb":
        con.execute("BEGIN TRANSACTION")
    else:
        con.autocommit = False
    database.query("INSERT INTO notes VALUES ('uncommitted')")
    assert dbfit.refit(con, "late")["decision"] == "promoted"
    assert database.query("SELECT note FROM notes") == [("uncommitted",)]
    con.rollback()
    assert database.query("SELECT count(*) FROM notes") == [(0,)]
    assert dbfit.load(con, "late").version == 2 and dbfit.decisions(con, "late")[-1]["decision"] == "promoted"
