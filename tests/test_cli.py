"""The command line: the demo and the benchmark run end to end in subprocesses on real DuckDB files."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys

import duckdb
from conftest import import_engine_module, skip_engine

from dbfit.interfaces.demo import TRUE_COEFFICIENTS


def run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "dbfit", *args], capture_output=True, text=True, timeout=600)


def test_demo_fits_the_invented_scenario_close_to_the_truth(tmp_path):
    database = tmp_path / "demo.duckdb"
    done = run("demo", "--rows", "60000", "--database", str(database), "--quiet")
    assert done.returncode == 0, done.stderr
    assert "late ~ distance_km" in done.stdout and "depot=Harbour" in done.stdout
    gap = float(re.search(r"Largest gap: ([0-9.]+) standard errors", done.stdout).group(1))
    assert gap < 4.5  # 11 estimates, each within 4.5 standard errors of its true value
    con = duckdb.connect(str(database), read_only=True)
    assert con.execute("SELECT count(*) FROM deliveries").fetchall()[0][0] == 60000
    con.close()
    assert done.stderr == ""  # --quiet prints no progress
    assert len(TRUE_COEFFICIENTS) == 11


def test_demo_reports_progress_when_not_quiet(tmp_path):
    done = run("demo", "--rows", "5000", "--database", str(tmp_path / "d.duckdb"))
    assert done.returncode == 0, done.stderr
    assert re.search(r"dbfit pass 1: deviance [0-9.]+", done.stderr)


def test_bench_prints_ratios_for_all_three_methods(tmp_path):
    done = run("bench", "--rows", "20000", "--predictors", "3", "--keep", str(tmp_path / "b.duckdb"))
    assert done.returncode == 0, done.stderr
    for label in ("(a) dbfit", "(b) export + statsmodels", "(c) in-memory numpy", "a/b: time", "a/c: time"):
        assert label in done.stdout
    differences = [float(x) for x in re.findall(r"largest estimate difference ([0-9.e+-]+)", done.stdout)]
    assert differences and max(differences) < 1e-6


def test_data_errors_exit_4_and_bad_usage_exits_2():
    done = run("demo", "--rows", "10", "--database", "/tmp/unused_dbfit_demo.duckdb")
    assert done.returncode == 4 and "at least 100 rows" in done.stderr
    done = run("demo", "--rows", "many")
    assert done.returncode == 2 and "invalid int value" in done.stderr


def test_bench_scenarios_run_at_small_size():
    done = run("bench", "--scenario", "levels", "--rows", "20000", "--levels", "200", "--predictors", "2")
    assert done.returncode == 0, done.stderr
    assert "(a) dbfit, blocks by level" in done.stdout and "not run" in done.stdout
    done = run("bench", "--scenario", "segments", "--rows", "20000", "--segments", "20", "--predictors", "2")
    assert done.returncode == 0, done.stderr
    assert re.search(r"\(a\) dbfit, one model per segment .* 20 models", done.stdout)
    assert "a/p: time" in done.stdout and "a/b: time" in done.stdout
    done = run(
        "bench", "--scenario", "outofcore", "--rows", "80000", "--predictors", "2", "--memory-limit", "100MB"
    )
    assert done.returncode == 0, done.stderr
    assert "seconds per million rows" in done.stdout


def test_bench_spark_scenario_agrees_with_duckdb():
    import_engine_module("pyspark")
    if shutil.which("java") is None:
        skip_engine("no Java runtime for Spark")
    done = run("bench", "--scenario", "spark", "--rows", "20000", "--segments", "5", "--predictors", "2")
    assert done.returncode == 0, done.stderr
    gaps = [float(g) for g in re.findall(r"largest estimate difference (\S+)", done.stdout)]
    assert len(gaps) == 2 and max(gaps) < 1e-9, done.stdout  # pooled and per segment, Spark vs DuckDB
