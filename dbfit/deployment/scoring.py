"""Scoring SQL: the linear predictor and probability of a fitted model as plain, portable SQL.

The linear predictor on the original scale is intercept + sum_j b_j * (product of the column's numeric
factors) * (its level indicators); aliased terms (no estimate) contribute nothing. Categorical levels are
written with CASE. A NULL in any factor (or the offset) gives NULL scores; a level never seen in training
follows the ``unseen`` policy. The probability is the logistic function written with e = exp(-|eta|), which
cannot overflow; exp() is not called for |eta| at or beyond the dialect's exp limit, where e is written as 0
(see :data:`dbfit.expressions.dialects.DOUBLE_EXP_LIMIT`); a dialect's other differences (the function that
raises, T-SQL's BIT levels) come from its :class:`~dbfit.expressions.dialects.Dialect` value. Standard
errors of the linear predictor are sqrt(x' V x) from the stored covariance V (delta method), and the
probability interval maps the Wald interval of the linear predictor through the logistic function (common
practice; see Agresti 2013, Categorical Data Analysis, 3rd ed., Wiley, on inference for logistic regression,
cited from memory).
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from statistics import NormalDist
from typing import Any

from sqlglot import exp

from dbfit.design.layout import Design, DesignColumn, Factor
from dbfit.errors import DbfitError
from dbfit.expressions import builders as sb
from dbfit.expressions import dialects
from dbfit.expressions.dialects import Dialect
from dbfit.expressions.dialects.duckdb import DUCKDB
from dbfit.expressions.source import source_relation

UNSEEN_POLICIES = ("null", "reference", "error")
SOURCE_ALIAS, SCORED_ALIAS = "dbfit_source", "dbfit_scored"
SCORE_COLUMNS = ("linear_predictor", "probability")
INTERVAL_COLUMNS = ("linear_predictor_se", "probability_low", "probability_high")

INTEGER_TYPE = re.compile(r"^U?(TINYINT|SMALLINT|INTEGER|BIGINT|HUGEINT)$|^INT\d*$", re.IGNORECASE)

Coefficient = Callable[[int], "exp.Expression | None"]


def constant_coefficients(model: Any) -> Coefficient:
    """Estimates written in as exact DOUBLE constants; None (left out) for aliased terms."""

    def coefficient(parameter: int) -> exp.Expression | None:
        value = float(model.estimates[parameter])
        return double(value) if value == value else None

    return coefficient


def double(value: float) -> exp.Expression:
    return sb.as_double(sb.number(value))


def check_options(dialect: Dialect, unseen: str) -> None:
    if unseen not in UNSEEN_POLICIES:
        raise DbfitError(f"unseen={unseen!r} is not a policy; choose one of {', '.join(UNSEEN_POLICIES)}")
    if unseen == "error" and dialect.raise_function is None:
        raising = [name for name in dialects.supported() if dialects.dialect(name).raise_function is not None]
        raise DbfitError(
            f"unseen='error' needs an SQL function that raises, which {dialect.name} lacks; "
            f"use 'null' or 'reference' (or one of {', '.join(raising)})"
        )


def linear_predictor(
    design: Design, coefficient: Coefficient, unseen: str, dialect: Dialect
) -> exp.Expression:
    """The guarded linear predictor: NULL for NULL inputs, the unseen policy, else the CAST sum."""
    has_intercept = 1 if design.intercept else 0
    pieces: list[exp.Expression] = []
    if design.intercept and (intercept := coefficient(0)) is not None:
        pieces.append(intercept)
    for term_columns in _columns_by_term(design):
        kept = [(j, c) for j, c in term_columns if coefficient(j + has_intercept) is not None]
        if kept:
            pieces.append(
                _term_contribution(design, [(coefficient(j + has_intercept), c) for j, c in kept], dialect)
            )
    if design.offset is not None:
        pieces.append(sb.as_double(design.offset.copy()))
    total = sb.as_double(sb.add(*pieces)) if pieces else double(0.0)
    return _guarded(design, total, unseen, dialect)


def standard_error(design: Design, covariance: Any, unseen: str, dialect: Dialect) -> exp.Expression:
    """sqrt(x' V x) over the terms with an estimate (delta method for the linear predictor)."""
    has_intercept = 1 if design.intercept else 0
    rows: list[tuple[int, exp.Expression]] = []
    if design.intercept and covariance[0, 0] == covariance[0, 0]:
        rows.append((0, double(1.0)))
    for j, column in enumerate(design.columns):
        k = j + has_intercept
        if covariance[k, k] == covariance[k, k]:
            rows.append((k, _column_value(design, column, dialect)))
    pieces: list[exp.Expression] = []
    for a, (k, x_k) in enumerate(rows):
        pieces.append(sb.mul(double(float(covariance[k, k])), sb.paren(x_k.copy()), sb.paren(x_k.copy())))
        for l, x_l in rows[a + 1 :]:
            pieces.append(
                sb.mul(double(2.0 * float(covariance[k, l])), sb.paren(x_k.copy()), sb.paren(x_l.copy()))
            )
    variance = sb.add(*pieces) if pieces else double(0.0)
    return _guarded(
        design, exp.Sqrt(this=exp.Abs(this=variance)), "null" if unseen == "error" else unseen, dialect
    )


def probability(eta: exp.Expression, exp_limit: float) -> exp.Expression:
    """1 / (1 + exp(-eta)) via e = exp(-|eta|), not called from ``exp_limit`` on (e = 0); NULL stays NULL."""
    magnitude, limit = exp.Abs(this=eta.copy()), sb.number(exp_limit)
    e = exp.Case(
        ifs=[
            exp.If(
                this=exp.LT(this=magnitude, expression=limit),
                true=exp.Exp(this=exp.Neg(this=magnitude.copy())),
            ),
            exp.If(this=exp.GTE(this=magnitude.copy(), expression=limit.copy()), true=double(0.0)),
        ]
    )
    one = double(1.0)
    return exp.Case(
        ifs=[
            exp.If(
                this=exp.GTE(this=eta.copy(), expression=sb.number(0)),
                true=sb.div(one, sb.paren(sb.add(one.copy(), e))),
            ),
            exp.If(
                this=exp.LT(this=eta.copy(), expression=sb.number(0)),
                true=sb.div(e.copy(), sb.paren(sb.add(one.copy(), e.copy()))),
            ),
        ]
    )


def scoring_query(
    model: Any,
    relation: exp.Expression,
    *,
    coefficient: Coefficient | None = None,
    joined: exp.Expression | None = None,
    join_on: exp.Expression | None = None,
    unseen: str = "null",
    with_standard_error: bool = False,
    level: float = 0.95,
    dialect: Dialect = DUCKDB,
) -> exp.Select:
    """SELECT every column of ``relation`` plus the score columns (and on request the interval columns).

    ``joined`` is a relation the ``coefficient`` expressions read: cross-joined (one row), or LEFT JOINed
    on ``join_on`` (one row per segment, see :mod:`dbfit.deployment.segment_views`).
    """
    check_options(dialect, unseen)
    design = model.design
    relation = _aliased(relation)
    eta = linear_predictor(design, coefficient or constant_coefficients(model), unseen, dialect)
    inner = exp.select(
        exp.Column(this=exp.Star(), table=exp.to_identifier(SOURCE_ALIAS)),
        exp.alias_(eta, "linear_predictor", quoted=True),
    )
    if with_standard_error:
        se = standard_error(design, model.covariance, unseen, dialect)
        inner = inner.select(exp.alias_(se, "linear_predictor_se", quoted=True))
    inner = inner.from_(relation)
    if joined is not None and join_on is not None:
        inner = inner.join(joined, on=join_on, join_type="LEFT")
    elif joined is not None:
        inner = inner.join(joined, join_type="CROSS")
    lp = sb.column("linear_predictor")
    outer = exp.select(
        exp.Column(this=exp.Star(), table=exp.to_identifier(SCORED_ALIAS)),
        exp.alias_(probability(lp, dialect.exp_limit), "probability", quoted=True),
    )
    if with_standard_error:
        if not 0.0 < level < 1.0:
            raise DbfitError(f"level must be between 0 and 1 (got {level})")
        z = double(NormalDist().inv_cdf(0.5 + level / 2.0))
        spread = sb.mul(z, sb.column("linear_predictor_se"))
        low = probability(sb.paren(sb.sub(lp.copy(), spread)), dialect.exp_limit)
        high = probability(sb.paren(sb.add(lp.copy(), spread.copy())), dialect.exp_limit)
        outer = outer.select(
            exp.alias_(low, "probability_low", quoted=True), exp.alias_(high, "probability_high", quoted=True)
        )
    return outer.from_(inner.subquery(SCORED_ALIAS))


def scoring_sql(
    model: Any,
    dialect: str = "duckdb",
    *,
    source: str | None = None,
    unseen: str = "null",
    standard_error: bool = False,
    level: float = 0.95,
) -> str:
    """The scoring SELECT as text in the dialect named ``dialect`` (see :func:`dbfit.scoring_sql`)."""
    target = dialects.dialect(dialect)
    check_options(target, unseen)
    query = scoring_query(
        model,
        source_relation(model.source_or_own(source)),
        unseen=unseen,
        with_standard_error=standard_error,
        level=level,
        dialect=target,
    )
    return query.sql(dialect=target.name)


def _aliased(relation: exp.Expression) -> exp.Expression:
    relation = relation.copy()
    if isinstance(relation, exp.Table):
        relation.set("alias", exp.TableAlias(this=exp.to_identifier(SOURCE_ALIAS)))
        return relation
    if relation.alias != SOURCE_ALIAS:
        raise AssertionError(f"source relation aliased {relation.alias!r}")
    return relation


def _columns_by_term(design: Design) -> list[list[tuple[int, DesignColumn]]]:
    """Columns of one term and one set of indicator factors (a term may span several: marginal_codings)."""
    groups: dict[tuple[Any, ...], list[tuple[int, DesignColumn]]] = {}
    for j, column in enumerate(design.columns):
        key = (column.term, column.numeric, tuple(i for i, _ in column.indicators))
        groups.setdefault(key, []).append((j, column))
    return list(groups.values())


def _numeric_product(design: Design, column: DesignColumn) -> exp.Expression | None:
    if not column.numeric:
        return None
    return sb.mul(*[sb.as_double(design.factors[i].expression.copy()) for i in column.numeric])


def _numeric_levels(factor: Factor) -> list[float | int] | None:
    """The levels as numbers when the factor casts a number to text (``x::VARCHAR``), else None.

    Engines write numbers as text differently (a DOUBLE 2 is '2.0' in DuckDB and Spark, '2' in PostgreSQL), so
    such levels are compared as numbers with the uncast value: exact for integers, and for floating-point
    values exact too, since each engine writes a double with the shortest text that reads back as itself.
    """
    if factor.cast_from is None:
        return None
    whole = INTEGER_TYPE.match(factor.cast_from) is not None
    try:
        values = [int(str(v)) if whole else float(str(v)) for v in factor.levels]
    except ValueError:
        return None
    return values if all(math.isfinite(v) for v in values) else None


def _compared(factor: Factor) -> exp.Expression:
    """What a factor's levels are compared with: the uncast number for numeric levels, else the expression."""
    if _numeric_levels(factor) is None:
        return factor.expression.copy()
    inner = factor.expression.this.copy()
    return inner if INTEGER_TYPE.match(factor.cast_from or "") else sb.as_double(inner)


def _level(factor: Factor, value: Any, dialect: Dialect) -> exp.Expression:
    """A level as a literal (a number for numeric levels); without booleans (T-SQL) BIT levels are 1, 0."""
    numbers = _numeric_levels(factor)
    if numbers is not None:
        number = numbers[factor.levels.index(value)]
        return exp.Literal.number(number) if isinstance(number, int) else double(number)
    if isinstance(value, bool) and not dialect.has_booleans:
        return exp.Literal.number(1 if value else 0)
    return factor.level_literal(value)


def _indicator_condition(design: Design, column: DesignColumn, dialect: Dialect) -> exp.Expression:
    checks = [
        exp.EQ(this=_compared(design.factors[i]), expression=_level(design.factors[i], level, dialect))
        for i, level in column.indicators
    ]
    return exp.and_(*checks) if len(checks) > 1 else checks[0]


def _term_contribution(
    design: Design, weighted: list[tuple[exp.Expression, DesignColumn]], dialect: Dialect
) -> exp.Expression:
    """b * product for a numeric term; product * CASE over the level combinations otherwise."""
    first = weighted[0][1]
    product = _numeric_product(design, first)
    if not first.indicators:
        return sb.mul(weighted[0][0], product)
    factors = [i for i, _ in first.indicators]
    if len(factors) == 1:
        factor = design.factors[factors[0]]
        case = exp.Case(
            this=_compared(factor),
            ifs=[exp.If(this=_level(factor, c.indicators[0][1], dialect), true=b) for b, c in weighted],
            default=double(0.0),
        )
    else:
        case = exp.Case(
            ifs=[exp.If(this=_indicator_condition(design, c, dialect), true=b) for b, c in weighted],
            default=double(0.0),
        )
    return sb.mul(product, case) if product is not None else case


def _column_value(design: Design, column: DesignColumn, dialect: Dialect) -> exp.Expression:
    """The original-scale value of one column: product of numeric factors times its 0/1 indicators."""
    product = _numeric_product(design, column)
    if not column.indicators:
        return product if product is not None else double(1.0)
    indicator = exp.Case(
        ifs=[exp.If(this=_indicator_condition(design, column, dialect), true=double(1.0))],
        default=double(0.0),
    )
    return sb.mul(product, indicator) if product is not None else indicator


def _unseen_message(factor: Factor) -> exp.Expression:
    """The unseen-level error text naming the row's value and the factor: 'Airport' of depot was not ..."""
    value = exp.Cast(this=factor.expression.copy(), to=exp.DataType.build("VARCHAR"))
    return exp.Concat(
        expressions=[
            exp.Literal.string("dbfit: '"),
            value,
            exp.Literal.string(f"' of {factor.text} was not seen in training"),
        ]
    )


def _guarded(design: Design, body: exp.Expression, unseen: str, dialect: Dialect) -> exp.Expression:
    inputs = [f.expression for f in design.factors] + ([design.offset] if design.offset is not None else [])
    ifs: list[exp.Expression] = []
    if inputs:
        missing = exp.or_(*[exp.Is(this=node.copy(), expression=exp.Null()) for node in inputs])
        ifs.append(exp.If(this=missing, true=exp.Null()))
    if unseen != "reference":
        for factor in design.factors:
            if factor.kind != "categorical":
                continue
            levels = [_level(factor, v, dialect) for v in factor.levels]
            unknown = exp.Not(this=exp.In(this=_compared(factor), expressions=levels))
            outcome = (
                exp.Null()
                if unseen == "null"
                else exp.Anonymous(this=dialect.raise_function, expressions=[_unseen_message(factor)])
            )
            ifs.append(exp.If(this=unknown, true=outcome))
    return exp.Case(ifs=ifs, default=body) if ifs else body
