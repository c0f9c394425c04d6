"""``dbfit bench``: every scenario runs end to end at a tiny size, dbfit's estimates agree with the reference
libraries it is measured against (scikit-learn, statsmodels, a numpy IRLS), and a baseline over the memory cap
is reported instead of run. Timings are never asserted."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import import_engine_module, skip_engine

from dbfit.interfaces import bench
from dbfit.interfaces.bench import BenchOptions, build_table, measure, numeric_select, run_bench

BASELINES = ["numpy", "sklearn", "logit", "glm"]
EXPECTED_KEYS = {
    "core": ["dbfit", *BASELINES],
    "categorical": ["dbfit", *BASELINES],
    "wide": ["dbfit", *BASELINES],
    "levels": ["dbfit", *BASELINES],
    "segments": ["dbfit-by", "dbfit", "logit-by"],
    "outofcore": ["dbfit-2", "dbfit-4", "dbfit-8"],
}
TABLE_ROW = re.compile(r"^\|( [^|]* \|){8}$")


def run_cli(target: Path, *args: str) -> tuple[subprocess.CompletedProcess, list[dict]]:
    """``dbfit bench ARGS --json TARGET`` in a subprocess: its output, and the records of its one scenario."""
    done = subprocess.run(
        [sys.executable, "-m", "dbfit", "bench", *args, "--json", str(target)],
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert done.returncode == 0, done.stderr
    return done, json.loads(target.read_text())["scenarios"][0]["records"]


@pytest.mark.parametrize("name", list(EXPECTED_KEYS))
def test_every_scenario_runs_tiny_and_agrees_with_the_reference_libraries(name, capsys):
    options = BenchOptions(scenario=name, rows=2000, levels=20, segments=20)
    report = run_bench(options)
    (scenario,) = report["scenarios"]
    records = scenario["records"]
    assert [r["key"] for r in records] == EXPECTED_KEYS[name]
    assert all(r["status"] == "ok" and r["peak_rss_mb"] > 0 for r in records), records
    compared = [r for r in records if "max_abs_difference" in r]
    # every baseline is compared with dbfit: same coefficients by label (reference libraries: scikit-learn,
    # statsmodels, and a numpy IRLS after McCullagh and Nelder); the pooled and out-of-core rows have none
    expected_compared = {"segments": 1, "outofcore": 0}.get(name, 4)
    assert len(compared) == expected_compared
    assert all(r["max_abs_difference"] < 1e-6 for r in compared), [r["max_abs_difference"] for r in compared]
    assert all(r["time_ratio"] > 0 and r["memory_ratio"] > 0 for r in compared)
    agreement = [c for c in report["targets"] if "estimates agree" in c["target"]]
    assert [c["met"] for c in agreement] == ([True] if compared else [])
    if name == "categorical":  # 83 columns: the first level of each factor left out, as dbfit codes it
        assert len(records[0]["labels"]) == 1 + 10 + 4 + 19 + 49
        assert all(r["labels"] == records[0]["labels"] for r in records[1:])
    table = capsys.readouterr().out.split("\n\n")[-1].strip().splitlines()
    assert len(table) == 2 + len(records)
    assert all(TABLE_ROW.match(line) for line in table), table


def test_targets_are_judged_from_the_ratios_of_one_run():
    def record(key: str, **figures: float) -> dict:
        return {"key": key, "method": key, "status": "ok", "subject": "dbfit", **figures}

    scenarios = [
        {
            "scenario": "wide",
            "records": [
                record("dbfit"),
                record("numpy", time_ratio=0.5, memory_ratio=0.4, max_abs_difference=2e-8),
                {"key": "sklearn", "method": "sklearn", "status": "not run"},
            ],
        },
        {
            "scenario": "core",
            "records": [record("dbfit"), {"key": "numpy", "method": "n", "status": "did not fit"}],
        },
    ]
    checks = {c["target"]: (c["measured"], c["met"]) for c in bench.target_checks(scenarios)}
    assert checks == {
        "wide: dbfit / numpy, time_ratio <= 0.6": (0.5, True),
        "wide: dbfit / numpy, memory_ratio <= 0.3": (0.4, False),
        "wide: estimates agree with every baseline to 1e-08": (2e-8, False),
        "core: dbfit / n, time_ratio <= 0.5": (None, None),
    }


def test_cli_prints_the_markdown_table_writes_json_and_repeats_every_method(tmp_path):
    done, records = run_cli(tmp_path / "b.json", "--rows", "3000", "--predictors", "3", "--repeat", "2")
    assert "| scenario | method | time | peak RSS |" in done.stdout
    assert [r["key"] for r in records] == ["dbfit", *BASELINES]
    assert all(len(r["runs"]) == 2 for r in records)  # --repeat applies to dbfit and every baseline


def test_a_baseline_whose_estimate_exceeds_the_cap_is_not_run(tmp_path):
    arguments = ("--rows", "2000", "--predictors", "3", "--baseline-memory", "0.0001")
    done, records = run_cli(tmp_path / "b.json", *arguments)
    assert records[0]["status"] == "ok"  # dbfit itself is not capped
    assert [r["status"] for r in records[1:]] == ["not run"] * 4
    assert all("cap 0.0001 GB" in r["note"] for r in records[1:])
    assert "not run: needs about" in done.stdout


def test_a_baseline_that_runs_out_of_its_cap_is_reported_as_not_fitting(monkeypatch, capsys):
    monkeypatch.setattr(bench, "MEMORY_FACTORS", dict.fromkeys(bench.MEMORY_FACTORS, 0.0))  # estimate: fits
    report = run_bench(BenchOptions(rows=100_000, predictors=3, baseline_memory_gb=0.002))
    records = report["scenarios"][0]["records"]
    assert [r["status"] for r in records] == ["ok"] + ["did not fit"] * 4
    assert all(r["note"] == "did not fit in 0.002 GB" for r in records[1:])
    assert capsys.readouterr().out.count("did not fit in 0.002 GB") >= 8  # each line, and each table row


def test_the_same_baseline_runs_under_a_cap_it_fits_in(tmp_path):
    path = str(tmp_path / "t.duckdb")
    build_table(path, numeric_select(1_000_000, 3))  # 24 MB of doubles, well above the small cap
    task = {"kind": "numpy", "path": path, "columns": ["x0", "x1", "x2"]}
    assert measure({**task, "memory_cap_bytes": 2 * 2**20})["status"] == "did not fit"
    assert measure({**task, "memory_cap_bytes": 2**30})["status"] == "ok"


def test_spark_scenario_agrees_with_duckdb(tmp_path):
    import_engine_module("pyspark")
    if shutil.which("java") is None:
        skip_engine("no Java runtime for Spark")
    arguments = ("--scenario", "spark", "--rows", "20000", "--segments", "5", "--predictors", "2")
    done, records = run_cli(tmp_path / "s.json", *arguments)
    gaps = [r["max_abs_difference"] for r in records if "max_abs_difference" in r]
    assert len(gaps) == 2 and max(gaps) < 1e-9, done.stdout  # pooled and per segment, Spark vs DuckDB


def test_a_worker_reports_its_own_peak_memory_not_its_parents():
    # A parent holding 400 MB starts a worker that holds little: the worker's peak must be its own.
    held = b"\x01" * (400 * 2**20)  # written, so resident
    code = "from dbfit.interfaces.bench import peak_rss_mb; print(peak_rss_mb())"
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert float(done.stdout) < 300, done.stdout
    assert len(held) == 400 * 2**20


SCALING_ROW = re.compile(r"^\|( [^|]* \|){10}$")


def test_spark_scale_runs_tiny_tabulates_each_engine_and_size_and_agrees_with_duckdb(tmp_path):
    import_engine_module("pyspark")
    if shutil.which("java") is None:
        skip_engine("no Java runtime for Spark")
    arguments = ("--scenario", "spark-scale", "--rows", "20000,40000", "--predictors", "5")
    setting = ("--spark-conf", "spark.sql.codegen.maxFields=300")
    done, records = run_cli(tmp_path / "s.json", *arguments, *setting, "--work-dir", str(tmp_path / "data"))
    assert [r["key"] for r in records] == ["duckdb-20000", "spark-20000", "duckdb-40000", "spark-40000"]
    assert all(r["status"] == "ok" and r["scans"] >= 3 for r in records), done.stdout
    spark = [r for r in records if r["key"].startswith("spark")]
    assert all(r["jvm_peak_rss_mb"] > 0 and r["peak_rss_mb"] > r["driver_peak_rss_mb"] for r in spark)
    assert all(r["spark_settings_seen"] == {"spark.sql.codegen.maxFields": "300"} for r in spark)
    # the same Parquet rows fitted by two engines: one answer (Spark SQL and DuckDB, dbfit's own sums)
    assert max(r["max_abs_difference"] for r in spark) < 1e-9, done.stdout
    scenario = json.loads((tmp_path / "s.json").read_text())["scenarios"][0]
    scaling = scenario["scaling"]
    assert [(row["engine"], row["rows"]) for row in scaling] == [
        ("duckdb", 20000),
        ("duckdb", 40000),
        ("spark", 20000),
        ("spark", 40000),
    ]
    for row in scaling:
        assert row["seconds_per_pass"] * row["scans"] == pytest.approx(row["seconds"])
        per_million = row["seconds_per_pass"] * 1e6 / row["rows"]
        assert row["seconds_per_pass_per_million_rows"] == pytest.approx(per_million)
        assert row["rows_vs_first"] == row["rows"] / 20000
        assert row["cpu_seconds_per_pass"] > 0  # the JVM's CPU time, read from /proc, is Spark's
    assert [row["growth_vs_first"] for row in scaling[::2]] == [1.0, 1.0]
    assert [[c["column"] for c in data["columns"]] for data in scenario["parquet"]] == [
        ["x0", "x1", "x2", "x3", "x4", "y"]
    ] * 2
    assert list((tmp_path / "data").iterdir()) == []  # each size's Parquet and the bench's folder are gone
    table = done.stdout.split("| engine | rows |")[1].split("\n\n")[0].strip().splitlines()[2:]
    assert len(table) == 4 and all(SCALING_ROW.match(line) for line in table), table


def test_a_list_of_row_counts_is_refused_outside_spark_scale():
    done = subprocess.run(
        [sys.executable, "-m", "dbfit", "bench", "--scenario", "core", "--rows", "2000,4000"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert done.returncode == 2, done.stderr
    assert "--rows takes a list of sizes only with --scenario spark-scale" in done.stderr
