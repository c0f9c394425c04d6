"""Promotion gates: the checks a candidate version must pass before it becomes a model's current version.

A candidate passes when it converged without separation, its held-out AUC is at most ``auc_margin`` below the
current version's and its held-out log loss at most ``log_loss_margin`` above it (both measured on the same
rows), and no coefficient moved by more than ``max_shift`` of the current version's standard errors. The
margins and the bound are per model (table ``dbfit_store.gates``); the defaults below are our own choice.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import duckdb

from dbfit.errors import StoreError
from dbfit.expressions.names import model_name
from dbfit.model.fitted import Model
from dbfit.store import model_store as store


@dataclasses.dataclass(frozen=True)
class Gates:
    """Promotion gates of one model; ``None`` switches a check off."""

    require_converged: bool = True
    auc_margin: float | None = 0.01
    log_loss_margin: float | None = 0.01
    max_shift: float | None = 5.0  # in standard errors of the current estimate

    def __post_init__(self) -> None:
        for field in ("auc_margin", "log_loss_margin", "max_shift"):
            value = getattr(self, field)
            if value is not None and (
                isinstance(value, bool)
                or not isinstance(value, (int, float))
                or not math.isfinite(value)
                or value < 0
            ):
                raise StoreError(f"gate {field} must be a non-negative number or None (got {value!r})")
        if not isinstance(self.require_converged, bool):
            raise StoreError(f"gate require_converged must be true or false (got {self.require_converged!r})")


def set_gates(con: duckdb.DuckDBPyConnection, name: str, **settings: Any) -> Gates:
    """Set (some of) the gates of stored model ``name``; the others keep their present value."""
    name = model_name(name)
    store.resolve_version(con, name, None)
    fields = {f.name for f in dataclasses.fields(Gates)}
    unknown = sorted(set(settings) - fields)
    if unknown:
        raise StoreError(f"unknown gate(s) {unknown}; the gates are {sorted(fields)}")
    gates = dataclasses.replace(gates_of(con, name), **settings)
    store.write_setting(con, "gates", name, dataclasses.asdict(gates))
    return gates


def gates_of(con: duckdb.DuckDBPyConnection, name: str) -> Gates:
    """The gates set for ``name``, or the defaults."""
    stored = store.read_setting(con, "gates", model_name(name))
    return Gates(**stored) if stored else Gates()


def coefficient_shift(candidate: Model, current: Model) -> tuple[float, str | None]:
    """The largest |candidate - current| / current standard error over the terms both have, and its term."""
    errors = dict(zip(current.labels, current.coefficients["std_error"].to_pylist()))
    largest, where = 0.0, None
    for label, estimate in zip(candidate.labels, candidate.estimates):
        if label not in current.labels or not math.isfinite(estimate):
            continue
        before, error = current.estimate(label), errors[label]
        if not math.isfinite(before) or error is None or not error > 0:
            continue
        shift = float(abs(estimate - before) / error)
        if shift > largest:
            largest, where = shift, label
    return largest, where


def evaluate(
    gates: Gates,
    candidate: Model,
    current: Model,
    candidate_metrics: dict[str, Any],
    current_metrics: dict[str, Any],
) -> tuple[bool, list[str], dict[str, Any]]:
    """(passed, reasons for refusal, figures) of a candidate against the current version."""
    reasons: list[str] = []
    shift, term = coefficient_shift(candidate, current)
    figures = {
        "candidate_auc": candidate_metrics.get("auc"),
        "current_auc": current_metrics.get("auc"),
        "candidate_log_loss": candidate_metrics.get("log_loss"),
        "current_log_loss": current_metrics.get("log_loss"),
        "largest_shift": shift,
        "largest_shift_term": term,
        "converged": bool(candidate.stats.get("converged")),
        "separation": bool(candidate.stats.get("separation")),
        "gates": dataclasses.asdict(gates),
    }
    if gates.require_converged and not figures["converged"]:
        reasons.append("the candidate did not converge")
    if gates.require_converged and figures["separation"]:
        reasons.append("the candidate shows separation")
    new, old = figures["candidate_auc"], figures["current_auc"]
    if gates.auc_margin is not None and _worse(new, old, gates.auc_margin, lower_is_worse=True):
        reasons.append(f"AUC {_text(new)} is more than {gates.auc_margin:g} below the current {_text(old)}")
    new, old = figures["candidate_log_loss"], figures["current_log_loss"]
    if gates.log_loss_margin is not None and _worse(new, old, gates.log_loss_margin, lower_is_worse=False):
        reasons.append(
            f"log loss {_text(new)} is more than {gates.log_loss_margin:g} above the current {_text(old)}"
        )
    if gates.max_shift is not None and shift > gates.max_shift:
        reasons.append(f"coefficient {term} moved {shift:.3g} standard errors (bound {gates.max_shift:g})")
    return not reasons, reasons, figures


def _worse(new: float | None, old: float | None, margin: float, *, lower_is_worse: bool) -> bool:
    if new is None or old is None or not math.isfinite(new):
        return new is None or not math.isfinite(
            new
        )  # a candidate without the figure cannot show it is not worse
    return (old - new > margin) if lower_is_worse else (new - old > margin)


def _text(value: float | None) -> str:
    return "missing" if value is None else f"{value:.6g}"
