"""``dbfit bench``: scenarios measured in one run on the same data, each method in its own process.

Scenarios: ``core`` (numeric predictors), ``categorical`` (numeric predictors and three categoricals of 5,
20 and 50 levels), ``wide`` (100 numeric predictors), ``segments`` (one model per segment vs one pooled
model), ``levels`` (one high-cardinality categorical), ``outofcore`` (a Parquet folder larger than DuckDB's
memory limit, at growing sizes), ``spark`` (the same pooled and per-segment fits on Spark SQL in local
mode, reading the same Parquet file) and ``spark-scale`` (one model on 20 predictors at growing row counts,
fitted by Spark SQL and DuckDB from the same Parquet folder: time per pass against rows, see
:mod:`dbfit.interfaces.bench_spark`; not part of ``all``).

The baselines are what a user would run on the exported table: scikit-learn's ``LogisticRegression`` with
the newton-cholesky solver and no penalty, statsmodels' ``Logit`` by Newton's method and statsmodels' ``GLM``
(each timed from the export of the table to numpy), and a plain numpy IRLS on arrays already in memory
(timed from the end of the export). A baseline runs only when an estimate of its memory stays under a cap,
and runs under that cap (``RLIMIT_AS`` above what its libraries hold), so a design that cannot fit is
reported instead of taking the machine down.

Each measurement runs in a subprocess so its peak resident memory is its own; ratios are dbfit's time and
memory over each baseline's from the same run, with the largest absolute difference between the estimates.
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from dbfit.interfaces.bench_spark import (
    SCALE_PREDICTORS,
    SCALE_ROWS,
    cpu_seconds,
    driver_jvm_memory,
    driver_jvm_pid,
    high_water_mb,
    local_spark_session,
    scaling_rows,
    scaling_table,
    write_parquet_folder,
)

RESULT_MARK = "dbfit-bench-result "
SCENARIOS = ("core", "categorical", "wide", "segments", "levels", "outofcore", "spark", "spark-scale")
EVERY_SCENARIO = SCENARIOS[:-1]  # ``all``: spark-scale writes and fits tens of millions of rows, run it alone
CATEGORICAL_LEVELS = (5, 20, 50)

# Peak memory of a baseline as a multiple of its dense design (rows x columns x 8 bytes): its peak RSS above
# that of its libraries in 200,000-row runs of core, categorical, wide and segments (numpy 1.9-2.5: the design
# and its weighted copy; scikit-learn 1.9-2.7; statsmodels Logit 3.2-4.1, GLM 10-12, Logit per segment 8),
# rounded up to the largest.
MEMORY_FACTORS = {"numpy": 2.5, "sklearn": 3.0, "logit": 4.0, "glm": 12.0, "logit-by": 8.0}
BASELINE_LABELS = {
    "numpy": "numpy IRLS on arrays in memory (fit only)",
    "sklearn": "scikit-learn newton-cholesky, incl. export",
    "logit": "statsmodels Logit (newton), incl. export",
    "glm": "statsmodels GLM, incl. export",
}


@dataclass(frozen=True)
class BenchOptions:
    """What ``run_bench`` measures and how: sizes, repeats, the baselines' memory cap, where JSON goes."""

    scenario: str = "core"
    rows: int | None = None
    row_sizes: tuple[int, ...] | None = None  # spark-scale: each size in turn (``rows`` is the first)
    predictors: int | None = None
    keep: str | None = None
    levels: int = 5000
    segments: int = 1000
    memory_limit: str = "2GB"
    repeat: int = 1
    baseline_memory_gb: float | None = None
    json_path: str | None = None
    work_dir: str | None = None  # where the data is written (a folder made and removed there)
    spark_settings: tuple[tuple[str, str], ...] = ()  # Spark configuration over the bench's own

    @property
    def memory_cap_gb(self) -> float:
        """The baselines' memory cap: as given, else half of the machine's memory."""
        if self.baseline_memory_gb is not None:
            return self.baseline_memory_gb
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30 / 2


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


def categorical_select(rows: int, predictors: int) -> str:
    """``numeric_select`` plus one text column ``c<L>`` per entry of CATEGORICAL_LEVELS (levels 'L00'...).

    The hash goes through a prime modulus first: DuckDB's ``hash(id, seed)`` keeps the parity of ``id``
    across seeds, which would make the odd levels of two even-sized factors collinear."""
    codes = {n: f"((hash(id, {100 + n}) % 1000003) % {n})" for n in CATEGORICAL_LEVELS}
    columns = "".join(f", 'L' || lpad({code}::VARCHAR, 2, '0') AS c{n}" for n, code in codes.items())
    effects = " + ".join(f"0.3 * sin({code}::DOUBLE)" for code in codes.values())
    return numeric_select(rows, predictors, columns, effects)


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
    """Plain Newton/IRLS in numpy on arrays in memory, same start and stopping rule as dbfit's.

    IRLS as in McCullagh and Nelder, Generalized Linear Models (2nd ed., 1989), section 2.5.
    """
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


