"""A source's fingerprint: its row count and a checksum of its rows, both computed in the database.

The checksum is the sum of DuckDB's ``hash`` of each whole row (as a struct) in 128-bit integers, so it does not
depend on the row order; appending, deleting or changing a row changes it (barring a hash collision).
"""

from __future__ import annotations

from typing import Any

from sqlglot import exp

from dbfit.engine import DuckDBEngine
from dbfit.source import source_relation

ROW = "dbfit_row"


def fingerprint(con: Any, source: str) -> dict[str, Any]:
    """``{"source", "source_rows", "checksum"}`` of ``source``; the checksum as text (it exceeds 64 bits)."""
    relation = exp.select("*").from_(source_relation(source)).subquery(ROW)
    row_hash = exp.Cast(this=exp.Anonymous(this="hash", expressions=[exp.column(ROW, quoted=True)]),
                        to=exp.DataType.build("HUGEINT"))
    rows, checksum = DuckDBEngine(con).fetch(exp.select(exp.Count(this=exp.Star()), exp.Sum(this=row_hash)).from_(relation))[0]
    return {"source": source, "source_rows": int(rows), "checksum": None if checksum is None else str(checksum)}


def segment_fingerprints(con: Any, source: str, by: exp.Expression, sources: dict[Any, str]) -> dict[Any, dict[str, Any]]:
    """The fingerprint of each segment's rows (``sources``: segment value -> its SELECT), all from one grouped scan;
    each equals :func:`fingerprint` of that segment's SELECT."""
    relation = exp.select("*").from_(source_relation(source)).subquery(ROW)
    row_hash = exp.Cast(this=exp.Anonymous(this="hash", expressions=[exp.column(ROW, quoted=True)]),
                        to=exp.DataType.build("HUGEINT"))
    query = exp.select(exp.alias_(by.copy(), "dbfit_seg", quoted=True), exp.Count(this=exp.Star()),
                       exp.Sum(this=row_hash)).from_(relation).group_by(exp.column("dbfit_seg", quoted=True))
    found = {value: (rows, checksum) for value, rows, checksum in DuckDBEngine(con).fetch(query)}
    return {value: {"source": text, "source_rows": int(found.get(value, (0, None))[0]),
                    "checksum": None if found.get(value, (0, None))[1] is None else str(found[value][1])}
            for value, text in sources.items()}


def origin_source(options: dict[str, Any], source: str) -> str:
    """The source the user gave: a held-out fit's model source is its training part, the split records the whole."""
    split = options.get("split") or {}
    return split.get("source", source)
