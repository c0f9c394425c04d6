"""Dialects dbfit writes scoring SQL for but does not fit on: Snowflake, BigQuery, T-SQL and SQLite.

The scoring SQL guards exp with the same limit on every target, so all of them give the same probabilities.
"""

from __future__ import annotations

from dbfit.expressions.dialects import DOUBLE_EXP_LIMIT, Dialect


def _target(name: str, raise_function: str | None, has_booleans: bool = True) -> Dialect:
    return Dialect(
        name=name,
        exp_limit=DOUBLE_EXP_LIMIT,
        raise_function=raise_function,
        has_booleans=has_booleans,
        fitting=None,
    )


SNOWFLAKE = _target("snowflake", raise_function=None)
BIGQUERY = _target("bigquery", raise_function="ERROR")
# T-SQL has no boolean values: a BIT column holds 1 and 0.
TSQL = _target("tsql", raise_function=None, has_booleans=False)
SQLITE = _target("sqlite", raise_function=None)

TARGETS = (SNOWFLAKE, BIGQUERY, TSQL, SQLITE)
