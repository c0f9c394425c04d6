"""DuckDB: the dialect every dbfit query tree is built in, so nothing is rewritten."""

from __future__ import annotations

from dbfit.expressions.dialects import DOUBLE_EXP_LIMIT, Dialect, FittingForms

# DuckDB's exp returns 0 or Infinity out of range instead of raising: the limit only bounds the scoring SQL,
# which writes the same guard in every dialect so that all of them give the same probabilities.
DUCKDB = Dialect(
    name="duckdb",
    exp_limit=DOUBLE_EXP_LIMIT,
    raise_function="error",
    has_booleans=True,
    fitting=FittingForms(
        clamps_exp=False, finite_test="isfinite", sorted_levels="array_agg", fences_subqueries=False
    ),
)
