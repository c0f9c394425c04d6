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

Reason codes (opt-in, ``reasons=k``) name, for each row, the k formula terms whose contributions push its
linear predictor most towards the event, relative to a baseline design row: the contribution of a term is the
sum over its design columns of estimate x (row value - baseline value), so a categorical (all its indicator
columns) or an interaction is one reason. The default baseline is each numeric column at its training mean
(the unweighted mean over the rows used, which the design keeps as the column's centre; a model without an
intercept is not centred, so there the baseline of a numeric column is 0) and every indicator at 0 (the
reference level); ``baseline=`` gives a row of its own. The contributions of all terms then sum to the linear
predictor minus the baseline's (the offset, not a term, is in both). The rank of a term is 1 + the number of
terms with a larger contribution, or an equal one earlier in the formula (ties are broken by formula order),
written as a CASE over the terms: plain SQL in every dialect. DuckDB computes each contribution once, in a
STRUCT column of the inner query that ``* EXCLUDE`` leaves out; the other dialects, without EXCLUDE, repeat the
contributions inline.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping
from statistics import NormalDist
from typing import Any

from sqlglot import exp

from dbfit.design.layout import Design, DesignColumn, Factor
from dbfit.errors import DbfitError
from dbfit.expressions import builders as sb
from dbfit.expressions import dialects
from dbfit.expressions.dialects import Dialect
from dbfit.expressions.dialects.date_parts import write_date_parts
from dbfit.expressions.dialects.duckdb import DUCKDB
from dbfit.expressions.dialects.number_text import write_number_texts
from dbfit.expressions.source import source_relation

UNSEEN_POLICIES = ("null", "reference", "error")
SOURCE_ALIAS, SCORED_ALIAS = "dbfit_source", "dbfit_scored"
SCORE_COLUMNS = ("linear_predictor", "probability")
INTERVAL_COLUMNS = ("linear_predictor_se", "probability_low", "probability_high")
DEFAULT_REASONS = 4
CONTRIBUTIONS = "dbfit_contributions"

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
    reasons: int | bool | None = 0,
    baseline: Mapping[str, Any] | None = None,
) -> exp.Select:
    """SELECT every column of ``relation`` plus the score columns (and on request the interval columns and
    ``reasons`` reason codes against ``baseline``, see the module docstring).

    ``joined`` is a relation the ``coefficient`` expressions read: cross-joined (one row), or LEFT JOINed
    on ``join_on`` (one row per segment, see :mod:`dbfit.deployment.segment_views`).
    """
    check_options(dialect, unseen)
    count = check_reasons(reasons)
    design = model.design
    relation = _aliased(relation)
    coefficient = coefficient or constant_coefficients(model)
    eta = linear_predictor(design, coefficient, unseen, dialect)
    inner = exp.select(
        exp.Column(this=exp.Star(), table=exp.to_identifier(SOURCE_ALIAS)),
        exp.alias_(eta, "linear_predictor", quoted=True),
    )
    if with_standard_error:
        se = standard_error(design, model.covariance, unseen, dialect)
        inner = inner.select(exp.alias_(se, "linear_predictor_se", quoted=True))
    inner = _joined(inner.from_(relation), joined, join_on)
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
    if count:
        contributions = term_contributions(design, coefficient, baseline_values(design, baseline), dialect)
        if dialect.name == "duckdb":
            # Each contribution once, in one STRUCT column of the inner query that the outer * leaves out
            # (one column: DuckDB keeps the text of a view's EXCLUDE list in no fixed order).
            fields = [
                exp.PropertyEQ(this=exp.Literal.string(f"c{i}"), expression=c)
                for i, (_, c) in enumerate(contributions)
            ]
            inner = inner.select(exp.alias_(exp.Struct(expressions=fields), CONTRIBUTIONS, quoted=True))
            contributions = [
                (
                    label,
                    exp.StructExtract(this=sb.column(CONTRIBUTIONS), expression=exp.Literal.string(f"c{i}")),
                )
                for i, (label, _) in enumerate(contributions)
            ]
            outer.expressions[0].this.set("except_", [sb.column(CONTRIBUTIONS)])
        elif joined is not None:
            raise DbfitError("reason codes of live or segment scoring are written in DuckDB SQL only")
        outer = outer.select(*reason_expressions(contributions, count))
    # a number cast to text reads as DuckDB writes it (the levels a model keeps), see number_text
    return write_number_texts(outer.from_(inner.subquery(SCORED_ALIAS)), dialect.name)


