"""Effects on the probability scale: average marginal effects and effects at a point, with delta-method errors.

An effect is taken with respect to one factor of the formula (a column or expression named in the terms):

* a numeric factor x gets the derivative dp/dx = p (1 - p) d eta/dx, where d eta/dx = sum_j b_j dX_j/dx
  sums over every design column that holds x (its main effect and each interaction or product with it), so
  an interaction is differentiated with respect to the variable, not the product column;
* each non-reference level m of a categorical factor f gets the discrete change p(f = m) - p(f = reference),
  every other factor as observed (or at the point).

The average marginal effect is the weighted mean of the row-wise effects over the rows (weight: prior weight
times trials, so a grouped row counts as its trials). Its gradient with respect to the estimates b is the mean
of the row-wise gradients

    d/db_l [p (1 - p) D]   = p (1 - p) (1 - 2 p) D X_l + p (1 - p) dX_l/dx        (D = d eta/dx)
    d/db_l [p_m - p_ref]   = p_m (1 - p_m) X_l(f = m) - p_ref (1 - p_ref) X_l(f = ref),

so the effects and their gradients are sums over rows and all come from one aggregate scan. The standard
error is sqrt(g' V g) with V the model's covariance (the delta method). Both are set out in Greene,
Econometric Analysis, 7th ed. (Pearson 2012), chapter 17 on partial effects in binary choice models and their
asymptotic covariance by the delta method (section numbers from memory).

At a point (``at="means"`` or a dict of values) the same expressions are evaluated once, in numpy, and the
point is held fixed. "At means" puts each numeric factor at its weighted mean over the rows and each
categorical's indicator columns at the shares of their levels (as statsmodels' ``at='mean'`` puts dummy
columns at their means); a column that multiplies factors takes the product of those values. A categorical
whose level change is measured is set to that level and to the reference, its other indicators at 0.

Supported: every numeric factor whose source columns appear in no other factor. A factor sharing a column with
another (``x`` beside ``power(x, 2)`` or ``log(x)``) is refused: its effect would need the derivative of one
factor with respect to another, which dbfit does not take.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa
from sqlglot import exp

from dbfit.design.layout import TARGET, Design, DesignColumn, level_label
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import FitError
from dbfit.expressions import builders as sb
from dbfit.expressions.source import source_relation
from dbfit.fitting.likelihood_ratio_terms import fitted_rows_design
from dbfit.model import inference
from dbfit.model.fitted import Model

DERIVATIVE, CHANGE = "derivative", "discrete change"
OVERALL, MEANS = "overall", "means"
EFFECT_COLUMNS = (
    "term",
    "level",
    "reference",
    "kind",
    "effect",
    "std_error",
    "wald_z",
    "p_value",
    "ci_low",
    "ci_high",
)
MAX_SUMS = 20_000  # aggregates of one effects scan: (effects) x (parameters + 1)


@dataclass(frozen=True)
class Effect:
    """What one effect is taken of: a numeric factor's derivative, or a categorical's change to ``level``."""

    factor: int
    level: Any = None
    is_change: bool = False


# A design column evaluated somewhere, as a constant times a product of pieces: ("value", i) is numeric factor
# i's value, ("is", i, level) the indicator of categorical factor i at level. None: the column is 0 there.
Pieces = tuple[float, list[tuple[Any, ...]]]


def column_pieces(
    column: DesignColumn, fixed: Mapping[int, Any], derivative: int | None = None
) -> Pieces | None:
    """``column`` (or its derivative with respect to numeric factor ``derivative``) with the categoricals in
    ``fixed`` set to a level."""
    constant, pieces = 1.0, []
    numeric = list(column.numeric)
    if derivative is not None:
        times = numeric.count(derivative)
        if not times:
            return None
        constant *= times
        numeric.remove(derivative)
    pieces += [("value", i) for i in numeric]
    for factor, level in column.indicators:
        if factor in fixed:
            if level_label(fixed[factor]) != level_label(level):
                return None
        else:
            pieces.append(("is", factor, level))
    return constant, pieces


def _all_columns(design: Design) -> list[DesignColumn | None]:
    """The design's columns in parameter order, None standing for the intercept."""
    return ([None] if design.intercept else []) + list(design.columns)


