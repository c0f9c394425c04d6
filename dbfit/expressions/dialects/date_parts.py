"""Date parts (``EXTRACT(part FROM t)``) written so that every dialect gives the same numbers.

DuckDB and PostgreSQL both read ``EXTRACT(EPOCH | ISODOW | MONTH | HOUR | DOY FROM t)`` of a DATE or a
TIMESTAMP without time zone alike: seconds since 1970-01-01 00:00 read as UTC, ISO day of week (Monday 1),
month, hour, day of year. SQLite has no EXTRACT and keeps dates as text; its ``strftime`` gives the same
numbers ('%s' whole seconds since 1970 read as UTC, '%w' day of week with Sunday 0, '%m', '%H', '%j'), from
the SQLite documentation of its date and time functions. Sub-second parts are dropped on SQLite.

Spark SQL names the ISO weekday ``DAYOFWEEK_ISO`` and has no EPOCH part; its TIMESTAMP is an instant shown
in the session time zone (``spark.sql.session.timeZone``), and ``unix_timestamp`` or ``CAST(t AS DOUBLE)``
count the seconds of that instant, so they would shift with the zone. dbfit reads a Spark date or time as
the wall-clock time it shows (``CAST(t AS TIMESTAMP_NTZ)``, a DATE at midnight) and writes its epoch seconds
as the exact microseconds from 1970-01-01 00:00 to it (``TIMESTAMPDIFF(MICROSECOND, ...)``, a difference of
two timestamps without time zone), which no session time zone changes.
"""

from __future__ import annotations

from sqlglot import exp

from dbfit.errors import DbfitError

NATIVE = ("duckdb", "postgres")
SQLITE_FORMATS = {"EPOCH": "%s", "ISODOW": "%w", "MONTH": "%m", "HOUR": "%H", "DOY": "%j"}
SPARK_PARTS = {"ISODOW": "DAYOFWEEK_ISO", "MONTH": "MONTH", "HOUR": "HOUR", "DOY": "DOY"}
MICROSECONDS = 1_000_000


def write_date_parts(tree: exp.Expression, dialect: str) -> exp.Expression:
    """``tree`` with each date part in ``dialect``'s spelling (``tree`` itself when nothing changes)."""
    parts = [node for node in tree.find_all(exp.Extract) if _part(node) in SQLITE_FORMATS]
    if not parts or dialect in NATIVE:
        return tree
    if dialect == "sqlite":
        return tree.copy().transform(_sqlite_part)
    if dialect == "spark":
        return tree.copy().transform(_spark_part)
    raise DbfitError(
        f"date terms are written for duckdb, postgres, spark and sqlite; dbfit cannot yet write them for {dialect}"
    )


def wall_clock(value: exp.Expression, dialect: str) -> exp.Expression:
    """``value`` (a DATE or TIMESTAMP) as the date and time it shows, without time zone, in ``dialect``: itself
    except on Spark, whose TIMESTAMP is an instant read in the session time zone (see the module docstring)."""
    if dialect != "spark":
        return value
    return exp.Cast(this=value, to=exp.DataType.build("TIMESTAMP_NTZ", dialect="spark"))


def _part(node: exp.Extract) -> str:
    return node.this.name.upper() if isinstance(node.this, (exp.Var, exp.Identifier, exp.Column)) else ""


def _spark_part(node: exp.Expression) -> exp.Expression:
    if not isinstance(node, exp.Extract) or _part(node) not in SQLITE_FORMATS:
        return node
    part, value = _part(node), node.expression.copy()
    if part != "EPOCH":
        return exp.Extract(this=exp.Var(this=SPARK_PARTS[part]), expression=value)
    epoch = exp.Cast(
        this=exp.Literal.string("1970-01-01 00:00:00"),
        to=exp.DataType.build("TIMESTAMP_NTZ", dialect="spark"),
    )
    micros = exp.TimestampDiff(
        this=wall_clock(value, "spark"), expression=epoch, unit=exp.Var(this="MICROSECOND")
    )
    seconds = exp.Div(
        this=exp.Cast(this=micros, to=exp.DataType.build("DOUBLE")),
        expression=exp.Literal.number(MICROSECONDS),
    )
    return exp.Paren(this=seconds)


def _sqlite_part(node: exp.Expression) -> exp.Expression:
    if not isinstance(node, exp.Extract) or _part(node) not in SQLITE_FORMATS:
        return node
    part = _part(node)
    text = exp.Anonymous(
        this="strftime", expressions=[exp.Literal.string(SQLITE_FORMATS[part]), node.expression.copy()]
    )
    number = exp.Cast(this=text, to=exp.DataType.build("REAL" if part == "EPOCH" else "INTEGER"))
    if part != "ISODOW":
        return number
    # Sunday 0 .. Saturday 6  ->  Monday 1 .. Sunday 7
    shifted = exp.Mod(
        this=exp.Paren(this=exp.Add(this=number, expression=exp.Literal.number(6))),
        expression=exp.Literal.number(7),
    )
    return exp.Paren(this=exp.Add(this=shifted, expression=exp.Literal.number(1)))
