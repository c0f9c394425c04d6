"""Robust (sandwich) covariances from one aggregate scan: HC0, HC1 and cluster-robust.

cov = B^-1 M B^-1 with the bread B = sum wt z z' (the Fisher information) and the meat M the sum of outer
products of score contributions: per row, s_i = r_i z_i (HC0; White 1980, Econometrica 48(4), 817-838,
doi:10.2307/1912934), scaled by n / (n - p) for HC1 (MacKinnon and White 1985, J. Econometrics 29(3),
305-325, doi:10.1016/0304-4076(85)90158-7); per cluster, the row scores are first summed within each cluster
(Liang and Zeger 1986, Biometrika 73(1), 13-22, doi:10.1093/biomet/73.1.13) and scaled by
G / (G - 1) * (n - 1) / (n - p) (common practice). Rows are the independent units: prior weights scale each
row's score, they do not replicate rows.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
from sqlglot import exp

from dbfit.design.layout import Design
from dbfit.engines import engine_for
from dbfit.engines.base import Engine
from dbfit.errors import FitError
from dbfit.expressions import builders as sb
from dbfit.expressions.formula import parse_expression
from dbfit.fitting.prior_correction import fitted_estimates
from dbfit.fitting.rowterms import row_terms, symmetric, triangle_size, upper_products
from dbfit.model import inference
from dbfit.model.fitted import Model

KINDS = ("HC0", "HC1", "cluster")
CLUSTER = "dbfit_cluster"


@dataclasses.dataclass
class SandwichParts:
    bread: np.ndarray  # Fisher information on the internal scale
    meat: np.ndarray
    clusters: int  # number of clusters (rows for HC0/HC1)


def choose_kind(robust: str | None, cluster: str | None) -> str | None:
    """Check the robust / cluster options and return the covariance kind (None: model-based)."""
    if robust is None:
        return "cluster" if cluster is not None else None
    if robust not in KINDS:
        raise FitError(f"robust must be one of {', '.join(KINDS)} (got {robust!r})")
    if robust == "cluster" and cluster is None:
        raise FitError("robust='cluster' needs cluster=<SQL expression naming each row's cluster>")
    if robust != "cluster" and cluster is not None:
        raise FitError(
            f"cluster={cluster!r} was given with robust={robust!r}; use robust='cluster' (or leave it out)"
        )
    return robust


def sandwich_query(
    design: Design, parameters: list[int], beta: np.ndarray, cluster: exp.Expression | None
) -> exp.Select:
    """One scan: upper triangles of the bread and the meat, the count of units and of rows with a NULL cluster."""
    terms = row_terms(design, parameters, beta, {CLUSTER: cluster} if cluster is not None else None)
    size = len(parameters)
    z = [terms.z(k) for k in range(size)]
    bread = [sb.agg_sum(sb.mul(sb.column("wt"), product)) for product in upper_products(z)]
    if cluster is None:
        scores = [sb.mul(sb.column("r"), zk) for zk in z]
        meat = [sb.agg_sum(product) for product in upper_products(scores)]
        sums = bread + meat + [exp.Count(this=exp.Star()), exp.Literal.number(0)]
        return _aliased_select(sums).from_(terms.subquery())
    # Two levels: score and information sums per cluster, then the outer products of the cluster scores.
    per_cluster = (
        exp.select(
            exp.alias_(exp.Is(this=sb.column(CLUSTER), expression=exp.Null()), "missing", quoted=True),
            exp.alias_(exp.Count(this=exp.Star()), "rows", quoted=True),
            *[exp.alias_(s, f"b{i}", quoted=True) for i, s in enumerate(bread)],
            *[
                exp.alias_(sb.agg_sum(sb.mul(sb.column("r"), zk)), f"g{k}", quoted=True)
                for k, zk in enumerate(z)
            ],
        )
        .from_(terms.subquery())
        .group_by(sb.column(CLUSTER))
    )
    group_scores = [sb.column(f"g{k}") for k in range(size)]
    missing = exp.If(this=sb.column("missing"), true=sb.column("rows"), false=exp.Literal.number(0))
    sums = [sb.agg_sum(sb.column(f"b{i}")) for i in range(len(bread))]
    sums += [sb.agg_sum(product) for product in upper_products(group_scores)]
    sums += [exp.Count(this=exp.Star()), sb.agg_sum(missing)]
    return _aliased_select(sums).from_(per_cluster.subquery("dbfit_clusters"))


def _aliased_select(values: list[exp.Expression]) -> exp.Select:
    return exp.select(*[exp.alias_(v, f"s{i}", quoted=True) for i, v in enumerate(values)])


def sandwich_parts(
    engine: Engine, design: Design, parameters: list[int], beta: np.ndarray, cluster_text: str | None
) -> SandwichParts:
    cluster = parse_expression(cluster_text, "cluster") if cluster_text is not None else None
    row = engine.fetch(sandwich_query(design, parameters, beta, cluster))[0]
    size = len(parameters)
    triangle = triangle_size(size)
    values = [np.nan if v is None else float(v) for v in row]
    units, missing = int(values[2 * triangle]), int(values[2 * triangle + 1])
    if missing:
        raise FitError(
            f"cluster '{cluster_text}' is NULL on {missing} of the {design.rows_used} rows used; "
            "give every row a cluster (e.g. coalesce(...)) or filter those rows in the source"
        )
    if cluster is not None and units < 2:
        raise FitError(
            f"cluster '{cluster_text}' puts all {design.rows_used} rows in {units} cluster; at least 2 are needed"
        )
    return SandwichParts(
        symmetric(values[:triangle], size), symmetric(values[triangle : 2 * triangle], size), units
    )


def sandwich_covariance(parts: SandwichParts, kind: str, rows: int) -> np.ndarray:
    """B^-1 M B^-1 with the small-sample factor of ``kind``, on the internal scale."""
    size = parts.bread.shape[0]
    inverse = np.linalg.inv(parts.bread)
    covariance = inverse @ parts.meat @ inverse
    if kind == "HC1":
        covariance *= rows / (rows - size)
    elif kind == "cluster":
        covariance *= parts.clusters / (parts.clusters - 1) * (rows - 1) / (rows - size)
    return covariance


def describe(kind: str, cluster: str | None, clusters: int) -> str:
    if kind == "cluster":
        return f"std.err   cluster-robust sandwich by {cluster} ({clusters:,} clusters)"
    scaling = ", scaled by n/(n-p)" if kind == "HC1" else ""
    return f"std.err   {kind} sandwich (heteroscedasticity-robust{scaling})"


def with_robust_errors(
    con: Any, model: Model, robust: str | None = None, cluster: str | None = None
) -> Model:
    """A copy of ``model`` with sandwich standard errors (HC0, HC1 or cluster-robust by ``cluster``).

    Runs one aggregate scan at the model's estimates on ``con`` (a DuckDB or psycopg connection or a
    SparkSession holding the model's source); the estimates themselves do not change.
    """
    kind = choose_kind(robust, cluster)
    if kind is None:
        raise FitError("give robust='HC0', 'HC1' or 'cluster' (with cluster=<SQL expression>)")
    if model.options.get("shrinkage") is not None:
        raise FitError("sandwich standard errors are not defined for a penalised fit")
    engine = engine_for(con)
    scans_before = engine.scans
    design = model.design
    active = [k for k in range(len(model.labels)) if np.isfinite(model.estimates[k])]
    transform = inference.original_scale_map(design, active)
    internal_beta = np.linalg.solve(transform, fitted_estimates(model)[active])
    parts = sandwich_parts(engine, design, active, internal_beta, cluster)
    internal = sandwich_covariance(parts, kind, design.rows_used)
    covariance = np.full_like(model.covariance, np.nan)
    covariance[np.ix_(active, active)] = transform @ internal @ transform.T
    stats = dict(model.stats)
    stats["scans"] = stats.get("scans", 0) + engine.scans - scans_before
    stats["covariance"] = kind
    if kind == "cluster":
        stats["clusters"] = parts.clusters
    stats["notes"] = [n for n in stats.get("notes", []) if not n.startswith("std.err")] + [
        describe(kind, cluster, parts.clusters)
    ]
    return dataclasses.replace(
        model,
        covariance=covariance,
        coefficients=inference.coefficient_table(model.labels, model.estimates, covariance),
        stats=stats,
        options={**model.options, "robust": kind, "cluster": cluster},
    )
