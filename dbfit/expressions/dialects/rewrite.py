"""A fitting query tree, built in DuckDB's terms, rewritten in the forms an engine's :class:`Dialect` names.

sqlglot then writes the rewritten tree in that engine's dialect; DuckDB's own trees pass unchanged.
"""

from __future__ import annotations

import math
from collections.abc import Callable

from sqlglot import exp

from dbfit.errors import DbfitError
from dbfit.expressions.dialects import Dialect, FittingForms
from dbfit.expressions.dialects.date_parts import write_date_parts
from dbfit.expressions.dialects.number_text import write_number_texts

# The forms the trees are built in (DuckDB's): queries in these forms run as built.
AS_BUILT = FittingForms(
    clamps_exp=False, finite_test="isfinite", sorted_levels="array_agg", fences_subqueries=False
)


def adapt(query: exp.Expression, dialect: Dialect) -> exp.Expression:
    """A copy of ``query`` in the forms of ``dialect`` (``query`` itself when nothing differs)."""
    forms = dialect.fitting
    if forms is None:
        raise DbfitError(f"dbfit does not fit models on {dialect.name}; it writes scoring SQL for it only")
    if forms == AS_BUILT:
        return query
    tree = _bottom_up(
        write_number_texts(query.copy(), dialect.name), lambda node: _rewrite(node, forms, dialect.exp_limit)
    )
    if forms.fences_subqueries:
        for subquery in list(tree.find_all(exp.Subquery)):
            inner = subquery.this
            if isinstance(inner, exp.Select) and not inner.args.get("offset") and not inner.args.get("limit"):
                inner.set("offset", exp.Offset(expression=exp.Literal.number(0)))
    return write_date_parts(tree, dialect.name)


def _bottom_up(tree: exp.Expression, rewrite: Callable[[exp.Expression], exp.Expression]) -> exp.Expression:
    """``tree`` with ``rewrite`` applied to every node, children before their parent, so that a rewritten
    node's arguments (an exp inside an exp, the key inside a split hash) are in the engine's forms too."""
    for node in reversed([n for n in tree.walk(bfs=False) if isinstance(n, exp.Expression)]):
        replacement = rewrite(node)
        if replacement is not node:
            if node is tree:
                return replacement
            node.replace(replacement)
    return tree


def _rewrite(node: exp.Expression, forms: FittingForms, limit: float) -> exp.Expression:
    if forms.clamps_exp and isinstance(node, exp.Exp):
        return exp.Exp(this=_clamped(node.this, limit))
    is_isfinite = isinstance(node, exp.Anonymous) and node.name.lower() == "isfinite"
    if is_isfinite and forms.finite_test != "isfinite":
        return _finite(node.expressions[0], forms.finite_test)
    if isinstance(node, exp.Anonymous) and node.name.lower() == "quantile_cont":
        return _quantiles(node, forms.quantiles)
    if isinstance(node, exp.Cast) and _is_row_hash(node.this) and forms.row_hash != "hash":
        return _row_hash(node.this.expressions[0], forms.row_hash)
    digits = _hex_digits(node)
    if digits is not None and forms.hex_number != "hex_literal":
        return _hex_number(digits, forms.hex_number)
    is_lgamma = (
        isinstance(node, exp.Anonymous) and node.name.lower() == "lgamma" and len(node.expressions) == 1
    )
    if is_lgamma and forms.log_gamma == "series":
        return _log_gamma(node.expressions[0])
    levels = isinstance(node, exp.ArrayAgg) and isinstance(node.this, exp.Order)
    if levels and forms.sorted_levels == "collect_set":
        distinct = node.this.this
        return exp.Anonymous(
            this="array_sort",
            expressions=[exp.Anonymous(this="collect_set", expressions=[distinct.expressions[0].copy()])],
        )
    return node


