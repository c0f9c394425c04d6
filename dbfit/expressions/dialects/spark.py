"""Apache Spark SQL: no isfinite, and a sorted set in place of ARRAY_AGG(DISTINCT ... ORDER BY ...)."""

from __future__ import annotations

from dbfit.expressions.dialects import DOUBLE_EXP_LIMIT, Dialect, FittingForms

# Spark's exp returns 0 or Infinity out of range; its arguments are clamped all the same, so an exp() in a
# formula gives the same finite numbers as on PostgreSQL. No quantile_cont: percentile (exact, the same
# interpolation); the row hash is xxhash64 of the row's text (hashing the columns themselves skips NULLs, so
# (NULL, 1) and (1, NULL) would hash alike). Samples by a row-hash filter: Spark 4 reads
# TABLESAMPLE (p PERCENT) REPEATABLE (seed), but sqlglot 30 writes it with SEED, which Spark refuses; its
# sample reads every row anyway. Hex digits become a number through conv(hex, 16, 10); there is
# no lgamma: Stirling's series stands in for it.
# Spark writes the DOUBLE 1e7 as '1.0E7' where DuckDB writes '10000000.0' (see number_text).
SPARK = Dialect(
    name="spark",
    exp_limit=DOUBLE_EXP_LIMIT,
    raise_function="raise_error",
    has_booleans=True,
    fitting=FittingForms(
        clamps_exp=True,
        finite_test="isnan",
        sorted_levels="collect_set",
        fences_subqueries=False,
        quantiles="percentile",
        row_hash="xxhash64_text",
        sample="hash",
        hex_number="conv",
        log_gamma="series",
    ),
)