def parameter_pieces(
    design: Design, fixed: Mapping[int, Any], derivative: int | None = None
) -> list[Pieces | None]:
    """:func:`column_pieces` for every parameter (the intercept is the constant 1, its derivative 0)."""
    return [
        (None if derivative is not None else (1.0, []))
        if column is None
        else column_pieces(column, fixed, derivative)
        for column in _all_columns(design)
    ]


def choose_effects(design: Design, variables: Sequence[str] | None) -> list[Effect]:
    """The effects of the factors named in ``variables`` (default: every factor), in formula order."""
    texts = [f.text for f in design.factors]
    if variables is not None:
        if isinstance(variables, str):
            variables = [variables]
        unknown = [v for v in variables if v not in texts]
        if unknown:
            raise FitError(
                f"variables names {', '.join(map(repr, unknown))}, not a factor of the formula; "
                f"its factors are {', '.join(texts)}"
            )
    chosen = [i for i, text in enumerate(texts) if variables is None or text in variables]
    _refuse_shared_columns(design, chosen)
    effects: list[Effect] = []
    for i in chosen:
        factor = design.factors[i]
        if factor.kind == "numeric":
            effects.append(Effect(i))
        else:
            effects += [Effect(i, level, True) for level in factor.levels if level != factor.reference]
    if not effects:
        raise FitError("there is no effect to take: the chosen factors have no levels besides the reference")
    return effects


def _refuse_shared_columns(design: Design, chosen: list[int]) -> None:
    names = [{c.name.lower() for c in f.expression.find_all(exp.Column)} for f in design.factors]
    for i in chosen:
        shared = [
            design.factors[j].text for j in range(len(design.factors)) if j != i and names[i] & names[j]
        ]
        if shared:
            raise FitError(
                f"'{design.factors[i].text}' shares its source column with {', '.join(map(repr, shared))}: its "
                "effect would need the derivative of one factor with respect to another, which dbfit does not "
                "take. Leave it out with variables=[...] (the other factors' effects are defined)"
            )


def effect_rows(design: Design, source: str | None) -> exp.Select:
    """The rows effects average over: the fitted rows, or the rows of ``source`` complete in the factors,
    offset, weights and trials (the target is not needed there)."""
    if source is None:
        return design.base_query()
    other = dataclasses.replace(design, relation=source_relation(source))
    used = [(node, name) for node, name in other.used_expressions() if name != TARGET]
    return (
        exp.select(*[exp.alias_(node.copy(), name, quoted=True) for node, name in used])
        .from_(other.relation.copy())
        .where(sb.all_not_null([sb.column(name) for _, name in used]))
    )


def _piece_sql(design: Design, piece: tuple[Any, ...]) -> exp.Expression:
    factor = design.factors[piece[1]]
    if piece[0] == "value":
        return sb.as_double(sb.column(factor.alias))
    return sb.truth_as_double(exp.EQ(this=sb.column(factor.alias), expression=factor.level_literal(piece[2])))


def pieces_sql(design: Design, pieces: Pieces) -> exp.Expression:
    constant, parts = pieces
    nodes = [_piece_sql(design, p) for p in parts]
    if constant != 1.0 or not nodes:
        nodes.insert(0, sb.number(constant))
    return sb.paren(sb.mul(*nodes))


def _weighted_sum(design: Design, terms: list[tuple[float, Pieces | None]]) -> exp.Expression:
    """sum_k c_k * column_k in SQL; columns that are 0 and zero coefficients are left out."""
    parts = [sb.mul(sb.number(c), pieces_sql(design, p)) for c, p in terms if p is not None and c != 0.0]
    return sb.paren(sb.add(*parts)) if parts else sb.number(0.0)


@dataclass
class EffectScan:
    """The sums of one scan: the weight total and, per effect, the summed effect and gradient."""

    rows: int
    weight: float
    effects: np.ndarray
    gradients: np.ndarray  # effects x parameters


