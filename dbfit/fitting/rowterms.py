"""Per-row quantities at given coefficients, for aggregates beyond the core statistics query.

For eta = offset + z'b the fitted probability is mu = 1 / (1 + e^-eta), the working weight
wt = w n mu (1 - mu) and the score residual r = w (y - n mu), so that the score is sum r z and the Fisher
information sum wt z z' (McCullagh and Nelder 1989, Generalized Linear Models, 2nd ed., section 4.4).
Everything is written with e = exp(-|eta|), finite for any eta.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from sqlglot import exp

from dbfit.expressions import builders as sb
from dbfit.design.layout import TARGET, Design

ONE = None  # stands for the intercept's constant column in ``RowTerms.z_names``


@dataclass
class RowTerms:
    """A SELECT with one row per data row: columns ``z_names``, y, pw, n, eta, e, mu, wt, r and any extras."""

    query: exp.Select
    z_names: list[str | None]

    def z(self, k: int) -> exp.Expression:
        """The k-th internal column (the literal 1 for the intercept)."""
        name = self.z_names[k]
        return exp.Literal.number(1) if name is ONE else sb.column(name)

    def subquery(self, alias: str = "dbfit_rowterms") -> exp.Expression:
        return self.query.subquery(alias)


def row_terms(
    design: Design,
    parameters: list[int],
    beta: np.ndarray,
    extra: dict[str, exp.Expression] | None = None,
) -> RowTerms:
    """Per-row terms for ``beta`` over ``parameters`` (indices into the design's labels, intercept first)."""
    has_intercept = 1 if design.intercept else 0
    z_names: list[str | None] = []
    projections: list[exp.Expression] = []
    for k in parameters:
        if design.intercept and k == 0:
            z_names.append(ONE)
            continue
        name = f"dbfit_z{k}"
        z_names.append(name)
        projections.append(exp.alias_(design.column_expression(design.columns[k - has_intercept]), name, quoted=True))
    extras = list(extra or {})
    offset = design.offset_expression()
    carried = [
        exp.alias_(sb.column(TARGET), "y", quoted=True),
        exp.alias_(design.weight_expression(), "pw", quoted=True),
        exp.alias_(design.trials_expression(), "n", quoted=True),
        exp.alias_(offset if offset is not None else exp.Literal.number(0), "off", quoted=True),
    ]
    columns = exp.select(*projections, *carried, *[sb.column(x) for x in extras]).from_(
        design.base_query(extra).subquery("dbfit_base")
    )

    pieces: list[exp.Expression] = [sb.column("off")]
    for name, b in zip(z_names, beta):
        pieces.append(sb.number(b) if name is ONE else sb.mul(sb.number(b), sb.column(name)))
    kept = [sb.column(n) for n in z_names if n is not ONE] + [sb.column(c) for c in ("y", "pw", "n", *extras)]
    linear = exp.select(*kept, exp.alias_(sb.add(*pieces), "eta", quoted=True)).from_(columns.subquery("dbfit_cols"))
    eta, e = sb.column("eta"), sb.column("e")
    with_e = exp.select("*", exp.alias_(sb.exp_neg_abs(eta), "e", quoted=True)).from_(linear.subquery("dbfit_lin"))
    with_mu = exp.select("*", exp.alias_(sb.stable_sigmoid(eta.copy(), e.copy()), "mu", quoted=True)).from_(
        with_e.subquery("dbfit_mu")
    )
    one = exp.Literal.number(1)
    # mu (1 - mu) = e / (1 + e)^2 for either sign of eta.
    working_weight = sb.div(
        sb.mul(sb.column("pw"), sb.column("n"), e.copy()),
        sb.paren(sb.mul(sb.paren(sb.add(one, e.copy())), sb.paren(sb.add(one.copy(), e.copy())))),
    )
    residual = sb.mul(sb.column("pw"), sb.paren(sb.sub(sb.column("y"), sb.mul(sb.column("n"), sb.column("mu")))))
    final = exp.select(
        "*", exp.alias_(working_weight, "wt", quoted=True), exp.alias_(residual, "r", quoted=True)
    ).from_(with_mu.subquery("dbfit_wr"))
    return RowTerms(query=final, z_names=z_names)


def upper_products(left: list[exp.Expression], right: list[exp.Expression] | None = None) -> list[exp.Expression]:
    """left_a * right_b for a <= b (right defaults to left): the upper triangle of an outer product."""
    right = left if right is None else right
    return [sb.mul(left[a].copy(), right[b].copy()) for a in range(len(left)) for b in range(a, len(left))]


def symmetric(values: list[float] | np.ndarray, size: int) -> np.ndarray:
    """Rebuild a symmetric matrix from its upper triangle listed row by row."""
    matrix = np.zeros((size, size))
    matrix[np.triu_indices(size)] = np.asarray(values, dtype=float)
    return matrix + np.triu(matrix, 1).T
