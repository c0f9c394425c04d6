"""Large fits start from a fit on a reservoir sample kept in a temporary table, then finish on all rows."""

from __future__ import annotations

import statsmodels.api as sm
from conftest import assert_close

import dbfit
import dbfit.fitting.driver
from dbfit.interfaces.demo import FORMULA, REFERENCE, build_deliveries


def test_sample_start_gives_the_full_data_answer_in_fewer_passes(con, monkeypatch):
    # Reference: statsmodels GLM Binomial on the same rows (invented demo data used only as input here).
    build_deliveries(con, 40_000)
    cold = dbfit.fit(con, FORMULA, "deliveries", reference=REFERENCE, progress=False)
    monkeypatch.setattr(dbfit.fitting.driver, "SAMPLE_START_ROWS", 10_000)
    monkeypatch.setattr(dbfit.fitting.driver, "SAMPLE_ROWS", 8_000)
    phases = []
    warm = dbfit.fit(
        con, FORMULA, "deliveries", reference=REFERENCE, progress=lambda r: phases.append(r.phase)
    )
    assert "sample of 8,000 rows" in phases and phases[-1] == "full data"
    assert phases.count("full data") < cold.stats["iterations"]
    assert warm.stats["iterations"] == phases.count("full data")
    assert_close(warm.estimates, cold.estimates, 1e-8, "same estimates as the cold start")
    frame = con.execute("SELECT * FROM deliveries WHERE parcel_kg IS NOT NULL").df()
    reference = sm.GLM.from_formula(
        "late ~ distance_km + parcel_kg + C(depot, Treatment('North')) + C(tier, Treatment('standard'))"
        " + dispatch_hour + rain",
        frame.assign(late=frame.late.astype(int), rain=frame.rain.astype(int)),
        family=sm.families.Binomial(),
    ).fit(tol=1e-12)
    depot, tier = "C(depot, Treatment('North'))", "C(tier, Treatment('standard'))"
    order = ["Intercept", "distance_km", "parcel_kg"] + [
        f"{depot}[T.{d}]" for d in ("East", "Harbour", "South", "West")
    ]
    order += [f"{tier}[T.{t}]" for t in ("economy", "express")] + ["dispatch_hour", "rain"]
    assert_close(warm.estimates, reference.params[order].values, 1e-6, "estimates")
    assert_close(
        warm.coefficients["std_error"].to_numpy(), reference.bse[order].values, 1e-6, "standard errors"
    )
    leftover = con.execute(
        "SELECT count(*) FROM duckdb_tables() WHERE table_name LIKE 'dbfit_sample_%'"
    ).fetchall()
    assert leftover[0][0] == 0
