"""The options of one fit, checked once where they enter dbfit (Python, SQL, command line, spec file, refit).

:class:`FitOptions` holds every option of :func:`dbfit.fit` with its type and range checked, and refuses the
combinations dbfit cannot fit, before any query runs. Each message names the option and the value given.
The SQL functions pass their options as text (so that ``max_iter := 'abc'`` reaches dbfit instead of failing a
cast in the database): :meth:`FitOptions.from_text` reads those.
"""

from __future__ import annotations

import dataclasses
import json
import math
import numbers
from collections.abc import Mapping, Sequence
from typing import Any

from dbfit.errors import FitError
from dbfit.fitting import penalised, prior_correction
from dbfit.fitting import robust as robust_errors

EXPRESSION_OPTIONS = ("weights", "offset", "trials", "by", "cluster", "split_key")
DEFAULTS: dict[str, Any] = {"max_iter": 50, "tol": 1e-10, "firth": False, "l1_share": 0.0, "folds": 5}


@dataclasses.dataclass(frozen=True)
class FitVariants:
    """The options that change how the estimates or their errors are computed."""

    robust_kind: str | None = None
    cluster: str | None = None
    firth: bool = False
    population_rate: float | None = None
    penalty_request: Any = None

    @property
    def plain(self) -> bool:
        """The estimates are the maximum-likelihood ones (no Firth adjustment, no penalty)."""
        return not self.firth and self.penalty_request is None

    @property
    def ordinary(self) -> bool:
        """Plain estimates with model-based errors on the sampled scale: nothing beyond the core fit."""
        return self.plain and self.robust_kind is None and self.population_rate is None


