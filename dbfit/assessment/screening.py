"""Screening a candidate variable before it enters a model: weight of evidence and information value per bin.

The variable is cut like a ``bins(x, k)`` term (:class:`dbfit.expressions.basis_terms.BinsCall`: quantile
edges from one scan in the database, or edges given); one grouped query then counts events (target 1) and
non-events (target 0) per bin and computes, in SQL,

    WoE_i = ln( (non_events_i / non_events) / (events_i / events) ),
    IV_i  = (non_events_i / non_events - events_i / events) * WoE_i,   IV = sum_i IV_i,

as in Siddiqi (2006), Credit Risk Scorecards: Developing and Implementing Intelligent Credit Scoring, Wiley,
chapter 6 (non-events are the "goods", events the "bads"). A bin with no events or no non-events has no
finite WoE: its WoE and IV are NULL and left out of the total. NULL values of the variable form the bin
``missing`` when ``missing_bin`` is set, else they are left out; rows with a NULL target are left out.
"""

from __future__ import annotations

from typing import Any

import pyarrow as pa
from sqlglot import exp

from dbfit.design.term_scan import quantile_scan
from dbfit.errors import FitError, FormulaError
from dbfit.expressions import builders as sb
from dbfit.expressions.basis_terms import BinsCall, check_values
from dbfit.expressions.formula import Formula, parse_expression
from dbfit.expressions.source import source_relation

SCREENING_COLUMNS = ("bin", "position", "rows", "events", "non_events", "woe", "iv")


def bin_screening(
    engine: Any,
    source: str,
    target: str,
    variable: str,
    *,
    bins: int = 10,
    edges: list[float] | None = None,
    missing_bin: bool = False,
) -> pa.Table:
    """One row per bin of ``variable`` (see the module docstring); ``target`` is a 0/1 or boolean expression.
    The total information value is the sum of the ``iv`` column."""
    relation = source_relation(source)
    target_node = parse_expression(target, "target")
    call = _call(variable, bins, edges, missing_bin)
    if call.edges is None:
        formula = Formula(text="", target=target_node, target_text=target, terms=(), intercept=True)
        [(values, distinct)] = quantile_scan(engine, formula, relation, [call])
        check_values(call, values, distinct)
        call = call.with_values(values)
    rows = engine.fetch(_screening_query(call, target_node, relation))
    if not rows:
        raise FitError(f"no rows with both '{target}' and '{variable}' to screen")
    columns = list(zip(*rows))
    return pa.table({name: list(values) for name, values in zip(SCREENING_COLUMNS, columns)})


def _call(variable: str, bins: int, edges: list[float] | None, missing_bin: bool) -> BinsCall:
    argument = parse_expression(variable, "variable")
    text = f"bins({variable})"
    if edges is not None:
        listed = [float(e) for e in edges]
        if not listed or any(not b > a for a, b in zip(listed, listed[1:])):
            raise FormulaError(
                f"screening of '{variable}': edges must be a strictly increasing list (got {edges})"
            )
        return BinsCall(
            text, argument, variable, len(listed) + 1, missing_bin=missing_bin, edges=tuple(listed)
        )
    if not isinstance(bins, int) or isinstance(bins, bool) or bins < 2:
        raise FormulaError(f"screening of '{variable}': bins must be a whole number >= 2 (got {bins!r})")
    return BinsCall(text, argument, variable, bins, missing_bin=missing_bin)


def _screening_query(call: BinsCall, target: exp.Expression, relation: exp.Expression) -> exp.Expression:
    """Grouped counts per bin, then WoE and the IV contributions over window totals, all in SQL."""
    labels = call.labels()
    position = exp.Case(
        ifs=[
            exp.If(
                this=exp.EQ(this=sb.column("bin"), expression=exp.Literal.string(label)),
                true=exp.Literal.number(k + 1),
            )
            for k, label in enumerate(labels)
        ],
        default=exp.Literal.number(0),
    )
    y = sb.column("y")
    counts = (
        exp.select(
            sb.column("bin"),
            exp.alias_(position, "position", quoted=True),
            exp.alias_(exp.Count(this=exp.Star()), "rows", quoted=True),
            exp.alias_(sb.agg_sum(y.copy()), "events", quoted=True),
            exp.alias_(sb.agg_sum(sb.sub(sb.number(1), y.copy())), "non_events", quoted=True),
        )
        .from_(
            exp.select(
                exp.alias_(call.expression(), "bin", quoted=True),
                exp.alias_(
                    sb.truth_as_double(exp.EQ(this=sb.paren(target.copy()), expression=sb.number(1))),
                    "y",
                    quoted=True,
                ),
            )
            .from_(relation.copy())
            .subquery("dbfit_rows")
        )
        .where(sb.all_not_null([sb.column("bin"), y.copy()]))
        .group_by(sb.column("bin"))
    )

    def share(column: str) -> exp.Expression:
        total = exp.Window(this=sb.agg_sum(sb.column(column)))
        return sb.paren(
            sb.div(sb.as_double(sb.column(column)), exp.Nullif(this=total, expression=sb.number(0)))
        )

    good, bad = share("non_events"), share("events")
    positive = exp.and_(
        exp.GT(this=sb.column("events"), expression=sb.number(0)),
        exp.GT(this=sb.column("non_events"), expression=sb.number(0)),
    )
    woe = exp.Case(ifs=[exp.If(this=positive, true=exp.Ln(this=sb.div(good.copy(), bad.copy())))])
    iv = exp.Case(ifs=[exp.If(this=positive.copy(), true=sb.mul(sb.paren(sb.sub(good, bad)), woe.copy()))])
    return (
        exp.select(
            sb.column("bin"),
            sb.column("position"),
            sb.column("rows"),
            sb.as_double(sb.column("events")),
            sb.as_double(sb.column("non_events")),
            exp.alias_(woe, "woe", quoted=True),
            exp.alias_(iv, "iv", quoted=True),
        )
        .from_(counts.subquery("dbfit_counts"))
        .order_by(sb.column("position"))
    )
