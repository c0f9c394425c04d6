"""The model store: versions, round trips, JSON documents, transactions, locks and refused names.

Datasets: statsmodels' spector data (Spector and Mazzeo 1980); reference: statsmodels Logit estimates.
Each test runs on both engines that hold a store: a real DuckDB file on disk, and a database of its own on
the test session's real PostgreSQL server (``pg_server`` in conftest); tests of a behaviour only one engine
has say so. The kill and lock tests use real subprocesses.
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

import duckdb
import numpy as np
import pytest
import statsmodels.api as sm
from conftest import load_frame
from pg_server import fresh_database

import dbfit
from dbfit.store import model_store as store

WORKTREE = str(Path(__file__).resolve().parents[1])
ENGINES = ["duckdb", "postgres"]


class Database:
    """One test's database on one engine: new connections to it, plain queries, tables loaded from frames."""

    def __init__(self, engine: str, target: str | dict) -> None:
        self.engine, self.target = engine, target

    def connect(self, **options):
        if self.engine == "duckdb":
            return dbfit.connect(self.target, **options)
        import psycopg

        return psycopg.connect(**self.target, autocommit=True, **options)

    @property
    def address(self) -> str:
        """What a subprocess connects to: the DuckDB file, or a PostgreSQL conninfo."""
        if self.engine == "duckdb":
            return self.target
        return " ".join(f"{k}={v}" for k, v in self.target.items())

    @property
    def uri(self) -> str:
        """What ``--database`` of the command line takes: the DuckDB file, or a postgresql:// URI."""
        if self.engine == "duckdb":
            return self.target
        keywords = self.target
        return f"postgresql://{keywords['user']}@{keywords['host']}:{keywords['port']}/{keywords['dbname']}"

    def query(self, con, sql: str, parameters: list | None = None) -> list[tuple]:
        if self.engine == "duckdb":
            return con.execute(sql, parameters).fetchall() if parameters else con.execute(sql).fetchall()
        cursor = con.execute(sql.replace("?", "%s"), parameters)
        return cursor.fetchall() if cursor.description else []

    def load(self, con, name: str, frame) -> None:
        if self.engine == "duckdb":
            load_frame(con, name, frame)
            return
        kinds = {"f": "double precision", "i": "bigint", "b": "boolean"}
        columns = ", ".join(f'"{c}" {kinds.get(frame[c].dtype.kind, "text")}' for c in frame.columns)
        con.execute(f'CREATE TABLE "{name}" ({columns})')
        with con.cursor() as cursor, cursor.copy(f'COPY "{name}" FROM STDIN') as copy:
            for row in frame.itertuples(index=False):
                copy.write_row([None if value != value else value for value in row])


@pytest.fixture(params=ENGINES)
def database(request, tmp_path):
    if request.param == "duckdb":
        yield Database("duckdb", str(tmp_path / "grades.duckdb"))
        return
    server = request.getfixturevalue("pg_server")
    with fresh_database(server, "dbfit_store_test") as keywords:
        yield Database("postgres", keywords)


@pytest.fixture
def spector_file(database):
    con = database.connect()
    database.load(con, "spector", sm.datasets.spector.load_pandas().data)
    yield con, database
    con.close()


def spector_model(con, **options):
    return dbfit.fit(con, "GRADE ~ GPA + TUCE + PSI::VARCHAR", "spector", progress=False, **options)


