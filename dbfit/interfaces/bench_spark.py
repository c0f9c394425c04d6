"""The Spark side of ``dbfit bench``: the local session its workers open, the driver JVM's memory, the Parquet
folders of ``spark-scale`` with their column sizes, and that scenario's table of time per pass against rows.

``spark-scale`` fits the same Parquet folder on DuckDB and on Spark SQL ``local[2]`` at growing sizes. A pass
is one scan of the data (``engine.scans``: the profile, the sample of the start on DuckDB, score-only and
Newton passes, the confirming pass, the null model); time per pass is the fit's time over its passes, so it
mixes cheap and dear scans alike on both engines.

Memory of a local Spark session lives in two processes: the Python driver (the worker) and the JVM it starts,
which runs the driver's planning and, in local mode, the executor threads that scan the Parquet. Each reports
its own resident high-water mark (``VmHWM``); the bench adds them, which bounds their joint peak from above.
The JVM's figure is mostly the heap it has touched, bounded by its maximum heap (``spark.driver.memory``).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

SCALE_ROWS = (10_000_000, 50_000_000)
SCALE_PREDICTORS = 20
ROWS_PER_FILE = 5_000_000


def local_spark_session(app_name: str, settings: dict[str, str] | None = None) -> Any:
    """A local Spark session on 2 cores (``local[2]``) with no UI and 2 shuffle partitions (the aggregates
    dbfit sends return one row, or one per segment, so more partitions only add tasks), then ``settings``
    (``--spark-conf``) over those."""
    os.environ.setdefault("SPARK_LOCAL_IP", "127.0.0.1")
    from pyspark.sql import SparkSession

    builder = (
        SparkSession.builder.master("local[2]")
        .appName(app_name)
        .config("spark.ui.enabled", "false")
        .config("spark.sql.shuffle.partitions", "2")
    )
    for key, value in (settings or {}).items():
        builder = builder.config(key, value)
    session = builder.getOrCreate()
    session.sparkContext.setLogLevel("ERROR")
    return session


def high_water_mb(pid: int | str = "self") -> float | None:
    """Resident high-water mark (``VmHWM``) of a process in MB, None where /proc does not say."""
    try:
        with open(f"/proc/{pid}/status", encoding="ascii") as status:
            for line in status:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        return None
    return None


def cpu_seconds(pid: int | str = "self") -> float | None:
    """User and system CPU time a process has used so far (``/proc/PID/stat``), None where it cannot be read.
    Under load, wall time stretches with the machine's other work; CPU time much less so."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return None
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")  # utime and stime, fields 14-15


def driver_jvm_pid(session: Any) -> int:
    """The process id of the session's driver JVM (asked through py4j, the only way into that process)."""
    return int(session.sparkContext._jvm.java.lang.ProcessHandle.current().pid())


def driver_jvm_memory(session: Any) -> dict[str, float]:
    """The driver JVM's peak resident memory and its maximum heap, in MB (read before the session stops)."""
    runtime = session.sparkContext._jvm.java.lang.Runtime.getRuntime()
    found = {"jvm_max_heap_mb": runtime.maxMemory() / 2**20}
    peak = high_water_mb(driver_jvm_pid(session))
    if peak is not None:
        found["jvm_peak_rss_mb"] = peak
    return found


def write_parquet_folder(folder: str, rows: int, select_of: Any) -> dict[str, Any]:
    """Write ``rows`` rows as Parquet files of at most ROWS_PER_FILE rows each (DuckDB's ``COPY ... (FORMAT
    parquet)``, its default compression) from ``select_of(rows, first_id)``, a deterministic SELECT; returns
    the folder's files, bytes on disk and each column's compressed and uncompressed bytes."""
    import duckdb

    os.makedirs(folder, exist_ok=True)
    con = duckdb.connect()
    con.execute("SET enable_progress_bar = false")
    for part, first in enumerate(range(0, rows, ROWS_PER_FILE)):
        count = min(ROWS_PER_FILE, rows - first)
        target = Path(folder) / f"part{part:03d}.parquet"
        con.execute(f"COPY ({select_of(count, first)}) TO '{target}' (FORMAT parquet)")
    columns = con.execute(
        "SELECT path_in_schema, any_value(compression), sum(total_compressed_size),"
        " sum(total_uncompressed_size) FROM parquet_metadata(?)"
        " GROUP BY path_in_schema ORDER BY min(column_id)",
        [f"{folder}/*.parquet"],
    ).fetchall()
    con.close()
    files = sorted(Path(folder).glob("*.parquet"))
    return {
        "files": len(files),
        "bytes_on_disk": sum(f.stat().st_size for f in files),
        "columns": [
            {"column": name, "compression": codec, "compressed_bytes": packed, "uncompressed_bytes": plain}
            for name, codec, packed, plain in columns
        ],
    }


