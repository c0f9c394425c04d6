"""What user text may compute: an allowlist of pure, deterministic, row-wise scalar SQL.

Every expression dbfit runs for the user (formula terms, the target, ``weights``, ``offset``, ``trials``,
``cluster``, ``by``, split keys, and every expression read back from a stored model or a model document) goes
through :func:`check_expression`. A node is allowed only when its sqlglot class is in ``ALLOWED_NODES`` (the
exact class, never a subclass) or, for a function sqlglot does not know (``exp.Anonymous``), when its name is
in ``ALLOWED_FUNCTIONS`` of some engine. Everything else is refused: unknown and user-defined functions
(dbfit's own ``dbfit_*`` included), volatile and session functions, functions touching files, large objects,
settings or other tables, set-returning functions, ``*`` and ``COLUMNS``, subqueries, aggregates, windows,
lambdas, placeholders.

A SELECT given as a source is the user's own query: :func:`check_source_query` lets it also aggregate, use
window and set-returning functions and read files (``SOURCE_TABLE_FUNCTIONS``), but calls no other
function."""

from __future__ import annotations

from sqlglot import exp

from dbfit.errors import FormulaError, SourceError

_STRUCTURE = (
    exp.Column,
    exp.Identifier,
    exp.Literal,
    exp.Null,
    exp.Boolean,
    exp.Paren,
    exp.Var,
    exp.Interval,
    exp.Cast,
    exp.TryCast,
    exp.DataType,
    exp.DataTypeParam,
)
_OPERATORS = (
    exp.Neg,
    exp.Not,
    exp.And,
    exp.Or,
    exp.Add,
    exp.Sub,
    exp.Mul,
    exp.Div,
    exp.IntDiv,
    exp.Mod,
    exp.Pow,
    exp.EQ,
    exp.NEQ,
    exp.GT,
    exp.GTE,
    exp.LT,
    exp.LTE,
    exp.NullSafeEQ,
    exp.NullSafeNEQ,
    exp.Is,
    exp.In,
    exp.Between,
    exp.Like,
    exp.ILike,
    exp.SimilarTo,
    exp.Glob,
    exp.DPipe,
    exp.BitwiseAnd,
    exp.BitwiseOr,
    exp.BitwiseXor,
    exp.BitwiseNot,
    exp.BitwiseLeftShift,
    exp.BitwiseRightShift,
)
_CONDITIONALS = (exp.Case, exp.If, exp.Coalesce, exp.Nullif, exp.Greatest, exp.Least)
_MATH = (
    exp.Abs,
    exp.Ln,
    exp.Log,
    exp.Exp,
    exp.Sqrt,
    exp.Cbrt,
    exp.Round,
    exp.Floor,
    exp.Ceil,
    exp.Sign,
    exp.Trunc,
    exp.Sin,
    exp.Cos,
    exp.Tan,
    exp.Cot,
    exp.Asin,
    exp.Acos,
    exp.Atan,
    exp.Atan2,
    exp.Pi,
    exp.Degrees,
    exp.Radians,
    exp.IsNan,
    exp.IsInf,
    exp.WidthBucket,
)
_STRINGS = (
    exp.Lower,
    exp.Upper,
    exp.Initcap,
    exp.Length,
    exp.Substring,
    exp.Trim,
    exp.Concat,
    exp.ConcatWs,
    exp.Replace,
    exp.StartsWith,
    exp.EndsWith,
    exp.Contains,
    exp.RegexpLike,
    exp.RegexpILike,
    exp.RegexpFullMatch,
    exp.RegexpReplace,
    exp.RegexpExtract,
    exp.Left,
    exp.Right,
    exp.StrPosition,
    exp.Pad,
    exp.Reverse,
    exp.SplitPart,
    exp.Ascii,
    exp.Chr,
    exp.Repeat,
    exp.MD5,
    exp.Levenshtein,
)
_DATES = (
    exp.Extract,
    exp.TimestampTrunc,
    exp.DateTrunc,
    exp.DateDiff,
    exp.DateAdd,
    exp.DateSub,
    exp.TimestampDiff,
    exp.Year,
    exp.Month,
    exp.Day,
    exp.DayOfWeek,
    exp.DayOfWeekIso,
    exp.DayOfYear,
    exp.DayOfMonth,
    exp.Quarter,
    exp.Week,
    exp.WeekOfYear,
    exp.Hour,
    exp.Minute,
    exp.Second,
    exp.TimeToUnix,
    exp.TimeToStr,
    exp.StrToTime,
    exp.StrToDate,
    exp.UnixToTime,
    exp.DateFromParts,
    exp.Date,
    exp.LastDay,
    exp.Monthname,
    exp.Dayname,
    exp.ToChar,
    exp.TsOrDsToDate,
)
ALLOWED_NODES: frozenset[type[exp.Expression]] = frozenset(
    _STRUCTURE + _OPERATORS + _CONDITIONALS + _MATH + _STRINGS + _DATES
)

