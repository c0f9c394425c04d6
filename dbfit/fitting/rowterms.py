"""Per-row quantities of the logistic model as SQL, written once for every aggregate query.

For eta = offset + z'b the fitted probability is mu = 1 / (1 + e^-eta), the working weight
wt = w n mu (1 - mu), the score residual r = w (y - n mu) and the log-likelihood term
ll = w [y eta - n log(1 + e^eta)], so that the score is sum r z, the Fisher information sum wt z z' and the
log-likelihood sum ll (McCullagh and Nelder 1989, Generalized Linear Models, 2nd ed., section 4.4).
Everything is written with e = exp(-|eta|), finite for any eta. The statistics query, the fold scan, the
sandwich scan and Firth's adjustment all take these expressions from here; sums of products over the upper
triangle of a symmetric matrix are listed by :func:`upper_pairs` and read back by :func:`symmetric`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from sqlglot import exp

from dbfit.design.layout import TARGET, Design
from dbfit.expressions import builders as sb

ONE = None  # stands for the intercept's constant column in ``RowTerms.z_names``


def carried_columns(design: Design) -> list[exp.Expression]:
    """The offset, outcome, prior weight and trials of each row, as the columns off, y, pw and n."""
    offset = design.offset_expression()
    return [
        exp.alias_(offset if offset is not None else exp.Literal.number(0), "off", quoted=True),
        exp.alias_(sb.column(TARGET), "y", quoted=True),
        exp.alias_(design.weight_expression().copy(), "pw", quoted=True),
        exp.alias_(design.trials_expression().copy(), "n", quoted=True),
    ]


def linear_predictor(coefficients: list[exp.Expression], z: list[exp.Expression | None]) -> exp.Expression:
    """off + sum b_k z_k, where a ``None`` column (the intercept's) contributes b_k alone."""
    pieces: list[exp.Expression] = [sb.column("off")]
    pieces += [b.copy() if zk is None else sb.mul(b.copy(), zk.copy()) for b, zk in zip(coefficients, z)]
    return sb.add(*pieces)


def with_e(query: exp.Select, alias: str, etas: dict[str, str] | None = None) -> exp.Select:
    """``SELECT *, exp(-|eta|) AS e FROM (query)``; ``etas``: each eta column's e column."""
    etas = etas or {"eta": "e"}
    return exp.select(
        "*", *[exp.alias_(sb.exp_neg_abs(sb.column(eta)), e, quoted=True) for eta, e in etas.items()]
    ).from_(query.subquery(alias))


@dataclass(frozen=True)
class RowQuantities:
    """The per-row terms at the linear predictor in column ``eta``, with e = exp(-|eta|) in column ``e``.

    ``weight`` multiplies a row's working weight, residual and log-likelihood: the prior weight pw unless a
    caller leaves some rows out (a fold, for instance) by a 0/1 factor on it.
    """

    eta: str = "eta"
    e: str = "e"

    def mu(self) -> exp.Expression:
        return sb.stable_sigmoid(sb.column(self.eta), sb.column(self.e))

    def working_weight(self, weight: exp.Expression | None = None) -> exp.Expression:
        """w n mu (1 - mu), with mu (1 - mu) = e / (1 + e)^2 for either sign of eta."""
        e, one = sb.column(self.e), exp.Literal.number(1)
        squared = sb.mul(sb.paren(sb.add(one, e)), sb.paren(sb.add(one.copy(), e.copy())))
        return sb.div(sb.mul(_weight(weight), sb.column("n"), e.copy()), sb.paren(squared))

    def residual(
        self, weight: exp.Expression | None = None, mu: exp.Expression | None = None
    ) -> exp.Expression:
        """w (y - n mu); ``mu`` may name a column already holding :meth:`mu`."""
        fitted = self.mu() if mu is None else mu
        return sb.mul(_weight(weight), sb.paren(sb.sub(sb.column("y"), sb.mul(sb.column("n"), fitted))))

    def loglik(self, weight: exp.Expression | None = None) -> exp.Expression:
        """w [y eta - n log(1 + e^eta)] (without the binomial coefficient's constant)."""
        eta = sb.column(self.eta)
        log1pexp = sb.paren(sb.stable_log1pexp(eta.copy(), sb.column(self.e)))
        difference = sb.sub(sb.mul(sb.column("y"), eta), sb.mul(sb.column("n"), log1pexp))
        return sb.mul(_weight(weight), sb.paren(difference))


def _weight(weight: exp.Expression | None) -> exp.Expression:
    return sb.column("pw") if weight is None else weight.copy()


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


def z_columns(design: Design, parameters: list[int]) -> tuple[list[str | None], list[exp.Expression]]:
    """The internal columns' names (``ONE`` for the intercept) and their aliased expressions, in order."""
    has_intercept = 1 if design.intercept else 0
    names: list[str | None] = []
    projections: list[exp.Expression] = []
    for k in parameters:
        if design.intercept and k == 0:
            names.append(ONE)
            continue
        names.append(f"dbfit_z{k}")
        projections.append(
            exp.alias_(design.column_expression(design.columns[k - has_intercept]), names[-1], quoted=True)
        )
    return names, projections


def row_terms(
    design: Design,
    parameters: list[int],
    beta: np.ndarray,
    extra: dict[str, exp.Expression] | None = None,
) -> RowTerms:
    """Per-row terms for ``beta`` over ``parameters`` (indices into the design's labels, intercept first)."""
    z_names, projections = z_columns(design, parameters)
    extras = list(extra or {})
    columns = exp.select(*projections, *carried_columns(design), *[sb.column(x) for x in extras]).from_(
        design.base_query(extra).subquery("dbfit_base")
    )
    z = [None if name is ONE else sb.column(name) for name in z_names]
    eta = linear_predictor([sb.number(b) for b in beta], z)
    kept = [sb.column(n) for n in z_names if n is not ONE] + [sb.column(c) for c in ("y", "pw", "n", *extras)]
    linear = exp.select(*kept, exp.alias_(eta, "eta", quoted=True)).from_(columns.subquery("dbfit_cols"))
    quantities = RowQuantities()
    with_mu = exp.select("*", exp.alias_(quantities.mu(), "mu", quoted=True)).from_(
        with_e(linear, "dbfit_lin").subquery("dbfit_mu")
    )
    final = exp.select(
        "*",
        exp.alias_(quantities.working_weight(), "wt", quoted=True),
        exp.alias_(quantities.residual(mu=sb.column("mu")), "r", quoted=True),
    ).from_(with_mu.subquery("dbfit_wr"))
    return RowTerms(query=final, z_names=z_names)


def triangle_size(size: int) -> int:
    """The number of entries on and above the diagonal of a size x size matrix."""
    return size * (size + 1) // 2


def upper_pairs(size: int) -> list[tuple[int, int]]:
    """(a, b) for a <= b, row by row: the order in which every query lists a symmetric matrix's sums."""
    return [(a, b) for a in range(size) for b in range(a, size)]


def upper_products(
    left: list[exp.Expression], right: list[exp.Expression] | None = None
) -> list[exp.Expression]:
    """left_a * right_b for a <= b (right defaults to left): the upper triangle of an outer product."""
    right = left if right is None else right
    return [sb.mul(left[a].copy(), right[b].copy()) for a, b in upper_pairs(len(left))]


def symmetric(values: list[float] | np.ndarray, size: int) -> np.ndarray:
    """Rebuild symmetric matrices from their upper triangles listed in :func:`upper_pairs` order.

    ``values`` holds one triangle, or one per leading index (shape (..., size (size + 1) / 2)); the result has
    shape (..., size, size).
    """
    values = np.asarray(values, dtype=float)
    rows, columns = np.triu_indices(size)
    matrix = np.zeros((*values.shape[:-1], size, size))
    matrix[..., rows, columns] = values
    matrix[..., columns, rows] = values
    return matrix