def pass_figures(record: dict[str, Any], rows: int) -> dict[str, float]:
    """Time per pass (the fit's time over its scans), the same per million rows, and CPU time per pass where
    it was measured (the fitting processes' user and system time: for Spark, the Python driver's and the
    JVM's)."""
    per_pass = record["seconds"] / record["scans"]
    found = {"seconds_per_pass": per_pass, "seconds_per_pass_per_million_rows": per_pass / rows * 1e6}
    for part in ("cpu_seconds", "jvm_cpu_seconds"):
        if part in record:
            found[f"{part}_per_pass"] = record[part] / record["scans"]
    return found


def scaling_rows(records: list[dict[str, Any]], sizes: list[int]) -> list[dict[str, Any]]:
    """One row per engine and size from the records keyed ``<engine>-<rows>``: time, passes, time per pass
    (and per million rows), peak memory, the largest estimate difference against the other engine, and the
    per-pass time over the smallest size's beside the ratio of rows."""
    by_key = {r["key"]: r for r in records}
    rows_out = []
    for engine in ("duckdb", "spark"):
        first: float | None = None
        for size in sizes:
            record = by_key.get(f"{engine}-{size}")
            if record is None or record["status"] != "ok":
                note = "missing" if record is None else f"{record['status']}: {record.get('note', '')}"
                rows_out.append({"engine": engine, "rows": size, "status": note})
                continue
            figures = pass_figures(record, size)
            first = figures["seconds_per_pass"] if first is None else first
            gap = record.get("max_abs_difference", by_key.get(f"spark-{size}", {}).get("max_abs_difference"))
            rows_out.append(
                {
                    "engine": engine,
                    "rows": size,
                    "status": "ok",
                    "seconds": record["seconds"],
                    "scans": record["scans"],
                    **figures,
                    "growth_vs_first": figures["seconds_per_pass"] / first,
                    "rows_vs_first": size / sizes[0],
                    "peak_rss_mb": record["peak_rss_mb"],
                    "memory_parts": memory_parts(record),
                    "max_abs_difference": gap,
                }
            )
    return rows_out


def memory_parts(record: dict[str, Any]) -> str:
    """What a record's peak memory is made of, in words."""
    if "jvm_peak_rss_mb" in record:
        return (
            f"Python driver {record['driver_peak_rss_mb']:,.0f} MB"
            f" + driver JVM {record['jvm_peak_rss_mb']:,.0f} MB (max heap {record['jvm_max_heap_mb']:,.0f} MB)"
        )
    return "the fitting process"


SCALING_HEADER = (
    "| engine | rows | total time | passes | time per pass | per pass per million rows | CPU per pass |"
    " per-pass time vs smallest size | peak memory (what is measured) | largest estimate difference |\n"
    "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |"
)
ENGINE_LABELS = {"duckdb": "DuckDB", "spark": "Spark local[2]"}


def cpu_text(row: dict[str, Any]) -> str:
    """CPU time per pass in words: all of it, and the driver JVM's share where there is one."""
    if "cpu_seconds_per_pass" not in row:
        return "not measured"
    jvm = row.get("jvm_cpu_seconds_per_pass")
    return f"{row['cpu_seconds_per_pass']:.3f} s" + ("" if jvm is None else f" (JVM {jvm:.3f} s)")


def scaling_table(rows: list[dict[str, Any]]) -> str:
    """The Markdown table of ``scaling_rows``."""
    lines = [SCALING_HEADER]
    for row in rows:
        head = [ENGINE_LABELS[row["engine"]], f"{row['rows']:,}"]
        if row["status"] != "ok":
            lines.append("| " + " | ".join([*head, row["status"], *[""] * 7]) + " |")
            continue
        gap = row["max_abs_difference"]
        cells = [
            f"{row['seconds']:.2f} s",
            str(row["scans"]),
            f"{row['seconds_per_pass']:.3f} s",
            f"{row['seconds_per_pass_per_million_rows']:.4f} s",
            cpu_text(row),
            f"x{row['growth_vs_first']:.2f} (rows x{row['rows_vs_first']:g})",
            f"{row['peak_rss_mb']:,.0f} MB: {row['memory_parts']}",
            "" if gap is None else f"{gap:.1e}",
        ]
        lines.append("| " + " | ".join([*head, *cells]) + " |")
    return "\n".join(lines)