def _clamped(argument: exp.Expression, limit: float) -> exp.Expression:
    low, high = exp.Neg(this=exp.Literal.number(limit)), exp.Literal.number(limit)
    return exp.Case(
        ifs=[
            exp.If(this=exp.LT(this=argument.copy(), expression=low.copy()), true=low),
            exp.If(this=exp.GT(this=argument.copy(), expression=high.copy()), true=high),
        ],
        default=argument.copy(),
    )


def _finite(value: exp.Expression, test: str) -> exp.Expression:
    """isfinite(value) without isfinite: not +/-Infinity, and not NaN (listed, or through isnan)."""

    def double(text: str) -> exp.Expression:
        return exp.Cast(this=exp.Literal.string(text), to=exp.DataType.build("DOUBLE"))

    infinite = [double("Infinity"), double("-Infinity")]
    if test == "not_in":
        return exp.Not(this=exp.In(this=value.copy(), expressions=[*infinite, double("NaN")]))
    return exp.and_(
        exp.Not(this=exp.In(this=value.copy(), expressions=infinite)),
        exp.Not(this=exp.Anonymous(this="isnan", expressions=[value.copy()])),
    )


def _quantiles(node: exp.Anonymous, form: str) -> exp.Expression:
    """quantile_cont(value, [q, ...]) in the engine's exact form (the same interpolation, an array back)."""
    value, fractions = node.expressions[0], node.expressions[1]
    if form == "percentile_cont":
        return exp.WithinGroup(
            this=exp.PercentileCont(this=fractions.copy()),
            expression=exp.Order(expressions=[exp.Ordered(this=value.copy())]),
        )
    if form == "percentile":
        return exp.Anonymous(this="percentile", expressions=[value.copy(), fractions.copy()])
    return node


def _is_row_hash(node: exp.Expression) -> bool:
    return isinstance(node, exp.Anonymous) and node.name.lower() == "hash" and len(node.expressions) == 1


def _row_hash(row: exp.Expression, form: str) -> exp.Expression:
    """A 64-bit hash of the whole row ``row`` (a table alias) as an exact integer, without DuckDB's hash."""
    if form == "md5_text":
        text = exp.Cast(this=row.copy(), to=exp.DataType.build("TEXT"))
        digits = exp.Substring(
            this=exp.MD5(this=text), start=exp.Literal.number(1), length=exp.Literal.number(16)
        )
        bits = exp.Cast(
            this=exp.DPipe(this=exp.Literal.string("x"), expression=digits),
            to=exp.DataType.build("BIT(64)", dialect="postgres"),
        )
        return exp.Cast(this=bits, to=exp.DataType.build("BIGINT"))
    # Spark: the row's columns as one struct, as text (NULLs written where they stand), hashed.
    text = exp.Cast(
        this=exp.Anonymous(this="struct", expressions=[exp.Star()]), to=exp.DataType.build("STRING")
    )
    hashed = exp.Anonymous(this="xxhash64", expressions=[text])
    return exp.Cast(this=hashed, to=exp.DataType.build("DECIMAL(38, 0)"))


def _hex_digits(node: exp.Expression) -> exp.Expression | None:
    """The hex digits of CAST('0x' || digits AS BIGINT) (built as CONCAT, read back from text as ||)."""
    if not isinstance(node, exp.Cast) or not node.to.is_type(exp.DataType.Type.BIGINT):
        return None
    inner = node.this
    if isinstance(inner, exp.DPipe):
        parts = [inner.this, inner.expression]
    elif isinstance(inner, exp.Concat):
        parts = list(inner.expressions)
    else:
        return None
    is_prefix = isinstance(parts[0], exp.Literal) and parts[0].is_string and parts[0].this == "0x"
    return parts[1] if len(parts) == 2 and is_prefix else None