# Functions sqlglot parses as exp.Anonymous (it has no typed node for them), by engine, lower case. Each is
# pure, deterministic and row-wise on the engine that spells it so, and harmless (or absent) on the others.
ALLOWED_FUNCTIONS: dict[str, frozenset[str]] = {
    "duckdb": frozenset(
        {
            "date_part",
            "datepart",
            "date_sub",
            "isfinite",
            "hash",
            "prefix",
            "suffix",
            "even",
            "gamma",
            "lgamma",
            "factorial",
            "gcd",
            "lcm",
            "bit_count",
            "nextafter",
            "epoch_ms",
            "make_timestamp",
            "make_time",
            "strip_accents",
            "isoyear",
            "yearweek",
            "era",
            "millennium",
            "century",
            "decade",
            "nanosecond",
            "microsecond",
            "millisecond",
            "signbit",
            "ln1p",
        }
    ),
    "postgres": frozenset(
        {
            "date_part",
            "isfinite",
            "to_date",
            "to_number",
            "btrim",
            "div",
            "scale",
            "log10",
            "gcd",
            "lcm",
            "factorial",
            "make_timestamp",
            "make_time",
            "justify_days",
            "justify_hours",
            "width_bucket",
        }
    ),
    "spark": frozenset(
        {
            "date_part",
            "datepart",
            "date_format",
            "nvl",
            "nvl2",
            "pmod",
            "log1p",
            "expm1",
            "hypot",
            "log10",
            "log2",
            "dayofmonth",
            "weekofyear",
            "months_between",
            "from_unixtime",
            "to_date",
            "bround",
        }
    ),
}
_ANY_ENGINE = frozenset().union(*ALLOWED_FUNCTIONS.values())

# Date-part and interval unit words (exp.Var): anything else spelled as a bare word is refused.
DATE_UNITS = frozenset(
    {
        "year",
        "years",
        "quarter",
        "quarters",
        "month",
        "months",
        "week",
        "weeks",
        "day",
        "days",
        "hour",
        "hours",
        "minute",
        "minutes",
        "second",
        "seconds",
        "millisecond",
        "milliseconds",
        "microsecond",
        "microseconds",
        "dow",
        "doy",
        "isodow",
        "isoyear",
        "epoch",
        "decade",
        "century",
        "millennium",
        "yearweek",
        "dayofweek",
        "dayofyear",
        "dayofmonth",
        "weekday",
        "weekofyear",
        "nanosecond",
        "nanoseconds",
    }
)

# Bare words that PostgreSQL reads as session functions when unquoted: as identifiers they are quoted.
_SESSION_WORDS = frozenset(
    {
        "user",
        "current_user",
        "session_user",
        "current_role",
        "current_catalog",
        "current_schema",
        "system_user",
        "current_date",
        "current_time",
        "current_timestamp",
        "localtime",
        "localtimestamp",
    }
)

