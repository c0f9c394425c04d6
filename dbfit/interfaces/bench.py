"""``dbfit bench``: scenarios measured in one run on the same data, each method in its own process.

Scenarios: ``core`` (numeric predictors: dbfit vs export + statsmodels vs an in-memory numpy IRLS),
``levels`` (one high-cardinality categorical), ``segments`` (one model per segment vs one pooled model),
``outofcore`` (a Parquet folder larger than DuckDB's memory limit, at growing sizes), ``spark`` (the same
pooled and per-segment fits on Spark SQL in local mode, reading the same Parquet file). Each measurement runs
in a subprocess so its peak resident memory is its own; figures are ratios against baselines measured in
the same run.
"""

from __future__ import annotations

import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

RESULT_MARK = "dbfit-bench-result "
SCENARIOS = ("core", "levels", "segments", "outofcore", "spark")


def _uniform(stream: int, scale: float = 1.0) -> str:
    return f"(((hash(id, {stream}) % 1000003) + 0.5) / 1000003.0 - 0.5) * {scale}"


def numeric_select(
    rows: int, predictors: int, extra: str = "", extra_eta: str = "0", first_id: int = 0
) -> str:
    """SELECT of synthetic numeric predictors and a 0/1 target from a known logistic model (ids from first_id)."""
    columns = ", ".join(f"{_uniform(j, 1 + j % 3)} AS x{j}" for j in range(predictors))
    eta = " + ".join(f"{0.15 * ((-1) ** j) * (1 + j % 4)} * x{j}" for j in range(predictors))
    inner = f"SELECT {columns}{extra}, id FROM range({int(first_id)}, {int(first_id) + int(rows)}) r(id)"
    target = f"(((hash(id, 999) % 1000003) + 0.5) / 1000003.0 < 1 / (1 + exp(-(-0.4 + {eta} + {extra_eta}))))::INTEGER"
    return f"SELECT * EXCLUDE (id), {target} AS y FROM ({inner})"


def build_table(path: str, select: str) -> None:
    import duckdb

    con = duckdb.connect(path)
    con.execute("SET enable_progress_bar = false")
    con.execute(f"CREATE OR REPLACE TABLE bench AS {select}")
    con.close()


def formula(predictors: int, extra: str = "") -> str:
    return "y ~ " + " + ".join([f"x{j}" for j in range(predictors)] + ([extra] if extra else []))


def numpy_irls(
    design: np.ndarray, target: np.ndarray, tol: float = 1e-10, max_iter: int = 50
) -> tuple[np.ndarray, int]:
    """Plain Newton/IRLS in numpy on arrays in memory, same start and stopping rule as dbfit's."""
    beta = np.zeros(design.shape[1])
    rate = target.mean()
    beta[0] = np.log(rate / (1 - rate))
    previous = np.inf
    for iteration in range(1, max_iter + 1):
        eta = design @ beta
        mu = 0.5 * (1 + np.tanh(0.5 * eta))
        deviance = -2 * np.sum(target * eta - np.logaddexp(0, eta))
        weights = mu * (1 - mu)
        gram = (design * weights[:, None]).T @ design
        step = np.linalg.solve(gram, design.T @ (target - mu))
        change = abs(previous - deviance) / (abs(deviance) + 0.1)
        beta = beta + step
        if change < tol or np.max(np.abs(step)) < 1e-7:
            return beta, iteration
        previous = deviance
    return beta, max_iter


def _export(path: str, columns: list[str]) -> dict[str, np.ndarray]:
    import duckdb

    con = duckdb.connect(path, read_only=True)
    arrays = con.execute(f"SELECT {', '.join(columns)} FROM bench").fetchnumpy()
    con.close()
    return arrays