def _hex_number(digits: exp.Expression, form: str) -> exp.Expression:
    """Up to 8 hex digits as the BIGINT they spell (0 .. 2^32 - 1), without a hexadecimal literal."""
    if form == "bit_string":
        bits = exp.Cast(
            this=exp.DPipe(this=exp.Literal.string("x"), expression=digits.copy()),
            to=exp.DataType.build("BIT(32)", dialect="postgres"),
        )
        return exp.Cast(this=bits, to=exp.DataType.build("BIGINT"))
    decimal = exp.Anonymous(
        this="conv", expressions=[digits.copy(), exp.Literal.number(16), exp.Literal.number(10)]
    )
    return exp.Cast(this=decimal, to=exp.DataType.build("BIGINT"))


# B_2k / (2k (2k - 1)) for k = 1 .. 7: the coefficients of Stirling's series for ln Gamma (Abramowitz and
# Stegun 1964, 6.1.40). The series envelops ln Gamma(x) for x > 0: its error is below the first omitted term,
# 3617 / (122400 x^15), which is under 3e-17 for x >= 10.
_STIRLING = (1 / 12, -1 / 360, 1 / 1260, -1 / 1680, 1 / 1188, -691 / 360360, 1 / 156)
_SERIES_FROM = 10


def _log_gamma(x: exp.Expression) -> exp.Expression:
    """ln Gamma(x) for x > 0 (NULL otherwise) from arithmetic and ln alone, for engines without lgamma.

    Stirling's series for x >= 10; below, the recurrence Gamma(x + 10) = x (x + 1) ... (x + 9) Gamma(x)
    (Abramowitz and Stegun 1964, 6.1.15) carries x into the series' range, where the product stays below 20!.
    A few units in the last place from the C library's lgamma, in the same scan as the rest of the sums: a
    grouped query over the distinct (trials, successes) pairs, with lgamma in numpy, would cost a second scan
    and a result as large as the number of distinct pairs.
    """
    shifted = exp.Paren(this=exp.Add(this=x.copy(), expression=exp.Literal.number(_SERIES_FROM)))
    product: exp.Expression = exp.Paren(this=x.copy())
    for step in range(1, _SERIES_FROM):
        term = exp.Paren(this=exp.Add(this=x.copy(), expression=exp.Literal.number(step)))
        product = exp.Mul(this=product, expression=term)
    return exp.Case(
        ifs=[
            exp.If(
                this=exp.GTE(this=x.copy(), expression=exp.Literal.number(_SERIES_FROM)),
                true=_stirling(exp.Paren(this=x.copy())),
            ),
            exp.If(
                this=exp.GT(this=x.copy(), expression=exp.Literal.number(0)),
                true=exp.Sub(this=_stirling(shifted), expression=exp.Ln(this=product)),
            ),
        ]
    )


def _stirling(x: exp.Expression) -> exp.Expression:
    """(x - 1/2) ln x - x + ln(2 pi) / 2 + sum_k c_k / x^(2k - 1), the sum in Horner form in 1 / x^2."""
    inverse_square = exp.Div(
        this=exp.Literal.number(1), expression=exp.Paren(this=exp.Mul(this=x.copy(), expression=x.copy()))
    )
    tail: exp.Expression = exp.Literal.number(repr(_STIRLING[-1]))
    for coefficient in reversed(_STIRLING[:-1]):
        scaled = exp.Mul(this=exp.Paren(this=inverse_square.copy()), expression=exp.Paren(this=tail))
        tail = exp.Add(this=_signed(coefficient), expression=scaled)
    half_log_two_pi = exp.Literal.number(repr(0.5 * math.log(2 * math.pi)))
    leading = exp.Mul(
        this=exp.Paren(this=exp.Sub(this=x.copy(), expression=exp.Literal.number(0.5))),
        expression=exp.Ln(this=x.copy()),
    )
    main = exp.Add(this=exp.Sub(this=leading, expression=x.copy()), expression=half_log_two_pi)
    return exp.Paren(
        this=exp.Add(this=main, expression=exp.Div(this=exp.Paren(this=tail), expression=x.copy()))
    )


def _signed(value: float) -> exp.Expression:
    literal = exp.Literal.number(repr(abs(value)))
    return exp.Paren(this=exp.Neg(this=literal)) if value < 0 else literal