def effects_query(
    design: Design, rows: exp.Select, beta: np.ndarray, effects: list[Effect], check_unseen: bool
) -> tuple[exp.Select, list[list[int | None]]]:
    """One aggregate over ``rows``: the weight, and for every effect its sum and its gradient's sums.

    Returns the query and, per effect, the position of each gradient entry among the sums (None: 0).
    """
    offset = design.offset_expression()
    weight = sb.mul(design.weight_expression(), design.trials_expression())

    def eta(fixed: Mapping[int, Any]) -> exp.Expression:
        linear = _weighted_sum(design, list(zip(beta, parameter_pieces(design, fixed))))
        return sb.add(linear, sb.as_double(offset.copy())) if offset is not None else linear

    settings: list[tuple[int, Any]] = []  # (factor, level) of every counterfactual linear predictor
    for effect in effects:
        if effect.is_change:
            for level in (design.factors[effect.factor].reference, effect.level):
                if (effect.factor, level) not in settings:
                    settings.append((effect.factor, level))
    etas = {"eta": "e", **{f"eta_{s}": f"e_{s}" for s in range(len(settings))}}
    linear = exp.select(
        *[sb.column(f.alias) for f in design.factors],
        exp.alias_(weight, "w", quoted=True),
        exp.alias_(eta({}), "eta", quoted=True),
        *[exp.alias_(eta({f: v}), f"eta_{s}", quoted=True) for s, (f, v) in enumerate(settings)],
    ).from_(rows.subquery("dbfit_rows"))
    with_e = exp.select(
        "*", *[exp.alias_(sb.exp_neg_abs(sb.column(a)), b, quoted=True) for a, b in etas.items()]
    ).from_(linear.subquery("dbfit_eta"))

    def probability_columns(eta_name: str, e_name: str, suffix: str) -> list[exp.Expression]:
        e, one = sb.column(e_name), exp.Literal.number(1)
        return [
            exp.alias_(sb.stable_sigmoid(sb.column(eta_name), e), f"p{suffix}", quoted=True),
            # p (1 - p) = e / (1 + e)^2 for either sign of eta
            exp.alias_(
                sb.div(
                    e.copy(),
                    sb.paren(sb.mul(sb.paren(sb.add(one, e.copy())), sb.paren(sb.add(one, e.copy())))),
                ),
                f"q{suffix}",
                quoted=True,
            ),
        ]

    derivatives = {
        effect.factor: _weighted_sum(
            design, list(zip(beta, parameter_pieces(design, {}, derivative=effect.factor)))
        )
        for effect in effects
        if not effect.is_change
    }
    probabilities = exp.select(
        "*",
        *probability_columns("eta", "e", ""),
        *[c for s in range(len(settings)) for c in probability_columns(f"eta_{s}", f"e_{s}", f"_{s}")],
        *[exp.alias_(node, f"d_{factor}", quoted=True) for factor, node in derivatives.items()],
    ).from_(with_e.subquery("dbfit_e"))

    w, p, q = sb.column("w"), sb.column("p"), sb.column("q")
    sums: list[exp.Expression] = [exp.Count(this=exp.Star()), sb.agg_sum(w.copy())]
    positions: list[list[int | None]] = []
    for effect in effects:
        if not effect.is_change:
            slope = sb.column(f"d_{effect.factor}")
            curvature = sb.mul(
                q.copy(), sb.paren(sb.sub(exp.Literal.number(1), sb.mul(sb.number(2.0), p.copy())))
            )
            sums.append(sb.agg_sum(sb.mul(w.copy(), q.copy(), slope.copy())))
            entries: list[int | None] = []
            values = parameter_pieces(design, {})
            slopes = parameter_pieces(design, {}, derivative=effect.factor)
            for value, derivative in zip(values, slopes):
                term = sb.mul(curvature.copy(), slope.copy(), pieces_sql(design, value))
                if derivative is not None:
                    term = sb.add(term, sb.mul(q.copy(), pieces_sql(design, derivative)))
                entries.append(len(sums))
                sums.append(sb.agg_sum(sb.mul(w.copy(), sb.paren(term))))
            positions.append(entries)
            continue
        changed = settings.index((effect.factor, effect.level))
        base = settings.index((effect.factor, design.factors[effect.factor].reference))
        sums.append(
            sb.agg_sum(sb.mul(w.copy(), sb.paren(sb.sub(sb.column(f"p_{changed}"), sb.column(f"p_{base}")))))
        )
        at_level = parameter_pieces(design, {effect.factor: effect.level})
        at_reference = parameter_pieces(design, {effect.factor: design.factors[effect.factor].reference})
        entries = []
        for high, low in zip(at_level, at_reference):
            parts = [
                sb.mul(sign, sb.column(f"q_{s}"), pieces_sql(design, pieces))
                for sign, s, pieces in ((sb.number(1.0), changed, high), (sb.number(-1.0), base, low))
                if pieces is not None
            ]
            if not parts:
                entries.append(None)
                continue
            entries.append(len(sums))
            sums.append(sb.agg_sum(sb.mul(w.copy(), sb.paren(sb.add(*parts)))))
        positions.append(entries)
    if check_unseen:
        sums += [_unseen_count(design, i) for i, f in enumerate(design.factors) if f.kind == "categorical"]
    if len(sums) > MAX_SUMS:
        raise FitError(
            f"the effects scan would carry {len(sums):,} sums (effects x parameters); dbfit takes at most "
            f"{MAX_SUMS:,} in one query: choose fewer factors with variables=[...]"
        )
    query = exp.select(*[exp.alias_(s, f"s{k}", quoted=True) for k, s in enumerate(sums)])
    return query.from_(probabilities.subquery("dbfit_p")), positions


