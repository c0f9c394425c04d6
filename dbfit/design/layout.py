"""Design encoding: from parsed formula and source to the model's internal columns.

One profiling scan over the complete rows (no NULL in any used expression) counts rows, checks the target,
weights and predictors, finds categorical levels and the centre and scale of every numeric column.
Numeric columns are centred (when there is an intercept) and scaled internally so that the Gram matrix is
well conditioned; estimates are mapped back to the original scale in :mod:`dbfit.model.inference`.
Categorical factors use treatment (indicator) coding against a reference level, or indicators for all their
levels where the marginality rule asks for them (see :func:`marginal_codings`).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from itertools import product
from typing import Any

from sqlglot import exp

from dbfit.design.term_scan import resolve_term_calls, with_bins_references
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import FitError, FormulaError
from dbfit.expressions import builders as sb
from dbfit.expressions.columns import resolve_columns
from dbfit.expressions.formula import Formula, parse_expression
from dbfit.expressions.term_functions import date_alternatives

NUMERIC_TYPE = re.compile(
    r"^(TINYINT|SMALLINT|INTEGER|BIGINT|HUGEINT|UTINYINT|USMALLINT|UINTEGER|UBIGINT|UHUGEINT|FLOAT|REAL|DOUBLE|DECIMAL.*|NUMERIC.*|INT\d*)$",
    re.IGNORECASE,
)
CATEGORICAL_TYPE = re.compile(r"^(VARCHAR|BOOLEAN|ENUM.*)$", re.IGNORECASE)
DATE_TYPE = re.compile(r"^(DATE|TIMESTAMP.*)$", re.IGNORECASE)

TARGET, WEIGHT, OFFSET, TRIALS, SEGMENT = "dbfit_y", "dbfit_w", "dbfit_o", "dbfit_n", "dbfit_seg"
NAMED_TARGET = "dbfit_named_target"
MAX_OFFENDING_SHOWN = 10
# A variance above this share of the squared mean is settled by the sums (see _ranges_in_doubt)
SUMS_SETTLE_SPREAD = 1e-6


@dataclass
class Factor:
    """One distinct expression used in the terms; ``alias`` names it in the base query."""

    text: str
    expression: exp.Expression
    alias: str
    sql_type: str = ""
    kind: str = ""  # "numeric" or "categorical"
    levels: list[Any] = field(default_factory=list)  # python values, sorted; first non-dropped is reference
    reference: Any = None
    cast_from: str | None = None  # text cast from this numeric type: scoring compares levels as numbers

    def level_literal(self, value: Any) -> exp.Expression:
        if isinstance(value, bool):
            return exp.Boolean(this=value)
        return exp.Literal.string(str(value))


@dataclass
class DesignColumn:
    """One internal column: (product of numeric factors - centre) / scale, times level indicators."""

    label: str
    term: str
    numeric: tuple[int, ...]  # factor indices multiplied together
    indicators: tuple[tuple[int, Any], ...]  # (factor index, level value)
    centre: float = 0.0
    scale: float = 1.0
    constant: bool = False  # zero variance in the data: aliased with the intercept (or all zero)


@dataclass
class Design:
    """Everything the statistics query and the inference need to know about the data."""

    formula: Formula
    relation: exp.Expression
    factors: list[Factor]
    columns: list[DesignColumn]
    intercept: bool
    target: exp.Expression
    weights: exp.Expression | None
    offset: exp.Expression | None
    trials: exp.Expression | None
    weights_text: str | None
    offset_text: str | None
    trials_text: str | None
    positive: str | None
    segment: exp.Expression | None = None
    segment_text: str | None = None
    named_target: exp.Expression | None = (
        None  # with positive=: the target as given, which must be two-valued
    )
    # "marginal": indicators follow the marginality rule (marginal_codings); "reference": every categorical
    # against its reference level (documents written before the rule, which carry no coding key)
    coding: str = "marginal"
    rows_total: int = 0
    rows_used: int = 0
    weight_sum: float = 0.0
    success_sum: float = 0.0  # weighted sum of the target
    trial_sum: float = 0.0  # weighted sum of trials (= weight_sum for 0/1 targets)
    loglik_constant: float = 0.0  # weighted sum of log binomial coefficients
    saturated_loglik: float = 0.0
    rows_zero_trials: int = 0  # grouped rows with 0 trials: used, but they carry no information
    source_columns: list[str] = field(default_factory=list)  # columns used, as the source spells them
    filled_rows: dict[str, int] = field(default_factory=dict)  # per filled(x, value) term: NULLs filled
    columns_at_fit: list[str] | None = None  # the source's columns when all_columns() was expanded

    @property
    def rows_informative(self) -> int:
        """Rows used that carry information: grouped rows with 0 trials add nothing to the likelihood."""
        return self.rows_used - self.rows_zero_trials

    @property
    def labels(self) -> list[str]:
        return (["intercept"] if self.intercept else []) + [c.label for c in self.columns]

    def used_expressions(self) -> list[tuple[exp.Expression, str]]:
        """Every expression a row needs, with its alias: target, factors, then the options in use."""
        used = [(self.target, TARGET)] + [(f.expression, f.alias) for f in self.factors]
        options = (
            (self.weights, WEIGHT),
            (self.offset, OFFSET),
            (self.trials, TRIALS),
            (self.segment, SEGMENT),
        )
        return used + [(node, name) for node, name in options if node is not None]

    def rows_query(self, extra: dict[str, exp.Expression] | None = None) -> exp.Select:
        """SELECT of the used expressions, aliased, over every row of the source.

        ``extra`` carries further source expressions (a cluster or split key) by alias, without filtering on them.
        """
        used = self.used_expressions() + [(node, name) for name, node in (extra or {}).items()]
        return exp.select(*[exp.alias_(node.copy(), name, quoted=True) for node, name in used]).from_(
            self.relation.copy()
        )

    def complete(self) -> exp.Expression:
        """The condition that a row of :meth:`rows_query` has no NULL in a used expression."""
        return sb.all_not_null([sb.column(name) for _, name in self.used_expressions()])

    def base_query(self, extra: dict[str, exp.Expression] | None = None) -> exp.Select:
        """SELECT of the used expressions over the complete rows of the source (one row per source row)."""
        return exp.select("*").from_(self.rows_query(extra).subquery("dbfit_rows")).where(self.complete())

    def column_expression(self, column: DesignColumn) -> exp.Expression:
        """SQL for the internal (centred, scaled) value of ``column`` over the base query's aliases."""
        parts: list[exp.Expression] = []
        if column.numeric:
            value = sb.mul(*[sb.as_double(sb.column(self.factors[i].alias)) for i in column.numeric])
            if column.centre != 0.0:
                value = sb.sub(sb.paren(value), sb.number(column.centre))
            parts.append(
                sb.div(sb.paren(value), sb.number(column.scale)) if column.scale != 1.0 else sb.paren(value)
            )
        for index, level in column.indicators:
            factor = self.factors[index]
            parts.append(
                sb.truth_as_double(
                    exp.EQ(this=sb.column(factor.alias), expression=factor.level_literal(level))
                )
            )
        return sb.mul(*parts) if parts else exp.Literal.number(1)

    def weight_expression(self) -> exp.Expression:
        return sb.column(WEIGHT) if self.weights is not None else exp.Literal.number(1)

    def trials_expression(self) -> exp.Expression:
        return sb.column(TRIALS) if self.trials is not None else exp.Literal.number(1)

    def offset_expression(self) -> exp.Expression | None:
        return sb.column(OFFSET) if self.offset is not None else None