@dataclasses.dataclass(frozen=True)
class FitOptions:
    """Every option of a fit, validated; build it with :meth:`of` (keywords) or :meth:`from_text` (SQL)."""

    weights: str | None = None
    offset: str | None = None
    trials: str | None = None
    reference: Mapping[str, Any] | None = None
    positive: Any = None
    max_iter: int = 50
    tol: float = 1e-10
    start: Mapping[str, float] | tuple[float, ...] | None = None
    by: str | None = None
    robust: str | None = None
    cluster: str | None = None
    firth: bool = False
    population_rate: float | None = None
    shrinkage: float | tuple[float, ...] | str | None = None
    l1_share: float = 0.0
    folds: int = 5
    split_key: str | None = None
    missing: Mapping[str, str] | str | None = None
    robust_kind: str | None = dataclasses.field(default=None, compare=False)
    penalty_request: Any = dataclasses.field(default=None, compare=False)

    @classmethod
    def of(cls, **options: Any) -> FitOptions:
        """Check ``options`` (the keywords of :func:`dbfit.fit` but ``progress``) and return them, typed."""
        unknown = sorted(set(options) - set(OPTION_NAMES))
        if unknown:
            raise FitError(
                f"unknown fit option(s) {', '.join(unknown)}; the options are {', '.join(sorted(OPTION_NAMES))}"
            )
        for name, default in DEFAULTS.items():
            if name in options and options[name] is None:
                raise FitError(
                    f"{name} must be given a value (got None); leave it out for the default {default!r}"
                )
        values = {**DEFAULTS, **options}
        for name in EXPRESSION_OPTIONS:
            values[name] = _expression_text(name, values.get(name))
        values["reference"] = _reference(values.get("reference"))
        values["positive"] = _positive(values.get("positive"))
        values["missing"] = _missing(values.get("missing"))
        values["max_iter"] = _whole(values["max_iter"], "max_iter", 1)
        values["tol"] = _real(values["tol"], "tol")
        if not values["tol"] > 0:
            raise FitError(f"tol must be a positive number (got {values['tol']!r})")
        values["start"] = _start(values.get("start"))
        values["firth"] = _flag(values["firth"], "firth")
        values["folds"] = _whole(values["folds"], "folds", 2)
        values["l1_share"] = _real(values["l1_share"], "l1_share")
        if not 0 <= values["l1_share"] <= 1:
            raise FitError(f"l1_share must be between 0 (ridge) and 1 (pure L1) (got {values['l1_share']!r})")
        if values.get("robust") is not None and not isinstance(values["robust"], str):
            raise FitError(
                f"robust must be one of {', '.join(robust_errors.KINDS)} (got {values['robust']!r})"
            )
        prior_correction.check_population_rate(values.get("population_rate"))
        shrinkage = values.get("shrinkage")
        if isinstance(shrinkage, (list, tuple)):
            shrinkage = tuple(shrinkage)
        values["shrinkage"] = shrinkage
        values["robust_kind"] = robust_errors.choose_kind(values.get("robust"), values.get("cluster"))
        values["penalty_request"] = penalised.check_request(
            shrinkage, values["l1_share"], values["folds"], values.get("split_key")
        )
        chosen = cls(**values)
        chosen._check_combinations()
        return chosen

    @classmethod
    def from_text(cls, **options: Any) -> FitOptions:
        """As :meth:`of`, with numbers and flags given as SQL text (NULL: the default)."""
        readers = {
            "max_iter": int,
            "folds": int,
            "tol": float,
            "l1_share": float,
            "population_rate": float,
            "firth": _text_flag,
            "shrinkage": _text_shrinkage,
        }
        converted = {}
        for name, value in options.items():
            if value is None or name not in readers:
                converted[name] = value
                continue
            try:
                converted[name] = readers[name](str(value).strip())
            except ValueError:
                raise FitError(f"{name} := {value!r} is not a {_wanted(name)}") from None
        return cls.of(**{k: v for k, v in converted.items() if v is not None or k not in DEFAULTS})

    def variants(self) -> Any:
        """The options that change how the estimates or their errors are computed (a ``FitVariants``)."""
        return FitVariants(
            self.robust_kind, self.cluster, self.firth, self.population_rate, self.penalty_request
        )

    def recorded(self) -> dict[str, Any]:
        """The options a model keeps in its ``options`` (and its document), in the shape documents have always had:
        the expressions and settings that define the fit (the variants add their own records)."""
        return {
            "weights": self.weights,
            "offset": self.offset,
            "trials": self.trials,
            "reference": dict(self.reference or {}),
            "positive": self.positive,
            "max_iter": self.max_iter,
            "tol": self.tol,
            "by": self.by,
            **(
                {"missing": self.missing if isinstance(self.missing, str) else dict(self.missing)}
                if self.missing
                else {}
            ),
        }

    def _check_combinations(self) -> None:
        if self.penalty_request is not None and (self.firth or self.robust_kind is not None):
            raise FitError("shrinkage cannot be combined with firth=True or robust standard errors")
        if self.by is not None and not self.variants().ordinary:
            raise FitError("by= cannot yet be combined with firth, robust, shrinkage or population_rate")
        if self.by is not None and self.start is not None:
            raise FitError("start= cannot be combined with by=: every segment starts from its own intercept")


# The options a user gives (derived values such as robust_kind are not among them), in declaration order.
OPTION_NAMES = tuple(f.name for f in dataclasses.fields(FitOptions) if f.compare)


def _expression_text(name: str, value: Any) -> str | None:
    if value is None:
        return None
    if not isinstance(value, str):
        raise FitError(
            f'{name} must be SQL expression text such as "amount" (got {type(value).__name__} {value!r})'
        )
    if not value.strip():
        raise FitError(f"{name} is empty: give an SQL expression or leave {name} out")
    return value


def _reference(value: Any) -> dict[str, Any] | None:
    if value is None:
        return None
    if not isinstance(value, Mapping):
        raise FitError(
            f"reference must map each categorical term to its reference level, e.g. {{'region': 'north'}} "
            f"(got {type(value).__name__} {value!r})"
        )
    for term, level in value.items():
        if not isinstance(term, str):
            raise FitError(
                f"reference names term {term!r}, which is not text: name the term as in the formula"
            )
        if level is not None and not isinstance(level, (str, numbers.Real)):
            raise FitError(f"reference level {level!r} of '{term}' must be a single value (text or number)")
    return dict(value)