def check_reasons(reasons: Any) -> int:
    """The number of reasons asked for (True: :data:`DEFAULT_REASONS`; None, False or 0: none)."""
    if reasons is None or reasons is False:
        return 0
    if reasons is True:
        reasons = DEFAULT_REASONS
    if not isinstance(reasons, int) or reasons < 0:
        raise DbfitError(f"reasons must be a whole number of reasons per row, e.g. 4 (got {reasons!r})")
    return reasons


def reason_columns(reasons: int) -> tuple[str, ...]:
    """``reason_1``, ``reason_1_contribution``, ``reason_2``, ... for ``reasons`` ranks."""
    return tuple(n for r in range(1, reasons + 1) for n in (f"reason_{r}", f"reason_{r}_contribution"))


def baseline_values(design: Design, baseline: Mapping[str, Any] | None = None) -> list[float]:
    """The baseline value of each design column: the training mean of a numeric column (its centre; 0 when
    not centred) and 0 for an indicator, or the column's value at the row ``baseline`` gives."""
    if baseline is None:
        return [0.0 if column.indicators else float(column.centre) for column in design.columns]
    row = _baseline_row(design, baseline)
    values = []
    for column in design.columns:
        value = math.prod(float(row[i]) for i in column.numeric)
        values.append(value if all(row[i] == level for i, level in column.indicators) else 0.0)
    return values


def baseline_linear_predictor(model: Any, baseline: Mapping[str, Any] | None = None) -> float:
    """The linear predictor of the baseline row (without any offset): intercept + sum b_j x baseline_j."""
    design = model.design
    has_intercept = 1 if design.intercept else 0
    total = float(model.estimates[0]) if design.intercept else 0.0
    for j, value in enumerate(baseline_values(design, baseline)):
        estimate = float(model.estimates[j + has_intercept])
        total += estimate * value if estimate == estimate else 0.0
    return total


def term_contributions(
    design: Design, coefficient: Coefficient, base: list[float], dialect: Dialect
) -> list[tuple[str, exp.Expression]]:
    """Each formula term with an estimate, in formula order: its label and SQL for
    sum_j b_j (x_j - base_j) over its design columns."""
    has_intercept = 1 if design.intercept else 0
    pieces: dict[str, list[exp.Expression]] = {}
    for term_columns in _columns_by_term(design):
        kept = [(j, c) for j, c in term_columns if coefficient(j + has_intercept) is not None]
        if not kept:
            continue
        weighted = [(coefficient(j + has_intercept), c) for j, c in kept]
        term = pieces.setdefault(kept[0][1].term, [])
        term.append(_term_contribution(design, weighted, dialect))
        term += [sb.mul(double(-base[j]), coefficient(j + has_intercept)) for j, _ in kept if base[j] != 0.0]
    return [(label, sb.as_double(sb.add(*parts))) for label, parts in pieces.items()]


