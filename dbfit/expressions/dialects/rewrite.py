"""A fitting query tree, built in DuckDB's terms, rewritten in the forms an engine's :class:`Dialect` names.

sqlglot then writes the rewritten tree in that engine's dialect; DuckDB's own trees pass unchanged.
"""

from __future__ import annotations

from sqlglot import exp

from dbfit.errors import DbfitError
from dbfit.expressions.dialects import Dialect, FittingForms

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
    tree = query.copy().transform(lambda node: _rewrite(node, forms, dialect.exp_limit))
    if forms.fences_subqueries:
        for subquery in list(tree.find_all(exp.Subquery)):
            inner = subquery.this
            if isinstance(inner, exp.Select) and not inner.args.get("offset") and not inner.args.get("limit"):
                inner.set("offset", exp.Offset(expression=exp.Literal.number(0)))
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
    if isinstance(node, exp.Cast) and forms.row_hash != "hash":
        digits = _hexadecimal_digits(node)
        if digits is not None:
            return _hexadecimal_number(digits, forms.row_hash)
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


def _hexadecimal_digits(node: exp.Cast) -> exp.Expression | None:
    """The digits of CAST('0x' || digits AS BIGINT), the split's hash (:func:`dbfit.expressions.splits.
    unit_hash`): a form DuckDB reads and PostgreSQL before 16 and Spark do not; None for any other cast."""
    text = node.this
    if isinstance(text, exp.DPipe):
        parts = [text.this, text.expression]
    elif isinstance(text, exp.Concat):
        parts = list(text.expressions)
    else:
        return None
    is_prefix = len(parts) == 2 and isinstance(parts[0], exp.Literal) and parts[0].this == "0x"
    return parts[1] if is_prefix and node.to.this == exp.DataType.Type.BIGINT else None


def _hexadecimal_number(digits: exp.Expression, form: str) -> exp.Expression:
    """The hexadecimal ``digits`` (at most 15) as a BIGINT: PostgreSQL through a bit string, Spark by conv."""
    if form == "md5_text":
        bits = exp.Cast(
            this=exp.DPipe(this=exp.Literal.string("x"), expression=digits.copy()),
            to=exp.DataType.build("BIT(32)", dialect="postgres"),
        )
        return exp.Cast(this=bits, to=exp.DataType.build("BIGINT"))
    converted = exp.Anonymous(
        this="conv", expressions=[digits.copy(), exp.Literal.number(16), exp.Literal.number(10)]
    )
    return exp.Cast(this=converted, to=exp.DataType.build("BIGINT"))


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
