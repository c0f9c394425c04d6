"""Bad input gets a clear error naming the problem, and nothing harmful runs."""

from __future__ import annotations

import pytest

import dbfit


@pytest.fixture
def deliveries(con):
    con.execute("""CREATE TABLE t AS SELECT y, x::DOUBLE AS x, g, z::DOUBLE AS z FROM (VALUES
        (1, 2.0, 'a', 0.5), (0, 1.0, 'b', 0.1), (1, 3.5, 'a', 0.7), (0, 0.5, 'b', 0.3),
        (1, 2.2, 'b', 0.9), (0, 1.1, 'a', 0.2), (1, 2.9, 'a', 0.4), (0, 0.7, 'b', 0.6)) v(y, x, g, z)""")
    return con


def table_exists(con, name: str) -> bool:
    return bool(
        con.execute("SELECT count(*) FROM duckdb_tables() WHERE table_name = ?", [name]).fetchall()[0][0]
    )


def test_unknown_column_is_named(deliveries):
    with pytest.raises(dbfit.FormulaError, match="unknown column 'nosuch'"):
        dbfit.fit(deliveries, "y ~ x + nosuch", "t", progress=False)


def test_target_values_other_than_zero_one_are_listed(deliveries):
    deliveries.execute("INSERT INTO t VALUES (2, 1.0, 'a', 0.5), (7, 1.0, 'b', 0.5)")
    with pytest.raises(dbfit.FitError, match=r"2 rows hold other values \(2, 7\)"):
        dbfit.fit(deliveries, "y ~ x", "t", progress=False)


def test_text_target_without_positive_class_is_refused(deliveries):
    with pytest.raises(dbfit.FitError, match="positive="):
        dbfit.fit(deliveries, "g ~ x", "t", progress=False)


def test_single_class_target(deliveries):
    with pytest.raises(dbfit.FitError, match="needs both classes"):
        dbfit.fit(deliveries, "y ~ x", "SELECT * FROM t WHERE y = 1", progress=False)


def test_no_rows_after_null_exclusion(deliveries):
    deliveries.execute("UPDATE t SET z = NULL")
    with pytest.raises(dbfit.FitError, match="no rows left to fit: all 8 rows"):
        dbfit.fit(deliveries, "y ~ x + z", "t", progress=False)


@pytest.mark.parametrize("bad", ["'nan'", "'inf'", "'-inf'"])
def test_non_finite_predictor_is_named_with_count(deliveries, bad):
    deliveries.execute(f"UPDATE t SET z = {bad}::DOUBLE WHERE x > 2")
    with pytest.raises(dbfit.FitError, match=r"term 'z' has 3 non-finite values"):
        dbfit.fit(deliveries, "y ~ x + z", "t", progress=False)


def test_source_that_is_not_a_select(deliveries):
    with pytest.raises(dbfit.SourceError, match="DELETE"):
        dbfit.fit(deliveries, "y ~ x", "DELETE FROM t", progress=False)
    assert deliveries.execute("SELECT count(*) FROM t").fetchall()[0][0] == 8


@pytest.mark.parametrize(
    "formula",
    [
        "y ~ x); DROP TABLE t; --",
        "y ~ x + (SELECT 1)",
        "y ~ (DELETE FROM t)",
        "y ~ avg(x)",
        "y ~ sum(x) OVER ()",
        "y ~ x FROM t; DROP TABLE t",
        "y ~ x -- comment\n; DROP TABLE t",
    ],
)
def test_formula_injection_is_refused_and_table_survives(deliveries, formula):
    with pytest.raises(dbfit.FormulaError):
        dbfit.fit(deliveries, formula, "t", progress=False)
    assert table_exists(deliveries, "t")


@pytest.mark.parametrize("source", ["t; DROP TABLE t", "x'; DROP TABLE t; --", "SELECT 1; DROP TABLE t"])
def test_source_injection_is_refused_and_table_survives(deliveries, source):
    with pytest.raises(dbfit.SourceError):
        dbfit.fit(deliveries, "y ~ x", source, progress=False)
    assert table_exists(deliveries, "t")


@pytest.mark.parametrize("option", ["weights", "offset", "trials"])
def test_option_expressions_are_parsed_not_spliced(deliveries, option):
    with pytest.raises(dbfit.FormulaError):
        dbfit.fit(deliveries, "y ~ x", "t", progress=False, **{option: "1); DROP TABLE t; --"})
    assert table_exists(deliveries, "t")


def test_unknown_table_is_a_source_error(deliveries):
    with pytest.raises(dbfit.SourceError, match="cannot be found"):
        dbfit.fit(deliveries, "y ~ x", "no_such_table", progress=False)


def test_negative_weights_are_refused(deliveries):
    with pytest.raises(dbfit.FitError, match="1 negative or non-finite"):
        dbfit.fit(deliveries, "y ~ x", "t", weights="CASE WHEN x = 2.0 THEN -1 ELSE 1 END", progress=False)


def test_grouped_target_above_trials_is_refused(deliveries):
    with pytest.raises(dbfit.FitError, match="between 0 and trials"):
        dbfit.fit(deliveries, "y * 3 ~ x", "t", trials="2", progress=False)


def test_unknown_reference_level_lists_levels(deliveries):
    with pytest.raises(
        dbfit.FormulaError, match=r"reference level 'c' of 'g' does not occur in the data \(levels: a, b\)"
    ):
        dbfit.fit(deliveries, "y ~ g", "t", reference={"g": "c"}, progress=False)


def test_date_typed_term_is_refused(deliveries):
    with pytest.raises(dbfit.FormulaError, match="SQL type DATE"):
        dbfit.fit(deliveries, "y ~ DATE '2024-01-01' + x", "t", progress=False)


def test_errors_share_one_family():
    assert issubclass(dbfit.FormulaError, dbfit.DbfitError)
    assert issubclass(dbfit.FitError, dbfit.DbfitError)
    assert issubclass(dbfit.DbfitError, ValueError)


def test_positive_on_a_target_of_more_than_two_values_is_refused(deliveries):
    deliveries.execute(
        "CREATE TABLE s AS SELECT x, CASE WHEN x > 2.5 THEN 'late' WHEN x > 1 THEN 'on_time' "
        "ELSE 'cancelled' END AS status FROM t"
    )
    with pytest.raises(
        dbfit.FitError,
        match=r"target 'status' has 3 values among the rows used \(cancelled, late, "
        r"on_time\).*\"status = 'late' ~ \.\.\.\"",
    ):
        dbfit.fit(deliveries, "status ~ x", "s", positive="late", progress=False)
    two = dbfit.fit(
        deliveries,
        "status ~ x",
        "SELECT * FROM s WHERE status <> 'cancelled'",
        positive="late",
        progress=False,
    )
    assert two.stats["n_used"] == 5