def _export(path: str, columns: list[str], order_by: str | None = None) -> dict[str, np.ndarray]:
    import duckdb

    con = duckdb.connect(path, read_only=True)
    ordering = f" ORDER BY {order_by}" if order_by else ""
    arrays = con.execute(f"SELECT {', '.join(columns)} FROM bench{ordering}").fetchnumpy()
    con.close()
    return arrays


def exported_design(
    arrays: dict[str, np.ndarray], numeric: list[str], categorical: list[str], intercept: bool
) -> tuple[np.ndarray, list[str]]:
    """The dense design a user builds from exported columns: numeric as they are, each categorical one-hot
    with its first level (sorted) left out, as dbfit codes it; with its column labels."""
    coded = [np.unique(arrays[name], return_inverse=True) for name in categorical]
    labels = (["intercept"] if intercept else []) + list(numeric)
    for name, (levels, _) in zip(categorical, coded):
        labels += [f"{name}={level}" for level in levels[1:]]
    rows = len(arrays["y"])
    design = np.zeros((rows, len(labels)))
    start = 0
    if intercept:
        design[:, 0] = 1.0
        start = 1
    for offset, name in enumerate(numeric, start):
        design[:, offset] = arrays[name]
    offset = start + len(numeric)
    for levels, codes in coded:
        present = codes > 0
        design[np.flatnonzero(present), offset + codes[present] - 1] = 1.0
        offset += len(levels) - 1
    return design, labels


def _fit_baseline(kind: str, design: np.ndarray, target: np.ndarray) -> tuple[np.ndarray, int]:
    """Fit one baseline on an exported design; its estimates (intercept first) and iterations."""
    if kind == "numpy":
        return numpy_irls(design, target)
    if kind == "sklearn":
        from sklearn.linear_model import LogisticRegression

        # C=inf is scikit-learn's current spelling of penalty=None (no penalty)
        model = LogisticRegression(solver="newton-cholesky", C=np.inf, tol=1e-10, max_iter=100)
        model.fit(design, target)
        return np.concatenate([model.intercept_, model.coef_[0]]), int(model.n_iter_[0])
    import statsmodels.api as sm

    if kind == "logit":
        fitted = sm.Logit(target, design).fit(method="newton", tol=1e-10, maxiter=100, disp=0)
        return np.asarray(fitted.params), int(fitted.mle_retvals["iterations"])
    fitted = sm.GLM(target, design, family=sm.families.Binomial()).fit(tol=1e-10)
    return np.asarray(fitted.params), int(fitted.fit_history["iteration"])


def _warm_up(path: str) -> None:
    """Open the database once, so that the address space DuckDB's threads reserve (stacks, allocator arenas)
    is held before the cap is measured from it."""
    import duckdb

    con = duckdb.connect(path, read_only=True)
    con.execute("SELECT count(*) FROM bench").fetchall()
    con.close()


def _cap_address_space(cap_bytes: int) -> None:
    """Let this process map at most ``cap_bytes`` beyond what it holds now (its interpreter and libraries)."""
    status = Path("/proc/self/status").read_text()
    held_kb = int(status.split("VmSize:")[1].split()[0])
    limit = held_kb * 1024 + cap_bytes
    resource.setrlimit(resource.RLIMIT_AS, (limit, limit))


def _dbfit_worker(task: dict[str, Any]) -> dict[str, Any]:
    import dbfit

    path = task["path"]
    con = dbfit.connect(path, read_only=path != ":memory:", **task.get("config", {}))
    phases: list[str] = []
    began, cpu_began = time.perf_counter(), cpu_seconds()
    fitted = dbfit.fit(
        con,
        task["formula"],
        task.get("source", "bench"),
        by=task.get("by"),
        progress=lambda r: phases.append(r.phase),
    )
    result: dict[str, Any] = {"seconds": time.perf_counter() - began}
    if cpu_began is not None:
        result["cpu_seconds"] = cpu_seconds() - cpu_began
    if isinstance(fitted, dbfit.SegmentedFit):
        result.update(
            scans=fitted.scans, models=len(fitted.models), failures=len(fitted.failures), passes=fitted.passes
        )
        result.update(_segment_estimates(fitted.models))
    else:
        result.update(_model_figures(fitted, phases))
    return result


def _model_figures(fitted: Any, phases: list[str]) -> dict[str, Any]:
    """A single model's scans, estimates and labels, and its Newton and score-only passes from ``phases``."""
    return {
        "scans": fitted.stats["scans"],
        "estimates": np.nan_to_num(fitted.estimates).tolist(),
        "labels": list(fitted.labels),
        "newton_passes": phases.count("full data"),
        "score_passes": phases.count("full data, score only"),
    }


def _segment_estimates(models: dict[Any, Any]) -> dict[str, list[Any]]:
    """Every segment's estimates in one list, labelled ``segment:term``, segments in sorted order."""
    estimates: list[float] = []
    labels: list[str] = []
    for value in sorted(models):
        estimates += np.nan_to_num(models[value].estimates).tolist()
        labels += [f"{value}:{label}" for label in models[value].labels]
    return {"estimates": estimates, "labels": labels}


