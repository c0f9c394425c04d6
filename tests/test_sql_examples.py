"""Every script in sql_examples/ runs, in order, on a real DuckDB file of the invented courier scenario.

The estimates the scripts store are compared with dbfit's Python API on the same rows (itself checked against
statsmodels in test_reference_fits.py); the other checks are on what each script must leave behind.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

import dbfit
from dbfit.interfaces.cli import main
from dbfit.interfaces.demo import FORMULA, REFERENCE, build_deliveries
from dbfit.interfaces.sql_script import run_script

EXAMPLES = sorted((Path(__file__).resolve().parents[1] / "sql_examples").glob("*.sql"))


def test_examples_run_in_order_and_leave_what_they_promise(tmp_path, capsys):
    assert [p.name for p in EXAMPLES] == [
        "01_fit.sql",
        "02_inspect.sql",
        "03_score.sql",
        "04_publish.sql",
        "05_refit.sql",
        "06_drift.sql",
        "07_drop.sql",
        "08_by_depot.sql",
    ]
    path = str(tmp_path / "courier.duckdb")
    with dbfit.connect(path) as con:
        build_deliveries(con, 20_000)
        python = dbfit.fit(con, FORMULA, "deliveries", reference=REFERENCE, progress=False)

    assert main(["sql", str(EXAMPLES[0]), "--database", path]) == 0
    assert "late_deliveries" in capsys.readouterr().out
    con = dbfit.connect(path)
    fitted = dbfit.load(con, "late_deliveries", version=1)
    np.testing.assert_allclose(fitted.estimates, python.estimates, rtol=1e-12)
    outcomes = {p.name: run_script(con, p.read_text()) for p in EXAMPLES[1:]}

    versions, coefficients, factors = outcomes["02_inspect.sql"]
    assert len(versions.rows) == 1 and len(coefficients.rows) == len(python.labels) and len(factors.rows) == 6
    groups, top = outcomes["03_score.sql"]
    assert len(groups.rows) == 15 and all(0 < row[3] < 1 for row in groups.rows)
    assert len(top.rows) == 5 and all(low < p < high for _, _, _, p, low, high in top.rows)
    pinned, live, risky = outcomes["04_publish.sql"]
    assert pinned.rows[0][1:] == ("late_deliveries", 1, "pinned") and live.rows[0][3] == "live"
    assert all(row[3] > 0.6 for row in risky.rows)
    refit, differing = outcomes["05_refit.sql"]
    assert {row[1] for row in refit.rows} == {2} and differing.rows[0][0] > 0
    (drift,) = outcomes["06_drift.sql"]
    readings = {row[0]: row[4] for row in drift.rows}
    assert drift.rows[0][0] == "dispatch_hour" and readings["dispatch_hour"] == "large shift"
    assert readings["distance_km"] == "stable" and readings["depot"] == "stable"
    first, rest, left, *_ = outcomes["07_drop.sql"]
    assert (
        first.rows == [("late_deliveries", 1)]
        and rest.rows == [("late_deliveries", 2)]
        and left.rows == [(0,)]
    )
    views = con.execute("SELECT view_name FROM duckdb_views() WHERE NOT internal").fetchall()
    assert views == [("late_by_depot_risk",)]  # 07 dropped its views; 08 made this one
    segments, listing, scored, published, per_depot = outcomes["08_by_depot.sql"]
    by_depot = dbfit.fit(
        con, "late ~ distance_km + parcel_kg + rain", "deliveries", by="depot", progress=False
    )
    assert [row[0] for row in listing.rows] == [f"late_by_depot.{d}" for d in sorted(by_depot.models)]
    for depot, model in by_depot.models.items():
        estimates = [row[4] for row in segments.rows if row[2] == depot]
        np.testing.assert_allclose(estimates, model.estimates, rtol=1e-12)
    north_rows = con.execute("SELECT count(*) FROM deliveries WHERE depot = 'North'").fetchall()[0][0]
    assert scored.rows == [(north_rows,)]
    assert published.rows == [('"late_by_depot_risk"', len(by_depot.models), "pinned")]
    counts = dict(
        con.execute(
            "SELECT depot, count(*) FROM deliveries WHERE distance_km IS NOT NULL AND "
            "parcel_kg IS NOT NULL AND rain IS NOT NULL GROUP BY depot"
        ).fetchall()
    )
    assert [(depot, n) for depot, n, _ in per_depot.rows] == sorted(counts.items())
    con.close()


def test_demo_stores_and_publishes_its_model(tmp_path, capsys):
    # The demo's own view, read back with plain duckdb; its probabilities stay within (0, 1).
    import duckdb

    from dbfit.interfaces.demo import run_demo

    path = tmp_path / "demo.duckdb"
    model = run_demo(str(path), rows=3000, quiet=True)
    assert "demo_late_risk" in capsys.readouterr().out
    with duckdb.connect(str(path), read_only=True) as plain:
        count, low, high = plain.execute(
            "SELECT count(probability), min(probability), max(probability) FROM demo_late_risk"
        ).fetchall()[0]
    assert count == model.stats["n_used"] and 0 < low < high < 1
