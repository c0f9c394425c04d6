"""A source's fingerprint: its row count and a checksum of its rows, both computed in the database.

The checksum is the sum of DuckDB's ``hash`` of each whole row (as a struct) in 128-bit integers, so it does not
depend on the row order; appending, deleting or changing a row changes it (barring a hash collision).
"""

from __future__ import annotations

from typing import Any

from sqlglot import exp

from dbfit.engines import engine_for
from dbfit.expressions.source import source_relation

ROW = "dbfit_row"


def fingerprint(con: Any, source: str) -> dict[str, Any]:
    """``{"source", "source_rows", "checksum"}`` of ``source``; the checksum as text (it exceeds 64 bits)."""
    relation, row_hash = _hashed_rows(source)
    rows, checksum = engine_for(con).fetch(exp.select(exp.Count(this=exp.Star()), row_hash).from_(relation))[
        0
    ]
    return _fingerprint_of(source, rows, checksum)


def segment_fingerprints(
    con: Any, source: str, by: exp.Expression, sources: dict[Any, str]
) -> dict[Any, dict[str, Any]]:
    """The fingerprint of each segment's rows (``sources``: segment value -> its SELECT), all from one grouped scan;
    each equals :func:`fingerprint` of that segment's SELECT."""
    relation, row_hash = _hashed_rows(source)
    key = exp.column("dbfit_seg", quoted=True)
    query = exp.select(exp.alias_(by.copy(), "dbfit_seg", quoted=True), exp.Count(this=exp.Star()), row_hash)
    found = {
        value: (rows, checksum)
        for value, rows, checksum in engine_for(con).fetch(query.from_(relation).group_by(key))
    }
    return {value: _fingerprint_of(text, *found.get(value, (0, None))) for value, text in sources.items()}


def _hashed_rows(source: str) -> tuple[exp.Expression, exp.Expression]:
    """The source's rows as one struct each, and the sum of their hashes in 128-bit integers."""
    relation = exp.select("*").from_(source_relation(source)).subquery(ROW)
    row_hash = exp.Cast(
        this=exp.Anonymous(this="hash", expressions=[exp.column(ROW, quoted=True)]),
        to=exp.DataType.build("HUGEINT"),
    )
    return relation, exp.Sum(this=row_hash)


def _fingerprint_of(source: str, rows: Any, checksum: Any) -> dict[str, Any]:
    return {
        "source": source,
        "source_rows": int(rows),
        "checksum": None if checksum is None else str(checksum),
    }


def origin_source(options: dict[str, Any], source: str) -> str:
    """The source the user gave: a held-out fit's model source is its training part, the split records the whole."""
    split = options.get("split") or {}
    return split.get("source", source)
