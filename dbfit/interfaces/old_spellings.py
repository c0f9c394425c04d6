"""Calls in the argument order of earlier releases, accepted for one more release with a DeprecationWarning."""

from __future__ import annotations

import functools
import warnings
from collections.abc import Callable
from typing import Any, TypeVar

Function = TypeVar("Function", bound=Callable[..., Any])


def version_by_keyword(positional: int) -> Callable[[Function], Function]:
    """For a function whose ``version`` became keyword-only after ``positional`` positional arguments: one
    more positional argument is the version as earlier releases took it, with a DeprecationWarning."""

    def decorate(function: Function) -> Function:
        @functools.wraps(function)
        def call(*args: Any, **kwargs: Any) -> Any:
            if len(args) > positional:
                if len(args) > positional + 1 or "version" in kwargs:
                    raise TypeError(
                        f"{function.__name__}() takes {positional} positional arguments and version="
                    )
                warnings.warn(
                    f"{function.__name__}(..., version) with the version by position is deprecated and "
                    f"goes in the next release; write {function.__name__}(..., version=...)",
                    DeprecationWarning,
                    stacklevel=2,
                )
                args, kwargs = args[:positional], {**kwargs, "version": args[positional]}
            return function(*args, **kwargs)

        return call  # type: ignore[return-value]

    return decorate


def warn_renamed(old: str, new: str) -> None:
    """Warn that ``old`` is deprecated in favour of ``new`` (at the caller's caller)."""
    warnings.warn(
        f"{old} is deprecated and goes in the next release; use {new}", DeprecationWarning, stacklevel=3
    )
