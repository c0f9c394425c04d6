"""Reading the model document back: shape checks, the expression allowlist on every stored expression, and
the rebuilt :class:`Model` (the format is described in :mod:`dbfit.model.document`)."""

from __future__ import annotations

import json
import math
from datetime import datetime
from typing import Any

import numpy as np

from dbfit.design.layout import Design, DesignColumn, Factor
from dbfit.errors import DbfitError, StoreError
from dbfit.expressions.columns import resolve_columns
from dbfit.expressions.formula import parse_expression, parse_factor, parse_formula
from dbfit.expressions.source import source_relation
from dbfit.model import inference
from dbfit.model.document import FORMAT, FORMAT_VERSION
from dbfit.model.fitted import Model


def from_json(text: str) -> Model:
    """Read a model written by :meth:`Model.to_json`; its source is kept as data (scoring it needs a source)."""
    try:
        document = json.loads(text)
    except (TypeError, json.JSONDecodeError) as err:
        raise StoreError(f"not a dbfit model document: {err}") from None
    model = from_document(document)
    model.source_is_data = True
    return model


def from_document(document: dict[str, Any], name: str | None = None, version: int | None = None) -> Model:
    """Rebuild a :class:`Model` (with its design encoding) from a document."""
    if not isinstance(document, dict) or document.get("format") != FORMAT:
        raise StoreError("not a dbfit model document: the 'format' key is missing or not 'dbfit-model'")
    if document.get("format_version") != FORMAT_VERSION:
        raise StoreError(
            f"dbfit model document version {document.get('format_version')!r} is not supported (this dbfit reads {FORMAT_VERSION})"
        )
    _check_shape(document)
    try:
        return _rebuild(document, name, version)
    except DbfitError:
        raise
    except (KeyError, TypeError, IndexError, ValueError, AttributeError) as err:
        raise StoreError(
            f"the dbfit model document is incomplete or malformed: {type(err).__name__} {err}"
        ) from None


SHAPE = {
    "formula": str,
    "source": str,
    "options": dict,
    "intercept": bool,
    "factors": list,
    "columns": list,
    "labels": list,
    "estimates": list,
    "covariance": list,
    "stats": dict,
    "warnings": list,
    "fingerprint": dict,
}


def _check_shape(document: dict[str, Any]) -> None:
    """Refuse a document whose keys are missing or of the wrong type, naming the key."""
    for key, wanted in SHAPE.items():
        if key not in document:
            raise StoreError(f"the dbfit model document lacks the key '{key}'")
        if not isinstance(document[key], wanted):
            raise StoreError(
                f"the dbfit model document's '{key}' must be a {wanted.__name__} "
                f"(got {type(document[key]).__name__} {document[key]!r:.60})"
            )
    size = len(document["labels"])
    if len(document["estimates"]) != size:
        raise StoreError(
            f"the dbfit model document has {len(document['estimates'])} estimates for {size} labels"
        )
    for position, value in enumerate(document["estimates"]):
        if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float))):
            raise StoreError(
                f"the dbfit model document's estimate {position} ('{document['labels'][position]}') is "
                f"not a number: {value!r}"
            )
    rows = document["covariance"]
    if len(rows) != size or any(not isinstance(row, list) or len(row) != size for row in rows):
        raise StoreError(f"the dbfit model document's covariance must be {size} x {size}, one row per label")
    if any(
        v is not None and (isinstance(v, bool) or not isinstance(v, (int, float)))
        for row in rows
        for v in row
    ):
        raise StoreError("the dbfit model document's covariance holds a value that is not a number")