def _unseen_count(design: Design, factor: int) -> exp.Expression:
    f = design.factors[factor]
    seen = exp.In(this=sb.column(f.alias), expressions=[f.level_literal(v) for v in f.levels])
    return sb.agg_sum(
        exp.If(this=exp.Not(this=seen), true=exp.Literal.number(1), false=exp.Literal.number(0))
    )


def _refuse_unseen(design: Design, counts: list[Any]) -> None:
    categorical = [f for f in design.factors if f.kind == "categorical"]
    for factor, count in zip(categorical, counts):
        if count:
            raise FitError(
                f"'{factor.text}' takes values never seen in training on {int(count)} rows of the source: their "
                "probability is not defined by the model; filter those rows out of the source"
            )


def scan_effects(
    engine: DuckDBEngine, design: Design, beta: np.ndarray, effects: list[Effect], source: str | None
) -> EffectScan:
    """The average effects' sums from one scan over the fitted rows or ``source``."""
    query, positions = effects_query(design, effect_rows(design, source), beta, effects, source is not None)
    row = [np.nan if v is None else float(v) for v in engine.fetch(query)[0]]
    rows, weight = int(row[0]), row[1]
    if source is not None:
        _refuse_unseen(design, row[len(row) - sum(f.kind == "categorical" for f in design.factors) :])
    if rows == 0 or not weight > 0:
        raise FitError("no complete rows to average the effects over (every row has a NULL or zero weight)")
    totals = np.zeros(len(effects))
    gradients = np.zeros((len(effects), len(beta)))
    at = 2
    for k, entries in enumerate(positions):
        totals[k] = row[at]
        at += 1 + sum(e is not None for e in entries)
        gradients[k] = [0.0 if e is None else row[e] for e in entries]
    return EffectScan(rows, weight, totals / weight, gradients / weight)


@dataclass
class Point:
    """Where effects at a point are taken: numeric factors' values, categoricals' level shares, the offset."""

    values: dict[int, float]
    shares: dict[int, dict[str, float]]  # factor -> level label -> share (1 for a given level)
    offset: float = 0.0

    def evaluate(self, pieces: Pieces | None) -> float:
        if pieces is None:
            return 0.0
        constant, parts = pieces
        total = constant
        for part in parts:
            if part[0] == "value":
                total *= self.values[part[1]]
            else:
                total *= self.shares[part[1]].get(level_label(part[2]), 0.0)
        return total


def means_query(design: Design, rows: exp.Select, check_unseen: bool) -> exp.Select:
    """One aggregate: the weight, the weighted sum of each numeric factor and of each level's indicator, the
    offset's weighted sum, and (for a new source) the rows with unseen levels."""
    weight = sb.mul(design.weight_expression(), design.trials_expression())
    sums: list[exp.Expression] = [exp.Count(this=exp.Star()), sb.agg_sum(weight.copy())]
    for i, factor in enumerate(design.factors):
        if factor.kind == "numeric":
            sums.append(sb.agg_sum(sb.mul(weight.copy(), _piece_sql(design, ("value", i)))))
        else:
            sums += [
                sb.agg_sum(sb.mul(weight.copy(), _piece_sql(design, ("is", i, v)))) for v in factor.levels
            ]
    if design.offset is not None:
        sums.append(sb.agg_sum(sb.mul(weight.copy(), sb.as_double(design.offset_expression()))))
    if check_unseen:
        sums += [_unseen_count(design, i) for i, f in enumerate(design.factors) if f.kind == "categorical"]
    query = exp.select(*[exp.alias_(s, f"s{k}", quoted=True) for k, s in enumerate(sums)])
    return query.from_(rows.subquery("dbfit_rows"))


