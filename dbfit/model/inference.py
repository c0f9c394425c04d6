"""Inference on the original scale: map internal estimates back, Wald tests and intervals, fit statistics.

Wald tests and intervals: Agresti (2013), Categorical Data Analysis, 3rd ed., section 4.3 (Wiley).
AIC: Akaike (1974), doi:10.1109/TAC.1974.1100705; BIC: Schwarz (1978), doi:10.1214/aos/1176344136.
"""

from __future__ import annotations

import math
from statistics import NormalDist

import numpy as np
import pyarrow as pa

from dbfit.design.layout import Design

# the standard library's normal quantile (Wichura 1988, AS 241) keeps scipy out of "import dbfit"
WALD_Z_95 = NormalDist().inv_cdf(0.975)
# The columns of the coefficient table, in order (the model store keeps them under the same names).
COEFFICIENT_COLUMNS = (
    "term",
    "estimate",
    "std_error",
    "wald_z",
    "p_value",
    "ci_low",
    "ci_high",
    "odds_ratio",
    "odds_ratio_low",
    "odds_ratio_high",
)


def original_scale_map(design: Design, parameters: list[int]) -> np.ndarray:
    """Matrix A with original = A @ internal over ``parameters`` (indices into intercept + columns).

    An internal column is z = (x - c) / s, so b z = (b / s) x - b c / s: the slope divides by s and the
    intercept absorbs -b c / s.
    """
    offset = 1 if design.intercept else 0
    size = len(parameters)
    transform = np.eye(size)
    intercept_row = parameters.index(0) if design.intercept and 0 in parameters else None
    for k, parameter in enumerate(parameters):
        if design.intercept and parameter == 0:
            continue
        column = design.columns[parameter - offset]
        transform[k, k] = 1.0 / column.scale
        if intercept_row is not None and column.centre != 0.0:
            transform[intercept_row, k] = -column.centre / column.scale
    return transform


def internal_start(design: Design, original: np.ndarray) -> np.ndarray:
    """Inverse of :func:`original_scale_map` over all parameters, for warm starts."""
    parameters = list(range(len(design.labels)))
    return np.linalg.solve(original_scale_map(design, parameters), original)


def coefficient_table(labels: list[str], estimates: np.ndarray, covariance: np.ndarray) -> pa.Table:
    """One row per term: estimate, standard error, Wald z and p, 95 % interval, odds ratio and its interval."""
    std_error = np.sqrt(np.where(np.diag(covariance) >= 0, np.diag(covariance), np.nan))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        wald_z = estimates / std_error
        two_sided = np.vectorize(math.erfc, otypes=[float])  # 2 * (1 - Phi(|z|)) = erfc(|z| / sqrt 2)
        p_value = two_sided(np.abs(wald_z) / math.sqrt(2.0))
        low, high = estimates - WALD_Z_95 * std_error, estimates + WALD_Z_95 * std_error
        odds, odds_low, odds_high = np.exp(estimates), np.exp(low), np.exp(high)

    values = (estimates, std_error, wald_z, p_value, low, high, odds, odds_low, odds_high)
    return pa.table(
        {
            "term": text_column(labels),
            **{name: float_column(v) for name, v in zip(COEFFICIENT_COLUMNS[1:], values)},
        }
    )


# The columns are built from Arrow buffers: pyarrow's pa.array() looks for pandas on every call, and importing
# pandas costs 0.3-1 s, more than a fit of a million rows takes without it.


def float_column(values: np.ndarray) -> pa.Array:
    """A float64 Arrow column of ``values`` with NaN as NULL."""
    values = np.ascontiguousarray(values, dtype=np.float64)
    missing = np.isnan(values)
    validity = pa.py_buffer(np.packbits(~missing, bitorder="little"))
    return pa.Array.from_buffers(
        pa.float64(), len(values), [validity, pa.py_buffer(values)], null_count=int(missing.sum())
    )


def text_column(texts: list[str]) -> pa.Array:
    """A string Arrow column of ``texts`` (UTF-8 bytes after 32-bit offsets, as the Arrow format lays it out)."""
    encoded = [text.encode("utf-8") for text in texts]
    offsets = np.cumsum([0] + [len(piece) for piece in encoded], dtype=np.int32)
    return pa.Array.from_buffers(
        pa.string(), len(texts), [None, pa.py_buffer(offsets), pa.py_buffer(b"".join(encoded))]
    )


def logit(probability: float) -> float:
    """log(p / (1 - p)), the log-odds of a probability strictly between 0 and 1."""
    return math.log(probability / (1.0 - probability))


def success_rate(design: Design) -> float:
    """The weighted share of successes among the trials of the rows used."""
    return design.success_sum / design.trial_sum


def intercept_only_estimate(design: Design) -> float:
    """The intercept-only fit's estimate without an offset, the logit of :func:`success_rate`.

    It solves that model's score equation sum w (y - n mu) = 0 in closed form; every fit starts its
    intercept there.
    """
    return logit(success_rate(design))


def null_loglik_closed_form(design: Design) -> float:
    """Intercept-only log-likelihood without an offset: the fitted probability is the weighted mean."""
    rate = success_rate(design)
    failures = design.trial_sum - design.success_sum
    return design.loglik_constant + design.success_sum * math.log(rate) + failures * math.log1p(-rate)


def information_criteria(loglik: float, parameters: int, rows: int) -> tuple[float, float]:
    return -2.0 * loglik + 2.0 * parameters, -2.0 * loglik + math.log(rows) * parameters
