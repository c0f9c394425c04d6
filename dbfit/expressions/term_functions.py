"""Term functions: dbfit's own calls in a formula that stand for plain SQL a fit computes and stores.

A term function is written as a factor of the formula and read here, never by the allowlist of
:mod:`dbfit.expressions.rules` (its arguments are checked by it). Each resolved call is turned into one plain
SQL tree that every scoring dialect can write; the call's text is the term's label. The calls:

* dates and times (the argument a DATE or TIMESTAMP expression):
  ``elapsed(t, day|hour, 'since')`` the days or hours from ``since`` to ``t`` (a number);
  ``iso_weekday(t)`` the ISO day of the week 1 (Monday) .. 7, ``month_of_year(t)`` 1 .. 12 and
  ``hour_of_day(t)`` 0 .. 23, each a categorical;
  ``cycle_sin(t, hour|day_of_year)`` and ``cycle_cos(...)``: sine and cosine of the angle
  2 pi hour / 24 or 2 pi (day of year - 1) / 365.25, a cyclic encoding (common practice);
* missing values: ``filled(x, value)`` is ``x`` with NULL replaced by ``value``, ``is_missing(x)`` is 1
  where ``x`` is NULL and 0 elsewhere, ``null_level(x)`` a categorical with NULL as the level ``(missing)``.

Written before a fit resolves them (:mod:`dbfit.design.term_resolution`), and never stored: ``elapsed(t,
unit)`` (the reference date is the earliest ``t`` among the rows used), ``cyclic(t, unit)`` (both of
``cycle_sin`` and ``cycle_cos``), ``all_columns()`` and ``all_columns_except(a, b)`` (the source's columns).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import UTC, date, datetime

import sqlglot
from sqlglot import exp
from sqlglot.errors import SqlglotError
from sqlglot.tokens import TokenType

from dbfit.errors import FormulaError
from dbfit.expressions import builders as sb
from dbfit.expressions.rules import check_expression

DIALECT = "duckdb"
MISSING_LEVEL = "(missing)"
TAU = 2.0 * math.pi

ELAPSED_UNITS = {"day": 86400.0, "hour": 3600.0}
CYCLES = {"hour": ("HOUR", 0.0, 24.0), "day_of_year": ("DOY", 1.0, 365.25)}  # (part, offset, period)
CALENDAR_PARTS = {"iso_weekday": "ISODOW", "month_of_year": "MONTH", "hour_of_day": "HOUR"}
DATE_FUNCTIONS = (
    "elapsed",
    "iso_weekday",
    "month_of_year",
    "hour_of_day",
    "cycle_sin",
    "cycle_cos",
    "cyclic",
)
MISSING_FUNCTIONS = ("filled", "is_missing", "null_level")
COLUMN_FUNCTIONS = ("all_columns", "all_columns_except")
NAMES = frozenset(DATE_FUNCTIONS + MISSING_FUNCTIONS + COLUMN_FUNCTIONS)
# resolved at fit time (never in a stored formula): their factors expand or gain a parameter
PENDING = frozenset(("cyclic",) + COLUMN_FUNCTIONS)


@dataclass(frozen=True)
class Call:
    """A term function call as written: its name and the text of each argument."""

    name: str
    arguments: tuple[str, ...]
    text: str

    @property
    def pending(self) -> bool:
        """Resolved by the fit: it expands into other terms or lacks its reference date."""
        return self.name in PENDING or (self.name == "elapsed" and len(self.arguments) == 2)


def date_alternatives(text: str) -> str:
    """What to write for a date or time term ``text``, for the message refusing it as it stands."""
    return (
        f"write elapsed({text}, day) or elapsed({text}, hour) (since the earliest date, or "
        f"elapsed({text}, day, '2024-01-01')), iso_weekday({text}), month_of_year({text}), hour_of_day({text}) "
        f"or cyclic({text}, hour) / cyclic({text}, day_of_year)"
    )


def read_call(text: str) -> Call | None:
    """The term function call ``text`` is, or None when it is no such call (plain SQL)."""
    try:
        tokens = sqlglot.tokenize(text, read=DIALECT)
    except SqlglotError:
        return None
    if (
        len(tokens) < 3
        or tokens[1].token_type != TokenType.L_PAREN
        or tokens[-1].token_type != TokenType.R_PAREN
    ):
        return None
    name = tokens[0].text.lower()
    if name not in NAMES or tokens[0].token_type == TokenType.STRING:
        return None
    arguments: list[str] = []
    depth, start = 0, None
    for token in tokens[2:-1]:
        if token.token_type in (TokenType.L_PAREN, TokenType.CASE, TokenType.L_BRACKET):
            depth += 1
        elif token.token_type in (TokenType.R_PAREN, TokenType.END, TokenType.R_BRACKET):
            depth -= 1
            if depth < 0:
                return None  # 'f(a) + g(b)': the first ')' closes the call before the end
        if depth == 0 and token.token_type == TokenType.COMMA:
            if start is None:
                raise FormulaError(f"term '{text}' has an empty argument")
            arguments.append(text[start : token.start].strip())
            start = None
            continue
        if start is None:
            start = token.start
    if start is not None:
        arguments.append(text[start : tokens[-1].start].strip())
    elif arguments:
        raise FormulaError(f"term '{text}' ends with an empty argument")
    return Call(name=name, arguments=tuple(arguments), text=text.strip())


def argument_tree(call: Call, position: int = 0) -> exp.Expression:
    """The argument at ``position``, parsed and checked like any formula expression."""
    text = call.arguments[position]
    try:
        parsed = sqlglot.parse_one(text, read=DIALECT)
    except SqlglotError as err:
        raise FormulaError(f"argument {text!r} of '{call.text}' is not valid SQL: {err}") from None
    return check_expression(parsed, f"term '{call.text}'")


def factor_tree(call: Call) -> exp.Expression:
    """The plain SQL of a resolved call (a DuckDB tree; :mod:`dbfit.expressions.dialects.date_parts`
    writes its date parts in the other dialects)."""
    check_arity(call)
    if call.name in ("elapsed", "cyclic", "cycle_sin", "cycle_cos"):
        unit_of(call, ELAPSED_UNITS if call.name == "elapsed" else CYCLES)
    if call.pending:
        raise FormulaError(
            f"'{call.text}' is resolved when a model is fitted (to "
            + (
                "the columns of the source"
                if call.name in COLUMN_FUNCTIONS
                else "its parts and reference date"
            )
            + "); it cannot stand in a stored model"
        )
    value = argument_tree(call)
    if call.name == "elapsed":
        unit = unit_of(call, ELAPSED_UNITS)
        since = reference_epoch(call)
        seconds = sb.sub(date_part("EPOCH", value), sb.number(since))
        return sb.div(sb.paren(seconds), sb.number(ELAPSED_UNITS[unit]))
    if call.name in CALENDAR_PARTS:
        return exp.Cast(this=date_part(CALENDAR_PARTS[call.name], value), to=exp.DataType.build("VARCHAR"))
    if call.name in ("cycle_sin", "cycle_cos"):
        part, offset, period = CYCLES[unit_of(call, CYCLES)]
        position = date_part(part, value)
        if offset:
            position = sb.paren(sb.sub(position, sb.number(offset)))
        angle = sb.div(sb.mul(sb.number(TAU), position), sb.number(period))
        return (exp.Sin if call.name == "cycle_sin" else exp.Cos)(this=angle)
    if call.name == "filled":
        fill = fill_value(call)
        return exp.Coalesce(this=sb.as_double(value), expressions=[sb.number(fill)])
    if call.name == "is_missing":
        return exp.Case(
            ifs=[exp.If(this=exp.Is(this=value, expression=exp.Null()), true=exp.Literal.number(1))],
            default=exp.Literal.number(0),
        )
    # null_level
    text_value = exp.Cast(this=value, to=exp.DataType.build("VARCHAR"))
    return exp.Coalesce(this=text_value, expressions=[exp.Literal.string(MISSING_LEVEL)])


ARITY = {
    "elapsed": (2, 3),
    "iso_weekday": (1, 1),
    "month_of_year": (1, 1),
    "hour_of_day": (1, 1),
    "cycle_sin": (2, 2),
    "cycle_cos": (2, 2),
    "cyclic": (2, 2),
    "filled": (2, 2),
    "is_missing": (1, 1),
    "null_level": (1, 1),
    "all_columns": (0, 0),
    "all_columns_except": (1, 10_000),
}


def check_arity(call: Call) -> None:
    """Refuse a call with the wrong number of arguments, naming the term and what to write."""
    low, high = ARITY[call.name]
    if low <= len(call.arguments) <= high:
        return
    if call.name in ("elapsed", "cyclic", "cycle_sin", "cycle_cos") and len(call.arguments) == 1:
        units = ELAPSED_UNITS if call.name == "elapsed" else CYCLES
        raise FormulaError(
            f"date term '{call.text}' has no unit: write "
            + " or ".join(f"{call.name}({call.arguments[0]}, {unit})" for unit in units)
        )
    wanted = f"{low}" if low == high else f"{low} to {high}" if high < 100 else f"at least {low}"
    raise FormulaError(f"term '{call.text}' takes {wanted} argument(s), got {len(call.arguments)}")


def unit_of(call: Call, units: dict) -> str:
    """The unit argument (written bare, ``day``, or quoted, ``'day'``), one of ``units``."""
    written = call.arguments[1].strip().strip("'\"").lower()
    if written not in units:
        raise FormulaError(
            f"date term '{call.text}' has unit {call.arguments[1]!r}; write one of {', '.join(units)}"
        )
    return written


def reference_moment(call: Call) -> datetime:
    """The reference date of ``elapsed(t, unit, 'since')`` as a naive datetime (UTC-free, as stored)."""
    text = call.arguments[2].strip()
    if len(text) < 2 or text[0] != "'" or text[-1] != "'":
        raise FormulaError(
            f"the reference date of '{call.text}' must be a quoted date such as '2024-01-01' (got {text})"
        )
    try:
        return datetime.fromisoformat(text[1:-1])
    except ValueError:
        raise FormulaError(
            f"the reference date {text} of '{call.text}' is not a date or time of the form "
            "'YYYY-MM-DD' or 'YYYY-MM-DD HH:MM:SS'"
        ) from None


def reference_epoch(call: Call) -> float:
    """Seconds from 1970-01-01 00:00 to the reference date, both read as UTC (so does every dialect)."""
    moment = reference_moment(call)
    if moment.tzinfo is not None:
        raise FormulaError(f"the reference date of '{call.text}' must not carry a time zone")
    return moment.replace(tzinfo=UTC).timestamp()


def reference_text(value: date | datetime) -> str:
    """A date or timestamp as the quoted literal ``elapsed`` stores: '2024-01-01' or '2024-01-01 06:30:00'."""
    if isinstance(value, datetime):
        if value.time() == datetime.min.time():
            return f"'{value.date().isoformat()}'"
        return f"'{value.isoformat(sep=' ')}'"
    return f"'{value.isoformat()}'"


def fill_value(call: Call) -> float:
    try:
        value = float(call.arguments[1])
    except ValueError:
        raise FormulaError(
            f"the fill value of '{call.text}' must be a number (got {call.arguments[1]})"
        ) from None
    if not math.isfinite(value):
        raise FormulaError(f"the fill value of '{call.text}' must be finite")
    return value


def date_part(part: str, value: exp.Expression) -> exp.Expression:
    """``EXTRACT(part FROM value)``: EPOCH (seconds since 1970, read as UTC), ISODOW, MONTH, HOUR or DOY."""
    return exp.Extract(this=exp.Var(this=part), expression=value)