def test_save_and_load_round_trip_bit_for_bit(spector_file):
    # reference: statsmodels Logit on spector for the stored estimates.
    con, database = spector_file
    model = spector_model(con)
    assert dbfit.save(con, model, "grades") == 1
    assert dbfit.fit(con, "GRADE ~ GPA", "spector", name="grades", progress=False).version == 2
    con.close()
    reopened = database.connect()
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
    stored = database.query(reopened, "SELECT count(*) FROM dbfit_store.coefficients WHERE version = 1")
    assert stored == [(len(model.labels),)]
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
    # Fitted in a DuckDB file of its own, moved through its JSON document into the store under test.
    con, _ = spector_file
    home = dbfit.connect(str(tmp_path / "home.duckdb"))
    load_frame(home, "spector", sm.datasets.spector.load_pandas().data)
    model = spector_model(home)
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
    moved = dbfit.from_json(text)
    dbfit.save(con, moved, "grades")
    stored = dbfit.load(con, "grades")
    assert np.array_equal(stored.estimates, model.estimates)
    here = home.execute(dbfit.scoring_sql(model)).fetchall()
    there = home.execute(dbfit.scoring_sql(stored, source="spector")).fetchall()
    assert here == there
    home.close()
    with pytest.raises(dbfit.StoreError, match="not a dbfit model document"):
        dbfit.from_json('{"format": "something else"}')
    with pytest.raises(dbfit.StoreError, match="version 9 is not supported"):
        dbfit.from_json(json.dumps({**document, "format_version": 9}))


def test_failed_write_leaves_no_partial_version(spector_file):
    con, database = spector_file
    model = spector_model(con, name="grades")
    # A stray coefficient row for version 2 makes the second insert of the next save violate the primary key.
    con.execute(
        "INSERT INTO dbfit_store.coefficients (model, version, position, term) VALUES ('grades', 2, 0, 'stray')"
    )
    with pytest.raises(dbfit.StoreError, match="already holds a row with this key"):
        dbfit.save(con, model, "grades")
    assert database.query(con, "SELECT version FROM dbfit_store.versions") == [(1,)]
    assert database.query(con, "SELECT count(*) FROM dbfit_store.covariance WHERE version = 2") == [(0,)]


def test_refused_names_leave_the_database_intact(spector_file):
    # The injection strings of the issue: each is refused with a clear error and table t survives.
    con, database = spector_file
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
    refusal = {"duckdb": "Table", "postgres": "is not a view"}[database.engine]
    with pytest.raises(dbfit.StoreError, match=f'view "t" cannot be created or replaced: .*{refusal}'):
        dbfit.publish(con, "grades", "spector", "t")
    with pytest.raises(dbfit.StoreError, match="live view reads the store: save the model first"):
        dbfit.publish(con, spector_model(con), "spector", "live_view", live=True)
    assert database.query(con, "SELECT * FROM t") == [(1,)]
    assert [r["model"] for r in dbfit.models(con)] == ["grades"]


KILL_SCRIPT = textwrap.dedent("""
    import sys
    import dbfit
    if sys.argv[2] == "postgres":
        import psycopg
        con = psycopg.connect(sys.argv[1], autocommit=True)
    else:
        con = dbfit.connect(sys.argv[1])
    print("ready", flush=True)
    from dbfit.lifecycle.saving import save_time_rows
    from dbfit.store.model_store import save_model
    model = dbfit.fit(con, "late ~ distance_km + parcel_kg + depot + tier + dispatch_hour + rain", "deliveries",
                      progress=False)
    extra = save_time_rows(con, model)  # the save's scans once, so that "write" is the version's transaction
    while True:  # back-to-back version writes, so that many kills land inside a transaction
        print("write", flush=True)
        save_model(con, model, "late", extra=extra)
        print("saved", flush=True)
""")


def check_store(database: Database, first_estimates: np.ndarray, what: str) -> int:
    """Every stored version is whole (document, coefficient and covariance rows); version 1 is untouched."""
    with database.connect() as con:
        versions = [r["version"] for r in dbfit.models(con)]
        assert versions == list(range(1, len(versions) + 1)), f"{what}: {versions}"
        for version in versions:
            model = dbfit.load(con, "late", version=version)
            counts = [
                database.query(con, f"SELECT count(*) FROM dbfit_store.{table} WHERE version = ?", [version])[
                    0
                ][0]
                for table in ("coefficients", "covariance")
            ]
            assert counts == [len(model.labels), len(model.labels) ** 2], f"{what}, version {version}"
        assert np.array_equal(dbfit.load(con, "late", version=1).estimates, first_estimates), what
    return len(versions)


