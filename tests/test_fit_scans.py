"""Fewer scans and less start-up on the plain fit: the profiling scan reads minimum and maximum only for a
column whose spread its sums leave in doubt, and fitting imports no pandas."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import statsmodels.api as sm
from conftest import assert_close, load_frame
from sklearn.datasets import load_breast_cancer

import dbfit
from dbfit.engines.duckdb_engine import DuckDBEngine

ROOT = Path(__file__).resolve().parent.parent
PREDICTORS = ["mean radius", "mean texture", "worst smoothness"]


def _cancer(con) -> None:
    # scikit-learn's bundled breast cancer data (Wisconsin diagnostic), 569 rows
    frame = load_breast_cancer(as_frame=True).frame[PREDICTORS + ["target"]]
    load_frame(con, "cancer", frame.rename(columns=lambda c: c.replace(" ", "_")))


def _statsmodels_slopes() -> np.ndarray:
    frame = load_breast_cancer(as_frame=True).frame
    design = sm.add_constant(frame[PREDICTORS])
    return sm.GLM(frame["target"], design, family=sm.families.Binomial()).fit(tol=1e-12).params.values[1:]


def _recorded_queries(monkeypatch) -> list[str]:
    seen: list[str] = []
    run = DuckDBEngine._run

    def recording(self, sql, parameters=None):
        seen.append(sql)
        return run(self, sql, parameters)

    monkeypatch.setattr(DuckDBEngine, "_run", recording)
    return seen


def test_the_profiling_scan_reads_no_minimum_or_maximum_when_the_sums_settle_every_spread(con, monkeypatch):
    # Reference: statsmodels GLM Binomial on the same rows.
    _cancer(con)
    seen = _recorded_queries(monkeypatch)
    model = dbfit.fit(con, "target ~ mean_radius + mean_texture + worst_smoothness", "cancer", progress=False)
    profiles = [sql for sql in seen if "sumsq_" in sql]
    assert len(profiles) == 1 and "MIN(" not in profiles[0] and "MAX(" not in profiles[0]
    assert not any("min_" in sql for sql in seen)
    assert model.stats["scans"] == 1 + model.stats["iterations"] + 1  # profile, Newton passes, confirmation
    assert_close(model.estimates[1:], _statsmodels_slopes(), 1e-8, "slopes")


def test_a_constant_column_and_one_far_from_zero_still_get_their_range(con, monkeypatch):
    # A column 1e9 + radius has a variance lost to cancellation in sum(x^2)/n - mean^2, and a constant column
    # has none: for those two only, one more scan reads minimum and maximum. Reference: statsmodels GLM
    # Binomial on the unshifted column (a shift moves only the intercept); the constant is aliased.
    _cancer(con)
    seen = _recorded_queries(monkeypatch)
    model = dbfit.fit(
        con,
        "target ~ (mean_radius + 1e9) + mean_texture + worst_smoothness + (0 * mean_texture + 3)",
        "cancer",
        progress=False,
    )
    ranges = [sql for sql in seen if "min_" in sql]
    assert len(ranges) == 1 and ranges[0].count("MIN(") == 2 and ranges[0].count("MAX(") == 2
    assert model.stats["scans"] == 2 + model.stats["iterations"] + 1
    assert_close(model.estimates[1:4], _statsmodels_slopes(), 1e-6, "slopes")
    assert np.isnan(model.estimates[4]) and any(w.startswith("aliased") for w in model.warnings)


FIT_IN_A_FRESH_PROCESS = """
import sys
import dbfit
import dbfit.fitting.driver as driver

con = dbfit.connect()
con.execute(
    "CREATE TABLE t AS SELECT i % 7 AS x, (i * 13) % 11 AS z, "
    "CASE WHEN (i * 37) % 11 > 5 + i % 3 THEN 1 ELSE 0 END AS y FROM range(3000) r(i)"
)
dbfit.fit(con, "y ~ x + z", "t", progress=False)
driver.SAMPLE_START_ROWS, driver.SAMPLE_ROWS = 1000, 800  # the path of a large fit: a sample first
dbfit.fit(con, "y ~ x + z", "t", progress=False)
print("pandas" in sys.modules)
"""


def test_fitting_imports_no_pandas():
    # pandas costs 0.3 to 1 s to import, more than a fit of a million rows; it stays out of the fit path.
    environment = {**os.environ, "PYTHONPATH": str(ROOT)}
    done = subprocess.run(
        [sys.executable, "-c", FIT_IN_A_FRESH_PROCESS],
        capture_output=True,
        text=True,
        env=environment,
        timeout=300,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    assert done.stdout.strip() == "False"


BY_SEGMENT = "target ~ mean_radius + mean_texture + worst_smoothness"


def _segment_fit(con, monkeypatch, sample_start_rows: int):
    import dbfit.fitting.driver as driver

    monkeypatch.setattr(driver, "SAMPLE_START_ROWS", sample_start_rows)
    monkeypatch.setattr(driver, "SAMPLE_ROWS", 10**6)  # the whole table: the sample fit is the pooled fit
    return dbfit.fit(con, BY_SEGMENT, "cancer", by="mean_radius * 1000 % 3 < 1", progress=False)


def test_segments_start_from_the_pooled_fit_of_a_sample_and_need_fewer_grouped_passes(con, monkeypatch):
    # Reference: statsmodels GLM Binomial within each segment. From the pooled estimates (the segment's
    # intercept moved by its logit of the success rate) each segment is nearer its own estimates than from its
    # intercept alone; the grouped passes fall and the estimates stay those of the intercept-only start.
    _cancer(con)
    from_intercept = _segment_fit(con, monkeypatch, 10**9)
    from_pooled = _segment_fit(con, monkeypatch, 1)
    assert from_pooled.passes < from_intercept.passes
    frame = load_breast_cancer(as_frame=True).frame
    segment = (frame["mean radius"] * 1000 % 3) < 1
    for value, model in from_pooled.models.items():
        other = from_intercept.models[value]
        assert_close(model.estimates, other.estimates, 1e-10, f"segment {value} estimates")
        assert_close(model.covariance, other.covariance, 1e-10, f"segment {value} covariance")
        rows = frame[segment == value]
        reference = sm.GLM(rows["target"], sm.add_constant(rows[PREDICTORS]), family=sm.families.Binomial())
        assert_close(model.estimates, reference.fit(tol=1e-12).params.values, 1e-8, f"segment {value}")
