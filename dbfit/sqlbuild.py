"""Small builders for sqlglot trees used by the statistics query and the scoring SQL."""

from __future__ import annotations

import math
from functools import reduce

from sqlglot import exp


def number(value: float) -> exp.Expression:
    """A numeric literal that round-trips the float exactly (shortest repr); negatives as unary minus."""
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"cannot write the non-finite number {value!r} into SQL")
    literal = exp.Literal.number(repr(abs(value)))
    return exp.Neg(this=literal) if math.copysign(1.0, value) < 0 and value != 0 else literal


def column(name: str) -> exp.Column:
    return exp.column(name, quoted=True)


def as_double(node: exp.Expression) -> exp.Expression:
    return exp.Cast(this=node, to=exp.DataType.build("DOUBLE"))


def paren(node: exp.Expression) -> exp.Expression:
    return exp.Paren(this=node)


def mul(*nodes: exp.Expression) -> exp.Expression:
    return reduce(lambda a, b: exp.Mul(this=a, expression=b), nodes)


def add(*nodes: exp.Expression) -> exp.Expression:
    return reduce(lambda a, b: exp.Add(this=a, expression=b), nodes)


def sub(a: exp.Expression, b: exp.Expression) -> exp.Expression:
    return exp.Sub(this=a, expression=b)


def div(a: exp.Expression, b: exp.Expression) -> exp.Expression:
    return exp.Div(this=a, expression=b)


def all_not_null(nodes: list[exp.Expression]) -> exp.Expression:
    checks = [exp.Not(this=exp.Is(this=node.copy(), expression=exp.Null())) for node in nodes]
    return reduce(lambda a, b: exp.And(this=a, expression=b), checks) if checks else exp.true()


def func(name: str, *args: exp.Expression) -> exp.Expression:
    return exp.Anonymous(this=name, expressions=list(args))


def agg_sum(node: exp.Expression) -> exp.Expression:
    return exp.Sum(this=node)


def exp_neg_abs(eta: exp.Expression) -> exp.Expression:
    """exp(-|eta|): in (0, 1], so nothing built from it can overflow."""
    return exp.Exp(this=exp.Neg(this=exp.Abs(this=eta)))


def stable_sigmoid(eta: exp.Expression, e: exp.Expression) -> exp.Expression:
    """1 / (1 + exp(-eta)) written with e = exp(-|eta|), exact and finite for any eta."""
    one = exp.Literal.number(1)
    return exp.If(
        this=exp.GTE(this=eta, expression=exp.Literal.number(0)),
        true=div(one, paren(add(one, e))),
        false=div(e, paren(add(one.copy(), e.copy()))),
    )


def stable_log1pexp(eta: exp.Expression, e: exp.Expression) -> exp.Expression:
    """log(1 + exp(eta)) = max(eta, 0) + log(1 + exp(-|eta|)), finite for any eta."""
    positive_part = exp.If(this=exp.GT(this=eta, expression=exp.Literal.number(0)), true=eta.copy(), false=exp.Literal.number(0))
    return add(positive_part, exp.Ln(this=add(exp.Literal.number(1), e)))
