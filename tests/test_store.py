"""The model store: versions, round trips, JSON documents, transactions, locks and refused names.

Datasets: statsmodels' spector data (Spector and Mazzeo 1980); reference: statsmodels Logit estimates.
All databases are real DuckDB files on disk; the kill and lock tests use real subprocesses.
"""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm
from conftest import load_frame

import dbfit

WORKTREE = str(Path(__file__).resolve().parents[1])


@pytest.fixture
def spector_file(tmp_path):
    path = tmp_path / "grades.duckdb"
    con = dbfit.connect(str(path))
    load_frame(con, "spector", sm.datasets.spector.load_pandas().data)
    yield con, path
    con.close()


def spector_model(con, **options):
    return dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI::VARCHAR", "spector", progress=False, **options)


def test_save_and_load_round_trip_bit_for_bit(spector_file):
    # reference: statsmodels Logit on spector for the stored estimates.
    con, path = spector_file
    model = spector_model(con)
    assert dbfit.save(con, model, "grades") == 1
    assert dbfit.fit(con, "GRADE ~ GPA", "spector", name="grades", progress=False).version == 2
    con.close()
    reopened = dbfit.connect(str(path))
    loaded = dbfit.load(reopened, "grades", version=1)
    assert (loaded.name, loaded.version, loaded.labels) == ("grades", 1, model.labels)
    assert np.array_equal(loaded.estimates, model.estimates) and np.array_equal(
        loaded.covariance, model.covariance
    )
    assert loaded.coefficients.equals(model.coefficients)
    assert dbfit.scoring_sql(loaded) == dbfit.scoring_sql(model)
    frame = sm.datasets.spector.load_pandas().data
    reference = sm.Logit(frame.GRADE, sm.add_constant(frame[["GPA", "TUCE", "PSI"]])).fit(disp=0, tol=1e-12)
    np.testing.assert_allclose(loaded.estimates, reference.params.values, rtol=1e-6)
    assert dbfit.load(reopened, "grades").formula == "GRADE ~ GPA"
    listing = dbfit.models(reopened)
    assert [(r["model"], r["version"], r["rows_used"], r["source_rows"]) for r in listing] == [
        ("grades", 1, 32, 32),
        ("grades", 2, 32, 32),
    ]
    stored = reopened.execute("SELECT count(*) FROM dbfit_store.coefficients WHERE version = 1").fetchall()[
        0
    ][0]
    assert stored == len(model.labels)
    reopened.close()


def test_unknown_models_and_versions_are_named(spector_file):
    con, _ = spector_file
    with pytest.raises(dbfit.StoreError, match="'grades' is not in the store .*the store is empty"):
        dbfit.load(con, "grades")
    spector_model(con, name="grades")
    with pytest.raises(dbfit.StoreError, match="has no version 7 .*stored versions: 1"):
        dbfit.load(con, "grades", version=7)
    with pytest.raises(dbfit.StoreError, match="'other' is not in the store .*stored models: grades"):
        dbfit.drop_model(con, "other")
    assert dbfit.drop_model(con, "grades") == [("grades", 1)]
    assert dbfit.models(con) == []


def test_json_document_moves_a_model_between_databases(spector_file, tmp_path):
    con, _ = spector_file
    model = spector_model(con)
    text = model.to_json()
    document = json.loads(text)
    assert document["format"] == "dbfit-model" and document["format_version"] == 1
    assert document["factors"][2] == {
        "expression": "PSI::VARCHAR",
        "kind": "categorical",
        "sql_type": "VARCHAR",
        "levels": ["0.0", "1.0"],
        "reference": "0.0",
        "cast_from": "DOUBLE",
    }
    other = dbfit.connect(str(tmp_path / "elsewhere.duckdb"))
    load_frame(other, "spector", sm.datasets.spector.load_pandas().data)
    moved = dbfit.from_json(text)
    dbfit.save(other, moved, "grades")
    assert np.array_equal(dbfit.load(other, "grades").estimates, model.estimates)
    here = con.execute(dbfit.scoring_sql(model)).fetchall()
    there = other.execute(dbfit.scoring_sql(moved, source="spector")).fetchall()
    assert here == there
    other.close()
    with pytest.raises(dbfit.StoreError, match="not a dbfit model document"):
        dbfit.from_json('{"format": "something else"}')
    with pytest.raises(dbfit.StoreError, match="version 9 is not supported"):
        dbfit.from_json(json.dumps({**document, "format_version": 9}))


