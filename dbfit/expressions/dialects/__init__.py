"""SQL dialects as data: what each engine or scoring target writes differently from DuckDB.

dbfit builds every query tree once, in DuckDB's terms. A :class:`Dialect` holds one dialect's differences
as values; :func:`dbfit.expressions.dialects.rewrite.adapt` turns a fitting query into that dialect's form
and the scoring SQL reads the scoring differences from it. One module per engine (``duckdb``, ``postgres``,
``spark``) and one for the targets dbfit only writes scoring SQL for (``scoring_targets``).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cache
from typing import Literal

from dbfit.errors import DbfitError

# exp(x) of an IEEE 754 double overflows beyond x = 709.78, and exp(-x) falls below the smallest normal double
# (2.2e-308) beyond x = 708.40 (common practice). 708 is the largest whole number inside both bounds: exp(708)
# is about 3.0e307 and exp(-708) about 3.3e-308.
DOUBLE_EXP_LIMIT = 708.0


@dataclass(frozen=True)
class FittingForms:
    """How the fitting queries (aggregates over the source) are written on an engine dbfit fits on."""

    clamps_exp: bool  # exp() raises out of range, so every exp argument is clamped to +/- exp_limit
    finite_test: Literal["isfinite", "not_in", "isnan"]  # isfinite(x); "not_in": x NOT IN (+-Infinity, NaN)
    sorted_levels: Literal["array_agg", "collect_set"]  # the sorted list of a column's distinct values
    fences_subqueries: bool  # each subquery gets OFFSET 0, so the planner computes it once
    # Exact quantiles with linear interpolation between order statistics (Hyndman and Fan 1996, definition 7):
    # quantile_cont(x, [q, ...]); "percentile_cont": percentile_cont(ARRAY[q, ...]) WITHIN GROUP (ORDER BY x);
    # "percentile": percentile(x, array(q, ...)). All three give the same numbers.
    quantiles: Literal["quantile_cont", "percentile_cont", "percentile"] = "quantile_cont"
    # A 64-bit hash of a whole row, summed exactly for the source's fingerprint: DuckDB's hash(row);
    # "md5_text": the first 16 hex digits of md5 of the row's text as a BIGINT; "xxhash64_text": xxhash64 of
    # the row's text. Each engine's checksum differs from the others' but is stable on that engine.
    row_hash: Literal["hash", "md5_text", "xxhash64_text"] = "hash"
    # A sample of the complete rows (dbfit.fitting.sample_fit): "system_reservoir": a table's row blocks by
    # TABLESAMPLE SYSTEM ... REPEATABLE, any other source by a reservoir; "system_hash": a table's row blocks,
    # any other source the rows whose row hash falls in a share of its range; "hash": that filter always.
    sample: Literal["system_reservoir", "system_hash", "hash"] = "system_reservoir"
    # The first 32 bits of an MD5 as a whole number (the split hash of dbfit.expressions.splits): DuckDB reads
    # CAST('0x' || hex AS BIGINT); "bit_string": ('x' || hex)::BIT(32)::BIGINT; "conv": conv(hex, 16, 10).
    hex_number: Literal["hex_literal", "bit_string", "conv"] = "hex_literal"
    # lgamma(x) (the log binomial coefficients of grouped targets): the engine's own, or "series": Stirling's
    # series, exact to a few units in the last place (see dbfit.expressions.dialects.rewrite).
    log_gamma: Literal["lgamma", "series"] = "lgamma"


@dataclass(frozen=True)
class Dialect:
    """One SQL dialect's differences from DuckDB's; ``name`` is sqlglot's name for it, as users write it."""

    name: str
    exp_limit: float  # exp(x) is evaluated for |x| below this only (clamped when fitting, 0 when scoring)
    raise_function: str | None  # fails the query with a message (scoring with unseen='error'); None: none
    has_booleans: bool  # TRUE / FALSE exist; otherwise boolean levels are written as the BIT values 1 / 0
    fitting: FittingForms | None  # None: a scoring target only, dbfit does not fit models on it


def dialect(name: str) -> Dialect:
    """The dialect called ``name``; :class:`DbfitError` naming the supported ones for any other name."""
    known = _known()
    if name not in known:
        raise DbfitError(f"dialect {name!r} is not supported; choose one of {', '.join(known)}")
    return known[name]


def supported() -> tuple[str, ...]:
    """The names of every dialect dbfit writes SQL for: the engines first, then the scoring targets."""
    return tuple(_known())


@cache
def _known() -> dict[str, Dialect]:
    from dbfit.expressions.dialects import duckdb, postgres, scoring_targets, spark

    return {d.name: d for d in (duckdb.DUCKDB, postgres.POSTGRES, spark.SPARK, *scoring_targets.TARGETS)}
