"""Resolve a formula's term functions against the source before the design is laid out.

The formula a model stores holds no unresolved term function: ``all_columns()`` and
``all_columns_except(a, b)`` become the source's columns (all but the target's and the options' columns and
the ones listed), ``cyclic(t, unit)`` its sine and cosine terms, ``elapsed(t, unit)`` gains its reference date
(the earliest ``t`` among the rows used), and the ``missing=`` option turns a numeric factor ``x`` into
``filled(x, mean)`` plus the term ``is_missing(x)`` and a categorical one into ``null_level(x)``. So a refit
(which reuses the stored formula) keeps the columns, reference dates and fill values of the model, and every
scoring path reads them from the formula. The reference dates and training means come from one scan over the
rows the fit uses, run only when a formula needs one; it also counts the NULLs each ``filled`` term replaces.
The fill value is the (weighted) mean of ``x`` over those rows where ``x`` is not NULL, the mean imputation
with a missing-indicator of Little and Rubin (2002), Statistical Analysis with Missing Data, 2nd ed., section
3.4 (cited from memory).
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field

from sqlglot import exp

from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import FitError, FormulaError
from dbfit.expressions import builders as sb
from dbfit.expressions import term_functions as tf
from dbfit.expressions.basis_terms import recognise
from dbfit.expressions.dialects.date_parts import wall_clock
from dbfit.expressions.formula import formula_pieces, parse_expression, parse_factor

DATED_ENGINES = ("duckdb", "postgres", "spark")
NUMERIC = re.compile(
    r"^(TINYINT|SMALLINT|INTEGER|BIGINT|HUGEINT|U\w*INT|FLOAT|REAL|DOUBLE|DECIMAL.*|NUMERIC.*|INT\d*)$", re.I
)
CATEGORICAL = re.compile(r"^(VARCHAR|BOOLEAN|ENUM.*)$", re.IGNORECASE)
TEXT_LEVELS = re.compile(r"^(VARCHAR|ENUM.*)$", re.IGNORECASE)
# a Spark TIMESTAMP is read as the wall-clock time it shows in the session time zone (see date_parts)
DATE_OR_TIME = re.compile(r"^(DATE|TIMESTAMP(_S|_MS|_NS|_NTZ)?|TIMESTAMP WITHOUT TIME ZONE)$", re.IGNORECASE)


@dataclass
class Resolution:
    """The formula as the model stores it, and what resolving it found."""

    formula: str
    filled_rows: dict[str, int] = field(default_factory=dict)  # per filled(x, value) factor: NULLs filled
    source_columns_seen: list[str] | None = None  # the source's columns, when all_columns expanded them
    renamed: dict[str, str] = field(default_factory=dict)  # x -> filled(x, v) or null_level(x)


def resolve_formula(
    engine: DuckDBEngine,
    text: str,
    relation: exp.Expression,
    *,
    missing: Mapping[str, str] | str | None = None,
    option_expressions: tuple[str | None, ...] = (),
    weights: str | None = None,
) -> Resolution:
    """Resolve ``text`` (see the module docstring); a formula with nothing to resolve comes back unchanged
    without a query. ``option_expressions`` (weights, offset, trials, by) name columns all_columns leaves out
    and rows the scan skips where they are NULL."""
    target_text, pieces = formula_pieces(text)
    calls = [[tf.read_call(factor) for factor in factors] for _, factors in pieces]
    flat = [call for row in calls for call in row if call is not None]
    if (
        not missing
        and not any(call.pending or call.name in ("filled", "null_level") for call in flat)
        and not any(call.name in tf.DATE_FUNCTIONS for call in flat)
    ):
        return Resolution(formula=text)
    resolution = Resolution(formula=text)
    dated = [call.text for call in flat if call.name in tf.DATE_FUNCTIONS]
    if dated and engine.dialect not in DATED_ENGINES:
        raise FormulaError(
            f"date terms ({', '.join(dated)}) are fitted on {', '.join(DATED_ENGINES)}; not yet on {engine.dialect}"
        )
    if any(call is not None and call.name in tf.COLUMN_FUNCTIONS for call in flat):
        pieces, resolution.source_columns_seen = _expand_columns(
            engine, relation, target_text, pieces, option_expressions
        )
    pieces = _expand_cycles(pieces)
    plain_types = _types(engine, relation, pieces)
    _check_dates(pieces, plain_types)
    pieces, new_fills = _apply_missing(pieces, plain_types, missing)
    pieces = _resolve_with_scan(
        engine, relation, target_text, pieces, new_fills, option_expressions, weights, resolution
    )
    if isinstance(missing, str):  # a policy for every term fills only the terms that have NULLs
        complete = {text for text in new_fills if resolution.filled_rows.get(text) == 0}
        pieces = [
            (sign, [_unfilled(f, complete) for f in factors])
            for sign, factors in pieces
            if not any(f"is_missing({text})" == ":".join(factors) for text in complete)
        ]
        resolution.filled_rows = {k: v for k, v in resolution.filled_rows.items() if k not in complete}
    for _, factors in pieces:
        for factor in factors:
            call = tf.read_call(factor)
            if call is not None and call.name in ("filled", "null_level") and call.arguments[0] in new_fills:
                resolution.renamed[call.arguments[0]] = factor
    resolution.formula = _joined(target_text, pieces)
    return resolution


def _joined(target_text: str, pieces: list[tuple[str, list[str]]]) -> str:
    rhs = ""
    for position, (sign, factors) in enumerate(pieces):
        term = ":".join(factors)
        rhs += (term if sign == "+" else f"- {term}") if position == 0 else f" {sign} {term}"
    return f"{target_text} ~ {rhs}"


def _is_intercept(factors: list[str]) -> bool:
    return factors in (["0"], ["1"])


def _column_names(texts: list[str | None]) -> set[str]:
    names: set[str] = set()
    for text in texts:
        if text is not None:
            names.update(c.name.lower() for c in parse_expression(text, "expression").find_all(exp.Column))
    return names


def _written(name: str) -> str:
    """A source column as a formula writes it: bare when it can be, else double-quoted."""
    bare = re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", name) is not None
    return exp.column(name, quoted=not bare).sql(dialect="duckdb")


def _expand_columns(
    engine: DuckDBEngine,
    relation: exp.Expression,
    target_text: str,
    pieces: list[tuple[str, list[str]]],
    option_expressions: tuple[str | None, ...],
) -> tuple[list[tuple[str, list[str]]], list[str]]:
    described = engine.describe(exp.select("*").from_(relation.copy()))
    present = {name.lower(): name for name, _ in described}
    used_elsewhere = _column_names([target_text, *option_expressions])
    expanded: list[tuple[str, list[str]]] = []
    for sign, factors in pieces:
        call = tf.read_call(factors[0]) if len(factors) == 1 else None
        if any((c := tf.read_call(f)) is not None and c.name in tf.COLUMN_FUNCTIONS for f in factors) and (
            call is None or sign != "+"
        ):
            raise FormulaError(
                f"'{':'.join(factors)}': all_columns() stands alone as a term added with '+' "
                "(remove columns by listing them: all_columns_except(id, ...))"
            )
        if call is None or call.name not in tf.COLUMN_FUNCTIONS:
            expanded.append((sign, factors))
            continue
        tf.check_arity(call)
        excluded = set(used_elsewhere)
        for argument in call.arguments:
            name = argument.strip().strip('"').lower()
            if name not in present:
                raise FormulaError(
                    f"'{call.text}' leaves out '{argument}', which is not a column of the source "
                    f"(columns: {', '.join(present.values())})"
                )
            excluded.add(name)
        chosen = [(name, kind) for name, kind in described if name.lower() not in excluded]
        unusable = [
            f"{name} ({kind})"
            for name, kind in chosen
            if not (NUMERIC.match(kind) or CATEGORICAL.match(kind))
        ]
        if unusable:
            raise FormulaError(
                f"'{call.text}' would take columns that are neither numeric nor categorical: "
                f"{', '.join(unusable)}; leave them out with all_columns_except(...) and enter dates through "
                "elapsed(), iso_weekday(), month_of_year(), hour_of_day() or cyclic()"
            )
        if not chosen:
            raise FormulaError(f"'{call.text}' leaves no column of the source")
        expanded.extend(("+", [_written(name)]) for name, _ in chosen)
    return _without_removed(expanded), [name for name, _ in described]


def _without_removed(pieces: list[tuple[str, list[str]]]) -> list[tuple[str, list[str]]]:
    """``all_columns() - id``: the removed single columns leave the stored formula with their '-' pieces."""

    def name(factors: list[str]) -> str:
        return factors[0].strip('"').lower() if len(factors) == 1 else ""

    added = {name(factors) for sign, factors in pieces if sign == "+"}
    # a removal of a term that is not there stays, for the formula's own error
    removed = {name(factors) for sign, factors in pieces if sign == "-" and name(factors) in added} - {""}
    kept = [(sign, factors) for sign, factors in pieces if name(factors) not in removed]
    return kept


def _expand_cycles(pieces: list[tuple[str, list[str]]]) -> list[tuple[str, list[str]]]:
    expanded: list[tuple[str, list[str]]] = []
    for sign, factors in pieces:
        position = next(
            (k for k, f in enumerate(factors) if (c := tf.read_call(f)) is not None and c.name == "cyclic"),
            None,
        )
        if position is None:
            expanded.append((sign, factors))
            continue
        call = tf.read_call(factors[position])
        assert call is not None
        tf.check_arity(call)
        unit = tf.unit_of(call, tf.CYCLES)
        for name in ("cycle_sin", "cycle_cos"):
            part = f"{name}({call.arguments[0]}, {unit})"
            expanded.append((sign, factors[:position] + [part] + factors[position + 1 :]))
    return expanded


def _types(
    engine: DuckDBEngine, relation: exp.Expression, pieces: list[tuple[str, list[str]]]
) -> dict[str, str]:
    """The SQL type of every plain factor and of every date function's argument, by text."""
    wanted: dict[str, exp.Expression] = {}
    for _, factors in pieces:
        if _is_intercept(factors):
            continue
        for factor in factors:
            call = tf.read_call(factor)
            if call is None:
                wanted.setdefault(factor, parse_factor(factor, f"term '{factor}'"))
            elif call.name in tf.DATE_FUNCTIONS or call.name in tf.MISSING_FUNCTIONS:
                tf.check_arity(call)
                wanted.setdefault(call.arguments[0], tf.argument_tree(call))
    if not wanted:
        return {}
    names = list(wanted)
    probe = exp.select(
        *[exp.alias_(node.copy(), f"dbfit_t{k}", quoted=True) for k, node in enumerate(wanted.values())]
    ).from_(relation.copy())
    return {names[k]: kind for k, (_, kind) in enumerate(engine.describe(probe))}


