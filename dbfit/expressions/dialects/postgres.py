"""PostgreSQL: exp raises out of range, no isfinite for numbers, and subqueries fenced with OFFSET 0."""

from __future__ import annotations

from dbfit.expressions.dialects import DOUBLE_EXP_LIMIT, Dialect, FittingForms

# exp raises "value out of range" on overflow (exp(709.8)) and on a result that underflows to zero
# (exp(-745.2)), measured on PostgreSQL 15; DOUBLE_EXP_LIMIT keeps every argument inside both bounds.
# isfinite exists for dates and timestamps only; PostgreSQL orders NaN equal to itself, so NOT IN finds it.
# The planner inlines a subquery's expressions into every aggregate above it; OFFSET 0 fences each one.
# No SQL function raises an error with a message, so unseen='error' is refused. No quantile_cont: the
# ordered-set aggregate percentile_cont (the same interpolation); no hash of a row: md5 of its text.
# TABLESAMPLE applies to tables only (not views or subqueries), and no reservoir sample: a row-hash filter. No
# hexadecimal literal in a cast to BIGINT: the hex digits go through a BIT(32) string. lgamma only arrives in
# PostgreSQL 18: Stirling's series stands in for it.
# PostgreSQL writes the DOUBLE 1 as '1' where DuckDB writes '1.0' (see number_text).
POSTGRES = Dialect(
    name="postgres",
    exp_limit=DOUBLE_EXP_LIMIT,
    raise_function=None,
    has_booleans=True,
    fitting=FittingForms(
        clamps_exp=True,
        finite_test="not_in",
        sorted_levels="array_agg",
        fences_subqueries=True,
        quantiles="percentile_cont",
        row_hash="md5_text",
        sample="system_hash",
        hex_number="bit_string",
        log_gamma="series",
    ),
)
