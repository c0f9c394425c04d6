"""``dbfit bench``: one run, one synthetic data set, three ways to fit it.

(a) dbfit in the database; (b) export to numpy, then statsmodels GLM; (c) a numpy IRLS on arrays already in
memory. Each runs in its own subprocess so its peak resident memory is its own; the figures are ratios
against the baselines measured in the same run on the same data.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

RESULT_MARK = "dbfit-bench-result "
METHODS = {"a": "dbfit in-database", "b": "export + statsmodels", "c": "in-memory numpy IRLS"}


def build_data(path: str, rows: int, predictors: int) -> None:
    """Synthetic numeric predictors and a 0/1 target from a known logistic model, made inside DuckDB."""
    import duckdb

    con = duckdb.connect(path)
    columns = ", ".join(
        f"(((hash(id, {j}) % 1000003) + 0.5) / 1000003.0 - 0.5) * {1 + j % 3} AS x{j}" for j in range(predictors)
    )
    eta = " + ".join(f"{0.15 * ((-1) ** j) * (1 + j % 4)} * x{j}" for j in range(predictors))
    con.execute(f"CREATE OR REPLACE TABLE bench AS SELECT {columns}, id FROM range({int(rows)}) r(id)")
    con.execute(
        f"CREATE OR REPLACE TABLE bench AS SELECT * EXCLUDE (id), "
        f"(((hash(id, 999) % 1000003) + 0.5) / 1000003.0 < 1 / (1 + exp(-(-0.4 + {eta}))))::INTEGER AS y FROM bench"
    )
    con.close()


def _worker(method: str, path: str, predictors: int) -> dict:
    import duckdb

    import dbfit

    names = [f"x{j}" for j in range(predictors)]
    result: dict = {"method": method}
    if method == "a":
        con = dbfit.connect(path, read_only=True)
        began = time.perf_counter()
        model = dbfit.fit(con, "y ~ " + " + ".join(names), "bench", progress=False)
        result["seconds"] = time.perf_counter() - began
        result["scans"] = model.stats["scans"]
        result["iterations"] = model.stats["iterations"]
        result["estimates"] = model.estimates.tolist()
    else:
        con = duckdb.connect(path, read_only=True)
        began = time.perf_counter()
        arrays = con.execute(f"SELECT {', '.join(names)}, y FROM bench").fetchnumpy()
        design = np.column_stack([np.ones(len(arrays["y"]))] + [np.asarray(arrays[n], dtype=float) for n in names])
        target = np.asarray(arrays["y"], dtype=float)
        del arrays
        exported = time.perf_counter()
        if method == "b":
            import statsmodels.api as sm

            estimates = sm.GLM(target, design, family=sm.families.Binomial()).fit(tol=1e-10).params
            result["seconds"] = time.perf_counter() - began
        else:
            estimates, iterations = numpy_irls(design, target)
            result["seconds"] = time.perf_counter() - exported
            result["iterations"] = iterations
        result["estimates"] = np.asarray(estimates).tolist()
    result["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    return result


def numpy_irls(design: np.ndarray, target: np.ndarray, tol: float = 1e-10, max_iter: int = 50) -> tuple[np.ndarray, int]:
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


def run_bench(rows: int = 5_000_000, predictors: int = 20, methods: str = "abc", keep: str | None = None) -> dict:
    """Build the data once, time each method in its own process, print and return the figures."""
    folder = tempfile.mkdtemp(prefix="dbfit_bench_")
    path = keep or os.path.join(folder, "bench.duckdb")
    began = time.perf_counter()
    if not Path(path).exists():
        build_data(path, rows, predictors)
    print(f"data: {rows:,} rows x {predictors} numeric predictors in {path} (built in {time.perf_counter() - began:.1f}s)")
    results = {}
    for method in methods:
        completed = subprocess.run(
            [sys.executable, "-m", "dbfit.bench", method, path, str(predictors)],
            capture_output=True, text=True, check=False,
        )
        if completed.returncode != 0:
            print(f"  ({method}) {METHODS[method]}: could not run: {completed.stderr.strip().splitlines()[-1:]}")
            continue
        marked = [line for line in completed.stdout.splitlines() if line.startswith(RESULT_MARK)]
        results[method] = json.loads(marked[-1][len(RESULT_MARK):])
        r = results[method]
        extra = f", {r['scans']} scans" if "scans" in r else ""
        print(f"  ({method}) {METHODS[method]:<22} {r['seconds']:8.2f} s   peak RSS {r['peak_rss_mb']:8.0f} MB{extra}")
    if "a" in results:
        for base in "bc":
            if base in results:
                ratio = results["a"]["seconds"] / results[base]["seconds"]
                memory = results["a"]["peak_rss_mb"] / results[base]["peak_rss_mb"]
                gap = np.max(np.abs(np.array(results["a"]["estimates"]) - np.array(results[base]["estimates"])))
                print(f"  a/{base}: time {ratio:.2f}, peak memory {memory:.2f}, largest estimate difference {gap:.1e}")
    return results


if __name__ == "__main__":
    print(RESULT_MARK + json.dumps(_worker(sys.argv[1], sys.argv[2], int(sys.argv[3]))))