def reason_expressions(contributions: list[tuple[str, exp.Expression]], reasons: int) -> list[exp.Expression]:
    """``reason_r`` and ``reason_r_contribution`` for r = 1..reasons from each term's label and contribution
    (a column or the expression itself): NULL where the linear predictor is NULL or there is no r-th term.

    The rank of term i is 1 + the number of terms j with c_j > c_i, or with c_j = c_i and j before i, so the
    ranks are 1..m with ties broken by formula order; rank r is found with a CASE over the terms.
    """
    ranks = [_rank(contributions, i) for i in range(len(contributions))]
    missing = exp.Is(this=sb.column("linear_predictor"), expression=exp.Null())
    picked: list[exp.Expression] = []
    for r in range(1, reasons + 1):
        for name, value_of in ((f"reason_{r}", 0), (f"reason_{r}_contribution", 1)):
            ifs = [
                exp.If(
                    this=exp.EQ(this=rank.copy(), expression=exp.Literal.number(r)),
                    true=exp.Literal.string(label) if value_of == 0 else contribution.copy(),
                )
                for rank, (label, contribution) in zip(ranks, contributions)
            ]
            value = exp.Case(ifs=[exp.If(this=missing.copy(), true=exp.Null()), *ifs])
            picked.append(exp.alias_(value, name, quoted=True))
    return picked


def _rank(contributions: list[tuple[str, exp.Expression]], i: int) -> exp.Expression:
    """1 + the number of terms ahead of term i (larger contribution, or equal and earlier in the formula)."""
    mine = contributions[i][1]
    ahead = [
        exp.Case(
            ifs=[
                exp.If(
                    this=(exp.GTE if j < i else exp.GT)(this=other.copy(), expression=mine.copy()),
                    true=exp.Literal.number(1),
                )
            ],
            default=exp.Literal.number(0),
        )
        for j, (_, other) in enumerate(contributions)
        if j != i
    ]
    return sb.paren(sb.add(exp.Literal.number(1), *ahead))


def scoring_sql(
    model: Any,
    dialect: str = "duckdb",
    *,
    source: str | None = None,
    unseen: str = "null",
    standard_error: bool = False,
    level: float = 0.95,
    reasons: int | bool | None = 0,
    baseline: Mapping[str, Any] | None = None,
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
        reasons=reasons,
        baseline=baseline,
    )
    return write_date_parts(query, target.name).sql(dialect=target.name)


def _joined(query: exp.Select, joined: exp.Expression | None, join_on: exp.Expression | None) -> exp.Select:
    if joined is not None and join_on is not None:
        return query.join(joined.copy(), on=join_on.copy(), join_type="LEFT")
    if joined is not None:
        return query.join(joined.copy(), join_type="CROSS")
    return query


def _baseline_row(design: Design, baseline: Mapping[str, Any]) -> list[Any]:
    """The baseline value of every factor, by the factor's text; each one named, numbers finite, levels known."""
    names = [factor.text for factor in design.factors]
    if not isinstance(baseline, Mapping):
        raise DbfitError(
            f"baseline must map each variable to its value, e.g. {{{names[0]!r}: ...}}"
            if names
            else "baseline must be a mapping of variable to value"
        )
    unknown = [str(k) for k in baseline if k not in names]
    missing = [n for n in names if n not in baseline]
    if unknown or missing:
        raise DbfitError(
            f"baseline must give exactly the model's variables {', '.join(names)}"
            + (f"; not in the model: {', '.join(unknown)}" if unknown else "")
            + (f"; missing: {', '.join(missing)}" if missing else "")
        )
    row: list[Any] = []
    for factor in design.factors:
        value = baseline[factor.text]
        if factor.kind == "numeric":
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                raise DbfitError(f"baseline {factor.text} must be a finite number (got {value!r})")
            row.append(float(value))
            continue
        matches = [level for level in factor.levels if level == value and type(level) is type(value)]
        matches = matches or [level for level in factor.levels if str(level) == str(value)]
        if not matches:
            shown = ", ".join(map(str, factor.levels[:10])) + (", ..." if len(factor.levels) > 10 else "")
            raise DbfitError(f"baseline {factor.text}={value!r} is not a level seen in training ({shown})")
        row.append(matches[0])
    return row


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