def _spark_worker(task: dict[str, Any]) -> dict[str, Any]:
    """Fit on a local Spark session reading ``task['parquet']`` (a file or a folder) as a temporary view; the
    session's start-up and the reading of the Parquet footers are timed apart from the fit."""
    import dbfit

    session = local_spark_session("dbfit-bench", task.get("spark_settings"))
    began = time.perf_counter()
    session.read.parquet(task["parquet"]).createOrReplaceTempView("bench")
    opened, jvm = time.perf_counter(), driver_jvm_pid(session)
    cpu_began = [cpu_seconds(), cpu_seconds(jvm)]
    phases: list[str] = []
    fitted = dbfit.fit(
        session, task["formula"], "bench", by=task.get("by"), progress=lambda r: phases.append(r.phase)
    )
    result: dict[str, Any] = {"seconds": time.perf_counter() - opened, "view_seconds": opened - began}
    cpu_ended = [cpu_seconds(), cpu_seconds(jvm)]
    if None not in cpu_began + cpu_ended:  # the Python driver's and the JVM's (its executor threads' too)
        python_cpu, jvm_cpu = (end - start for start, end in zip(cpu_began, cpu_ended))
        result.update(cpu_seconds=python_cpu + jvm_cpu, python_cpu_seconds=python_cpu)
        result["jvm_cpu_seconds"] = jvm_cpu
    if isinstance(fitted, dbfit.SegmentedFit):
        result.update(models=len(fitted.models), passes=fitted.passes, **_segment_estimates(fitted.models))
    else:
        result.update(_model_figures(fitted, phases))
    result.update(driver_jvm_memory(session))
    result["spark_settings_seen"] = {key: session.conf.get(key) for key in task.get("spark_settings") or {}}
    session.stop()
    return result


def _baseline_worker(task: dict[str, Any]) -> dict[str, Any]:
    kind, numeric, categorical = task["kind"], task["columns"], task.get("categorical", [])
    began = time.perf_counter()
    arrays = _export(task["path"], numeric + categorical + ["y"])
    design, labels = exported_design(arrays, numeric, categorical, intercept=kind != "sklearn")
    target = np.asarray(arrays["y"], dtype=float)
    del arrays
    exported = time.perf_counter()
    estimates, iterations = _fit_baseline(kind, design, target)
    start = exported if kind == "numpy" else began
    return {
        "seconds": time.perf_counter() - start,
        "iterations": iterations,
        "estimates": estimates.tolist(),
        "labels": ["intercept"] + labels if kind == "sklearn" else labels,
    }


def _segments_baseline_worker(task: dict[str, Any]) -> dict[str, Any]:
    numeric = task["columns"]
    began = time.perf_counter()
    arrays = _export(task["path"], numeric + ["y", "seg"], order_by="seg")
    segments, starts = np.unique(arrays["seg"], return_index=True)
    design, labels = exported_design(arrays, numeric, [], intercept=True)
    target = np.asarray(arrays["y"], dtype=float)
    del arrays
    bounds = list(starts) + [len(target)]
    estimates: list[float] = []
    all_labels: list[str] = []
    iterations = 0
    for value, a, b in zip(segments, bounds[:-1], bounds[1:]):
        found, used = _fit_baseline("logit", design[a:b], target[a:b])
        estimates += found.tolist()
        all_labels += [f"{value}:{label}" for label in labels]
        iterations += used
    return {
        "seconds": time.perf_counter() - began,
        "models": len(segments),
        "iterations": iterations,
        "estimates": estimates,
        "labels": all_labels,
    }


WORKERS: dict[str, Callable[[dict[str, Any]], dict[str, Any]]] = {
    "dbfit": _dbfit_worker,
    "spark": _spark_worker,
    "logit-by": _segments_baseline_worker,
    **{kind: _baseline_worker for kind in BASELINE_LABELS},
}


LIBRARIES = {"sklearn": "sklearn.linear_model", "logit": "statsmodels.api", "glm": "statsmodels.api"}


def _worker(task: dict[str, Any]) -> dict[str, Any]:
    """Run one measurement named by ``task['kind']``; returns seconds, peak RSS and what it found. A baseline's
    library is imported before its memory cap is set, so the cap bounds only its data and its work."""
    importlib.import_module(LIBRARIES.get(task["kind"].removesuffix("-by"), "numpy"))
    if task.get("memory_cap_bytes") is not None:
        _warm_up(task["path"])
        _cap_address_space(task["memory_cap_bytes"])
    try:
        result = WORKERS[task["kind"]](task)
    except MemoryError:
        result = {"status": "did not fit"}
    result["peak_rss_mb"] = peak_rss_mb()
    if "jvm_peak_rss_mb" in result:  # a Spark session: the Python driver and its JVM, each at its own peak
        result["driver_peak_rss_mb"] = result["peak_rss_mb"]
        result["peak_rss_mb"] += result["jvm_peak_rss_mb"]
    return result


def peak_rss_mb() -> float:
    """This process's own peak resident memory: VmHWM of /proc/self/status, which starts afresh with the new
    program. ``ru_maxrss`` (the fallback off Linux) keeps the high-water mark of the process that started it
    across fork and exec, so a small worker of a large parent reports the parent's peak."""
    own = high_water_mb()
    return own if own is not None else resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