MISSING_POLICIES = ("drop", "indicator", "level")


def _missing(value: Any) -> Mapping[str, str] | str | None:
    """``missing=``: one policy for every term it fits, or a mapping of term to policy; SQL gives either as
    text (a policy word, or a JSON object such as '{"distance_km": "indicator"}')."""
    if value is None:
        return None
    if isinstance(value, str) and value.strip().startswith("{"):
        try:
            value = json.loads(value)
        except json.JSONDecodeError as err:
            raise FitError(f"missing := {value!r} is not a JSON object of term to policy: {err}") from None
    if isinstance(value, str):
        if value not in MISSING_POLICIES:
            raise FitError(
                f"missing must be one of {', '.join(MISSING_POLICIES)} or a mapping of term to "
                f"policy (got {value!r})"
            )
        return value
    if not isinstance(value, Mapping):
        raise FitError(
            "missing must be a policy ('drop', 'indicator' or 'level') or a mapping of term to policy, e.g. "
            f"{{'distance_km': 'indicator'}} (got {type(value).__name__} {value!r})"
        )
    for term, policy in value.items():
        if not isinstance(term, str) or policy not in MISSING_POLICIES:
            raise FitError(
                f"missing names {term!r} with policy {policy!r}: name a term as in the formula and one of "
                f"{', '.join(MISSING_POLICIES)}"
            )
    return dict(value)


def _positive(value: Any) -> Any:
    if value is not None and not isinstance(value, (str, numbers.Real)):
        raise FitError(
            "positive must be one target value (text, number or boolean), "
            f"got {type(value).__name__} {value!r}"
        )
    return value


def _whole(value: Any, name: str, least: int) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise FitError(
            f"{name} must be a whole number of at least {least} (got {type(value).__name__} {value!r})"
        )
    if value < least:
        raise FitError(f"{name} must be a whole number of at least {least} (got {value!r})")
    return int(value)


def _real(value: Any, name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not math.isfinite(value):
        raise FitError(f"{name} must be a finite number (got {type(value).__name__} {value!r})")
    return float(value)


def _flag(value: Any, name: str) -> bool:
    if isinstance(value, bool) or type(value).__name__ == "bool_":
        return bool(value)
    raise FitError(f"{name} must be True or False (got {type(value).__name__} {value!r})")


def _start(value: Any) -> Mapping[str, float] | tuple[float, ...] | None:
    if value is None:
        return None
    if isinstance(value, Mapping):
        for label, number in value.items():
            if not isinstance(label, str):
                raise FitError(f"start names term {label!r}, which is not text: use the model's term labels")
            if number is not None and (isinstance(number, bool) or not isinstance(number, numbers.Real)):
                raise FitError(
                    f"start value of '{label}' must be a number (got {type(number).__name__} {number!r})"
                )
        return dict(value)
    if isinstance(value, (str, bytes)) or not isinstance(value, Sequence) and not hasattr(value, "__array__"):
        raise FitError(
            f"start must be a mapping of term label to estimate or a list of estimates in label order "
            f"(got {type(value).__name__} {value!r})"
        )
    numbers_given = list(value)
    for position, number in enumerate(numbers_given):
        if isinstance(number, bool) or not isinstance(number, numbers.Real):
            raise FitError(
                f"start value {position} must be a number (got {type(number).__name__} {number!r})"
            )
    return tuple(float(number) for number in numbers_given)


def _text_flag(text: str) -> bool:
    words = {"true": True, "t": True, "1": True, "false": False, "f": False, "0": False}
    if text.lower() not in words:
        raise ValueError(text)
    return words[text.lower()]


def _text_shrinkage(text: str) -> float | str:
    return "cv" if text == "cv" else float(text)


def _wanted(name: str) -> str:
    return {
        "max_iter": "whole number",
        "folds": "whole number",
        "firth": "boolean (true or false)",
        "shrinkage": "number or 'cv'",
    }.get(name, "number")
