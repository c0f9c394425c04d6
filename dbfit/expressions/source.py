"""Turn the user's ``source`` (table or view name, file path, or single SELECT) into a FROM item.

The text is parsed with sqlglot and rebuilt as an expression tree; it is never spliced into SQL. A SELECT is
the user's own query, read-only, and calls only the functions that
:func:`dbfit.expressions.rules.check_source_query` allows (row-wise scalars, aggregates, windows, file readers
and set-returning functions).
"""

from __future__ import annotations

import re

import sqlglot
from sqlglot import exp
from sqlglot.errors import SqlglotError

from dbfit.errors import SourceError
from dbfit.expressions.formula import DIALECT
from dbfit.expressions.rules import check_source_query

_FILE_READERS = {
    "parquet": "read_parquet",
    "csv": "read_csv_auto",
    "tsv": "read_csv_auto",
    "json": "read_json_auto",
}
_FILE_PATTERN = re.compile(r"\.(parquet|csv|tsv|json)(\.gz|\.zst)?$", re.IGNORECASE)


def source_relation(source: str) -> exp.Expression:
    """Return a sqlglot FROM item (table, file reader call or aliased subquery) for ``source``."""
    if not isinstance(source, str) or not source.strip():
        raise SourceError("the source is empty: give a table or view name, a Parquet/CSV path, or a SELECT")
    text = source.strip()
    match = _FILE_PATTERN.search(text)
    if match and not text.lower().startswith(("select", "with", "from", "(")):
        reader = _FILE_READERS[match.group(1).lower()]
        return exp.Anonymous(this=reader, expressions=[exp.Literal.string(text)]).as_("dbfit_source")
    try:
        statements = [s for s in sqlglot.parse(text, read=DIALECT) if s is not None]
    except SqlglotError as err:
        raise SourceError(f"source {text[:80]!r} is not a table name, file path or SELECT: {err}") from None
    if len(statements) != 1:
        raise SourceError(f"source {text[:80]!r} holds {len(statements)} statements; give exactly one SELECT")
    node = statements[0]
    if isinstance(node, exp.Query):
        _refuse_writes(node, text)
        check_source_query(node, text)
        return exp.Subquery(this=node, alias=exp.TableAlias(this=exp.to_identifier("dbfit_source")))
    table = _as_table(node)
    if table is None:
        kind = type(node).__name__.upper()
        raise SourceError(
            f"source {text[:80]!r} is a {kind} statement, not a table, view, file path or single SELECT"
        )
    return table


def _as_table(node: exp.Expression) -> exp.Table | None:
    """A bare (possibly qualified) name parses as a column or a dotted chain; rebuild it as a table."""
    parts: list[exp.Identifier] = []
    if isinstance(node, exp.Column):
        parts = [p for p in node.parts if isinstance(p, exp.Identifier)]
        if len(parts) != len(node.parts):
            return None
    elif isinstance(node, exp.Identifier):
        parts = [node]
    elif isinstance(node, exp.Table) and not node.args.get("alias"):
        parts = [p for p in node.parts if isinstance(p, exp.Identifier)]
    if not parts or len(parts) > 3:
        return None
    names = [exp.to_identifier(p.name, quoted=True) for p in parts]
    table, db, catalog = (
        names[-1],
        (names[-2] if len(names) > 1 else None),
        (names[-3] if len(names) > 2 else None),
    )
    return exp.Table(this=table, db=db, catalog=catalog)


def _refuse_writes(node: exp.Expression, text: str) -> None:
    for sub in node.walk():
        if isinstance(sub, (exp.DML, exp.DDL, exp.Command)) or (isinstance(sub, exp.Into)):
            raise SourceError(
                f"source {text[:80]!r} contains a {type(sub).__name__.upper()}: only a read-only SELECT"
            )