def _check_dates(pieces: list[tuple[str, list[str]]], types: dict[str, str]) -> None:
    for _, factors in pieces:
        for factor in factors:
            call = tf.read_call(factor)
            if call is None or call.name not in tf.DATE_FUNCTIONS:
                continue
            kind = types[call.arguments[0]]
            if not DATE_OR_TIME.match(kind):
                zone = "WITH TIME ZONE" in kind.upper() or kind.upper() == "TIMESTAMPTZ"
                raise FormulaError(
                    f"'{call.text}' needs a DATE or TIMESTAMP, but '{call.arguments[0]}' is {kind}"
                    + ("; cast it to TIMESTAMP in the time zone you mean" if zone else "")
                )
            hourly = call.name == "hour_of_day" or (
                call.name in ("cycle_sin", "cycle_cos") and tf.unit_of(call, tf.CYCLES) == "hour"
            )
            if hourly and kind.upper() == "DATE":
                raise FormulaError(
                    f"'{call.text}' asks for the hour of '{call.arguments[0]}', a DATE (no time)"
                )


def _policy_of(factor: str, kind: str, missing: Mapping[str, str] | str | None) -> str:
    if missing is None:
        return "drop"
    if isinstance(missing, str):
        wanted = {
            "indicator": "indicator" if NUMERIC.match(kind) else "drop",
            "level": "level" if TEXT_LEVELS.match(kind) else "drop",
        }
        return wanted.get(missing, "drop")
    return missing.get(factor, "drop")