def _worker(task: dict[str, Any]) -> dict[str, Any]:
    """Run one measurement named by ``task['kind']``; returns seconds, peak RSS and what it found."""
    import dbfit

    kind, path = task["kind"], task["path"]
    result: dict[str, Any] = {}
    if kind in ("dbfit", "dbfit-by"):
        con = dbfit.connect(path, read_only=path != ":memory:", **task.get("config", {}))
        phases: list[str] = []
        began = time.perf_counter()
        fitted = dbfit.fit(
            con,
            task["formula"],
            task.get("source", "bench"),
            by=task.get("by"),
            progress=lambda r: phases.append(r.phase),
        )
        result["seconds"] = time.perf_counter() - began
        if isinstance(fitted, dbfit.SegmentedFit):
            result.update(
                scans=fitted.scans,
                models=len(fitted.models),
                failures=len(fitted.failures),
                passes=fitted.passes,
                estimates=np.concatenate(
                    [np.nan_to_num(m.estimates) for m in fitted.models.values()]
                ).tolist(),
            )
        else:
            result.update(
                scans=fitted.stats["scans"],
                estimates=np.nan_to_num(fitted.estimates).tolist(),
                newton_passes=phases.count("full data"),
                score_passes=phases.count("full data, score only"),
            )
    elif kind == "spark":
        os.environ.setdefault("SPARK_LOCAL_IP", "127.0.0.1")
        from pyspark.sql import SparkSession

        session = (
            SparkSession.builder.master("local[2]")
            .appName("dbfit-bench")
            .config("spark.ui.enabled", "false")
            .config("spark.sql.shuffle.partitions", "2")
            .getOrCreate()
        )
        session.sparkContext.setLogLevel("ERROR")
        session.read.parquet(task["parquet"]).createOrReplaceTempView("bench")
        began = time.perf_counter()
        fitted = dbfit.fit(session, task["formula"], "bench", by=task.get("by"), progress=False)
        result["seconds"] = time.perf_counter() - began  # the session's start-up is not counted
        if isinstance(fitted, dbfit.SegmentedFit):
            result.update(
                models=len(fitted.models),
                passes=fitted.passes,
                estimates=np.concatenate(
                    [np.nan_to_num(m.estimates) for m in fitted.models.values()]
                ).tolist(),
            )
        else:
            result.update(estimates=np.nan_to_num(fitted.estimates).tolist())
        session.stop()
    elif kind in ("statsmodels", "numpy"):
        import statsmodels.api as sm

        names = task["columns"]
        began = time.perf_counter()
        arrays = _export(path, names + ["y"])
        design = np.column_stack(
            [np.ones(len(arrays["y"]))] + [np.asarray(arrays[n], dtype=float) for n in names]
        )
        target = np.asarray(arrays["y"], dtype=float)
        del arrays
        exported = time.perf_counter()
        if kind == "statsmodels":
            estimates = sm.GLM(target, design, family=sm.families.Binomial()).fit(tol=1e-10).params
            result["seconds"] = time.perf_counter() - began
        else:
            estimates, result["iterations"] = numpy_irls(design, target)
            result["seconds"] = time.perf_counter() - exported
        result["estimates"] = np.asarray(estimates).tolist()
    elif kind == "statsmodels-by":
        import statsmodels.api as sm

        names = task["columns"]
        began = time.perf_counter()
        arrays = _export(path, names + ["y", "seg"])
        order = np.argsort(arrays["seg"], kind="stable")
        segments, starts = np.unique(arrays["seg"][order], return_index=True)
        design = np.column_stack(
            [np.ones(len(order))] + [np.asarray(arrays[n], dtype=float)[order] for n in names]
        )
        target = np.asarray(arrays["y"], dtype=float)[order]
        bounds = list(starts) + [len(order)]
        for a, b in zip(bounds[:-1], bounds[1:]):
            sm.GLM(target[a:b], design[a:b], family=sm.families.Binomial()).fit(tol=1e-10)
        result["seconds"] = time.perf_counter() - began
        result["models"] = len(segments)
    result["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    return result


def _measure(task: dict[str, Any], repeat: int = 1) -> dict[str, Any] | None:
    """Run ``task`` ``repeat`` times, each in a fresh process; the run of median time, with every run's seconds."""
    runs = [_measure_once(task) for _ in range(max(1, repeat))]
    if any(r is None for r in runs):
        return None
    ordered = sorted(runs, key=lambda r: r["seconds"])
    return {**ordered[len(ordered) // 2], "runs": [r["seconds"] for r in runs]}


def _measure_once(task: dict[str, Any]) -> dict[str, Any] | None:
    done = subprocess.run(
        [sys.executable, "-m", "dbfit.interfaces.bench", json.dumps(task)],
        capture_output=True,
        text=True,
        check=False,
    )
    marked = [line[line.index(RESULT_MARK) :] for line in done.stdout.splitlines() if RESULT_MARK in line]
    if done.returncode != 0 or not marked:
        tail = (done.stderr.strip().splitlines() or done.stdout.strip().splitlines() or ["no output"])[-1]
        print(f"    could not run {task['kind']} (exit status {done.returncode}): {tail}")
        return None
    return json.loads(marked[-1][len(RESULT_MARK) :])


def _line(label: str, r: dict[str, Any] | None) -> None:
    if r is None:
        return
    extra = ""
    if "newton_passes" in r:
        extra = (
            f", {r['scans']} scans ({r['score_passes']} score-only + {r['newton_passes']} full Newton passes)"
        )
    elif "models" in r:
        extra = f", {r['models']} models" + (f", {r['passes']} grouped passes" if "passes" in r else "")
    if len(r.get("runs", [])) > 1:
        extra += f"; median of {len(r['runs'])} runs ({min(r['runs']):.2f}-{max(r['runs']):.2f} s)"
    print(f"  {label:<34} {r['seconds']:8.2f} s   peak RSS {r['peak_rss_mb']:8.0f} MB{extra}")


def _ratio(name: str, a: dict[str, Any] | None, b: dict[str, Any] | None) -> None:
    if a is None or b is None:
        return
    text = f"  {name}: time {a['seconds'] / b['seconds']:.2f}, peak memory {a['peak_rss_mb'] / b['peak_rss_mb']:.2f}"
    if "estimates" in a and "estimates" in b and len(a["estimates"]) == len(b["estimates"]):
        gap = np.max(np.abs(np.array(a["estimates"]) - np.array(b["estimates"])))
        text += f", largest estimate difference {gap:.1e}"
    print(text)


def bench_core(folder: str, rows: int, predictors: int, keep: str | None, repeat: int = 1) -> dict[str, Any]:
    path = keep or os.path.join(folder, "core.duckdb")
    if not Path(path).exists():
        build_table(path, numeric_select(rows, predictors))
    print(f"core: {rows:,} rows x {predictors} numeric predictors")
    names = [f"x{j}" for j in range(predictors)]
    a = _measure({"kind": "dbfit", "path": path, "formula": formula(predictors)}, repeat)
    b = _measure({"kind": "statsmodels", "path": path, "columns": names}, repeat)
    c = _measure({"kind": "numpy", "path": path, "columns": names}, repeat)
    _line("(a) dbfit in-database", a)
    _line("(b) export + statsmodels", b)
    _line("(c) in-memory numpy IRLS", c)
    _ratio("a/b", a, b)
    _ratio("a/c", a, c)
    return {"a": a, "b": b, "c": c}


def bench_levels(folder: str, rows: int, predictors: int, levels: int, repeat: int = 1) -> dict[str, Any]:
    path = os.path.join(folder, "levels.duckdb")
    effect = f"((hash(id, 77) % {levels})::DOUBLE - {levels / 2}) / {levels / 2}"
    build_table(
        path, numeric_select(rows, predictors, f", 'L' || (hash(id, 77) % {levels}) AS level", effect)
    )
    print(f"levels: {rows:,} rows, one {levels:,}-level categorical and {predictors} numeric predictors")
    a = _measure({"kind": "dbfit", "path": path, "formula": formula(predictors, "level")}, repeat)
    _line("(a) dbfit, blocks by level", a)
    dense_bytes = rows * (levels + predictors) * 8
    print(
        f"  export + statsmodels: not run; its dense design would take {dense_bytes / 2**30:,.1f} GiB of memory"
    )
    return {"a": a}


def bench_segments(folder: str, rows: int, predictors: int, segments: int, repeat: int = 1) -> dict[str, Any]:
    path = os.path.join(folder, "segments.duckdb")
    build_table(path, numeric_select(rows, predictors, f", hash(id, 55) % {segments} AS seg"))
    print(f"segments: {rows:,} rows x {predictors} numeric predictors, {segments:,} segments")
    names = [f"x{j}" for j in range(predictors)]
    by = _measure({"kind": "dbfit-by", "path": path, "formula": formula(predictors), "by": "seg"}, repeat)
    pooled = _measure({"kind": "dbfit", "path": path, "formula": formula(predictors)}, repeat)
    b = _measure({"kind": "statsmodels-by", "path": path, "columns": names}, repeat)
    _line("(a) dbfit, one model per segment", by)
    _line("(p) dbfit, one pooled model", pooled)
    _line("(b) export + statsmodels per segment", b)
    _ratio("a/p", by, pooled)
    _ratio("a/b", by, b)
    return {"a": by, "p": pooled, "b": b}


def bench_outofcore(
    folder: str, rows: int, predictors: int, memory_limit: str, repeat: int = 1
) -> dict[str, Any]:
    import duckdb

    lake = os.path.join(folder, "lake")
    os.makedirs(lake, exist_ok=True)
    parts = 8
    con = duckdb.connect()
    for part in range(parts):
        select = numeric_select(rows // parts, predictors, first_id=part * (rows // parts))
        con.execute(f"COPY ({select}) TO '{lake}/part{part}.parquet' (FORMAT parquet)")
    con.close()
    size = sum(f.stat().st_size for f in Path(lake).glob("*.parquet"))
    print(
        f"outofcore: {rows:,} rows x {predictors} predictors in {parts} Parquet files ({size / 2**30:.2f} GiB on disk,"
        f" {rows * (predictors + 1) * 8 / 2**30:.2f} GiB as doubles), memory_limit {memory_limit}"
    )
    results = {}
    for used in (parts // 4, parts // 2, parts):
        files = f"{lake}/part[0-{used - 1}].parquet"
        results[used] = _measure(
            {
                "kind": "dbfit",
                "path": ":memory:",
                "formula": formula(predictors),
                "source": files,
                "config": {"memory_limit": memory_limit, "threads": 2},
            },
            repeat,
        )
        _line(f"(a) dbfit on {used * (rows // parts):,} rows", results[used])
    firsts = [r for r in results.values() if r]
    if len(firsts) == len(results):
        per_row = [r["seconds"] / (u * (rows // parts)) * 1e6 for u, r in results.items()]
        print("  seconds per million rows: " + ", ".join(f"{x:.2f}" for x in per_row))
    return results


def bench_spark(folder: str, rows: int, predictors: int, segments: int, repeat: int = 1) -> dict[str, Any]:
    """The same fits on DuckDB and on Spark SQL in local mode (2 cores), both reading one Parquet file."""
    import duckdb

    parquet = os.path.join(folder, "spark_bench.parquet")
    con = duckdb.connect()
    con.execute("SET enable_progress_bar = false")
    select = numeric_select(rows, predictors, f", hash(id, 55) % {segments} AS seg")
    con.execute(f"COPY ({select}) TO '{parquet}' (FORMAT parquet)")
    con.close()
    print(
        f"spark: {rows:,} rows x {predictors} numeric predictors in one Parquet file, {segments:,} segments"
    )
    try:
        import pyspark  # noqa: F401
    except ImportError:
        print("  Spark not run: pyspark is not installed")
        return {}
    if shutil.which("java") is None:
        print("  Spark not run: no Java runtime on PATH")
        return {}
    results = {}
    for label, by in (("one pooled model", None), ("one model per segment", "seg")):
        duck = _measure(
            {
                "kind": "dbfit-by" if by else "dbfit",
                "path": ":memory:",
                "formula": formula(predictors),
                "source": parquet,
                "by": by,
            },
            repeat,
        )
        spark = _measure(
            {"kind": "spark", "path": "", "parquet": parquet, "formula": formula(predictors), "by": by},
            repeat,
        )
        _line(f"(a) DuckDB, {label}", duck)
        _line(f"(s) Spark local[2], {label}", spark)
        _ratio(f"s/a ({label})", spark, duck)
        results[label] = {"a": duck, "s": spark}
    print(
        "  Spark's peak RSS is its Python driver's only: the JVM runs in a child process and is not counted"
    )
    return results


def run_bench(
    scenario: str = "core",
    rows: int | None = None,
    predictors: int | None = None,
    keep: str | None = None,
    levels: int = 5000,
    segments: int = 1000,
    memory_limit: str = "2GB",
    repeat: int = 1,
) -> dict[str, Any]:
    """Run one scenario (or ``all``) and print its figures; each measurement ``repeat`` times (the median shown)."""
    folder = tempfile.mkdtemp(prefix="dbfit_bench_")
    chosen = SCENARIOS if scenario == "all" else (scenario,)
    results = {}
    for name in chosen:
        if name == "core":
            results[name] = bench_core(folder, rows or 5_000_000, predictors or 20, keep, repeat)
        elif name == "levels":
            results[name] = bench_levels(folder, rows or 2_000_000, predictors or 10, levels, repeat)
        elif name == "segments":
            results[name] = bench_segments(folder, rows or 5_000_000, predictors or 5, segments, repeat)
        elif name == "spark":
            results[name] = bench_spark(
                folder, rows or 2_000_000, predictors or 5, min(segments, 100), repeat
            )
        elif name == "outofcore":
            results[name] = bench_outofcore(
                folder, rows or 100_000_000, predictors or 10, memory_limit, repeat
            )
        else:
            raise ValueError(f"unknown scenario {name!r}; choose from {', '.join(SCENARIOS)} or all")
    return results


if __name__ == "__main__":
    print(RESULT_MARK + json.dumps(_worker(json.loads(sys.argv[1]))))
