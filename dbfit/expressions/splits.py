"""Splits of a source by the hash of a key: a holdout share or k folds, as SQL conditions (no I/O).

A row's place comes from the first 32 bits of the MD5 of its key's text, so the same rows fall in the same part
on every run and every engine that computes MD5 alike (common practice for reproducible splits). The trees are
built in DuckDB's terms (CAST('0x' || hex AS BIGINT)); dbfit.expressions.dialects.rewrite spells the hex number
for PostgreSQL and Spark, and dbfit.expressions.dialects.number_text writes the key's text as DuckDB does.
"""

from __future__ import annotations

import dataclasses

from sqlglot import exp

from dbfit.errors import FitError
from dbfit.expressions import builders as sb
from dbfit.expressions import dialects
from dbfit.expressions.dialects.rewrite import adapt
from dbfit.expressions.formula import parse_expression
from dbfit.expressions.source import source_relation


def unit_hash(keys: list[exp.Expression]) -> exp.Expression:
    """A number in [0, 1) from the first 32 bits of MD5 of the keys' text joined by '|'."""
    texts = [exp.Cast(this=k.copy(), to=exp.DataType.build("VARCHAR")) for k in keys]
    joined = texts[0] if len(texts) == 1 else exp.ConcatWs(expressions=[exp.Literal.string("|"), *texts])
    hexadecimal = exp.Concat(
        expressions=[
            exp.Literal.string("0x"),
            exp.Left(this=exp.MD5(this=joined), expression=exp.Literal.number(8)),
        ]
    )
    return sb.div(
        exp.Cast(this=hexadecimal, to=exp.DataType.build("BIGINT")), exp.Literal.number(4294967296.0)
    )


def holdout_condition(keys: list[exp.Expression], share: float, *, held_out: bool) -> exp.Expression:
    """The rows whose hash falls below ``share`` are held out; the others train."""
    if isinstance(share, bool) or not isinstance(share, (int, float)) or not 0.0 < share < 1.0:
        raise FitError(f"the holdout share must lie strictly between 0 and 1 (got {share!r})")
    unit = unit_hash(keys)
    return (exp.LT if held_out else exp.GTE)(this=unit, expression=sb.number(share))


@dataclasses.dataclass(frozen=True)
class Holdout:
    """Hold out the rows whose key hashes below ``share``; fit on the rest and assess on them."""

    key: str
    share: float = 0.2


@dataclasses.dataclass(frozen=True)
class KFold:
    """Assign rows to ``folds`` parts by the hash of ``key``, for cross-validation."""

    key: str
    folds: int = 5


def labelled_rows(relation: exp.Expression, split: Holdout | KFold) -> exp.Select:
    """Every row of ``relation`` with a column ``dbfit_part``: 'train'/'holdout', or the fold number."""
    keys = [parse_expression(split.key, "split key", f"the {type(split).__name__} key")]
    if isinstance(split, Holdout):
        part: exp.Expression = exp.If(
            this=holdout_condition(keys, split.share, held_out=True),
            true=exp.Literal.string("holdout"),
            false=exp.Literal.string("train"),
        )
    else:
        if not isinstance(split.folds, int) or split.folds < 2:
            raise FitError(f"folds must be a whole number of at least 2 (got {split.folds!r})")
        part = exp.Cast(
            this=exp.Floor(this=sb.mul(unit_hash(keys), exp.Literal.number(split.folds))),
            to=exp.DataType.build("INTEGER"),
        )
    return exp.select("*", exp.alias_(part, "dbfit_part", quoted=True)).from_(relation.copy())


def part_condition(split: Holdout | KFold, part: str | int, *, keep: bool = True) -> exp.Expression:
    """The WHERE condition of one part of the split (or, with ``keep=False``, of all the others).

    A row whose key hashes to NULL trains (as in :func:`labelled_rows`) and belongs to no fold.
    """
    keys = [parse_expression(split.key, "split key")]
    if isinstance(split, Holdout):
        below = holdout_condition(keys, split.share, held_out=True)
        held_out = exp.Coalesce(this=below, expressions=[exp.false()])
        wanted = (part == "holdout") == keep
        return held_out if wanted else exp.Not(this=exp.Paren(this=held_out))
    if not isinstance(split.folds, int) or split.folds < 2:
        raise FitError(f"folds must be a whole number of at least 2 (got {split.folds!r})")
    fold = exp.Floor(this=sb.mul(unit_hash(keys), exp.Literal.number(split.folds)))
    return (exp.EQ if keep else exp.NEQ)(this=fold, expression=exp.Literal.number(part))


def part_relation(
    relation: exp.Expression, split: Holdout | KFold, part: str | int, *, keep: bool = True
) -> exp.Expression:
    """The rows of ``relation`` in ``part`` (or, with ``keep=False``, all the others), as an aliased subquery.

    The rows keep exactly the source's columns (no part column to drop), so the SELECT is portable SQL.
    """
    rows = exp.select("*").from_(relation.copy()).where(part_condition(split, part, keep=keep))
    return rows.subquery("dbfit_part_rows")


def part_source(
    source: str, split: Holdout | KFold, part: str | int, *, keep: bool = True, dialect: str = "duckdb"
) -> str:
    """One part of the split of ``source`` as a SELECT (text written by sqlglot from the parsed source).

    dbfit reads source text in DuckDB's terms on every engine and rewrites the hash for the engine it runs on,
    so the default text serves as the source of a fit or an assessment on PostgreSQL and Spark as well.
    ``dialect="postgres"`` or ``"spark"`` writes the SELECT to run on that engine directly (in psql, say).
    """
    rows = exp.select("*").from_(part_relation(source_relation(source), split, part, keep=keep))
    return adapt(rows, dialects.dialect(dialect)).sql(dialect)
