"""The model subcommands for schedulers, run in subprocesses on real DuckDB files: specs, --json, exit codes.

Data: the invented courier scenario of dbfit.interfaces.demo. Exit codes as documented: 0 success, 2 bad usage,
3 a gate refused promotion, 4 data or database error.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import duckdb
import pytest

import dbfit
from dbfit.interfaces.demo import FORMULA, build_deliveries

ROOT = Path(__file__).resolve().parents[1]
COMMANDS = ("fit", "refit", "models", "gates", "promote", "decisions", "publish", "assess", "drift", "report")


def run(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    environment = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.run(
        [sys.executable, "-m", "dbfit", *map(str, args)],
        capture_output=True,
        text=True,
        timeout=600,
        env=environment,
        cwd=cwd,
    )


def one_object(done: subprocess.CompletedProcess) -> dict:
    return json.loads(done.stdout)  # exactly one JSON object, nothing else on stdout


@pytest.fixture
def database(tmp_path) -> Path:
    path = tmp_path / "courier.duckdb"
    con = duckdb.connect(str(path))
    build_deliveries(con, 30_000, "all_deliveries")
    con.execute(
        "CREATE TABLE deliveries AS SELECT * FROM all_deliveries WHERE delivery_id < 15000"
    ).fetchall()
    con.close()
    return path


def _spec(tmp_path: Path, database: Path, kind: str) -> Path:
    if kind == "toml":
        text = (
            f'database = "{database}"\nname = "late"\nformula = "{FORMULA}"\nsource = "deliveries"\n'
            'holdout_key = "delivery_id"\nholdout_share = 0.25\n\n[reference]\ndepot = "North"\ntier = "standard"\n'
            "\n[gates]\nmax_shift = 6.0\n"
        )
        path = tmp_path / "late.toml"
    else:
        text = json.dumps(
            {
                "database": str(database),
                "name": "late",
                "formula": FORMULA,
                "source": "deliveries",
                "holdout_key": "delivery_id",
                "holdout_share": 0.25,
                "reference": {"depot": "North", "tier": "standard"},
                "gates": {"max_shift": 6.0},
            }
        )
        path = tmp_path / "late.json"
    path.write_text(text)
    return path


def _live_scores(database: Path) -> list[tuple]:
    con = duckdb.connect(str(database), read_only=True)
    try:
        return con.execute(
            "SELECT delivery_id, probability FROM late_live WHERE delivery_id < 15000 ORDER BY delivery_id"
        ).fetchall()
    finally:
        con.close()


@pytest.mark.parametrize("kind", ["toml", "json"])
def test_fit_from_a_spec_file_then_refit_on_appended_rows_warm_started(tmp_path, database, kind):
    done = run("fit", "--spec", _spec(tmp_path, database, kind), "--json")
    assert done.returncode == 0, done.stderr
    fitted = one_object(done)
    assert fitted["ok"] and fitted["version"] == 1 and fitted["holdout"]["auc"] > 0.6
    gates = one_object(run("gates", "late", "--database", database, "--json"))
    assert gates["gates"]["max_shift"] == 6.0
    con = duckdb.connect(str(database))
    con.execute("INSERT INTO deliveries SELECT * FROM all_deliveries WHERE delivery_id >= 15000").fetchall()
    con.close()
    done = run("refit", "late", "--database", database, "--json")
    assert done.returncode == 0, done.stderr
    refit = one_object(done)
    assert refit["decision"] == "promoted" and refit["candidate_version"] == 2
    cold = run("refit", "late", "--database", database, "--cold", "--json")
    assert cold.returncode == 0, cold.stderr
    assert refit["figures"]["iterations"] < one_object(cold)["figures"]["iterations"]  # counted Newton passes
    listed = one_object(run("models", "--database", database, "--json"))["versions"]
    assert [(v["version"], v["current"]) for v in listed] == [(1, False), (2, False), (3, True)]


def test_gate_refusal_exits_3_and_leaves_the_live_view_untouched(tmp_path, database):
    assert run("fit", "--spec", _spec(tmp_path, database, "toml")).returncode == 0
    done = run(
        "publish",
        "late",
        "--database",
        database,
        "--view",
        "late_live",
        "--live",
        "--source",
        "deliveries",
        "--json",
    )
    assert done.returncode == 0 and one_object(done)["mode"] == "live"
    before = _live_scores(database)
    con = duckdb.connect(str(database))
    con.execute(
        "INSERT INTO deliveries SELECT * REPLACE (NOT late AS late) FROM all_deliveries "
        "WHERE delivery_id >= 15000"
    ).fetchall()
    con.close()
    done = run("refit", "late", "--database", database, "--json")
    assert done.returncode == 3, done.stderr
    result = one_object(done)
    assert result["decision"] == "refused" and not result["ok"] and result["exit_code"] == 3
    assert "refused" in done.stderr and "moved" in done.stderr
    assert _live_scores(database) == before
    con = duckdb.connect(str(database), read_only=True)
    audit = con.execute(
        "SELECT model, candidate_version, current_version, decision, reason, figures "
        "FROM dbfit_store.decisions"
    ).fetchall()
    current = con.execute("SELECT version FROM dbfit_store.current_versions WHERE model = 'late'").fetchall()
    con.close()
    assert audit[-1][:4] == ("late", 2, 1, "refused") and "moved" in audit[-1][4]
    assert json.loads(audit[-1][5])["largest_shift"] > 6.0 and current == [(1,)]
    text = run("refit", "late", "--database", database)
    assert text.returncode == 3 and "decision: refused" in text.stdout
    by_hand = run("promote", "late", "2", "--database", database, "--json")
    assert (
        by_hand.returncode == 3
        and one_object(by_hand)["decision"] == "refused"
        and "not promoted" in by_hand.stderr
    )
    assert _live_scores(database) == before
    audit = one_object(run("decisions", "late", "--database", database, "--json"))["decisions"]
    assert [a["decision"] for a in audit] == ["refused", "refused", "refused"]


def test_skip_unchanged_and_assess_drift_commands(tmp_path, database):
    assert (
        run(
            "fit",
            "--database",
            database,
            "--name",
            "late",
            "--formula",
            FORMULA,
            "--source",
            "deliveries",
            "--reference",
            "depot=North",
        ).returncode
        == 0
    )
    skipped = run("refit", "late", "--database", database, "--skip-unchanged", "--json")
    assert skipped.returncode == 0 and one_object(skipped)["decision"] == "skipped"
    metrics = one_object(run("assess", "late", "--database", database, "--json"))["metrics"]
    assert {m["metric"] for m in metrics} >= {"auc", "log_loss"}
    shifted = "SELECT * REPLACE (parcel_kg * 3 AS parcel_kg) FROM all_deliveries"
    drift = one_object(run("drift", "late", "--database", database, "--source", shifted, "--json"))
    psi = {v["variable"]: v for v in drift["variables"]}
    assert psi["parcel_kg"]["reading"] == "large shift" and psi["depot"]["reading"] == "stable"
    assert "common practice" in drift["bands"]


def test_exit_codes_for_bad_usage_and_data_errors(database):
    assert run("refit").returncode == 2  # argparse: the model name is missing
    missing = run("fit", "--database", database, "--name", "late")
    assert missing.returncode == 2 and "--formula" in missing.stderr
    unknown = run("refit", "nothing", "--database", database, "--json")
    assert unknown.returncode == 4 and "not in the store" in unknown.stderr
    assert one_object(unknown)["ok"] is False
    bad = run(
        "fit", "--database", database, "--name", "late", "--formula", "late ~ nope", "--source", "deliveries"
    )
    assert bad.returncode == 4 and "nope" in bad.stderr and bad.stdout == ""
    shift = run("gates", "nothing", "--database", database, "--max-shift", "many")
    assert shift.returncode == 2


def test_every_model_command_has_help_with_the_exit_codes():
    for command in COMMANDS:
        done = run(command, "--help")
        assert done.returncode == 0 and "exit codes" in done.stdout and "3  a promotion gate" in done.stdout


def test_report_writes_html_when_the_report_module_is_present(tmp_path, database):
    pytest.importorskip("dbfit.assessment.report")
    assert (
        run(
            "fit", "--database", database, "--name", "late", "--formula", FORMULA, "--source", "deliveries"
        ).returncode
        == 0
    )
    out = tmp_path / "late.html"
    done = run("report", "late", "--database", database, "--output", out, "--source", "deliveries")
    assert done.returncode == 0, done.stderr
    assert one_object(run("models", "--database", database, "--json"))["ok"]
    assert "<html" in out.read_text().lower() and "distance_km" in out.read_text()


@pytest.mark.skipif(shutil.which("make") is None, reason="make is not installed")
def test_makefile_nightly_target_refits_and_fails_loudly(tmp_path, database):
    con = dbfit.connect(str(database))
    dbfit.fit(
        con, FORMULA, "deliveries", name="late", split=dbfit.Holdout("delivery_id", 0.25), progress=False
    )
    con.close()
    settings = [f"DATABASE={database}", "MODEL=late", "VIEW=late_scores", f"PYTHON={sys.executable}"]
    done = subprocess.run(
        ["make", "-s", "-C", str(ROOT), "nightly", *settings],
        capture_output=True,
        text=True,
        timeout=600,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
    )
    assert done.returncode == 0, done.stderr
    con = duckdb.connect(str(database))
    assert con.execute("SELECT count(*) FROM late_scores").fetchall() == [(15000,)]
    con.execute("INSERT INTO deliveries SELECT * REPLACE (NOT late AS late) FROM all_deliveries").fetchall()
    con.close()
    done = subprocess.run(
        ["make", "-s", "-C", str(ROOT), "nightly", *settings],
        capture_output=True,
        text=True,
        timeout=600,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
    )
    assert done.returncode != 0 and "refused" in done.stderr


def test_two_refits_started_at_once_leave_one_promotion_and_one_clear_error(database):
    con = dbfit.connect(str(database))
    dbfit.fit(
        con, FORMULA, "deliveries", name="late", split=dbfit.Holdout("delivery_id", 0.25), progress=False
    )
    con.execute("INSERT INTO deliveries SELECT * FROM all_deliveries WHERE delivery_id >= 15000").fetchall()
    con.close()
    environment = {**os.environ, "PYTHONPATH": str(ROOT)}
    started = [
        subprocess.Popen(
            [sys.executable, "-m", "dbfit", "refit", "late", "--database", str(database)],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
            env=environment,
        )
        for _ in range(2)
    ]
    finished = [(p.wait(timeout=600), p.stderr.read()) for p in started]
    assert sorted(code for code, _ in finished) == [0, 4], finished
    assert "locked" in next(err for code, err in finished if code == 4)
    con = duckdb.connect(str(database), read_only=True)
    assert con.execute("SELECT version FROM dbfit_store.versions ORDER BY version").fetchall() == [(1,), (2,)]
    assert con.execute("SELECT version FROM dbfit_store.current_versions").fetchall() == [(2,)]
    assert con.execute("SELECT decision FROM dbfit_store.decisions").fetchall() == [("promoted",)]
    con.close()


def test_fit_by_segment_stores_one_model_per_segment_and_refits_each(database):
    done = run(
        "fit",
        "--database",
        database,
        "--name",
        "late",
        "--formula",
        "late ~ distance_km + rain",
        "--source",
        "deliveries",
        "--by",
        "depot",
        "--json",
    )
    assert done.returncode == 0, done.stderr
    result = one_object(done)
    con = duckdb.connect(str(database), read_only=True)
    depots = [r[0] for r in con.execute("SELECT DISTINCT depot FROM deliveries ORDER BY 1").fetchall()]
    counts = dict(con.execute("SELECT depot, count(*) FROM deliveries GROUP BY 1").fetchall())
    con.close()
    assert [m["segment"] for m in result["models"]] == depots and result["failures"] == {}
    assert all(m["model"] == f"late.{m['segment']}" and m["version"] == 1 for m in result["models"])
    assert all(m["rows_used"] == counts[m["segment"]] for m in result["models"])
    refit = one_object(
        run("refit", f"late.{depots[0]}", "--database", database, "--skip-unchanged", "--json")
    )
    assert refit["decision"] == "skipped" and refit["source_rows"] == counts[depots[0]]
