"""A fit specification for ``dbfit fit --spec FILE``: a JSON or TOML file (read with tomllib) of the fit's settings.

Keys: ``database``, ``name``, ``formula``, ``source`` (required unless given on the command line), and optionally
the options of :func:`dbfit.fit` (``weights``, ``offset``, ``trials``, ``positive``, ``reference`` (a table of
term = level), ``max_iter``, ``tol``, ``firth``, ``by`` (one model per segment, stored as ``name.<segment>``),
``robust``, ``cluster``, ``population_rate``, ``shrinkage``, ``l1_share``, ``folds``, ``split_key``),
``holdout_key``, ``holdout_share``, ``threshold`` and ``gates`` (a table of gate settings).
"""

from __future__ import annotations

import json
import tomllib
from pathlib import Path
from typing import Any

from dbfit.errors import DbfitError, UsageError
from dbfit.fitting.options import OPTION_NAMES

REQUIRED = ("database", "name", "formula", "source")
# The fit's own options: checked by dbfit.fitting.options.FitOptions where the command builds the fit (with the
# command line's values over these), so their rules live in one place.
FIT_OPTIONS = tuple(name for name in OPTION_NAMES if name != "start")  # start values come from refit only
OPTIONAL = {
    **{key: object for key in FIT_OPTIONS},
    "holdout_key": str,
    "holdout_share": (int, float),
    "threshold": (int, float),
    "gates": dict,
}


def read_spec(path: str) -> dict[str, Any]:
    """The settings in ``path`` (``.toml`` as TOML, anything else as JSON), checked for unknown keys and types."""
    file = Path(path)
    try:
        text = file.read_text()
    except OSError as err:
        raise DbfitError(f"the spec file {path} cannot be read: {err.strerror}") from None
    try:
        spec = tomllib.loads(text) if file.suffix.lower() == ".toml" else json.loads(text)
    except (tomllib.TOMLDecodeError, json.JSONDecodeError) as err:
        raise DbfitError(
            f"the spec file {path} is not valid {'TOML' if file.suffix == '.toml' else 'JSON'}: {err}"
        ) from None
    if not isinstance(spec, dict):
        raise DbfitError(f"the spec file {path} must hold one object of settings")
    unknown = sorted(set(spec) - set(REQUIRED) - set(OPTIONAL))
    if unknown:
        raise DbfitError(
            f"the spec file {path} has unknown key(s) {unknown}; known: {sorted(REQUIRED + tuple(OPTIONAL))}"
        )
    for key, value in spec.items():
        wanted = OPTIONAL.get(key, str)
        if not isinstance(value, wanted) or (wanted is not object and isinstance(value, bool)):
            raise DbfitError(f"the spec file {path}: {key} = {value!r} has the wrong type")
    return spec


def merge(spec: dict[str, Any], given: dict[str, Any]) -> dict[str, Any]:
    """Command-line values over the spec's; every required key must end up set."""
    settings = {**spec, **{k: v for k, v in given.items() if v is not None}}
    missing = [k for k in REQUIRED if not settings.get(k)]
    if missing:
        raise UsageError(
            f"fit needs {', '.join('--' + k for k in missing)} (on the command line or in --spec)"
        )
    return settings