def _rebuild(document: dict[str, Any], name: str | None, version: int | None) -> Model:
    options = dict(document["options"])
    formula = parse_formula(document["formula"])
    check_option_expressions(options, document.get("offset"))
    factors = [
        Factor(
            text=f["expression"],
            expression=parse_factor(f["expression"], f"factor {i + 1} of the model document"),
            alias=f"dbfit_f{i}",
            sql_type=f["sql_type"],
            kind=f["kind"],
            levels=list(f["levels"]),
            reference=f["reference"],
            cast_from=f.get("cast_from"),
        )
        for i, f in enumerate(document["factors"])
    ]
    columns = [
        DesignColumn(
            label=c["label"],
            term=c["term"],
            numeric=tuple(c["numeric"]),
            indicators=tuple((int(i), level) for i, level in c["indicators"]),
            centre=float(c["centre"]),
            scale=float(c["scale"]),
            constant=bool(c["constant"]),
        )
        for c in document["columns"]
    ]
    for column in columns:
        for index in column.numeric + tuple(i for i, _ in column.indicators):
            if not 0 <= index < len(factors):
                raise StoreError(
                    f"column '{column.label}' refers to factor {index}, but the model has {len(factors)}"
                )

    def optional_expression(key: str) -> Any:
        text = options.get(key)
        return parse_expression(text, key) if text is not None else None

    fingerprint = document["fingerprint"]
    design = Design(
        formula=formula,
        relation=source_relation(document["source"]),
        factors=factors,
        columns=columns,
        intercept=bool(document["intercept"]),
        target=formula.target,
        weights=optional_expression("weights"),
        offset=optional_expression("offset"),
        trials=optional_expression("trials"),
        weights_text=options.get("weights"),
        offset_text=document.get("offset"),
        trials_text=options.get("trials"),
        positive=None if options.get("positive") is None else str(options["positive"]),
        rows_total=int(fingerprint["rows_total"]),
        rows_used=int(fingerprint["rows_used"]),
        coding=str(document.get("coding", "reference")),
    )
    # Documents from before columns were resolved have no source_columns: their names stay as written.
    recorded = [str(name) for name in document.get("source_columns") or []]
    design.source_columns = resolve_columns([node for node, _ in design.used_expressions()], recorded)
    labels = list(document["labels"])
    if labels != design.labels:
        raise StoreError(f"the document's labels {labels} do not match its columns {design.labels}")
    estimates = np.array([math.nan if v is None else float(v) for v in document["estimates"]])
    covariance = np.array(
        [[math.nan if v is None else float(v) for v in row] for row in document["covariance"]]
    )
    if estimates.shape != (len(labels),) or covariance.shape != (len(labels), len(labels)):
        raise StoreError(
            f"the document has {estimates.size} estimates and a {covariance.shape} covariance for {len(labels)} terms"
        )
    return Model(
        formula=document["formula"],
        source=_whole_source(document["source"], options),
        design=design,
        labels=labels,
        estimates=estimates,
        covariance=covariance,
        coefficients=inference.coefficient_table(labels, estimates, covariance),
        stats=dict(document["stats"]),
        warnings=list(document["warnings"]),
        options=options,
        fitted_at=datetime.fromisoformat(fingerprint["fitted_at"]),
        name=name,
        version=version,
    )


# Option expressions a model keeps (top-level option, or option inside a nested record): checked on load, so a
# tampered document or store row is refused before anything runs.
_EXPRESSION_OPTIONS: tuple[tuple[str, ...], ...] = (
    ("weights",),
    ("offset",),
    ("trials",),
    ("cluster",),
    ("by",),
    ("split_key",),
    ("split", "key"),
    ("segment", "by"),
)


def check_option_expressions(options: dict[str, Any], offset: Any = None) -> None:
    """Parse (and so check against the allowlist) every expression a model's options hold."""
    found: list[tuple[tuple[str, ...], Any]] = [(("offset",), offset)]
    for path in _EXPRESSION_OPTIONS:
        value: Any = options
        for key in path:
            value = value.get(key) if isinstance(value, dict) else None
        found.append((path, value))
    for path, value in found:
        if value is not None:
            label = ".".join(path)
            if not isinstance(value, str):
                raise StoreError(f"option {label} of the model document is {value!r}, not an expression text")
            parse_expression(value, label, f"option {label} of the model document")


def _whole_source(source: str, options: dict[str, Any]) -> str:
    """The whole source: documents of holdout fits written before the split rule was kept apart name the
    training part (a SELECT ... EXCLUDE of the split) as their source; the split records the whole one."""
    split = options.get("split")
    return split["source"] if isinstance(split, dict) and isinstance(split.get("source"), str) else source