OUT_OF_MEMORY_SIGNS = (
    "memoryerror",
    "memory allocation",
    "bad_alloc",
    "out of memory",
    "outofmemory",
    "cannot allocate memory",
)


def _measure_once(task: dict[str, Any]) -> dict[str, Any]:
    """One run of ``task`` in a fresh process: its result, or a record of why it has none."""
    done = subprocess.run(
        [sys.executable, "-m", "dbfit.interfaces.bench", json.dumps(task)],
        capture_output=True,
        text=True,
        check=False,
    )
    marked = [line[line.index(RESULT_MARK) :] for line in done.stdout.splitlines() if RESULT_MARK in line]
    if done.returncode == 0 and marked:
        return {"status": "ok", **json.loads(marked[-1][len(RESULT_MARK) :])}
    capped = task.get("memory_cap_bytes") is not None
    if capped and (done.returncode < 0 or any(sign in done.stderr.lower() for sign in OUT_OF_MEMORY_SIGNS)):
        return {"status": "did not fit"}
    tail = (done.stderr.strip().splitlines() or done.stdout.strip().splitlines() or ["no output"])[-1]
    return {"status": "failed", "note": f"exit status {done.returncode}: {tail}"}


def measure(task: dict[str, Any], repeat: int = 1) -> dict[str, Any]:
    """Run ``task`` ``repeat`` times, each in a fresh process: the run of median time, with every run's
    seconds; the first run that has no result ends the repeats and is returned."""
    runs = []
    for _ in range(max(1, repeat)):
        run = _measure_once(task)
        if run["status"] != "ok":
            return run
        runs.append(run)
    ordered = sorted(runs, key=lambda r: r["seconds"])
    return {**ordered[len(ordered) // 2], "runs": [r["seconds"] for r in runs]}


class Scenario:
    """The records of one scenario: each method's measurement, and the ratios of a subject to its baselines."""

    def __init__(self, name: str, title: str, options: BenchOptions, rows: int) -> None:
        self.name, self.title, self.options, self.rows = name, title, options, rows
        self.records: list[dict[str, Any]] = []
        self.extra: dict[str, Any] = {}  # figures of the whole scenario (spark-scale: data sizes, scaling)
        print(title, flush=True)

    def run(self, key: str, label: str, task: dict[str, Any], subject: str | None = None) -> dict[str, Any]:
        """Measure ``task`` and record it; with ``subject``, its ratios are the subject's over this one's."""
        return self.add(key, label, measure(task, self.options.repeat), subject)

    def baseline(
        self, kind: str, path: str, numeric: list[str], categorical: list[str], width: int, subject: str
    ) -> dict[str, Any]:
        """Measure one baseline under the memory cap when its estimated memory fits; ``width`` counts the
        columns of its dense design."""
        cap_gb = self.options.memory_cap_gb
        needed_gb = self.rows * width * 8 * MEMORY_FACTORS[kind] / 2**30
        label = BASELINE_LABELS.get(kind, "statsmodels Logit per segment, incl. export")
        if needed_gb > cap_gb:
            note = f"needs about {needed_gb:,.2f} GB ({MEMORY_FACTORS[kind]} x its design), cap {cap_gb:g} GB"
            return self.add(kind, label, {"status": "not run", "note": note}, subject)
        task = {"kind": kind, "path": path, "columns": numeric, "categorical": categorical}
        task["memory_cap_bytes"] = int(cap_gb * 2**30)
        return self.run(kind, label, task, subject)

    def add(self, key: str, label: str, found: dict[str, Any], subject: str | None) -> dict[str, Any]:
        record = {"key": key, "method": label, **found}
        if record["status"] == "did not fit":
            record["note"] = f"did not fit in {self.options.memory_cap_gb:g} GB"
        chosen = [r for r in self.records if r["key"] == subject]
        if chosen and record["status"] == "ok" and chosen[0]["status"] == "ok":
            record.update(_comparison(chosen[0], record))
        self.records.append(record)
        print("  " + _line(record), flush=True)
        return record

    def as_dict(self) -> dict[str, Any]:
        return {
            "scenario": self.name,
            "title": self.title,
            "rows": self.rows,
            "records": self.records,
            **self.extra,
        }


def _comparison(subject: dict[str, Any], other: dict[str, Any]) -> dict[str, Any]:
    """The subject's time and memory over ``other``'s, and the largest difference between their estimates
    (matched by label)."""
    found: dict[str, Any] = {
        "subject": subject["key"],
        "time_ratio": subject["seconds"] / other["seconds"],
        "memory_ratio": subject["peak_rss_mb"] / other["peak_rss_mb"],
    }
    theirs = dict(zip(other.get("labels", []), other.get("estimates", [])))
    ours = dict(zip(subject.get("labels", []), subject.get("estimates", [])))
    if ours and set(ours) == set(theirs):
        found["max_abs_difference"] = max(abs(ours[label] - theirs[label]) for label in ours)
    return found


def _steps(record: dict[str, Any]) -> str:
    """Scans or iterations of one record, in words."""
    if "newton_passes" in record:
        return (
            f"{record['scans']} scans ({record['score_passes']} score-only, {record['newton_passes']} Newton)"
        )
    if "passes" in record:
        return f"{record['models']} models, {record['passes']} grouped passes"
    if "models" in record:
        return f"{record['models']} models, {record['iterations']} iterations"
    if "iterations" in record:
        return f"{record['iterations']} iterations"
    return ""


def _time(record: dict[str, Any]) -> str:
    if record["status"] != "ok":
        return record["status"]
    runs = record.get("runs", [])
    spread = f" ({min(runs):.2f}-{max(runs):.2f}, median of {len(runs)})" if len(runs) > 1 else ""
    return f"{record['seconds']:.2f} s{spread}"


def _line(record: dict[str, Any]) -> str:
    if record["status"] != "ok":
        return f"{record['method']:<46} {record['status']}: {record.get('note', '')}"
    text = f"{record['method']:<46} {_time(record)}, peak RSS {record['peak_rss_mb']:,.0f} MB"
    text += f", {_steps(record)}" if _steps(record) else ""
    if "time_ratio" in record:
        text += f"; {record['subject']} / this: time {record['time_ratio']:.2f}, memory {record['memory_ratio']:.2f}"
    if "max_abs_difference" in record:
        text += f", largest estimate difference {record['max_abs_difference']:.1e}"
    return text


MARKDOWN_HEADER = (
    "| scenario | method | time | peak RSS | scans / iterations | time ratio | memory ratio | largest estimate difference |\n"
    "| --- | --- | --- | --- | --- | --- | --- | --- |"
)


def markdown_table(scenarios: list[dict[str, Any]]) -> str:
    """One row per scenario and method; the ratios are the named subject's (a dbfit fit) over the row's."""
    lines = [MARKDOWN_HEADER]
    for scenario in scenarios:
        for record in scenario["records"]:
            if record["status"] != "ok":
                cells = [f"{record['status']}: {record.get('note', '')}", "", "", "", "", ""]
            else:
                ratios = (
                    [
                        f"{record['subject']} / this {record['time_ratio']:.2f}",
                        f"{record['memory_ratio']:.2f}",
                    ]
                    if "time_ratio" in record
                    else ["", ""]
                )
                gap = record.get("max_abs_difference")
                cells = [
                    _time(record),
                    f"{record['peak_rss_mb']:,.0f} MB",
                    _steps(record),
                    *ratios,
                    "" if gap is None else f"{gap:.1e}",
                ]
            lines.append("| " + " | ".join([scenario["title"], record["method"], *cells]) + " |")
    return "\n".join(lines)


def _one_model_against_baselines(
    scenario: Scenario, path: str, predictors: int, factors: list[str], width: int
) -> Scenario:
    """Fit dbfit on ``x0..`` plus ``factors``, then every baseline on the same columns exported; ``width``
    counts the columns of the dense design."""
    task = {"kind": "dbfit", "path": path, "formula": formula(predictors, " + ".join(factors))}
    scenario.run("dbfit", "dbfit in-database", task)
    for kind in BASELINE_LABELS:
        scenario.baseline(kind, path, [f"x{j}" for j in range(predictors)], factors, width, subject="dbfit")
    return scenario


def bench_core(folder: str, options: BenchOptions) -> Scenario:
    rows, predictors = options.rows or 5_000_000, options.predictors or 20
    path = options.keep or os.path.join(folder, "core.duckdb")
    if not Path(path).exists():
        build_table(path, numeric_select(rows, predictors))
    scenario = Scenario("core", f"core: {rows:,} rows x {predictors} numeric", options, rows)
    return _one_model_against_baselines(scenario, path, predictors, [], predictors + 1)


def bench_categorical(folder: str, options: BenchOptions) -> Scenario:
    rows, predictors = options.rows or 5_000_000, options.predictors or 10
    path = os.path.join(folder, "categorical.duckdb")
    build_table(path, categorical_select(rows, predictors))
    factors = [f"c{n}" for n in CATEGORICAL_LEVELS]
    width = 1 + predictors + sum(n - 1 for n in CATEGORICAL_LEVELS)
    title = f"categorical: {rows:,} rows x ({predictors} numeric + {', '.join(factors)}; {width} columns)"
    scenario = Scenario("categorical", title, options, rows)
    return _one_model_against_baselines(scenario, path, predictors, factors, width)


def bench_wide(folder: str, options: BenchOptions) -> Scenario:
    rows, predictors = options.rows or 1_000_000, options.predictors or 100
    path = os.path.join(folder, "wide.duckdb")
    build_table(path, numeric_select(rows, predictors))
    scenario = Scenario("wide", f"wide: {rows:,} rows x {predictors} numeric", options, rows)
    return _one_model_against_baselines(scenario, path, predictors, [], predictors + 1)


def bench_segments(folder: str, options: BenchOptions) -> Scenario:
    rows, predictors, segments = options.rows or 5_000_000, options.predictors or 5, options.segments
    path = os.path.join(folder, "segments.duckdb")
    build_table(path, numeric_select(rows, predictors, f", hash(id, 55) % {segments} AS seg"))
    title = f"segments: {segments:,} segment models on {rows:,} rows x {predictors} numeric (target: <= 2x pooled)"
    scenario = Scenario("segments", title, options, rows)
    task = {"kind": "dbfit", "path": path, "formula": formula(predictors)}
    scenario.run("dbfit-by", "dbfit, one model per segment", {**task, "by": "seg"})
    scenario.run("dbfit", "dbfit, one pooled model", task, subject="dbfit-by")
    names = [f"x{j}" for j in range(predictors)]
    scenario.baseline("logit-by", path, names, [], predictors + 2, subject="dbfit-by")
    return scenario


def bench_levels(folder: str, options: BenchOptions) -> Scenario:
    rows, predictors, levels = options.rows or 2_000_000, options.predictors or 10, options.levels
    path = os.path.join(folder, "levels.duckdb")
    effect = f"((hash(id, 77) % {levels})::DOUBLE - {levels / 2}) / {levels / 2}"
    build_table(
        path, numeric_select(rows, predictors, f", 'L' || (hash(id, 77) % {levels}) AS level", effect)
    )
    title = f"levels: {rows:,} rows, one {levels:,}-level categorical + {predictors} numeric"
    scenario = Scenario("levels", title, options, rows)
    return _one_model_against_baselines(scenario, path, predictors, ["level"], 1 + predictors + levels)


def bench_outofcore(folder: str, options: BenchOptions) -> Scenario:
    import duckdb

    rows, predictors = options.rows or 100_000_000, options.predictors or 10
    lake = os.path.join(folder, "lake")
    os.makedirs(lake, exist_ok=True)
    parts = 8
    con = duckdb.connect()
    for part in range(parts):
        select = numeric_select(rows // parts, predictors, first_id=part * (rows // parts))
        con.execute(f"COPY ({select}) TO '{lake}/part{part}.parquet' (FORMAT parquet)")
    con.close()
    size = sum(f.stat().st_size for f in Path(lake).glob("*.parquet"))
    title = (
        f"out of core: {rows:,} rows x {predictors} numeric in {parts} Parquet files ({size / 2**30:.2f} GiB on"
        f" disk, {rows * (predictors + 1) * 8 / 2**30:.2f} GiB as doubles), memory_limit {options.memory_limit}"
    )
    scenario = Scenario("outofcore", title, options, rows)
    for used in (parts // 4, parts // 2, parts):
        task = {
            "kind": "dbfit",
            "path": ":memory:",
            "formula": formula(predictors),
            "source": f"{lake}/part[0-{used - 1}].parquet",
            "config": {"memory_limit": options.memory_limit, "threads": 2},
        }
        record = scenario.run(f"dbfit-{used}", f"dbfit on {used * (rows // parts):,} rows", task)
        if record["status"] == "ok":
            record["seconds_per_million_rows"] = record["seconds"] / (used * (rows // parts)) * 1e6
    return scenario


def bench_spark(folder: str, options: BenchOptions) -> Scenario:
    """The same fits on DuckDB and on Spark SQL in local mode (2 cores), both reading one Parquet file."""
    import duckdb

    rows, predictors, segments = (
        options.rows or 2_000_000,
        options.predictors or 5,
        min(options.segments, 100),
    )
    parquet = os.path.join(folder, "spark_bench.parquet")
    con = duckdb.connect()
    con.execute("SET enable_progress_bar = false")
    select = numeric_select(rows, predictors, f", hash(id, 55) % {segments} AS seg")
    con.execute(f"COPY ({select}) TO '{parquet}' (FORMAT parquet)")
    con.close()
    title = (
        f"spark: {rows:,} rows x {predictors} numeric in one Parquet file, pooled and {segments:,} segments"
    )
    scenario = Scenario("spark", title, options, rows)
    missing = _spark_missing()
    for label, by in (("one pooled model", None), ("one model per segment", "seg")):
        key = "pooled" if by is None else "by"
        task = {
            "kind": "dbfit",
            "path": ":memory:",
            "formula": formula(predictors),
            "source": parquet,
            "by": by,
        }
        scenario.run(f"duckdb-{key}", f"DuckDB, {label}", task)
        if missing:
            scenario.add(
                f"spark-{key}", f"Spark local[2], {label}", {"status": "not run", "note": missing}, None
            )
            continue
        task = {"kind": "spark", "path": "", "parquet": parquet, "formula": formula(predictors), "by": by}
        task["spark_settings"] = dict(options.spark_settings)
        scenario.run(f"spark-{key}", f"Spark local[2], {label} (start-up not counted)", task, f"duckdb-{key}")
    return scenario


def bench_spark_scale(folder: str, options: BenchOptions) -> Scenario:
    """One model on ``--predictors`` numeric predictors (default SCALE_PREDICTORS) at each size of ``--rows``
    (default SCALE_ROWS), fitted by DuckDB and by Spark local[2] from the same Parquet folder; a size's folder
    is removed before the next is written, so the disk holds one size at a time."""
    sizes = list(options.row_sizes or ((options.rows,) if options.rows else SCALE_ROWS))
    predictors = options.predictors or SCALE_PREDICTORS
    shown = ", ".join(f"{size:,}" for size in sizes)
    title = f"spark-scale: {shown} rows x {predictors} numeric in Parquet, DuckDB and Spark local[2]"
    scenario = Scenario("spark-scale", title, options, sizes[-1])
    missing = _spark_missing()
    written_data = []
    for size in sizes:
        lake = os.path.join(folder, f"scale_{size}")
        began = time.perf_counter()
        written = write_parquet_folder(
            lake, size, lambda n, first: numeric_select(n, predictors, first_id=first)
        )
        written.update(rows=size, seconds_to_write=time.perf_counter() - began)
        on_disk = written["bytes_on_disk"]
        print(
            f"  {size:,} rows: {written['files']} Parquet files, {on_disk / 2**30:.2f} GiB on disk"
            f" ({on_disk / size / (predictors + 1):.2f} bytes per value)",
            flush=True,
        )
        task = {
            "kind": "dbfit",
            "path": ":memory:",
            "formula": formula(predictors),
            "source": f"{lake}/*.parquet",
        }
        scenario.run(f"duckdb-{size}", f"DuckDB, {size:,} rows", task)
        label = f"Spark local[2], {size:,} rows"
        if missing:
            scenario.add(f"spark-{size}", label, {"status": "not run", "note": missing}, None)
        else:
            task = {"kind": "spark", "path": "", "parquet": lake, "formula": formula(predictors)}
            task["spark_settings"] = dict(options.spark_settings)
            scenario.run(f"spark-{size}", f"{label} (start-up not counted)", task, f"duckdb-{size}")
        shutil.rmtree(lake, ignore_errors=True)
        written_data.append({**written, "load_average_after": os.getloadavg()})
    scaling = scaling_rows(scenario.records, sizes)
    scenario.extra.update(parquet=written_data, scaling=scaling, spark_settings=dict(options.spark_settings))
    return scenario


def _spark_missing() -> str:
    """Why Spark cannot run here, or '' when it can."""
    try:
        import pyspark  # noqa: F401
    except ImportError:
        return "pyspark is not installed"
    return "" if shutil.which("java") else "no Java runtime on PATH"


SCENARIO_RUNNERS: dict[str, Callable[[str, BenchOptions], Scenario]] = {
    "core": bench_core,
    "categorical": bench_categorical,
    "wide": bench_wide,
    "segments": bench_segments,
    "levels": bench_levels,
    "outofcore": bench_outofcore,
    "spark": bench_spark,
    "spark-scale": bench_spark_scale,
}


# Targets of issue 13, each: scenario, the record compared with dbfit, the ratio checked, its bound.
TARGETS = (
    ("core", "numpy", "time_ratio", 0.5),
    ("core", "sklearn", "time_ratio", 0.25),
    ("categorical", "numpy", "time_ratio", 0.25),
    ("wide", "numpy", "time_ratio", 0.6),
    ("wide", "numpy", "memory_ratio", 0.3),
    ("segments", "dbfit", "time_ratio", 2.0),
)
AGREEMENT_TARGET = 1e-8


def target_checks(scenarios: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Each target of the scenarios that ran: what it bounds, the figure measured (None when a method did not
    run) and whether it is met; and per scenario, the largest estimate difference against any baseline."""
    checks = []
    for scenario in scenarios:
        records = {r["key"]: r for r in scenario["records"]}
        for name, key, field, bound in TARGETS:
            if name == scenario["scenario"] and key in records:
                record = records[key]
                text = (
                    f"{scenario['scenario']}: {record.get('subject', 'dbfit')} / {record['method']}, {field}"
                )
                checks.append(_check(f"{text} <= {bound:g}", record.get(field), bound))
        gaps = [r["max_abs_difference"] for r in scenario["records"] if "max_abs_difference" in r]
        if gaps:
            text = f"{scenario['scenario']}: estimates agree with every baseline to {AGREEMENT_TARGET:g}"
            checks.append(_check(text, max(gaps), AGREEMENT_TARGET))
    return checks


def _check(target: str, measured: float | None, bound: float) -> dict[str, Any]:
    met = None if measured is None else measured <= bound
    return {"target": target, "measured": measured, "met": met}


def _targets_table(checks: list[dict[str, Any]]) -> str:
    lines = ["| target | measured | met |", "| --- | --- | --- |"]
    for check in checks:
        measured = "not measured" if check["measured"] is None else f"{check['measured']:.3g}"
        met = {True: "yes", False: "no", None: ""}[check["met"]]
        lines.append(f"| {check['target']} | {measured} | {met} |")
    return "\n".join(lines)


def run_bench(options: BenchOptions) -> dict[str, Any]:
    """Run one scenario (or ``all``), print each measurement, the targets met or missed and the Markdown
    table; write the JSON when ``options.json_path`` is set. Returns what the JSON holds."""
    if options.scenario != "all" and options.scenario not in SCENARIO_RUNNERS:
        raise ValueError(f"unknown scenario {options.scenario!r}; choose from {', '.join(SCENARIOS)} or all")
    chosen = EVERY_SCENARIO if options.scenario == "all" else (options.scenario,)
    load_before = os.getloadavg()
    if options.work_dir:
        os.makedirs(options.work_dir, exist_ok=True)
    folder = tempfile.mkdtemp(prefix="dbfit_bench_", dir=options.work_dir)
    try:
        scenarios = [SCENARIO_RUNNERS[name](folder, options).as_dict() for name in chosen]
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    machine = {
        "cpus": os.cpu_count(),
        "baseline_memory_cap_gb": options.memory_cap_gb,
        "load_average_before": load_before,  # 1, 5 and 15 minutes, as uptime shows them
        "load_average_after": os.getloadavg(),
    }
    report = {
        "machine": machine,
        "repeat": options.repeat,
        "scenarios": scenarios,
        "targets": target_checks(scenarios),
    }
    loads = [" ".join(f"{x:.2f}" for x in machine[k]) for k in ("load_average_before", "load_average_after")]
    print(f"\n{os.cpu_count()} CPUs; load average (1, 5, 15 min) before {loads[0]}, after {loads[1]}")
    if report["targets"]:
        print()
        print(_targets_table(report["targets"]))
    print()
    print(markdown_table(scenarios))
    for scenario in scenarios:
        if "scaling" in scenario:
            print()
            print(scaling_table(scenario["scaling"]))
    if options.json_path:
        Path(options.json_path).write_text(json.dumps(report, indent=1))
        print(f"\nJSON written to {options.json_path}")
    return report


def add_bench_arguments(bench: argparse.ArgumentParser) -> None:
    """The options of ``dbfit bench``."""
    bench.add_argument(
        "--scenario",
        default="core",
        choices=[*SCENARIOS, "all"],
        help="what to measure (default: %(default)s; all: every scenario but spark-scale)",
    )
    bench.add_argument(
        "--rows",
        type=row_sizes,
        default=None,
        help="rows (default: the scenario's own size); spark-scale takes a list, e.g. 10000000,50000000",
    )
    bench.add_argument(
        "--predictors", type=int, default=None, help="numeric predictors (default: per scenario)"
    )
    bench.add_argument("--levels", type=int, default=5000, help="levels of the categorical in 'levels'")
    bench.add_argument("--segments", type=int, default=1000, help="segments in 'segments'")
    bench.add_argument("--memory-limit", default="2GB", help="DuckDB memory_limit in 'outofcore'")
    bench.add_argument("--keep", default=None, help="core: reuse or keep the data in this DuckDB file")
    bench.add_argument(
        "--repeat", type=int, default=1, help="run each measurement this many times; show the median"
    )
    bench.add_argument(
        "--baseline-memory",
        type=float,
        default=None,
        metavar="GB",
        help="memory cap of each baseline in GB (default: half of the machine's memory)",
    )
    bench.add_argument(
        "--json", default=None, metavar="FILE", help="also write the figures to this JSON file"
    )
    bench.add_argument(
        "--spark-conf",
        type=spark_setting,
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="spark, spark-scale: a Spark setting for the session (repeat for more)",
    )
    bench.add_argument(
        "--work-dir",
        default=None,
        metavar="DIR",
        help="write the data in a folder made and removed under DIR (default: the system's temporary folder)",
    )


def spark_setting(text: str) -> tuple[str, str]:
    """``--spark-conf``: one ``key=value`` Spark setting."""
    key, equals, value = text.partition("=")
    if not (equals and key.strip() and value.strip()):
        raise argparse.ArgumentTypeError(f"{text!r} is not KEY=VALUE")
    return key.strip(), value.strip()


def row_sizes(text: str) -> tuple[int, ...]:
    """``--rows``: one count or a comma-separated list of counts (``10000000,50000000``)."""
    try:
        sizes = tuple(int(part.replace("_", "")) for part in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a row count or a list of them") from None
    if any(size <= 0 for size in sizes):
        raise argparse.ArgumentTypeError(f"row counts must be positive, got {text!r}")
    return sizes


def run_bench_command(args: argparse.Namespace) -> None:
    """``dbfit bench`` with parsed arguments."""
    sizes = args.rows or ()
    if len(sizes) > 1 and args.scenario != "spark-scale":
        from dbfit.errors import UsageError

        raise UsageError(
            f"--rows takes a list of sizes only with --scenario spark-scale, got {len(sizes)} sizes"
        )
    run_bench(
        BenchOptions(
            scenario=args.scenario,
            rows=sizes[0] if sizes else None,
            row_sizes=tuple(sizes) or None,
            predictors=args.predictors,
            keep=args.keep,
            levels=args.levels,
            segments=args.segments,
            memory_limit=args.memory_limit,
            repeat=args.repeat,
            baseline_memory_gb=args.baseline_memory,
            json_path=args.json,
            work_dir=args.work_dir,
            spark_settings=tuple(args.spark_conf),
        )
    )


if __name__ == "__main__":
    print(RESULT_MARK + json.dumps(_worker(json.loads(sys.argv[1]))))
