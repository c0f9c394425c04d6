"""The command line: the demo runs end to end in subprocesses on real DuckDB files."""

from __future__ import annotations

import re
import subprocess
import sys

import duckdb
import pytest

import dbfit
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
    stored = dbfit.connect(str(database), read_only=True)
    smooth, straight = (dbfit.load(stored, name) for name in ("demo_late_smooth", "demo_late"))
    stored.close()
    assert "spline(distance_km)[4]" in smooth.labels and "bins(dispatch_hour)=" in " ".join(smooth.labels)
    aics = re.search(r"AIC ([0-9,.]+) against ([0-9,.]+) for the straight terms", done.stdout).groups()
    assert [float(a.replace(",", "")) for a in aics] == pytest.approx(
        [smooth.stats["aic"], straight.stats["aic"]], abs=0.06
    )
    assert done.stderr == ""  # --quiet prints no progress
    assert len(TRUE_COEFFICIENTS) == 11


def test_demo_reports_progress_when_not_quiet(tmp_path):
    done = run("demo", "--rows", "5000", "--database", str(tmp_path / "d.duckdb"))
    assert done.returncode == 0, done.stderr
    assert re.search(r"dbfit pass 1: deviance [0-9.]+", done.stderr)


def test_data_errors_exit_4_and_bad_usage_exits_2():
    done = run("demo", "--rows", "10", "--database", "/tmp/unused_dbfit_demo.duckdb")
    assert done.returncode == 4 and "at least 100 rows" in done.stderr
    done = run("demo", "--rows", "many")
    assert done.returncode == 2 and "invalid int value" in done.stderr
