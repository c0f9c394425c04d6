"""One scan for many fits: the statistics of every cross-validation fold (and of all rows) at once.

Fit f has its own coefficients and a fold it holds out (or none). Each row gets one linear predictor per fit;
a row enters fit f's information, score and log-likelihood when its fold is not the one f holds out, and its
held-out log-likelihood otherwise. So k folds plus the fit on all rows cost one scan per pass, not k + 1.
The per-row terms are those of :mod:`dbfit.fitting.rowterms` (McCullagh and Nelder 1989, section 4.4).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from sqlglot import exp

from dbfit.design.layout import Design
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.expressions import builders as sb
from dbfit.fitting.rowterms import (
    ONE,
    RowQuantities,
    carried_columns,
    linear_predictor,
    symmetric,
    triangle_size,
    upper_products,
    with_e,
    z_columns,
)
from dbfit.fitting.splits import FOLD
from dbfit.solver.information import PassResult


@dataclass(frozen=True)
class FoldFit:
    held_out: int | None  # the fold this fit leaves out; None fits all rows
    beta: np.ndarray


@dataclass
class FoldPass:
    result: PassResult  # over the fit's training rows
    held_out_loglik: float  # over the rows of the fold it leaves out (0 when none)


def fold_scan_query(
    design: Design, parameters: list[int], fold: exp.Expression, fits: list[FoldFit]
) -> exp.Select:
    names, projections = z_columns(design, parameters)
    z = [exp.Literal.number(1) if name is ONE else sb.column(name) for name in names]
    columns = exp.select(*projections, *carried_columns(design), sb.column(FOLD)).from_(
        design.base_query({FOLD: fold}).subquery("dbfit_base")
    )
    kept = [sb.column(name) for name in names if name is not ONE]
    kept += [sb.column(c) for c in ("y", "pw", "n", FOLD)]
    z_or_one = [None if name is ONE else sb.column(name) for name in names]
    etas = [linear_predictor([sb.number(b) for b in fit.beta], z_or_one) for fit in fits]
    linear = exp.select(
        *kept, *[exp.alias_(eta, f"eta{f}", quoted=True) for f, eta in enumerate(etas)]
    ).from_(columns.subquery("dbfit_cols"))

    row_terms: list[exp.Expression] = []
    for f, fit in enumerate(fits):
        quantities = RowQuantities(eta=f"eta{f}", e=f"e{f}")
        training = (
            exp.Literal.number(1)
            if fit.held_out is None
            else exp.If(
                this=exp.NEQ(this=sb.column(FOLD), expression=exp.Literal.number(fit.held_out)),
                true=exp.Literal.number(1),
                false=exp.Literal.number(0),
            )
        )
        weight = sb.mul(training, sb.column("pw"))
        row_terms += [
            exp.alias_(quantities.working_weight(weight), f"wt{f}", quoted=True),
            exp.alias_(quantities.residual(weight), f"r{f}", quoted=True),
            exp.alias_(quantities.loglik(), f"ll{f}", quoted=True),
            exp.alias_(training.copy(), f"t{f}", quoted=True),
        ]
    e_columns = {f"eta{f}": f"e{f}" for f in range(len(fits))}
    terms = exp.select(*kept, *row_terms).from_(with_e(linear, "dbfit_lin", e_columns).subquery("dbfit_e"))

    one = exp.Literal.number(1)
    sums: list[exp.Expression] = []
    for f in range(len(fits)):
        sums += [sb.agg_sum(sb.mul(sb.column(f"wt{f}"), product)) for product in upper_products(z)]
        sums += [sb.agg_sum(sb.mul(sb.column(f"r{f}"), zk.copy())) for zk in z]
        sums.append(sb.agg_sum(sb.mul(sb.column(f"t{f}"), sb.column(f"ll{f}"))))
        sums.append(sb.agg_sum(sb.mul(sb.paren(sb.sub(one.copy(), sb.column(f"t{f}"))), sb.column(f"ll{f}"))))
    return exp.select(*[exp.alias_(s, f"s{i}", quoted=True) for i, s in enumerate(sums)]).from_(
        terms.subquery("dbfit_terms")
    )


def fold_scan(
    engine: DuckDBEngine, design: Design, parameters: list[int], fold: exp.Expression, fits: list[FoldFit]
) -> list[FoldPass]:
    """Run the scan and split its one row into a pass result per fit."""
    values = [
        0.0 if v is None else float(v)
        for v in engine.fetch(fold_scan_query(design, parameters, fold, fits))[0]
    ]
    size = len(parameters)
    triangle = triangle_size(size)
    width = triangle + size + 2
    passes = []
    for f in range(len(fits)):
        chunk = values[f * width : (f + 1) * width]
        result = PassResult(
            symmetric(chunk[:triangle], size),
            np.array(chunk[triangle : triangle + size]),
            chunk[triangle + size],
            0.0,
            0.0,
        )
        passes.append(FoldPass(result, chunk[triangle + size + 1]))
    return passes
