"""Comparing fitted models: the likelihood-ratio test for nested models and a side-by-side table.

Likelihood-ratio test: Agresti (2013), Categorical Data Analysis, 3rd ed., section 1.3.3 and 4.4.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import pyarrow as pa

from dbfit.assessment.metrics import chi_square_tail
from dbfit.errors import FitError
from dbfit.model.fitted import Model


def same_rows(a: Model, b: Model) -> bool:
    """Fitted on the same rows: same source, rows used and outcome totals (the NULL exclusion can differ)."""
    da, db = a.design, b.design
    return (
        a.source == b.source
        and da.rows_used == db.rows_used
        and math.isclose(da.weight_sum, db.weight_sum, rel_tol=1e-12)
        and math.isclose(da.success_sum, db.success_sum, rel_tol=1e-12)
        and da.target.sql() == db.target.sql()
    )


def likelihood_ratio_test(smaller: Model, larger: Model) -> dict[str, float]:
    """Deviance difference of two nested models fitted on the same rows, its df and chi-square p-value."""
    if not same_rows(smaller, larger):
        raise FitError(
            "the two models were not fitted on the same rows (source, rows used or outcome totals differ: "
            f"{smaller.stats['n_used']} vs {larger.stats['n_used']} rows); refit both on one source without NULLs"
        )
    missing = [label for label in smaller.labels if label not in larger.labels]
    if missing:
        raise FitError(
            f"the models are not nested: the smaller has terms the larger lacks: {', '.join(missing)}"
        )
    df = larger.stats["parameters"] - smaller.stats["parameters"]
    if df <= 0:
        raise FitError("the larger model must estimate more coefficients than the smaller one")
    statistic = smaller.stats["deviance"] - larger.stats["deviance"]
    return {
        "deviance_difference": statistic,
        "df": float(df),
        "p_value": chi_square_tail(max(statistic, 0.0), df),
    }


def comparison_table(models: Sequence[Model], names: Sequence[str] | None = None) -> pa.Table:
    """AIC, BIC, deviance and (where measured) held-out AUC and log loss for several models."""
    names = list(names) if names is not None else [m.formula for m in models]
    if len(names) != len(models):
        raise FitError(f"{len(names)} names for {len(models)} models")

    def held_out(model: Model, metric: str) -> float | None:
        return (model.stats.get("holdout") or {}).get(metric)

    return pa.table(
        {
            "model": pa.array(names, type=pa.string()),
            "parameters": [m.stats["parameters"] for m in models],
            "rows_used": [m.stats["n_used"] for m in models],
            "deviance": [m.stats["deviance"] for m in models],
            "aic": [m.stats["aic"] for m in models],
            "bic": [m.stats["bic"] for m in models],
            "holdout_auc": pa.array([held_out(m, "auc") for m in models], type=pa.float64()),
            "holdout_log_loss": pa.array([held_out(m, "log_loss") for m in models], type=pa.float64()),
        }
    )