def _apply_missing(
    pieces: list[tuple[str, list[str]]], types: dict[str, str], missing: Mapping[str, str] | str | None
) -> tuple[list[tuple[str, list[str]]], list[str]]:
    """Rewrite the factors ``missing=`` asks for; returns the pieces and the factors rewritten."""
    if not missing:
        return pieces, []
    plain = {
        f
        for _, factors in pieces
        if not _is_intercept(factors)
        for f in factors
        if tf.read_call(f) is None and recognise(f, f"term '{f}'") is None  # spline and bins keep their rows
    }
    if isinstance(missing, Mapping):
        resolved = {
            c.arguments[0]
            for _, factors in pieces
            for f in factors
            if (c := tf.read_call(f)) is not None and c.name in tf.MISSING_FUNCTIONS
        }
        for name in missing:
            if name not in plain and name not in resolved:
                raise FormulaError(
                    f"missing= names '{name}', which is not a term of the formula "
                    f"(terms: {', '.join(sorted(plain)) or 'none'})"
                )
    rewritten: dict[str, str] = {}
    for factor in sorted(plain):
        kind = types[factor]
        policy = _policy_of(factor, kind, missing)
        if policy == "indicator":
            if not NUMERIC.match(kind):
                raise FormulaError(
                    f"missing='indicator' of '{factor}' needs a numeric term, but it is {kind}; "
                    "give a categorical missing='level' (NULL as its own level)"
                )
            rewritten[factor] = f"filled({factor}, ?)"
        elif policy == "level":
            if not CATEGORICAL.match(kind):
                raise FormulaError(
                    f"missing='level' of '{factor}' needs a categorical term, but it is {kind}; "
                    "give a numeric one missing='indicator'"
                )
            if not TEXT_LEVELS.match(kind):
                raise FormulaError(
                    f"missing='level' of '{factor}' needs text levels, but it is BOOLEAN (written 1/0 in some "
                    f"dialects); write it as text, e.g. CASE WHEN {factor} THEN 'yes' ELSE 'no' END"
                )
            rewritten[factor] = f"null_level({factor})"
    out: list[tuple[str, list[str]]] = []
    indicated: set[str] = set()
    for sign, factors in pieces:
        out.append((sign, [rewritten.get(f, f) for f in factors]))
        for f in factors:
            if rewritten.get(f, "").startswith("filled(") and f not in indicated and sign == "+":
                indicated.add(f)
                out.append(("+", [f"is_missing({f})"]))
    return out, sorted(rewritten)