# In a SELECT source: set-returning and file-reading table functions (DuckDB spellings) and typed nodes of
# queries' own functions (aggregates and windows are allowed by their base classes).
SOURCE_TABLE_FUNCTIONS = frozenset(
    {
        "read_parquet",
        "parquet_scan",
        "read_csv",
        "read_csv_auto",
        "read_json",
        "read_json_auto",
        "read_ndjson",
        "read_ndjson_auto",
        "range",
        "generate_series",
        "unnest",
    }
)
_SOURCE_NODES = (
    exp.Array,
    exp.Unnest,
    exp.Explode,
    exp.GenerateSeries,
    exp.ReadCSV,
    exp.ReadParquet,
    exp.Columns,
    exp.RowNumber,
    exp.Rank,
    exp.DenseRank,
    exp.Lag,
    exp.Lead,
    exp.FirstValue,
    exp.LastValue,
    exp.NthValue,
    exp.PercentRank,
    exp.CumeDist,
)
_WHY = "dbfit accepts row-wise computations only; compute it in a view first"


def check_expression(node: exp.Expression, where: str) -> exp.Expression:
    """Refuse ``node`` unless every part of it is on the allowlist; return it (session words quoted).

    ``where`` says where the text was found ("term 3 of the formula", "weights", ...), for the message.
    """
    for sub in node.walk():
        if isinstance(sub, exp.Anonymous):
            if sub.name.lower() not in _ANY_ENGINE:
                raise FormulaError(f"function {sub.name} in {where} is not allowed: {_WHY}")
        elif type(sub) not in ALLOWED_NODES:
            raise FormulaError(f"{_describe(sub)} in {where} is not allowed: {_WHY}")
        elif isinstance(sub, exp.Var) and sub.name.lower() not in DATE_UNITS:
            raise FormulaError(f"the word {sub.name} in {where} is not allowed: only date-part units are")
        elif isinstance(sub, exp.DataType) and sub.this == exp.DataType.Type.USERDEFINED:
            raise FormulaError(
                f"cast to type {sub.sql('duckdb')} in {where} is not allowed: only built-in types are"
            )
        elif isinstance(sub, exp.Identifier) and not sub.quoted and sub.name.lower() in _SESSION_WORDS:
            sub.set("quoted", True)
    return node


def check_source_query(node: exp.Expression, text: str) -> None:
    """Refuse a function call in a SELECT source unless it is an allowlisted scalar, an aggregate, a window
    function or a reader."""
    for sub in node.walk():
        if isinstance(sub, exp.Anonymous):
            name = sub.name.lower()
            if name not in _ANY_ENGINE and name not in SOURCE_TABLE_FUNCTIONS:
                raise SourceError(
                    f"source {text[:80]!r} calls function {sub.name}, which a source may not call: a source "
                    "reads rows (tables, files, row-wise functions, aggregates); create a view for anything "
                    "else"
                )
        elif isinstance(sub, (exp.Placeholder, exp.Parameter, exp.SessionParameter)):
            raise SourceError(f"source {text[:80]!r} holds a parameter placeholder {sub.sql('duckdb')}")
        elif isinstance(sub, exp.Func) and not _source_function(sub):
            raise SourceError(
                f"source {text[:80]!r} calls {_describe(sub)}, which a source may not call: a source "
                "reads rows; volatile and session functions change between reads"
            )


def _source_function(node: exp.Func) -> bool:
    kind = type(node)
    return kind in ALLOWED_NODES or kind in _SOURCE_NODES or isinstance(node, exp.AggFunc)


def _describe(node: exp.Expression) -> str:
    """'function random' for a function node, else the kind of node and its text."""
    if isinstance(node, exp.Func):
        return f"function {node.sql('duckdb').split('(')[0].strip().lower()}"
    kind = {
        exp.Star: "'*'",
        exp.Placeholder: "a parameter placeholder",
        exp.Subquery: "a subquery",
        exp.Select: "a SELECT",
        exp.Window: "a window",
    }.get(type(node))
    return kind or f"{type(node).__name__.lower()} '{node.sql('duckdb')[:60]}'"