@pytest.mark.parametrize("stop", [signal.SIGKILL, signal.SIGINT], ids=["SIGKILL", "SIGINT"])
def test_interrupted_fits_never_leave_a_partial_version(database, stop):
    # common practice: a committed transaction survives a crash, an uncommitted one leaves no trace
    # (PostgreSQL rolls back the open transaction of a client that is gone). SIGINT raises KeyboardInterrupt
    # (or DuckDB's interrupt) inside the fit or the write.
    from dbfit.interfaces.demo import build_deliveries

    with database.connect() as con:
        if database.engine == "duckdb":
            build_deliveries(con, 20_000)
        else:
            with dbfit.connect() as builder:
                build_deliveries(builder, 20_000)
                database.load(con, "deliveries", builder.execute("SELECT * FROM deliveries").df())
        first = dbfit.fit(con, "late ~ distance_km + depot", "deliveries", name="late", progress=False)
    rng = random.Random(20261201)
    env = {**os.environ, "PYTHONPATH": WORKTREE}
    stored, landed = 1, {"fit": 0, "write": 0, "between": 0}
    for attempt in range(10 if stop == signal.SIGKILL else 3):
        child = subprocess.Popen(
            [sys.executable, "-c", KILL_SCRIPT, database.address, database.engine],
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
        now = check_store(database, first.estimates, f"attempt {attempt}")
        # A kill after COMMIT but before "saved" was printed leaves one more whole version.
        allowed = (
            {stored + saved, stored + saved + 1} if lines and lines[-1] == b"write" else {stored + saved}
        )
        assert now in allowed, f"attempt {attempt}: {now} versions, expected {sorted(allowed)} ({landed})"
        stored = now
    if stop == signal.SIGKILL:
        assert landed["write"] >= 1, f"no kill landed inside a version write: {landed}"
    print(f"{database.engine}, {stop.name}: kills landed {landed}; {stored} whole versions stored")


def test_second_writer_gets_a_clear_lock_message(tmp_path):
    # DuckDB only: one process locks a DuckDB file; a PostgreSQL server takes any number of client processes.
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
    # PostgreSQL: a session whose transactions are read-only (default_transaction_read_only), which the
    # store's own connection for the write inherits from the caller's connection parameters.
    con, database = spector_file
    model = spector_model(con)
    con.close()
    if database.engine == "duckdb":
        reader = database.connect(read_only=True)
    else:
        reader = database.connect(options="-c default_transaction_read_only=on")
    with pytest.raises(dbfit.StoreError, match="read-only"):
        dbfit.save(reader, model, "grades")
    assert dbfit.models(reader) == []
    if database.engine == "duckdb":
        assert reader.execute("SELECT count(*) FROM dbfit.models()").fetchall() == [(0,)]
    reader.close()


def test_concurrent_writers_in_one_process_all_get_whole_versions(spector_file):
    # Three threads on their own connections save 8 versions each. DuckDB: conflicts on a version number are
    # retried; PostgreSQL: the writers of one model take turns on its advisory lock.
    import threading

    con, database = spector_file
    model = spector_model(con, name="grades")
    failures: list[str] = []

    def writer() -> None:
        connection = con.cursor() if database.engine == "duckdb" else database.connect()
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
    counts = database.query(con, "SELECT count(*) FROM dbfit_store.coefficients GROUP BY version")
    assert {c[0] for c in counts} == {len(model.labels)}


def test_the_callers_open_transaction_is_neither_used_nor_ended(spector_file):
    # The version is written on the store's own connection: the caller's rollback does not take it back, and
    # the save neither commits nor aborts the caller's uncommitted row.
    con, database = spector_file
    database.query(con, "CREATE TABLE notes (note VARCHAR)")
    model = spector_model(con)
    if database.engine == "duckdb":
        con.execute("BEGIN TRANSACTION")
    else:
        con.autocommit = False
    database.query(con, "INSERT INTO notes VALUES ('uncommitted')")
    assert dbfit.save(con, model, "grades") == 1
    assert database.query(con, "SELECT note FROM notes") == [("uncommitted",)]
    con.rollback()
    assert database.query(con, "SELECT count(*) FROM notes") == [(0,)]
    assert [r["version"] for r in dbfit.models(con)] == [1]


@pytest.mark.parametrize("database", ["postgres"], indirect=True)
def test_postgres_writers_of_one_model_wait_for_its_lock(database, spector_file):
    # PostgreSQL only: DuckDB has no lock a writer waits on (its clashes are retried, see the test above).
    # A transaction holding the model's advisory lock (the key the store takes: hashtext of 'dbfit_store' and
    # of the name) keeps a save waiting; the save completes as the next version once that transaction ends.
    import threading

    con, _ = spector_file
    model = spector_model(con, name="grades")
    holder = database.connect()
    holder.autocommit = False
    holder.execute("SELECT pg_advisory_xact_lock(hashtext('dbfit_store'), hashtext('grades'))")
    saved: list[int] = []
    writer = threading.Thread(target=lambda: saved.append(dbfit.save(database.connect(), model, "grades")))
    writer.start()
    waiting = "SELECT count(*) FROM pg_locks WHERE locktype = 'advisory' AND NOT granted"
    while database.query(con, waiting) == [(0,)] and writer.is_alive():
        writer.join(timeout=0.05)
    assert database.query(con, waiting) == [(1,)] and saved == []
    assert [r["version"] for r in dbfit.models(con)] == [1]
    holder.commit()
    writer.join(timeout=60)
    assert saved == [2] and [r["version"] for r in dbfit.models(con)] == [1, 2]
    holder.close()


def test_published_views_score_with_plain_sql_of_the_engine(spector_file):
    # Reference: statsmodels Logit predictions on spector (version 1) and with weights 1 + GPA
    # (freq_weights of statsmodels GLM, version 2). The views are queried on a fresh connection with nothing
    # of dbfit loaded (duckdb.connect, or psycopg); the pinned view keeps version 1, the live view follows the
    # promotion.
    con, database = spector_file
    frame = sm.datasets.spector.load_pandas().data
    design = sm.add_constant(frame[["GPA", "TUCE", "PSI"]])
    first = sm.Logit(frame.GRADE, design).fit(disp=0, tol=1e-12).predict(design)
    weighted = sm.GLM(frame.GRADE, design, family=sm.families.Binomial(), freq_weights=1 + frame.GPA)
    second = weighted.fit(tol=1e-12).predict(design)
    spector_model(con, name="grades")
    pinned = dbfit.publish(con, "grades", "spector", "grades_pinned")
    live = dbfit.publish(con, "grades", "spector", "grades_live", live=True)
    assert (pinned["mode"], pinned["version"], live["mode"], live["version"]) == ("pinned", 1, "live", None)
    plain = duckdb.connect(database.target) if database.engine == "duckdb" else database.connect()

    def probabilities(view: str) -> np.ndarray:
        rows = database.query(plain, f'SELECT "GPA", "TUCE", "PSI", probability FROM {view} ORDER BY 1, 2, 3')
        ordered = frame.assign(p=np.arange(len(frame))).sort_values(["GPA", "TUCE", "PSI"])
        assert np.array_equal(np.array([r[:3] for r in rows]), ordered[["GPA", "TUCE", "PSI"]].to_numpy())
        return np.array([r[3] for r in rows])[np.argsort(ordered["p"].to_numpy())]

    np.testing.assert_allclose(probabilities("grades_pinned"), first, rtol=1e-7)
    np.testing.assert_allclose(probabilities("grades_live"), first, rtol=1e-7)
    spector_model(con, name="grades", weights="1 + GPA")
    np.testing.assert_allclose(probabilities("grades_pinned"), first, rtol=1e-7)
    np.testing.assert_allclose(probabilities("grades_live"), second, rtol=1e-7)
    assert (
        dbfit.publish(con, "grades", "spector", "grades_pinned")["version"] == 2
    )  # dbfit's own view: replaced
    database.query(con, "CREATE VIEW by_hand AS SELECT 1 AS x")
    with pytest.raises(dbfit.StoreError, match="already exists and was not published by dbfit"):
        dbfit.publish(con, "grades", "spector", "by_hand")
    plain.close()


def test_command_line_keeps_models_in_the_store_of_either_engine(spector_file, tmp_path):
    # The scheduler's commands with --database naming the DuckDB file or a postgresql:// URI. Counts of
    # statsmodels' spector data (Spector and Mazzeo 1980): 32 students, 11 with a better grade, 17 with a GPA
    # above 3.
    con, database = spector_file
    report = tmp_path / "grades.html"
    env = {**os.environ, "PYTHONPATH": WORKTREE}

    def run(*arguments: str) -> tuple[int, dict]:
        done = subprocess.run(
            [sys.executable, "-m", "dbfit", *arguments, "--database", database.uri, "--json"],
            capture_output=True,
            text=True,
            env=env,
            timeout=300,
        )
        return done.returncode, json.loads(done.stdout) if done.stdout.strip() else {"stderr": done.stderr}

    con.close()  # DuckDB lets one process write a file at a time
    formula = ["--formula", "GRADE ~ GPA + TUCE + PSI", "--source", "spector"]
    assert run("fit", "--name", "grades", *formula)[0] == 0
    assert run("fit", "--name", "grades", *formula, "--weights", "1 + GPA")[1]["version"] == 2
    code, listing = run("models")
    assert code == 0 and [(v["version"], v["current"]) for v in listing["versions"]] == [
        (1, False),
        (2, True),
    ]
    code, made = run("publish", "grades", "--view", "grades_view", "--version", "1")
    assert code == 0 and (made["mode"], made["version"]) == ("pinned", 1)
    code, promoted = run("promote", "grades", "1", "--force")
    assert code == 0 and promoted["decision"] == "promoted"
    code, trail = run("decisions", "grades")
    assert code == 0 and [d["reason"] for d in trail["decisions"]] == ["forced: gates not applied"]
    reopened = database.connect()
    assert dbfit.load(reopened, "grades").version == 1
    assert len(database.query(reopened, "SELECT * FROM grades_view")) == 32
    reopened.close()
    # Reference: statsmodels Logit on spector, its average marginal effects and its squared z (the Wald test of
    # a one-df term), for version 1, the current one.
    frame = sm.datasets.spector.load_pandas().data
    reference = sm.Logit(frame.GRADE, sm.add_constant(frame[["GPA", "TUCE", "PSI"]])).fit(disp=0, tol=1e-12)
    code, effects = run("effects", "grades")
    assert code == 0 and [e["term"] for e in effects["effects"]] == ["GPA", "TUCE", "PSI"]
    margins = reference.get_margeff(at="overall")
    np.testing.assert_allclose([e["effect"] for e in effects["effects"]], margins.margeff, rtol=1e-6)
    np.testing.assert_allclose([e["std_error"] for e in effects["effects"]], margins.margeff_se, rtol=1e-6)
    code, tests = run("term-tests", "grades")
    assert code == 0 and [t["term"] for t in tests["terms"]] == ["GPA", "TUCE", "PSI"]
    chi_squares = [t["wald_chi_square"] for t in tests["terms"]]
    np.testing.assert_allclose(chi_squares, reference.tvalues[1:] ** 2, rtol=1e-6)
    # The verbs that measure a stored model: through its gates, on its training snapshot, in a report.
    code, refitted = run("refit", "grades", "--skip-unchanged")
    assert code == 0 and refitted["decision"] == "skipped"  # the fingerprint stored with version 1 matches
    code, promoted = run("promote", "grades", "2")
    assert code == 0 and promoted["decision"] == "promoted" and promoted["figures"]["largest_shift"] < 5
    code, refused = run("gates", "grades", "--max-shift", "0.01")
    assert code == 0 and refused["gates"]["max_shift"] == 0.01
    code, refused = run("promote", "grades", "1")
    assert code == 3 and refused["decision"] == "refused" and "moved" in refused["error"]
    code, assessed = run("assess", "grades")
    metrics = {m["metric"]: m["value"] for m in assessed["metrics"]}
    assert code == 0 and metrics["rows"] == 32 and metrics["positives"] == 11  # spector: 11 of 32 got an A
    code, drift = run("drift", "grades", "--source", 'SELECT * FROM spector WHERE "GPA" > 3')
    by_variable = {v["variable"]: v for v in drift["variables"]}
    assert (
        code == 0 and by_variable["score"]["training_rows"] == 32 and by_variable["score"]["new_rows"] == 17
    )
    code, written = run("report", "grades", "--output", str(report), "--source", "spector")
    assert code == 0 and written["version"] == 2 and "Drift against the training rows" in report.read_text()
    assert [d["decision"] for d in run("decisions", "grades")[1]["decisions"]] == [
        "promoted",
        "skipped",
        "promoted",
        "refused",
    ]


def test_drift_of_a_stored_model_reads_the_snapshot_saved_with_it(spector_file):
    # The snapshot is taken at save time (in the version's transaction, with the source's fingerprint): after
    # the source loses rows, drift still compares with the 32 training rows of spector (Spector and Mazzeo
    # 1980), 17 of which have a GPA above 3. Reference: the source's own figures before the change.
    con, database = spector_file
    spector_model(con, name="grades")
    [printed] = database.query(con, "SELECT source, source_rows FROM dbfit_store.fingerprints")
    assert printed == ("spector", 32)
    stored = database.query(con, "SELECT count(*) FROM dbfit_store.drift_bins WHERE variable = 'score'")
    assert stored == [(10,)]  # deciles: ten bins of the linear predictor
    database.query(con, 'DELETE FROM spector WHERE "GPA" <= 3')
    table = {row["variable"]: row for row in dbfit.drift(con, "grades", "spector").to_pylist()}
    assert {row["training_rows"] for row in table.values()} == {32}
    assert {row["new_rows"] for row in table.values()} == {17}
    assert table["score"]["psi"] > 0.25  # only the better students remain: a large shift of the score


def test_gates_and_a_stale_promotion_on_either_engine(spector_file):
    # The promotion check runs inside the decision's transaction (PostgreSQL: under the model's lock): a
    # candidate checked against version 1 after version 2 became current is refused whole, nothing written.
    con, _ = spector_file
    model = spector_model(con)
    dbfit.save(con, model, "grades")
    assert [dbfit.save(con, model, "grades", promote=False) for _ in range(2)] == [2, 3]
    assert dbfit.set_gates(con, "grades", max_shift=3.0).max_shift == 3.0
    assert dbfit.gates_of(con, "grades").max_shift == 3.0
    store.record_decision(con, "grades", 2, 1, "promoted", "passed every gate", {"auc": 0.9}, promote=True)
    with pytest.raises(dbfit.StoreConflictError, match="version 2 became current"):
        store.record_decision(con, "grades", 3, 1, "promoted", "passed every gate", {}, promote=True)
    assert dbfit.load(con, "grades").version == 2
    assert [(d["candidate_version"], d["figures"]) for d in dbfit.decisions(con, "grades")] == [
        (2, {"auc": 0.9})
    ]


def test_segment_models_are_stored_in_one_transaction_on_either_engine(spector_file):
    # A by= fit stores one model per segment, every one of them or none (PostgreSQL: all their locks held).
    con, _ = spector_file
    fitted = dbfit.fit(con, "GRADE ~ GPA + TUCE", "spector", by="PSI", name="grades", progress=False)
    stored = sorted(r["model"] for r in dbfit.models(con))
    assert len(stored) == len(fitted.models) == 2 and all(name.startswith("grades.") for name in stored)
    for model in fitted.models.values():
        assert np.array_equal(dbfit.load(con, model.name).estimates, model.estimates)
    again = dbfit.save(con, fitted, "grades")
    assert sorted(again.values()) == [(name, 2) for name in stored]