def training_means(engine: DuckDBEngine, design: Design, source: str | None) -> tuple[Point, int]:
    """The weighted means of the factors (level shares for categoricals) and of the offset, in one scan."""
    row = [
        np.nan if v is None else float(v)
        for v in engine.fetch(means_query(design, effect_rows(design, source), source is not None))[0]
    ]
    rows, weight = int(row[0]), row[1]
    if rows == 0 or not weight > 0:
        raise FitError("no complete rows to take the means over (every row has a NULL or zero weight)")
    point, at = Point({}, {}), 2
    for i, factor in enumerate(design.factors):
        if factor.kind == "numeric":
            point.values[i] = row[at] / weight
            at += 1
        else:
            point.shares[i] = {level_label(v): row[at + k] / weight for k, v in enumerate(factor.levels)}
            at += len(factor.levels)
    if design.offset is not None:
        point.offset = row[at] / weight
        at += 1
    if source is not None:
        _refuse_unseen(design, row[at:])
    return point, rows


def given_point(design: Design, values: Mapping[str, Any], means: Point | None) -> Point:
    """The point of ``values`` (by factor text), the other factors at ``means``."""
    texts = {f.text: i for i, f in enumerate(design.factors)}
    unknown = [name for name in values if name not in texts]
    if unknown:
        raise FitError(
            f"at names {', '.join(map(repr, unknown))}, not a factor of the formula; its factors are "
            f"{', '.join(texts)}"
        )
    point = (
        Point(dict(means.values), {k: dict(v) for k, v in means.shares.items()}, means.offset)
        if means
        else Point({}, {})
    )
    for name, value in values.items():
        i = texts[name]
        factor = design.factors[i]
        if factor.kind == "numeric":
            try:
                number = float(value)
            except (TypeError, ValueError):
                raise FitError(f"at: '{name}' is numeric; {value!r} is not a number") from None
            if isinstance(value, bool) or not math.isfinite(number):
                raise FitError(f"at: '{name}' is numeric; give it a finite number (got {value!r})")
            point.values[i] = number
        else:
            labels = [level_label(v) for v in factor.levels]
            if level_label(value) not in labels:
                raise FitError(
                    f"at: {value!r} is not a level of '{name}' in training (levels: {', '.join(labels[:20])})"
                )
            point.shares[i] = {level_label(value): 1.0}
    return point


def needs_means(design: Design, values: Mapping[str, Any]) -> bool:
    """Whether a point of ``values`` leaves some factor (or the offset) to be taken at its mean."""
    return design.offset is not None or any(f.text not in values for f in design.factors)


def effects_at_point(
    design: Design, beta: np.ndarray, effects: list[Effect], point: Point
) -> tuple[np.ndarray, np.ndarray]:
    """Each effect and its gradient at ``point`` (held fixed)."""

    def columns(fixed: Mapping[int, Any], derivative: int | None = None) -> np.ndarray:
        return np.array([point.evaluate(p) for p in parameter_pieces(design, fixed, derivative)])

    def probability(x: np.ndarray) -> tuple[float, float]:
        p = 1.0 / (1.0 + math.exp(-(float(beta @ x) + point.offset)))
        return p, p * (1.0 - p)

    values = np.zeros(len(effects))
    gradients = np.zeros((len(effects), len(beta)))
    for k, effect in enumerate(effects):
        if not effect.is_change:
            x, slope = columns({}), columns({}, effect.factor)
            p, q = probability(x)
            derivative = float(beta @ slope)
            values[k] = q * derivative
            gradients[k] = q * (1.0 - 2.0 * p) * derivative * x + q * slope
            continue
        reference = design.factors[effect.factor].reference
        high, low = columns({effect.factor: effect.level}), columns({effect.factor: reference})
        (p1, q1), (p0, q0) = probability(high), probability(low)
        values[k] = p1 - p0
        gradients[k] = q1 * high - q0 * low
    return values, gradients


