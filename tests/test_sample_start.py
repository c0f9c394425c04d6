"""Large fits start from a fit on a sample held in memory (its Newton passes in numpy), then finish on all rows."""

from __future__ import annotations

import numpy as np
import statsmodels.api as sm
from conftest import assert_close, load_frame

import dbfit
import dbfit.fitting.driver
from dbfit.design.layout import build_design
from dbfit.engines import engine_for
from dbfit.expressions.formula import parse_formula
from dbfit.expressions.source import source_relation
from dbfit.fitting.sample_fit import SampleArrays
from dbfit.fitting.statistics import StatisticsPass
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


def test_the_sample_passes_in_numpy_equal_the_statistics_query_on_the_same_rows(con):
    # Reference: the SQL statistics query (McCullagh and Nelder 1989, section 4.4) on the rows of statsmodels'
    # bundled star98 data (grouped binomial: NABOVE of NABOVE + NBELOW), with weights, an offset and trials,
    # at a moderate and at an extreme point (|eta| far above 17, where only the e = exp(-|eta|) forms hold).
    load_frame(con, "star98", sm.datasets.star98.load_pandas().data)
    engine = engine_for(con)
    design = build_design(
        engine,
        parse_formula("NABOVE ~ LOWINC + PERASIAN + PTRATIO + LOWINC:PTRATIO"),
        source_relation("star98"),
        weights="1 + PERMINTE / 100",
        offset="PCTAF / 100",
        trials="NABOVE + NBELOW",
    )
    parameters = list(range(len(design.labels)))
    rows = design.base_query()
    arrays = SampleArrays.fetch(engine, design, parameters, rows, scan=False)
    assert arrays.rows == 303
    in_sql = StatisticsPass(engine, design, rows)
    for beta in (np.array([-0.4, 0.3, -0.2, 0.1, 0.05]), np.array([30.0, -25.0, 12.0, -40.0, 22.0])):
        expected, actual = in_sql(parameters, beta), arrays.statistics(parameters, beta)
        assert_close(actual.gram.as_array(), expected.gram.as_array(), 1e-12, "information")
        assert_close(actual.score, expected.score, 1e-12, "score")
        assert_close(actual.loglik, expected.loglik, 1e-12, "log-likelihood")
        tails = [actual.extreme, actual.misfit_extreme]
        assert_close(tails, [expected.extreme, expected.misfit_extreme], 1e-12, "rows fitted at 0 or 1")
    assert expected.extreme > 0 and expected.misfit_extreme > 0  # the extreme point reaches those branches


def test_the_score_only_scans_stop_once_one_full_newton_pass_finishes_the_fit(con, monkeypatch):
    # Newton's method converges quadratically near the estimate (Nocedal and Wright 2006, Numerical
    # Optimization, 2nd ed., section 3.3): the refinement stops when the full pass that follows converges at
    # once, whatever the tolerance; the answer then agrees with a fit run to a much tighter tolerance, to
    # 1e-10 at the default tolerance. The invented demo data is only input here; the reference is that
    # fully converged cold fit.
    build_deliveries(con, 40_000)
    converged = dbfit.fit(
        con, FORMULA, "deliveries", reference=REFERENCE, tol=1e-15, max_iter=100, progress=False
    )
    monkeypatch.setattr(dbfit.fitting.driver, "SAMPLE_START_ROWS", 10_000)
    monkeypatch.setattr(dbfit.fitting.driver, "SAMPLE_ROWS", 8_000)
    score_only = {}
    for tol, agreement in ((1e-8, 1e-8), (1e-10, 1e-10), (1e-12, 1e-10)):
        reports: list = []
        warm = dbfit.fit(con, FORMULA, "deliveries", reference=REFERENCE, tol=tol, progress=reports.append)
        assert warm.stats["converged"] and warm.stats["iterations"] == 1  # one full Newton pass
        score_only[tol] = [report.phase for report in reports].count("full data, score only")
        assert score_only[tol] < dbfit.fitting.driver.REFINE_PASSES
        assert_close(warm.estimates, converged.estimates, agreement, f"estimates at tol={tol}")
    assert score_only[1e-8] < score_only[1e-10] < score_only[1e-12]


def test_a_source_that_is_not_a_table_is_sampled_by_a_reservoir_in_one_scan(con, monkeypatch):
    # A SELECT cannot be sampled by row blocks: a reservoir sample of its complete rows is drawn in one
    # counted scan. Reference: the cold fit of the same rows (itself checked against statsmodels above).
    build_deliveries(con, 40_000)
    source = "SELECT * FROM deliveries WHERE dispatch_hour < 20"
    cold = dbfit.fit(con, FORMULA, source, reference=REFERENCE, progress=False)
    monkeypatch.setattr(dbfit.fitting.driver, "SAMPLE_START_ROWS", 10_000)
    monkeypatch.setattr(dbfit.fitting.driver, "SAMPLE_ROWS", 8_000)
    reports: list = []
    warm = dbfit.fit(con, FORMULA, source, reference=REFERENCE, progress=reports.append)
    phases = [report.phase for report in reports]
    assert "sample of 8,000 rows" in phases
    # profile, the reservoir, the score-only scans, the Newton passes and the confirming scan
    assert warm.stats["scans"] == 2 + phases.count("full data, score only") + warm.stats["iterations"] + 1
    assert_close(warm.estimates, cold.estimates, 1e-8, "same estimates as the cold start")