def level_label(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    return str(value)


def build_design(
    engine: DuckDBEngine,
    formula: Formula,
    relation: exp.Expression,
    *,
    weights: str | None = None,
    offset: str | None = None,
    trials: str | None = None,
    positive: Any = None,
    reference: dict[str, Any] | None = None,
    by: str | None = None,
) -> Design:
    """Type the expressions, run the profiling scan, and lay out the internal columns.

    ``by`` is a segment expression: its NULL rows are left out like any other used column. Term functions
    get their knots and edges first (:func:`dbfit.design.term_scan.resolve_term_calls`); ``design.formula``
    is then the formula with them listed.
    """
    formula = resolve_term_calls(engine, formula, relation, NUMERIC_TYPE)
    reference = with_bins_references(formula, reference or {})
    factors = [
        Factor(text=text, expression=_factor_expression(formula, text), alias=f"dbfit_f{i}")
        for i, text in enumerate(formula.factor_texts())
    ]
    design = Design(
        formula=formula,
        relation=relation,
        factors=factors,
        columns=[],
        intercept=formula.intercept,
        target=formula.target,
        weights=parse_expression(weights, "weights") if weights is not None else None,
        offset=parse_expression(offset, "offset") if offset is not None else None,
        trials=parse_expression(trials, "trials") if trials is not None else None,
        weights_text=weights,
        offset_text=offset,
        trials_text=trials,
        positive=None if positive is None else str(positive),
        segment=parse_expression(by, "by") if by is not None else None,
        segment_text=by,
    )
    present = [name for name, _ in engine.describe(exp.select("*").from_(relation.copy()))]
    design.source_columns = resolve_columns([node for node, _ in design.used_expressions()], present)
    _assign_types(engine, design, positive)
    _check_references(design, reference or {})
    _profile(engine, design, reference or {})
    return design


def _factor_expression(formula: Formula, text: str) -> exp.Expression:
    for term in formula.terms:
        for factor_text, node in zip(term.texts, term.factors):
            if factor_text == text:
                return node
    raise AssertionError(text)


def _product_operands(node: exp.Expression) -> list[exp.Expression]:
    """The operands of a chain of ``*`` at the top of an expression (``a * b * c`` -> a, b, c)."""
    node = node.unnest() if isinstance(node, exp.Paren) else node
    if isinstance(node, exp.Mul):
        return _product_operands(node.this) + _product_operands(node.expression)
    return [node]


def _as_written(node: exp.Expression) -> str:
    """``node`` as SQL text with its identifiers unquoted, as a user writes them in a formula."""
    plain = node.copy()
    for identifier in plain.find_all(exp.Identifier):
        identifier.set("quoted", False)
    return plain.sql(dialect="duckdb")


def _refuse_categorical_products(engine: DuckDBEngine, design: Design) -> None:
    """``*`` inside a factor is SQL multiplication; of a categorical it means nothing, and Wilkinson-Rogers
    readers expect the crossing ``a + b + a:b``, so say how to write that instead."""
    products = [(f, _product_operands(f.expression)) for f in design.factors]
    products = [(f, operands) for f, operands in products if len(operands) > 1]
    if not products:
        return
    probe = exp.select(
        *[
            exp.alias_(operand.copy(), f"dbfit_p{i}_{k}", quoted=True)
            for i, (_, operands) in enumerate(products)
            for k, operand in enumerate(operands)
        ]
    )
    types = [sql_type for _, sql_type in engine.describe(probe.from_(design.relation.copy()))]
    at = 0
    for factor, operands in products:
        kinds = types[at : at + len(operands)]
        at += len(operands)
        if any(CATEGORICAL_TYPE.match(kind) for kind in kinds):
            texts = [_as_written(operand) for operand in operands]
            crossing = [
                ":".join(texts[k] for k in range(len(texts)) if mask >> k & 1)
                for mask in sorted(range(1, 1 << len(texts)), key=lambda m: (bin(m).count("1"), m))
            ]
            raise FormulaError(
                f"'{factor.text}' multiplies a categorical: write '{' + '.join(crossing)}' for the crossing "
                "('*' inside a term is SQL multiplication of numbers)"
            )


def _assign_types(engine: DuckDBEngine, design: Design, positive: Any) -> None:
    _refuse_categorical_products(engine, design)
    probe = exp.select(
        *[exp.alias_(node.copy(), name, quoted=True) for node, name in design.used_expressions()]
    )
    casts = {
        f"{f.alias}_cast": f.expression.this
        for f in design.factors
        if isinstance(f.expression, exp.Cast) and f.expression.to.is_type(*exp.DataType.TEXT_TYPES)
    }
    probe = probe.select(*[exp.alias_(node.copy(), name, quoted=True) for name, node in casts.items()])
    types = dict(engine.describe(probe.from_(design.relation.copy())))

    target_type = types[TARGET]
    if isinstance(positive, str) and (NUMERIC_TYPE.match(target_type) or target_type.upper() == "BOOLEAN"):
        raise FitError(
            f"positive={positive!r} is text, but the target '{design.formula.target_text}' has type "
            f"{target_type}: name one of its values as a {target_type.lower()}"
        )
    if positive is not None:
        literal = (
            exp.Boolean(this=positive)
            if isinstance(positive, bool)
            else (
                sb.number(positive)
                if isinstance(positive, (int, float))
                else exp.Literal.string(str(positive))
            )
        )
        design.named_target = design.target.copy()
        design.target = sb.truth_as_double(exp.EQ(this=sb.paren(design.target), expression=literal))
    elif target_type.upper() == "BOOLEAN":
        design.target = sb.truth_as_double(design.target)
    elif NUMERIC_TYPE.match(target_type):
        design.target = sb.as_double(design.target)
    else:
        raise FitError(
            f"the target '{design.formula.target_text}' has type {target_type}; give a 0/1 or boolean expression, "
            f"or name the positive class with positive=... (e.g. positive='late')"
        )

    for f in design.factors:
        f.sql_type = types[f.alias]
        inner = types.get(f"{f.alias}_cast")
        f.cast_from = inner.upper() if inner is not None and NUMERIC_TYPE.match(inner) else None
        if NUMERIC_TYPE.match(f.sql_type):
            f.kind = "numeric"
        elif CATEGORICAL_TYPE.match(f.sql_type):
            f.kind = "categorical"
        elif DATE_TYPE.match(f.sql_type):
            raise FormulaError(f"term '{f.text}' has SQL type {f.sql_type}: {date_alternatives(f.text)}")
        else:
            raise FormulaError(
                f"term '{f.text}' has SQL type {f.sql_type}, which is neither numeric nor categorical "
                "(VARCHAR, ENUM, BOOLEAN); cast it in the formula, e.g. 'extract(hour FROM t)'"
            )
    for node, name, what in (
        (design.weights, WEIGHT, "weights"),
        (design.offset, OFFSET, "offset"),
        (design.trials, TRIALS, "trials"),
    ):
        if node is not None and not NUMERIC_TYPE.match(types[name]):
            raise FormulaError(f"{what} expression has SQL type {types[name]}; it must be numeric")
    if design.segment is not None and not (
        NUMERIC_TYPE.match(types[SEGMENT]) or CATEGORICAL_TYPE.match(types[SEGMENT])
    ):
        raise FormulaError(
            f"by expression '{design.segment_text}' has SQL type {types[SEGMENT]}; use text, a number or a boolean"
        )
    if design.offset is not None:
        design.offset = sb.as_double(design.offset)
    if design.weights is not None:
        design.weights = sb.as_double(design.weights)
    if design.trials is not None:
        design.trials = sb.as_double(design.trials)


def _check_references(design: Design, reference: dict[str, Any]) -> None:
    known = {f.text: f for f in design.factors}
    for name in reference:
        factor = known.get(name)
        if factor is None:
            raise FormulaError(
                f"reference names '{name}', which is not a term of the formula (terms: {', '.join(known)})"
            )
        if factor.kind != "categorical":
            raise FormulaError(
                f"reference names '{name}', which is numeric; only categorical terms have a reference level"
            )


def _profile(engine: DuckDBEngine, design: Design, reference: dict[str, Any]) -> None:
    w = design.weight_expression()
    products = _numeric_products(design)
    aggregates = outcome_sums(design)
    aggregates["bad_target"] = _count_where(_bad_target_condition(design))
    if design.trials is not None:
        no_trials = exp.EQ(this=sb.column(TRIALS), expression=exp.Literal.number(0))
        aggregates["zero_trials"] = _count_where(no_trials)
    if design.weights is not None:
        aggregates["bad_weight"] = _count_where(
            exp.Or(
                this=exp.LT(this=w.copy(), expression=exp.Literal.number(0)),
                expression=exp.Not(this=sb.func("isfinite", w.copy())),
            )
        )
    if design.offset is not None:
        aggregates["bad_offset"] = _count_where(exp.Not(this=sb.func("isfinite", sb.column(OFFSET))))
    for i, f in enumerate(design.factors):
        if f.kind == "categorical":
            aggregates[f"levels_{i}"] = exp.ArrayAgg(
                this=exp.Order(
                    this=exp.Distinct(expressions=[sb.column(f.alias)]),
                    expressions=[exp.Ordered(this=sb.column(f.alias), nulls_first=False)],
                )
            )
    for key, indices in products.items():
        value = _product_value(design, indices)
        aggregates[f"sum_{key}"] = sb.agg_sum(value)
        aggregates[f"sumsq_{key}"] = sb.agg_sum(sb.mul(value.copy(), value.copy()))

    extra = {}
    if design.named_target is not None:
        extra[NAMED_TARGET] = design.named_target
        aggregates["target_values"] = exp.Count(this=exp.Distinct(expressions=[sb.column(NAMED_TARGET)]))
    names = list(aggregates)
    query = exp.select(*[exp.alias_(node, name, quoted=True) for name, node in aggregates.items()]).from_(
        design.base_query(extra).subquery("dbfit_base")
    )
    total_query = exp.select(exp.Count(this=exp.Star())).from_(design.relation.copy())
    query = query.select(exp.alias_(total_query.subquery(), "total", quoted=True))
    row = dict(zip(names + ["total"], engine.fetch(query)[0]))

    design.rows_total, design.rows_used = int(row["total"]), int(row["used"])
    if design.rows_used == 0:
        raise FitError(
            f"no rows left to fit: all {design.rows_total} rows of the source have NULL in a used column "
            f"(target, terms, weights, offset or trials)"
            if design.rows_total
            else "no rows to fit: the source is empty"
        )
    if row["bad_target"]:
        raise FitError(_bad_target_message(engine, design, int(row["bad_target"])))
    if design.named_target is not None and int(row["target_values"]) > 2:
        raise FitError(_many_valued_target_message(engine, design, int(row["target_values"])))
    if row.get("bad_weight"):
        raise FitError(
            f"weights '{design.weights_text}' has {row['bad_weight']} negative or non-finite values"
        )
    if row.get("bad_offset"):
        raise FitError(
            f"offset '{design.offset_text}' has {row['bad_offset']} non-finite values (NaN or infinity)"
        )
    if not all(math.isfinite(float(row[f"sumsq_{key}"])) for key in products):
        _raise_non_finite(engine, design)
    row.update(_ranges_in_doubt(engine, design, row, products))
    design.weight_sum = float(row["weight_sum"] or 0.0)
    design.success_sum = float(row["success_sum"] or 0.0)
    design.trial_sum = float(row["trial_sum"] or 0.0)
    if design.weight_sum <= 0:
        raise FitError("the weights of the rows used add up to zero; nothing to fit")
    if design.positive is not None and design.success_sum <= 0:
        raise FitError(
            f"positive={design.positive!r} is not among the values of the target "
            f"'{design.formula.target_text}' on the {design.rows_used} rows used: "
            "name one of its two values"
        )
    if design.success_sum <= 0 or design.success_sum >= design.trial_sum:
        outcome = "0 (no successes)" if design.success_sum <= 0 else "1 (no failures)"
        raise FitError(
            f"the target '{design.formula.target_text}' is {outcome} on all {design.rows_used} rows used: "
            "a logistic model needs both classes"
        )
    design.loglik_constant = float(row.get("loglik_constant") or 0.0)
    design.saturated_loglik = float(row.get("saturated_loglik") or 0.0)
    design.rows_zero_trials = int(row.get("zero_trials") or 0)

    for i, f in enumerate(design.factors):
        if f.kind == "categorical":
            f.levels = list(row[f"levels_{i}"])
            wanted = reference.get(f.text)
            if wanted is not None:
                match = [v for v in f.levels if level_label(v) == level_label(wanted)]
                if not match:
                    shown = ", ".join(level_label(v) for v in f.levels[:20])
                    raise FormulaError(
                        f"reference level '{wanted}' of '{f.text}' does not occur in the data (levels: {shown})"
                    )
                f.reference = match[0]
            else:
                f.reference = f.levels[0]
    design.columns = _layout_columns(design, row, products)


def outcome_sums(design: Design) -> dict[str, exp.Expression]:
    """Aggregates over complete rows that every fit needs: counts, weighted successes and trials, and
    for grouped targets the log binomial coefficients and the saturated log-likelihood."""
    y, w, n = sb.column(TARGET), design.weight_expression(), design.trials_expression()
    sums: dict[str, exp.Expression] = {
        "used": exp.Count(this=exp.Star()),
        "weight_sum": sb.agg_sum(w.copy()),
        "success_sum": sb.agg_sum(sb.mul(w.copy(), y.copy())),
        "trial_sum": sb.agg_sum(sb.mul(w.copy(), n.copy())),
    }
    if design.trials is not None:
        # Rows breaking 0 <= successes <= trials are refused after the scan; they add 0 here, so that engines
        # whose ln and division raise (PostgreSQL, Spark) reach that message instead of failing the scan.
        valid = exp.Not(this=sb.paren(_bad_target_condition(design)))
        for name, term in (
            ("loglik_constant", _log_binomial(y, n)),
            ("saturated_loglik", _saturated_term(y, n)),
        ):
            only_valid = exp.If(this=valid.copy(), true=term, false=exp.Literal.number(0))
            sums[name] = sb.agg_sum(sb.mul(w.copy(), only_valid))
    return sums


def segment_profiles(engine: DuckDBEngine, design: Design) -> list[dict[str, Any]]:
    """One scan grouped by segment: rows in each segment, rows used, and the outcome sums."""
    sums = outcome_sums(design)
    complete = design.complete()
    filtered = [
        exp.alias_(exp.Filter(this=node, expression=exp.Where(this=complete.copy())), name, quoted=True)
        for name, node in sums.items()
    ]
    query = (
        exp.select(
            sb.column(SEGMENT), exp.alias_(exp.Count(this=exp.Star()), "total", quoted=True), *filtered
        )
        .from_(design.rows_query().subquery("dbfit_rows"))
        .where(exp.Not(this=exp.Is(this=sb.column(SEGMENT), expression=exp.Null())))
        .group_by(sb.column(SEGMENT))
        .order_by(sb.column(SEGMENT))
    )
    names = ["segment", "total", *sums]
    return [dict(zip(names, row)) for row in engine.fetch(query)]


def _numeric_products(design: Design) -> dict[str, tuple[int, ...]]:
    index = {f.text: i for i, f in enumerate(design.factors)}
    products: dict[str, tuple[int, ...]] = {}
    for term in design.formula.terms:
        numeric = tuple(index[t] for t in term.texts if design.factors[index[t]].kind == "numeric")
        if numeric:
            products["_".join(map(str, numeric))] = numeric
    return products


Coding = tuple[tuple[int, bool], ...]  # (categorical factor index, all levels?) in the term's factor order


def marginal_codings(design: Design) -> list[list[Coding]]:
    """For every term, the sub-terms its columns span: which categorical factors appear, each coded with
    indicators for all its levels (full) or for all but its reference level (reduced).

    The marginality rule of Chambers and Hastie (1992), Statistical Models in S, chapter 2 (cited from
    memory), in the form patsy documents for its coding algorithm ("redundancy" / full-rank coding): a term's
    categorical part expands into the products of every subset of its categorical factors, reduced-coded; the
    subsets already spanned by a term with the same numeric factors (the intercept spans the empty subset of
    the terms without numeric factors) are left out; then a sub-term ``s`` and one with one more factor ``f``
    merge into ``s`` with ``f`` full-coded, as long as any pair merges. So ``~ x:g`` without ``x`` gets one
    slope of ``x`` per level of ``g``, and ``~ 0 + g`` one indicator per level. Terms with the same numeric
    factors are taken in order of their number of factors, lower first, as R and patsy do.
    """
    index = {f.text: i for i, f in enumerate(design.factors)}
    spanned: dict[frozenset[int], set[frozenset[tuple[int, bool]]]] = {}
    if design.intercept:
        spanned[frozenset()] = {frozenset()}
    codings: list[list[Coding]] = [[] for _ in design.formula.terms]
    order = sorted(range(len(design.formula.terms)), key=lambda t: len(design.formula.terms[t].texts))
    for t in order:
        factors = [index[text] for text in design.formula.terms[t].texts]
        numeric = frozenset(i for i in factors if design.factors[i].kind == "numeric")
        categorical = [i for i in factors if design.factors[i].kind == "categorical"]
        used = spanned.setdefault(numeric, set())
        masks = range(1 << len(categorical))
        subsets = sorted(
            (tuple(i for k, i in enumerate(categorical) if mask >> k & 1) for mask in masks), key=len
        )
        needed = [frozenset((i, False) for i in subset) for subset in subsets]
        needed = [s for s in needed if s not in used]
        used.update(needed)
        merged = _merge_subterms(needed)
        position = {i: k for k, i in enumerate(categorical)}
        codings[t] = [tuple(sorted(s, key=lambda pair: position[pair[0]])) for s in merged]
    return codings


def _merge_subterms(subterms: list[frozenset[tuple[int, bool]]]) -> list[frozenset[tuple[int, bool]]]:
    """Merge ``s`` into a later ``s`` plus one reduced factor, which becomes full, while any pair merges."""
    subterms = list(subterms)
    merged = True
    while merged:
        merged = False
        for short_at, short in enumerate(subterms):
            for long_at in range(short_at + 1, len(subterms)):
                extra = subterms[long_at] - short
                if len(subterms[long_at]) == len(short) + 1 and short <= subterms[long_at]:
                    ((factor, _),) = extra
                    subterms[long_at] = short | {(factor, True)}
                    del subterms[short_at]
                    merged = True
                    break
            if merged:
                break
    return subterms


def _layout_columns(
    design: Design, row: dict[str, Any], products: dict[str, tuple[int, ...]]
) -> list[DesignColumn]:
    index = {f.text: i for i, f in enumerate(design.factors)}
    columns: list[DesignColumn] = []
    for term, codings in zip(design.formula.terms, marginal_codings(design)):
        numeric = tuple(index[t] for t in term.texts if design.factors[index[t]].kind == "numeric")
        for coding in codings:
            centre, scale, constant = 0.0, 1.0, False
            if numeric:
                key = "_".join(map(str, numeric))
                centre, scale, constant = _centre_and_scale(
                    row, key, design.rows_used, centred=not coding and design.intercept
                )
            level_sets = [
                [(i, v) for v in design.factors[i].levels if full or v != design.factors[i].reference]
                for i, full in coding
            ]
            for combination in product(*level_sets):
                levels = dict(combination)
                pieces = []
                for text in term.texts:
                    i = index[text]
                    if design.factors[i].kind == "numeric":
                        pieces.append(term.name_of(text))
                    elif i in levels:
                        pieces.append(f"{term.name_of(text)}={level_label(levels[i])}")
                columns.append(
                    DesignColumn(
                        label=":".join(pieces),
                        term=term.group,
                        numeric=numeric,
                        indicators=tuple(combination),
                        centre=centre,
                        scale=scale,
                        constant=constant,
                    )
                )
    return columns


def _raise_non_finite(engine: DuckDBEngine, design: Design) -> None:
    """A sum of squares came back NaN or infinite: count the culprits (error path only, one more scan)."""
    numeric = [(i, f) for i, f in enumerate(design.factors) if f.kind == "numeric"]
    counts = exp.select(
        *[
            _count_where(exp.Not(this=sb.func("isfinite", sb.as_double(sb.column(f.alias)))))
            for _, f in numeric
        ]
    ).from_(design.base_query().subquery("dbfit_base"))
    for (_, factor), count in zip(numeric, engine.fetch(counts)[0]):
        if count:
            raise FitError(
                f"term '{factor.text}' has {count} non-finite values (NaN or infinity) among the rows used; "
                "filter them out in the source or map them to NULL"
            )
    raise FitError("a numeric term is too large to square in double precision; rescale it in the formula")


def _product_value(design: Design, indices: tuple[int, ...]) -> exp.Expression:
    """The product of the numeric factors ``indices`` as DOUBLE, over the base query's aliases."""
    return sb.mul(*[sb.as_double(sb.column(design.factors[i].alias)) for i in indices])


def _moments(row: dict[str, Any], key: str, rows: int) -> tuple[float, float]:
    """Mean and variance of a numeric column from its sum and sum of squares."""
    mean = float(row[f"sum_{key}"]) / rows
    return mean, float(row[f"sumsq_{key}"]) / rows - mean * mean


def _ranges_in_doubt(
    engine: DuckDBEngine, design: Design, row: dict[str, Any], products: dict[str, tuple[int, ...]]
) -> dict[str, Any]:
    """The minimum and maximum of the numeric columns whose variance the sums leave in doubt (one more scan,
    only when there is such a column; none otherwise).

    A variance above SUMS_SETTLE_SPREAD times the squared mean is far above the rounding of
    sum(x^2) / n - mean^2, whose relative error grows about as n times the unit roundoff (Higham 2002,
    Accuracy and Stability of Numerical Algorithms, 2nd ed., section 4.2): such a column is not constant and
    its spread is the square root of the variance. Below it (a constant column, or a large mean with a small
    spread), the range decides, as it always did. Minimum and maximum cost more per row than sums, so the
    profiling scan leaves them out (a third of its time at 20 columns).
    """
    doubtful: dict[str, tuple[int, ...]] = {}
    for key, indices in products.items():
        mean, variance = _moments(row, key, design.rows_used)
        if not variance > SUMS_SETTLE_SPREAD * mean * mean:
            doubtful[key] = indices
    if not doubtful:
        return {}
    aggregates: dict[str, exp.Expression] = {}
    for key, indices in doubtful.items():
        aggregates[f"min_{key}"] = exp.Min(this=_product_value(design, indices))
        aggregates[f"max_{key}"] = exp.Max(this=_product_value(design, indices))
    query = exp.select(*[exp.alias_(node, name, quoted=True) for name, node in aggregates.items()])
    return dict(zip(aggregates, engine.fetch(query.from_(design.base_query().subquery("dbfit_base")))[0]))


def _centre_and_scale(
    row: dict[str, Any], key: str, rows: int, *, centred: bool
) -> tuple[float, float, bool]:
    """Centre and scale of a numeric column from its sum and sum of squares, and for a column whose variance
    is in doubt (see :func:`_ranges_in_doubt`) its minimum and maximum.

    Any positive scale gives the same fit; these only condition the Gram matrix. When the variance from
    the sums is lost to cancellation (a large mean and a small spread), a quarter of the range stands in.
    """
    mean, variance = _moments(row, key, rows)
    if f"min_{key}" not in row:  # the sums settle it: a spread well above rounding, not constant
        return (mean if centred else 0.0), math.sqrt(variance), False
    squares = float(row[f"sumsq_{key}"])
    low, high = float(row[f"min_{key}"]), float(row[f"max_{key}"])
    reliable = variance > 1e-8 * mean * mean and variance > 0
    spread = math.sqrt(variance) if reliable else (high - low) / 4.0
    if centred:
        constant = low == high
        return mean, (spread if not constant else 1.0), constant
    root_mean_square = math.sqrt(max(squares / rows, 0.0))
    return 0.0, (spread if spread > 0 else (root_mean_square or 1.0)), low == high == 0.0


def _count_where(condition: exp.Expression) -> exp.Expression:
    return sb.agg_sum(exp.If(this=condition, true=exp.Literal.number(1), false=exp.Literal.number(0)))


def _bad_target_condition(design: Design) -> exp.Expression:
    y = sb.column(TARGET)
    if design.trials is not None:
        n = sb.column(TRIALS)
        return exp.or_(
            exp.LT(this=y.copy(), expression=exp.Literal.number(0)),
            exp.GT(this=y.copy(), expression=n.copy()),
            exp.LT(this=n.copy(), expression=exp.Literal.number(0)),
            exp.Not(this=sb.func("isfinite", n.copy())),
        )
    return exp.Not(this=exp.In(this=y, expressions=[exp.Literal.number(0), exp.Literal.number(1)]))


def _bad_target_message(engine: DuckDBEngine, design: Design, count: int) -> str:
    values_query = (
        exp.select(sb.column(TARGET))
        .distinct()
        .from_(design.base_query().subquery("dbfit_base"))
        .where(_bad_target_condition(design))
        .order_by(sb.column(TARGET))
        .limit(MAX_OFFENDING_SHOWN)
    )
    shown = ", ".join(_format_value(r[0]) for r in engine.fetch(values_query))
    if design.trials is not None:
        return (
            f"the target '{design.formula.target_text}' must count successes between 0 and trials "
            f"'{design.trials_text}' (>= 0) on every row; {count} rows break this (target values: {shown})"
        )
    return (
        f"the target '{design.formula.target_text}' must be 0/1 or true/false; {count} rows hold other values "
        f"({shown}); write a condition such as \"status = 'late'\" or pass positive=..."
    )


def _many_valued_target_message(engine: DuckDBEngine, design: Design, count: int) -> str:
    values_query = (
        exp.select(sb.column(NAMED_TARGET))
        .distinct()
        .from_(design.base_query({NAMED_TARGET: design.named_target}).subquery("dbfit_base"))
        .order_by(sb.column(NAMED_TARGET))
        .limit(MAX_OFFENDING_SHOWN)
    )
    shown = ", ".join(_format_value(r[0]) for r in engine.fetch(values_query))
    target = design.formula.target_text
    return (
        f"positive= names one of two outcome values, but the target '{target}' has {count} values among the rows "
        f"used ({shown}{', ...' if count > MAX_OFFENDING_SHOWN else ''}); to fit one value against all the others, "
        f"write it as the target, e.g. \"{target} = '{design.positive}' ~ ...\""
    )


def _format_value(value: Any) -> str:
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def _log_binomial(y: exp.Expression, n: exp.Expression) -> exp.Expression:
    one = exp.Literal.number(1)
    return sb.sub(
        sb.sub(sb.func("lgamma", sb.add(n.copy(), one)), sb.func("lgamma", sb.add(y.copy(), one.copy()))),
        sb.func("lgamma", sb.add(sb.sub(n.copy(), y.copy()), one.copy())),
    )


def _saturated_term(y: exp.Expression, n: exp.Expression) -> exp.Expression:
    """y log(y/n) + (n-y) log(1-y/n), with 0 log 0 = 0."""

    def x_log_ratio(x: exp.Expression) -> exp.Expression:
        return exp.If(
            this=exp.GT(this=x.copy(), expression=exp.Literal.number(0)),
            true=sb.mul(x.copy(), exp.Ln(this=sb.div(x.copy(), n.copy()))),
            false=exp.Literal.number(0),
        )

    return sb.add(x_log_ratio(y), x_log_ratio(sb.paren(sb.sub(n.copy(), y.copy()))))
