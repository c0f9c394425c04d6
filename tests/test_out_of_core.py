"""A Parquet folder larger than DuckDB's memory limit is fitted by streaming aggregates (reduced size)."""

from __future__ import annotations

import duckdb
from conftest import assert_close

import dbfit
from dbfit.interfaces.bench import numeric_select


def test_parquet_folder_larger_than_memory_limit(tmp_path):
    lake = tmp_path / "lake"
    lake.mkdir()
    writer = duckdb.connect()
    for part in range(4):
        writer.execute(
            f"COPY ({numeric_select(1_000_000, 10)}) TO '{lake}/part{part}.parquet' (FORMAT parquet)"
        )
    rows_bytes = writer.execute(f"SELECT count(*) * 11 * 8 FROM '{lake}/*.parquet'").fetchall()[0][0]
    writer.close()
    limit_bytes = 100 * 2**20
    assert rows_bytes > 3 * limit_bytes  # the data as doubles is several times the memory limit
    formula = "y ~ " + " + ".join(f"x{j}" for j in range(10))
    small = dbfit.connect(memory_limit="100MB", threads=2)
    limited = dbfit.fit(small, formula, f"{lake}/*.parquet", progress=False)
    peak = small.execute("SELECT max(memory_usage_bytes) FROM duckdb_memory()").fetchall()[0][0]
    small.close()
    free = dbfit.connect()
    unlimited = dbfit.fit(free, formula, f"{lake}/*.parquet", progress=False)
    free.close()
    assert limited.stats["n_used"] == 4_000_000 and limited.stats["converged"]
    assert_close(limited.estimates, unlimited.estimates, 1e-10, "same estimates under a small memory limit")
    assert peak <= limit_bytes
