"""Spellings kept for one release, each with a DeprecationWarning that names its replacement.

Model and SegmentedFit are plain values: storing, scoring SQL and reports are functions of the layers above
them (``dbfit.save``, ``dbfit.scoring_sql``, ``dbfit.write_report``). The methods of earlier releases are
attached here, at the top layer, so that the value classes import nothing above them.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from typing import Any

from dbfit.interfaces import python_api
from dbfit.interfaces.old_spellings import warn_renamed
from dbfit.model.fitted import Model
from dbfit.model.segmented import SegmentedFit


def _method(old: str, new: str, call: Callable[..., Any]) -> Callable[..., Any]:
    @functools.wraps(call)
    def method(self: Any, *args: Any, **kwargs: Any) -> Any:
        warn_renamed(old, new)
        return call(self, *args, **kwargs)

    method.__doc__ = f"Deprecated: use {new}."
    return method


def _save(fitted: Any, con: Any, name: str, *, promote: bool = True) -> Any:
    return python_api.save(con, fitted, name, promote=promote)


def _segment_scoring_sql(fitted: SegmentedFit, source: str | None = None, *, unseen: str = "null") -> str:
    return python_api.scoring_sql(fitted, source=source, unseen=unseen)


def attach() -> None:
    """Give Model and SegmentedFit their methods of earlier releases, each warning once per call site."""
    Model.save = _method("Model.save(con, name)", "dbfit.save(con, model, name)", _save)  # type: ignore[attr-defined]
    Model.scoring_sql = _method(
        "Model.scoring_sql(...)",
        "dbfit.scoring_sql(model, ...)",  # type: ignore[attr-defined]
        python_api.scoring_sql,
    )
    Model.report = _method(
        "Model.report(path)",
        "dbfit.write_report(model, path)",  # type: ignore[attr-defined]
        python_api.write_report,
    )
    SegmentedFit.save = _method(
        "SegmentedFit.save(con, name)",  # type: ignore[attr-defined]
        "dbfit.save(con, fitted, name)",
        _save,
    )
    SegmentedFit.scoring_sql = _method(
        "SegmentedFit.scoring_sql(...)",  # type: ignore[attr-defined]
        "dbfit.scoring_sql(fitted, source=...)",
        _segment_scoring_sql,
    )