def test_failed_write_leaves_no_partial_version(spector_file):
    con, _ = spector_file
    model = spector_model(con, name="grades")
    # A stray coefficient row for version 2 makes the second insert of the next save violate the primary key.
    con.execute(
        "INSERT INTO dbfit_store.coefficients (model, version, position, term) VALUES ('grades', 2, 0, 'stray')"
    )
    with pytest.raises(dbfit.StoreError, match="already holds a row with this key"):
        dbfit.save(con, model, "grades")
    assert con.execute("SELECT version FROM dbfit_store.versions").fetchall() == [(1,)]
    assert con.execute("SELECT count(*) FROM dbfit_store.covariance WHERE version = 2").fetchall() == [(0,)]


def test_refused_names_leave_the_database_intact(spector_file):
    # The injection strings of the issue: each is refused with a clear error and table t survives.
    con, _ = spector_file
    con.execute("CREATE TABLE t AS SELECT 1 AS x")
    model = spector_model(con, name="grades")
    attacks = ["x'; DROP TABLE t; --", "v AS SELECT 1; --"]
    for attack in attacks:
        with pytest.raises(dbfit.StoreError, match="model name"):
            dbfit.save(con, model, attack)
        with pytest.raises(dbfit.StoreError, match="view name"):
            dbfit.publish(con, "grades", "spector", attack)
        with pytest.raises(dbfit.DbfitError):
            dbfit.publish(con, "grades", attack, "ok_view")
        with pytest.raises(dbfit.DbfitError):
            dbfit.scoring_sql(model, source=attack)
        with pytest.raises(dbfit.DbfitError):
            dbfit.load(con, attack)
    with pytest.raises(dbfit.StoreError, match='view "t" cannot be created or replaced: .*Table'):
        dbfit.publish(con, "grades", "spector", "t")
    with pytest.raises(dbfit.StoreError, match="live view reads the store: save the model first"):
        dbfit.publish(con, spector_model(con), "spector", "live_view", live=True)
    assert con.execute("SELECT * FROM t").fetchall() == [(1,)]
    assert [r["model"] for r in dbfit.models(con)] == ["grades"]


KILL_SCRIPT = textwrap.dedent("""
    import sys
    import dbfit
    con = dbfit.connect(sys.argv[1])
    print("ready", flush=True)
    model = dbfit.fit(con, "late ~ distance_km + parcel_kg + depot + tier + dispatch_hour + rain", "deliveries",
                      progress=False)
    while True:  # back-to-back version writes, so that many kills land inside a transaction
        print("write", flush=True)
        dbfit.save(con, model, "late")
        print("saved", flush=True)
""")


def check_store(path: Path, first_estimates: np.ndarray, what: str) -> int:
    """Every stored version is whole (document, coefficient and covariance rows); version 1 is untouched."""
    with dbfit.connect(str(path)) as con:
        versions = [r["version"] for r in dbfit.models(con)]
        assert versions == list(range(1, len(versions) + 1)), f"{what}: {versions}"
        for version in versions:
            model = dbfit.load(con, "late", version=version)
            counts = [
                con.execute(
                    f"SELECT count(*) FROM dbfit_store.{table} WHERE version = ?", [version]
                ).fetchall()[0][0]
                for table in ("coefficients", "covariance")
            ]
            assert counts == [len(model.labels), len(model.labels) ** 2], f"{what}, version {version}"
        assert np.array_equal(dbfit.load(con, "late", version=1).estimates, first_estimates), what
    return len(versions)


