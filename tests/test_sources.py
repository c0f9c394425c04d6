"""Every kind of source: table, view, SELECT, Parquet, CSV, a folder of Parquet files, a DuckDB file on disk."""

from __future__ import annotations

import numpy as np
import statsmodels.api as sm
from conftest import assert_close, load_frame

import dbfit

FORMULA = "GRADE ~ GPA + TUCE + PSI"


def reference_estimates():
    # Reference: statsmodels Logit on statsmodels' spector data.
    frame = sm.datasets.spector.load_pandas().data
    return (
        sm.Logit(frame.GRADE, sm.add_constant(frame[["GPA", "TUCE", "PSI"]]))
        .fit(disp=0, tol=1e-12)
        .params.values
    )


def test_parquet_csv_view_and_select_sources_agree(con, tmp_path):
    load_frame(con, "spector", sm.datasets.spector.load_pandas().data)
    parquet, csv = tmp_path / "spector.parquet", tmp_path / "spector.csv"
    con.execute(f"COPY spector TO '{parquet}' (FORMAT parquet)")
    con.execute(f"COPY spector TO '{csv}' (HEADER)")
    con.execute("CREATE VIEW spector_view AS SELECT * FROM spector")
    expected = reference_estimates()
    for source in [str(parquet), str(csv), "spector_view", "SELECT * FROM spector WHERE GPA > 0"]:
        model = dbfit.fit(con, FORMULA, source, progress=False)
        assert_close(model.estimates, expected, 1e-6, f"estimates from {source}")


def test_folder_of_parquet_files(con, tmp_path):
    load_frame(con, "spector", sm.datasets.spector.load_pandas().data)
    for part in range(3):
        con.execute(
            f"COPY (SELECT * FROM spector WHERE rowid % 3 = {part}) TO '{tmp_path}/part{part}.parquet' (FORMAT parquet)"
        )
    model = dbfit.fit(con, FORMULA, f"{tmp_path}/*.parquet", progress=False)
    assert model.stats["n_used"] == 32
    assert_close(model.estimates, reference_estimates(), 1e-6, "estimates from a parquet glob")


def test_duckdb_file_on_disk_reopened(tmp_path):
    path = str(tmp_path / "school.duckdb")
    first = dbfit.connect(path)
    load_frame(first, "spector", sm.datasets.spector.load_pandas().data)
    first.close()
    again = dbfit.connect(path, read_only=True)
    model = dbfit.fit(again, FORMULA, "main.spector", progress=False)
    again.close()
    assert_close(model.estimates, reference_estimates(), 1e-6, "estimates from a file database")


def test_missing_file_is_a_source_error(con, tmp_path):
    try:
        dbfit.fit(con, FORMULA, str(tmp_path / "absent.parquet"), progress=False)
    except dbfit.SourceError as err:
        assert "cannot be read" in str(err) or "cannot be found" in str(err)
    else:
        raise AssertionError("a missing file must raise SourceError")


def test_statistics_query_golden_sql(con):
    # Golden pair: the statistics query for a one-term formula, as DuckDB SQL text.
    from dbfit.design.layout import build_design
    from dbfit.engines.duckdb_engine import DuckDBEngine
    from dbfit.expressions.formula import parse_formula
    from dbfit.expressions.source import source_relation
    from dbfit.fitting.statistics import statistics_query

    con.execute("CREATE TABLE t AS SELECT (i % 3 = 0) AS y, i * 1.0 AS x FROM range(10) r(i)")
    design = build_design(DuckDBEngine(con), parse_formula("y ~ x"), source_relation("t"))
    sql = statistics_query(design, [0], True, np.array([0.5, -0.25])).sql(dialect="duckdb")
    assert sql == (
        'SELECT SUM("wt") AS "s0", SUM("wdbfit_z0") AS "s1", SUM("wdbfit_z0" * "dbfit_z0") AS "s2", SUM("r") AS "s3", '
        'SUM("r" * "dbfit_z0") AS "s4", SUM("ll") AS "s5", SUM("ext") AS "s6", SUM("bad") AS "s7" FROM (SELECT '
        '"dbfit_z0", "wt" * "dbfit_z0" AS "wdbfit_z0", "wt", "r", "ll", "ext", "bad" FROM (SELECT "dbfit_z0", '
        '"pw" * "n" * "e" / ((1 + "e") * (1 + "e")) AS "wt", "pw" * ("y" - "n" * CASE WHEN "eta" >= 0 THEN 1 / (1 + '
        '"e") ELSE "e" / (1 + "e") END) AS "r", "pw" * ("y" * "eta" - "n" * (CASE WHEN "eta" > 0 THEN "eta" ELSE 0 '
        'END + LN(1 + "e"))) AS "ll", CASE WHEN ABS("eta") > 17.0 THEN "pw" ELSE 0 END AS "ext", CASE WHEN ("eta" > '
        '17.0 AND "y" < "n") OR ("eta" < -17.0 AND "y" > 0) THEN "pw" ELSE 0 END AS "bad" FROM (SELECT *, '
        'EXP(-ABS("eta")) AS "e" FROM (SELECT "dbfit_z0", "y", "pw", "n", "off" + 0.5 + -0.25 * "dbfit_z0" AS "eta" '
        'FROM (SELECT ((CAST("dbfit_f0" AS DOUBLE)) - 4.5) / 2.8722813232690143 AS "dbfit_z0", 0 AS "off", "dbfit_y" '
        'AS "y", 1 AS "pw", 1 AS "n" FROM (SELECT * FROM (SELECT CASE WHEN "y" THEN CAST(1 AS DOUBLE) WHEN NOT ("y") THEN '
        'CAST(0 AS DOUBLE) END AS "dbfit_y", "x" AS "dbfit_f0" '
        'FROM "t") AS dbfit_rows WHERE NOT "dbfit_y" IS NULL AND NOT "dbfit_f0" IS NULL) AS dbfit_base) AS '
        "dbfit_cols) AS dbfit_lin) AS dbfit_e) AS dbfit_terms) AS dbfit_w"
    )
