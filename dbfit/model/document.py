"""The model document: a fitted model as plain JSON, to store it or move it between databases.

Format ``dbfit-model`` version 1 (our own; documented in README.md). Top-level keys:
``format``, ``format_version``, ``formula`` (as fitted: a spline or bins term lists its knots or edges there,
``spline(x, 4, knots => [...])``, and each of its columns is a factor whose expression is the plain-SQL basis
or bin CASE, see :mod:`dbfit.expressions.basis_terms`), ``source`` (the whole source, also for a holdout fit),
``options``, ``intercept``, ``coding`` (``marginal``: indicators follow the marginality rule of
:func:`dbfit.design.layout.marginal_codings`; absent in older documents, whose categoricals were all coded against
their reference level), ``offset``, ``factors`` (expression text, kind, SQL type, levels, reference level;
``cast_from``, the numeric type of a text factor written as a cast of a number, whose levels scoring
compares as numbers),
``columns`` (label, term, indices of the numeric factors multiplied together, indicator pairs
``[factor index, level]``, internal centre and scale, constant flag), ``labels``, ``estimates`` (original
scale, ``null`` when aliased), ``covariance`` (p x p, ``null`` for aliased rows and columns),
``source_columns`` (the source's columns the formula and options use, spelled as the source does; the
expressions are matched to them case-insensitively and quoted), ``stats``, ``warnings`` and ``fingerprint``
(rows in the source, rows used, source text, fit time in UTC). Floats are written with Python's shortest
round-trip repr, so a document read back gives bit-identical numbers.
"""

from __future__ import annotations

import json
import math
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from dbfit.model.fitted import Model

FORMAT, FORMAT_VERSION = "dbfit-model", 1


def to_document(model: Model) -> dict[str, Any]:
    """The model as a JSON-ready dict (see the module docstring for the keys)."""
    design = model.design
    return {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "formula": model.formula,
        "source": model.source,
        "options": _plain(model.options),
        "intercept": design.intercept,
        "coding": design.coding,
        "offset": design.offset_text,
        **({"source_columns": list(design.source_columns)} if design.source_columns else {}),
        "factors": [
            {
                "expression": f.text,
                "kind": f.kind,
                "sql_type": f.sql_type,
                "levels": list(f.levels),
                "reference": f.reference,
                **({"cast_from": f.cast_from} if f.cast_from else {}),
            }
            for f in design.factors
        ],
        "columns": [
            {
                "label": c.label,
                "term": c.term,
                "numeric": list(c.numeric),
                "indicators": [[i, level] for i, level in c.indicators],
                "centre": c.centre,
                "scale": c.scale,
                "constant": c.constant,
            }
            for c in design.columns
        ],
        "labels": list(model.labels),
        "estimates": [_finite_or_none(v) for v in model.estimates],
        "covariance": [[_finite_or_none(v) for v in row] for row in model.covariance],
        "stats": _plain(model.stats),
        "warnings": list(model.warnings),
        "fingerprint": {
            "rows_total": design.rows_total,
            "rows_used": design.rows_used,
            "source": model.source,
            "fitted_at": model.fitted_at.isoformat(),
        },
    }


def to_json(model: Model) -> str:
    return json.dumps(to_document(model), allow_nan=False, sort_keys=False)


def _finite_or_none(value: float) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None


def _plain(value: Any) -> Any:
    """Numpy scalars and non-finite floats into JSON-native values."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return _finite_or_none(float(value))
    return value