def effects_table(model: Model, effects: list[Effect], values: np.ndarray, gradients: np.ndarray) -> pa.Table:
    """One row per effect: what it is, the estimate, its delta-method standard error, z, p and 95 % interval
    (no standard error when the model has no covariance, as after a penalised fit)."""
    design, estimates, covariance = model.design, model.estimates, model.covariance
    active = [k for k in range(len(estimates)) if np.isfinite(estimates[k])]  # aliased ones are left out
    block = covariance[np.ix_(active, active)]
    rows: dict[str, list[Any]] = {name: [] for name in EFFECT_COLUMNS}
    for effect, value, gradient in zip(effects, values, gradients):
        factor = design.factors[effect.factor]
        g = gradient[active]
        variance = float(g @ block @ g) if np.all(np.isfinite(block)) else math.nan
        error = math.sqrt(variance) if variance >= 0 else math.nan
        z = value / error if error > 0 else math.nan
        rows["term"].append(factor.text)
        rows["level"].append(level_label(effect.level) if effect.is_change else None)
        rows["reference"].append(level_label(factor.reference) if effect.is_change else None)
        rows["kind"].append(CHANGE if effect.is_change else DERIVATIVE)
        rows["effect"].append(float(value))
        rows["std_error"].append(error)
        rows["wald_z"].append(z)
        rows["p_value"].append(math.erfc(abs(z) / math.sqrt(2.0)) if math.isfinite(z) else math.nan)
        rows["ci_low"].append(value - inference.WALD_Z_95 * error)
        rows["ci_high"].append(value + inference.WALD_Z_95 * error)
    columns: dict[str, pa.Array] = {}
    for name in EFFECT_COLUMNS:
        if name in ("term", "level", "reference", "kind"):
            columns[name] = pa.array(rows[name], type=pa.string())
        else:
            data = np.asarray(rows[name], dtype=float)
            columns[name] = pa.array(data, mask=~np.isfinite(data), type=pa.float64())
    return pa.table(columns)


def marginal_effects(
    engine: DuckDBEngine,
    model: Model,
    source: str | None = None,
    *,
    at: str | Mapping[str, Any] = OVERALL,
    variables: Sequence[str] | None = None,
) -> pa.Table:
    """Effects of ``model``'s factors on the probability, with delta-method standard errors.

    ``at="overall"`` (default): the average over the rows (the fitted rows, or the complete rows of
    ``source``), one scan. ``at="means"``: at the weighted means of those rows, one scan. ``at={factor:
    value, ...}``: at that point, the factors not named at their means (no scan when every factor is named
    and the model has no offset). ``variables`` names the factors to take effects of (default: all).
    The table's schema metadata says where the effects were taken (``dbfit_at``), over which rows
    (``dbfit_rows``) and how many scans it cost (``dbfit_scans``).
    """
    design = fitted_rows_design(model) if source is None else model.design
    beta = np.nan_to_num(np.asarray(model.estimates, dtype=float), nan=0.0)
    effects = choose_effects(design, variables)
    before = engine.scans
    rows_text = (
        f"the {design.rows_used:,} rows the model was fitted on"
        if source is None
        else f"the rows of {source}"
    )
    if isinstance(at, str) and at == OVERALL:
        scanned = scan_effects(engine, design, beta, effects, source)
        values, gradients = scanned.effects, scanned.gradients
        where = f"average over {scanned.rows:,} rows"
    elif (isinstance(at, str) and at == MEANS) or isinstance(at, Mapping):
        given = {} if isinstance(at, str) else dict(at)
        means = None
        if isinstance(at, str) or needs_means(design, given):
            means, rows = training_means(engine, design, source)
            rows_text += f" ({rows:,} rows)" if source is not None else ""
        point = given_point(design, given, means)
        values, gradients = effects_at_point(design, beta, effects, point)
        where = (
            "at the means"
            if not given
            else "at "
            + ", ".join(f"{k}={v}" for k, v in given.items())
            + (", other factors at their means" if means is not None else "")
        )
    else:
        raise FitError(f"at={at!r}: give 'overall', 'means' or a dict of factor values")
    table = effects_table(model, effects, values, gradients)
    return table.replace_schema_metadata(
        {
            b"dbfit_at": where.encode(),
            b"dbfit_rows": rows_text.encode(),
            b"dbfit_scans": str(engine.scans - before).encode(),
        }
    )
