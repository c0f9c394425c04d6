"""Training as a workflow: fit (on the training rows of a holdout split), assess the held-out rows, store."""

from __future__ import annotations

from typing import Any

import duckdb
import pyarrow as pa

from dbfit.assessment import metrics as assessment
from dbfit.deployment import views as deploy
from dbfit.engines import engine_for
from dbfit.errors import FitError
from dbfit.expressions.names import model_name
from dbfit.expressions.splits import Holdout, part_source
from dbfit.fitting import driver as fitting
from dbfit.fitting.options import FitOptions
from dbfit.lifecycle import saving
from dbfit.model.fitted import Model
from dbfit.model.segmented import SegmentedFit
from dbfit.store.model_store import store_of


def fit_and_store(
    con: duckdb.DuckDBPyConnection,
    formula: str,
    source: str,
    options: FitOptions,
    *,
    name: str | None = None,
    split: Holdout | None = None,
    threshold: float = 0.5,
    progress: fitting.Progress = None,
    store: Any = None,
) -> Model | SegmentedFit:
    """Fit with options already checked; with ``split`` on the training rows, the held-out metrics (at
    ``threshold``) in ``model.stats["holdout"]``; with ``name`` stored as that name's next version (in
    ``store``, a DuckDB or psycopg connection, when the data's engine holds no store: Spark)."""
    if name is not None:
        model_name(name)
        store_of(con if store is None else store)  # no store there: refused before the fit
    elif store is not None:
        raise FitError("store= says where to store the model: give name= too")
    if split is not None and not isinstance(split, Holdout):
        raise FitError("split= takes dbfit.Holdout(key, share); for k folds use dbfit.cross_validate")
    if split is not None and options.by is not None:
        raise FitError("split= cannot be combined with by=")
    if split is not None:
        assessment.check_threshold(threshold)
    training = source if split is None else part_source(source, split, "train")
    model = fitting.fit_with(con, formula, training, options, progress)
    if split is not None:
        model.source = source
        model.options["split"] = {
            "key": split.key,
            "share": split.share,
            "source": source,
            "threshold": threshold,
        }
        held_out = assess(con, model, None, rows="held_out", threshold=threshold)
        model.stats["holdout"] = dict(zip(held_out["metric"].to_pylist(), held_out["value"].to_pylist()))
    if name is not None:
        saving.save(con, model, name, store=store)
    return model


def assess(
    con: duckdb.DuckDBPyConnection,
    model: str | Model,
    source: str | None = None,
    *,
    rows: str | None = None,
    threshold: float = 0.5,
    version: int | None = None,
) -> pa.Table:
    """One row per metric (metric, value, note) of ``model``; the note of metric ``rows`` says which rows.

    Default: the held-out rows of a holdout fit, else all rows of the model's source (in-sample). ``source``
    assesses all rows of another source; ``rows`` ("held_out", "training", "all") picks a part of the split.
    """
    resolved = deploy.resolve_model(con, model, version)
    text, note = resolved.assessed_rows(source, rows)
    engine = engine_for(con)
    scored = assessment.scored_relation(resolved, text, engine=engine)
    return assessment.metrics(engine, scored, threshold, rows_note=note).table()
