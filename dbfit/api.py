"""The Python entry points that touch the store: fit-and-save, load, move as JSON, publish, list, drop."""

from __future__ import annotations

from typing import Any

import duckdb
import pyarrow as pa

from dbfit import deploy, fitting, serialize, store
from dbfit.engine import translate_error
from dbfit.model import Model
from dbfit.names import model_name


def fit(con: duckdb.DuckDBPyConnection, formula: str, source: str, *, name: str | None = None, **options: Any) -> Model:
    """Fit as :func:`dbfit.fitting.fit`; with ``name=...`` also store the model as that name's next version."""
    if name is not None:
        model_name(name)
    model = fitting.fit(con, formula, source, **options)
    if name is not None:
        model.save(con, name)
    return model


fit.__doc__ = (fitting.fit.__doc__ or "") + "\n    name : store the fitted model as the next version of this name.\n"


def load(con: duckdb.DuckDBPyConnection, name: str, version: int | None = None) -> Model:
    """The stored model ``name`` at ``version`` (default: the latest)."""
    return store.load_model(con, name, version)


def from_json(text: str) -> Model:
    """A model from the JSON of :meth:`Model.to_json` (format ``dbfit-model`` 1)."""
    return serialize.from_json(text)


def score(con: duckdb.DuckDBPyConnection, model: str | Model, source: str | None = None, *, version: int | None = None,
          standard_error: bool = False, level: float = 0.95, unseen: str = "null") -> pa.Table:
    """Every column of ``source`` (default: the training source) plus the score columns, as a pyarrow table.

    ``model`` is a stored model's name or a Model; the options are those of :meth:`Model.scoring_sql`.
    """
    resolved = deploy.resolve_model(con, model, version)
    query = deploy.build_scoring(con, resolved, source, unseen=unseen, standard_error=standard_error, level=level)
    try:
        return con.sql(query.sql("duckdb")).to_arrow_table()
    except duckdb.Error as err:
        raise translate_error(err) from None


def models(con: duckdb.DuckDBPyConnection) -> list[dict[str, Any]]:
    """One dict per stored version in ``con``'s database."""
    return store.version_rows(con)


def drop_model(con: duckdb.DuckDBPyConnection, name: str, version: int | None = None) -> list[tuple[str, int]]:
    """Delete one version, or every version, of a stored model; returns what was deleted."""
    return store.drop_model(con, name, version)
