"""Publishing to Spark: a persistent view in the session's catalog that scores a source with plain Spark SQL.

Why a persistent view (``CREATE OR REPLACE VIEW``) rather than a temporary one: a published view is for others
to query (other sessions and jobs, the Thrift server, a BI tool) and lasts as long as the catalog does (a Hive
metastore or another lasting catalog), as a published view does on DuckDB and PostgreSQL; a temporary view is
seen by the session that made it only, and goes with it. Spark lets a persistent view read catalog tables and
views only, so a source that is a temporary view (a DataFrame's ``createOrReplaceTempView``) is refused with
what to do instead.

Spark holds no store of dbfit's: the view is pinned (the version's estimates written in as constants; a live
view would read the store's tables in the same database), and it says what it is in its own table properties
(``dbfit.model``, ``dbfit.version``, ``dbfit.mode`` and ``dbfit.text_sha256``, the SHA-256 of the view's text
as created). Publishing again replaces a view only when those properties are there and the catalog's text of
the view still has that hash (``ALTER VIEW ... AS`` keeps the properties but changes the text); any other
relation of that name is refused unless ``replace=True``.
"""

from __future__ import annotations

import hashlib
from typing import Any

from sqlglot import exp

from dbfit.errors import StoreError

DIALECT = "spark"
TEXT_HASH = "dbfit.text_sha256"


def publish_spark_view(
    session: Any, target: exp.Table, query: exp.Select, record: dict[str, Any], *, replace: bool = False
) -> str:
    """Create or replace the persistent view ``target`` AS ``query`` with dbfit's table properties; return the
    statement run. ``record`` holds the view's ``model``, ``version`` and ``mode``."""
    shown = target.sql(DIALECT)
    if not replace and _exists(session, shown) and not is_published_spark_view(session, target):
        raise StoreError(
            f"view {shown} already exists and was not published by dbfit (or was changed since): choose "
            "another name, or pass replace=True to replace it"
        )
    text = query.sql(DIALECT)
    properties = {
        "dbfit.model": record.get("model") or "",
        "dbfit.version": "" if record.get("version") is None else str(record["version"]),
        "dbfit.mode": record["mode"],
        TEXT_HASH: _sha256(text),
    }
    listed = ", ".join(f"{_literal(k)} = {_literal(v)}" for k, v in properties.items())
    statement = f"CREATE OR REPLACE VIEW {shown} TBLPROPERTIES ({listed}) AS {text}"
    try:
        session.sql(statement)
    except Exception as err:  # pyspark raises its own AnalysisException family
        raise StoreError(_refusal(shown, err)) from None
    return statement


def is_published_spark_view(session: Any, target: exp.Table) -> bool:
    """Whether ``target`` is a view dbfit published in this catalog and nobody has changed since."""
    shown = target.sql(DIALECT)
    properties = _rows(session, f"SHOW TBLPROPERTIES {shown}")
    recorded = dict(properties or []).get(TEXT_HASH)
    if recorded is None:
        return False
    details = dict((row[0], row[1]) for row in _rows(session, f"DESCRIBE TABLE EXTENDED {shown}") or [])
    return details.get("Type") == "VIEW" and _sha256(details.get("View Text") or "") == recorded


def _exists(session: Any, shown: str) -> bool:
    return _rows(session, f"SHOW TBLPROPERTIES {shown}") is not None


def _rows(session: Any, statement: str) -> list[tuple[Any, ...]] | None:
    """The rows of a catalog statement about one relation, or None when there is no such relation."""
    try:
        return [tuple(row) for row in session.sql(statement).collect()]
    except Exception as err:
        if "TABLE_OR_VIEW_NOT_FOUND" in str(err):
            return None
        raise StoreError(f"the Spark catalog could not be read: {_first_line(err)}") from None


def _refusal(shown: str, err: Exception) -> str:
    first = _first_line(err)
    if "INVALID_TEMP_OBJ_REFERENCE" in str(err):
        return (
            f"view {shown} cannot be created: its source reads a temporary view, and Spark lets a persistent "
            "view read catalog tables and views only. Save the rows as a table (DataFrame.write.saveAsTable) "
            "and publish over that, or score them with dbfit.scoring_sql(model, 'spark') in a temporary view "
            f"of your own ({first})"
        )
    return f"view {shown} cannot be created or replaced: {first}"


def _literal(value: str) -> str:
    return exp.Literal.string(value).sql(DIALECT)


def _sha256(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()


def _first_line(err: Exception) -> str:
    return (str(err).strip().splitlines() or [type(err).__name__])[0]
