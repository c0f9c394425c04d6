"""Refit a stored model on current data and promote the candidate only through its gates.

The refit reuses the current version's formula, source and options, starts Newton from its estimates
(``start=``), stores the result as a candidate version, measures candidate and current version on the same
rows (the held-out part when the current version was fitted with a holdout, else all rows of the source),
applies :mod:`dbfit.lifecycle.gates` and records the decision in ``dbfit_store.decisions``; only a pass makes the
candidate current. With ``skip_unchanged`` a source whose fingerprint equals the current version's is left alone.
"""

from __future__ import annotations

import math
from typing import Any

import duckdb
from sqlglot import exp

from dbfit.design.term_scan import with_quantiles_recomputed
from dbfit.engines import engine_for
from dbfit.errors import GateRefusedError, StoreError
from dbfit.expressions.names import model_name
from dbfit.expressions.source import source_relation
from dbfit.expressions.splits import Holdout, part_source
from dbfit.fitting.options import OPTION_NAMES, FitOptions
from dbfit.lifecycle import saving, training
from dbfit.lifecycle.fingerprint import fingerprint, origin_source
from dbfit.lifecycle.gates import evaluate, gates_of
from dbfit.model.fitted import Model
from dbfit.store import model_store as store

# every option of the current version but its start values (refit warm-starts), by= (refused above) and
# missing= (the stored formula already holds its fill values and levels: applied again to new data it could
# fill terms the model never filled)
REUSED_OPTIONS = tuple(name for name in OPTION_NAMES if name not in ("start", "by", "missing"))


def refit(
    con: duckdb.DuckDBPyConnection,
    name: str,
    *,
    source: str | None = None,
    skip_unchanged: bool = False,
    cold: bool = False,
    progress: bool = False,
    recompute_knots: bool = False,
) -> dict[str, Any]:
    """Refit ``name`` and decide on promotion; returns the decision. ``source`` overrides the stored source;
    ``cold=True`` starts from the intercept-only fit instead of the current estimates. The knots and bin
    edges of spline and bins terms are those of the current version unless ``recompute_knots=True``, which
    computes those taken at quantiles again on the new rows (and starts cold, as the columns change)."""
    name = model_name(name)
    current = store.load_model(con, name)
    source = source if source is not None else origin_source(current.options, current.source)
    seen = fingerprint(con, source)
    result: dict[str, Any] = {
        "model": name,
        "source": source,
        "current_version": current.version,
        "candidate_version": None,
        "source_rows": seen["source_rows"],
    }
    if skip_unchanged and _unchanged(con, current, seen):
        store.record_decision(
            con,
            name,
            None,
            current.version,
            "skipped",
            "the source fingerprint equals the current version's",
            seen,
            promote=False,
        )
        return result | {
            "decision": "skipped",
            "reasons": ["the source fingerprint equals the current version's"],
        }
    options = {k: current.options[k] for k in REUSED_OPTIONS if current.options.get(k) is not None}
    if current.options.get("by") is not None:
        raise StoreError(f"model '{name}' was fitted by segment (by=); refit it from Python")
    split = current.options.get("split")
    holdout = Holdout(split["key"], split["share"]) if split else None
    start = (
        None
        if cold or recompute_knots
        else {label: float(v) for label, v in zip(current.labels, current.estimates) if math.isfinite(v)}
    )
    chosen = FitOptions.of(start=start, **options)
    candidate = training.fit_and_store(
        con,
        with_quantiles_recomputed(current.formula) if recompute_knots else current.formula,
        source,
        chosen,
        split=holdout,
        progress=progress,
        threshold=split["threshold"] if split else 0.5,
    )
    if current.options.get("segment"):
        candidate.options["segment"] = current.options["segment"]  # still one segment of its by= fit
    version = saving.save_model(con, candidate, name, promote=False)
    figures_source = part_source(source, holdout, "holdout") if holdout else source
    candidate_metrics = candidate.stats.get("holdout") or _metrics(con, candidate, figures_source)
    passed, reasons, figures = evaluate(
        gates_of(con, name), candidate, current, candidate_metrics, _metrics(con, current, figures_source)
    )
    figures |= {
        "measured_on": "held-out rows" if holdout else "all rows of the source (no holdout set)",
        "iterations": candidate.stats["iterations"],
        "scans": candidate.stats["scans"],
    }
    decision = "promoted" if passed else "refused"
    reason = "passed every gate" if passed else "; ".join(reasons)
    store.record_decision(con, name, version, current.version, decision, reason, figures, promote=passed)
    return result | {
        "candidate_version": version,
        "decision": decision,
        "reasons": reasons or [reason],
        "figures": figures,
        **_column_notes(con, current, source),
    }


def _column_notes(con: duckdb.DuckDBPyConnection, current: Model, source: str) -> dict[str, Any]:
    """A note when all_columns() chose the model's columns and the source has gained columns since."""
    seen = current.stats.get("source_columns_at_fit")
    if not seen:
        return {}
    now = [name for name, _ in engine_for(con).describe(exp.select("*").from_(source_relation(source)))]
    gained = [name for name in now if name.lower() not in {s.lower() for s in seen}]
    if not gained:
        return {}
    return {
        "notes": [
            f"the source has gained column(s) {', '.join(gained)} since the fit; all_columns() was expanded "
            "then and the refit keeps the model's columns: fit anew to include them"
        ]
    }


def promote(
    con: duckdb.DuckDBPyConnection, name: str, *, version: int, force: bool = False
) -> dict[str, Any]:
    """Make stored ``version`` of ``name`` current after its gates (measured as in :func:`refit`; ``force``
    skips them, and the audit row says so); raises GateRefusedError on refusal."""
    name = model_name(name)
    current = store.load_model(con, name)
    candidate = store.load_model(con, name, version)
    result = {"model": name, "candidate_version": candidate.version, "current_version": current.version}
    if force:
        store.record_decision(
            con,
            name,
            candidate.version,
            current.version,
            "promoted",
            "forced: gates not applied",
            {},
            promote=True,
        )
        return result | {"decision": "promoted", "reasons": ["forced: gates not applied"]}
    source = origin_source(candidate.options, candidate.source)
    split = candidate.options.get("split")
    figures_source = (
        part_source(source, Holdout(split["key"], split["share"]), "holdout") if split else source
    )
    passed, reasons, figures = evaluate(
        gates_of(con, name),
        candidate,
        current,
        _metrics(con, candidate, figures_source),
        _metrics(con, current, figures_source),
    )
    decision, reason = ("promoted", "passed every gate") if passed else ("refused", "; ".join(reasons))
    store.record_decision(
        con, name, candidate.version, current.version, decision, reason, figures, promote=passed
    )
    result |= {"decision": decision, "reasons": reasons or [reason], "figures": figures}
    if not passed:
        raise GateRefusedError(f"version {version} of '{name}' was not promoted: {reason}", result)
    return result


def _metrics(con: duckdb.DuckDBPyConnection, model: Model, source: str) -> dict[str, Any]:
    table = training.assess(con, model, source)
    return dict(zip(table["metric"].to_pylist(), table["value"].to_pylist()))


def _unchanged(con: duckdb.DuckDBPyConnection, current: Model, seen: dict[str, Any]) -> bool:
    stored = store.version_table(con, "fingerprints", current.name, current.version)
    return bool(stored) and all(stored[0][k] == seen[k] for k in ("source", "source_rows", "checksum"))
