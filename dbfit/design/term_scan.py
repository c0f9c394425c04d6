"""Knots and bin edges of the formula's term functions, computed in the database in one scan.

Each unresolved ``spline(x, k)`` or ``bins(x, k)`` (see :mod:`dbfit.expressions.basis_terms`) asks for
quantiles of its argument: ``quantile_cont`` in DuckDB, ``percentile_cont(...) WITHIN GROUP`` in PostgreSQL
(sqlglot writes the one tree in each engine's spelling), ``percentile(x, array(...))`` in Spark (exact, with
the same linear interpolation), over the rows whose target, term-function arguments
and other terms are not NULL, unweighted. The count of distinct values comes from the same scan, so a call
asking for more knots or bins than the data has values is refused naming the term. The formula is then
rewritten with the values listed (``spline(x, knots => [...])``), which is the formula the model keeps.
"""

from __future__ import annotations

import re
from typing import Any

from sqlglot import exp

from dbfit.errors import FormulaError
from dbfit.expressions import builders as sb
from dbfit.expressions.basis_terms import BinsCall, SplineCall, TermCall, check_values
from dbfit.expressions.formula import Formula, Term, parse_formula


def resolve_term_calls(
    engine: Any, formula: Formula, relation: exp.Expression, numeric: re.Pattern
) -> Formula:
    """``formula`` with the knots and edges of every term function computed; the arguments must be numeric
    (their SQL type matches ``numeric``)."""
    calls = [term for term in formula.terms if term.call is not None]
    if not calls:
        return formula
    _check_numeric(engine, calls, relation, numeric)
    unresolved = [term for term in formula.terms if term.unresolved]
    if not unresolved:
        return formula
    values = quantile_scan(engine, formula, relation, [term.call for term in unresolved if term.call])
    text = formula.text
    for term, (quantiles, distinct) in zip(unresolved, values):
        assert term.call is not None
        check_values(term.call, quantiles, distinct)
        text = text.replace(term.texts[0], term.call.with_values(quantiles).resolved_text())
    return parse_formula(text)


def quantile_scan(
    engine: Any, formula: Formula, relation: exp.Expression, calls: list[TermCall]
) -> list[tuple[list[float], int]]:
    """One scan: for each call, the quantiles of its argument that it asks for and its distinct count."""
    selected: list[exp.Expression] = []
    for call in calls:
        value = sb.as_double(call.argument.copy())
        quantiles = exp.Array(expressions=[sb.number(q) for q in call.quantiles()])
        if getattr(engine, "dialect", "duckdb") == "spark":  # Spark's percentile_cont takes one fraction
            selected.append(exp.Anonymous(this="percentile", expressions=[value, quantiles]))
        else:
            selected.append(exp.PercentileCont(this=value, expression=quantiles))
        selected.append(exp.Count(this=exp.Distinct(expressions=[value.copy()])))
    present = [formula.target] + [
        term.call.argument if term.call is not None else factor
        for term in formula.terms
        for factor in term.factors
    ]
    query = exp.select(*selected).from_(relation.copy()).where(sb.all_not_null(present))
    row = engine.fetch(query)[0]
    found: list[tuple[list[float], int]] = []
    for k, call in enumerate(calls):
        quantiles, distinct = row[2 * k], int(row[2 * k + 1] or 0)
        if quantiles is None:
            raise FormulaError(f"term '{call.text}': '{call.argument_text}' has no value among the rows used")
        found.append(([float(q) for q in quantiles], distinct))
    return found


def _check_numeric(engine: Any, terms: list[Term], relation: exp.Expression, numeric: re.Pattern) -> None:
    probe = exp.select(
        *[
            exp.alias_(term.call.argument.copy(), f"dbfit_a{k}", quoted=True)
            for k, term in enumerate(terms)
            if term.call
        ]
    )
    for term, (_, sql_type) in zip(terms, engine.describe(probe.from_(relation.copy()))):
        if not numeric.match(sql_type):
            assert term.call is not None
            kind = "spline" if isinstance(term.call, SplineCall) else "bins"
            raise FormulaError(
                f"term '{term.call.text}': '{term.call.argument_text}' has SQL type {sql_type}; a {kind} term "
                "needs a numeric expression (a categorical enters the formula as it is)"
            )


def with_quantiles_recomputed(text: str) -> str:
    """The formula ``text`` with the knots and edges a fit computed at quantiles taken out, so that the next
    fit computes them again (knots and edges the user listed stay)."""
    for term in parse_formula(text).terms:
        call = term.call
        if call is not None and call.computed:
            text = text.replace(call.text, call.unresolved_text())
    return text


def with_bins_references(formula: Formula, given: dict[str, Any]) -> dict[str, Any]:
    """``given`` reference levels by factor text, with each bins term's own (``reference => j``) added and a
    key naming a bins term as ``bins(x)`` moved to its factor's text."""
    references: dict[str, Any] = {}
    names: dict[str, str] = {}
    for term in formula.terms:
        if isinstance(term.call, BinsCall):
            references[term.texts[0]] = term.call.reference_label
            names[term.call.name] = term.texts[0]
    return references | {names.get(key, key): value for key, value in given.items()}