@pytest.mark.parametrize("stop", [signal.SIGKILL, signal.SIGINT], ids=["SIGKILL", "SIGINT"])
def test_interrupted_fits_never_leave_a_partial_version(tmp_path, stop):
    # common practice: a committed transaction survives a crash, an uncommitted one leaves no trace.
    # SIGINT raises KeyboardInterrupt (or DuckDB's interrupt) inside the fit or the write.
    from dbfit.interfaces.demo import build_deliveries

    path = tmp_path / "courier.duckdb"
    with dbfit.connect(str(path)) as con:
        build_deliveries(con, 20_000)
        first = dbfit.fit(con, "late ~ distance_km + depot", "deliveries", name="late", progress=False)
    rng = random.Random(20261201)
    env = {**os.environ, "PYTHONPATH": WORKTREE}
    stored, landed = 1, {"fit": 0, "write": 0, "between": 0}
    for attempt in range(10 if stop == signal.SIGKILL else 3):
        child = subprocess.Popen(
            [sys.executable, "-c", KILL_SCRIPT, str(path)],
            stdout=subprocess.PIPE,
            stderr=subprocess.DEVNULL,
            env=env,
        )
        assert child.stdout.readline().strip() == b"ready"
        lines: list[bytes] = []
        if attempt % 2:  # aim inside a version write: wait until one starts, then a little longer
            while not lines or lines[-1] != b"write":
                lines.append(child.stdout.readline().strip())
            time.sleep(rng.uniform(0.0, 0.08))
        else:  # aim inside the fit
            time.sleep(rng.uniform(0.02, 0.3))
        child.send_signal(stop)
        child.wait(timeout=30)
        lines += child.stdout.read().split()
        saved = lines.count(b"saved")
        landed["fit" if not lines else "write" if lines[-1] == b"write" else "between"] += 1
        now = check_store(path, first.estimates, f"attempt {attempt}")
        # A kill after COMMIT but before "saved" was printed leaves one more whole version.
        allowed = (
            {stored + saved, stored + saved + 1} if lines and lines[-1] == b"write" else {stored + saved}
        )
        assert now in allowed, f"attempt {attempt}: {now} versions, expected {sorted(allowed)} ({landed})"
        stored = now
    if stop == signal.SIGKILL:
        assert landed["write"] >= 1, f"no kill landed inside a version write: {landed}"
    print(f"{stop.name}: kills landed {landed}; {stored} whole versions stored")


def test_second_writer_gets_a_clear_lock_message(tmp_path):
    path = tmp_path / "busy.duckdb"
    holder = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import sys, duckdb; c = duckdb.connect(sys.argv[1]); print('open', flush=True); sys.stdin.read()",
            str(path),
        ],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
    )
    try:
        assert holder.stdout.readline().strip() == b"open"
        with pytest.raises(
            dbfit.StoreError, match=rf"locked by process {holder.pid} .*one process write a file"
        ):
            dbfit.connect(str(path))
    finally:
        holder.stdin.close()
        holder.wait(timeout=30)


def test_read_only_database_cannot_take_a_version(spector_file):
    con, path = spector_file
    model = spector_model(con)
    con.close()
    reader = dbfit.connect(str(path), read_only=True)
    with pytest.raises(dbfit.StoreError, match="read-only"):
        dbfit.save(reader, model, "grades")
    assert reader.execute("SELECT count(*) FROM dbfit.models()").fetchall() == [(0,)]
    reader.close()


def test_concurrent_writers_in_one_process_all_get_whole_versions(spector_file):
    # Three threads on their own connections save 8 versions each; conflicts on a version number are retried.
    import threading

    con, _ = spector_file
    model = spector_model(con, name="grades")
    failures: list[str] = []

    def writer() -> None:
        connection = con.cursor()
        for _ in range(8):
            try:
                dbfit.save(connection, model, "grades")
            except dbfit.StoreError as err:
                failures.append(str(err))
        connection.close()

    threads = [threading.Thread(target=writer) for _ in range(3)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=120)
    assert failures == []
    versions = [r["version"] for r in dbfit.models(con)]
    assert versions == list(range(1, 26))
    counts = con.execute("SELECT count(*) FROM dbfit_store.coefficients GROUP BY version").fetchall()
    assert {c[0] for c in counts} == {len(model.labels)}