def _resolve_with_scan(
    engine: DuckDBEngine,
    relation: exp.Expression,
    target_text: str,
    pieces: list[tuple[str, list[str]]],
    new_fills: list[str],
    option_expressions: tuple[str | None, ...],
    weights: str | None,
    resolution: Resolution,
) -> list[tuple[str, list[str]]]:
    """One scan over the rows the fit uses: each pending reference date, each owed fill value, and the NULLs
    each fill replaces; then the pieces with those values written in."""
    pending_dates: dict[str, exp.Expression] = {}
    filled_arguments: dict[str, exp.Expression] = {}
    level_arguments: dict[str, exp.Expression] = {}
    required: list[exp.Expression] = [parse_expression(target_text, "the target")]
    required += [parse_expression(text, "option") for text in option_expressions if text is not None]
    for _, factors in pieces:
        if _is_intercept(factors):
            continue
        for factor in factors:
            call = tf.read_call(factor)
            if call is not None and call.name == "filled":
                filled_arguments.setdefault(call.arguments[0], tf.argument_tree(call))
            elif call is not None and call.name == "null_level":
                level_arguments.setdefault(call.arguments[0], tf.argument_tree(call))
            elif call is not None and call.name == "is_missing":
                continue
            elif call is not None and call.pending:
                pending_dates.setdefault(call.arguments[0], tf.argument_tree(call))
                required.append(tf.argument_tree(call))
            else:
                required.append(parse_factor(factor, f"term '{factor}'"))
    if not pending_dates and not filled_arguments and not level_arguments:
        return pieces
    w = sb.as_double(parse_expression(weights, "weights")) if weights is not None else exp.Literal.number(1)
    aggregates: list[exp.Expression] = [
        exp.Min(this=wall_clock(node.copy(), engine.dialect)) for node in pending_dates.values()
    ]
    for node in filled_arguments.values():
        present = exp.Not(this=exp.Is(this=node.copy(), expression=exp.Null()))
        value = sb.as_double(node.copy())
        aggregates.append(
            sb.agg_sum(exp.If(this=present.copy(), true=sb.mul(w.copy(), value), false=exp.Null()))
        )
        aggregates.append(sb.agg_sum(exp.If(this=present, true=w.copy(), false=exp.Null())))
    for node in [*filled_arguments.values(), *level_arguments.values()]:
        missing_rows = exp.Is(this=node.copy(), expression=exp.Null())
        aggregates.append(
            sb.agg_sum(exp.If(this=missing_rows, true=exp.Literal.number(1), false=exp.Literal.number(0)))
        )
    query = (
        exp.select(*[exp.alias_(node, f"dbfit_r{k}", quoted=True) for k, node in enumerate(aggregates)])
        .from_(relation.copy())
        .where(sb.all_not_null(required))
    )
    row = list(engine.fetch(query)[0])
    values: dict[str, str] = {}
    for text in pending_dates:
        earliest = row.pop(0)
        if earliest is None:
            raise FitError(f"'{text}' has no value among the rows used: no reference date for elapsed()")
        values[f"date:{text}"] = tf.reference_text(earliest)
    for text in filled_arguments:
        total, weight = row.pop(0), row.pop(0)
        if text in new_fills:
            if not weight:
                raise FitError(f"'{text}' is NULL on every row used: it has no mean to fill with")
            mean = float(total) / float(weight)
            if not math.isfinite(mean):
                raise FitError(f"the mean of '{text}' is not finite; it cannot fill its NULLs")
            values[f"fill:{text}"] = repr(mean)
    for text in [*filled_arguments, *level_arguments]:
        resolution.filled_rows[text] = int(row.pop(0) or 0)
    return [(sign, [_with_values(f, values) for f in factors]) for sign, factors in pieces]


def _unfilled(factor: str, complete: set[str]) -> str:
    call = tf.read_call(factor)
    if call is not None and call.name in ("filled", "null_level") and call.arguments[0] in complete:
        return call.arguments[0]
    return factor


def _with_values(factor: str, values: dict[str, str]) -> str:
    call = tf.read_call(factor)
    if call is None:
        return factor
    argument = call.arguments[0] if call.arguments else ""
    if call.name == "elapsed" and call.pending:
        return f"elapsed({argument}, {tf.unit_of(call, tf.ELAPSED_UNITS)}, {values[f'date:{argument}']})"
    if call.name == "filled" and call.arguments[1] == "?":
        return f"filled({argument}, {values[f'fill:{argument}']})"
    return factor
