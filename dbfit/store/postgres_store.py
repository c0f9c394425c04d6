"""The store in a PostgreSQL database, through psycopg: the same tables in schema ``dbfit_store``.

Writes run on a connection of their own, opened with the caller's connection parameters, in one transaction
(the caller's connection and its open transaction are never used for them; PostgreSQL rolls back the
transaction of a client that dies before COMMIT). Writers take turns per model through transaction-level
advisory locks keyed on the model name (``pg_advisory_xact_lock``): the latest version is read only after the
lock is held, so two writers of one model never pick the same version number, and a promotion's check that
the current version is still current runs under the same lock. Creating the tables takes a lock of its own.
Reads run on the caller's connection inside a transaction or, within the caller's open one, a savepoint.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from dbfit.errors import StoreConflictError, StoreError
from dbfit.store.backend import StoreDatabase, columns_of
from dbfit.store.tables import SCHEMA, schema_statements

LOCK_SPACE = "dbfit_store"  # first key of every advisory lock the store takes (hashtext of it)
SCHEMA_LOCK = "dbfit_store.create"  # second key while the tables are created


class PostgresStore(StoreDatabase):
    dialect = "postgres"

    def fetch(self, sql: str, parameters: list[Any] | None = None) -> list[tuple[Any, ...]]:
        return self._read(sql, parameters, lambda cursor: cursor.fetchall() if cursor.description else [])

    def fetch_dicts(self, sql: str, parameters: list[Any]) -> list[dict[str, Any]]:
        def rows(cursor: Any) -> list[dict[str, Any]]:
            names = [d.name for d in cursor.description]
            return [dict(zip(names, row)) for row in cursor.fetchall()]

        return self._read(sql, parameters, rows)

    def _read(self, sql: str, parameters: list[Any] | None, result: Any) -> Any:
        import psycopg
        from psycopg.pq import TransactionStatus

        if self.connection.info.transaction_status == TransactionStatus.INERROR:
            raise StoreError("the connection's open transaction has already failed: roll it back first")
        try:
            with self.connection.transaction(), self.connection.cursor() as cursor:
                cursor.execute(_bound(sql), parameters or None)
                return result(cursor)
        except psycopg.Error as err:
            raise store_error(err) from None

    def tables(self) -> set[str]:
        rows = self.fetch(
            "SELECT table_name FROM information_schema.tables WHERE table_catalog = current_database() "
            "AND table_schema = ?",
            [SCHEMA],
        )
        return {row[0] for row in rows}

    @contextmanager
    def transaction(self, names: list[str]) -> Iterator[StoreDatabase]:
        import psycopg

        try:
            connection = psycopg.connect(_conninfo(self.connection), autocommit=False)
        except psycopg.Error as err:
            raise StoreError(
                f"a second connection for the store's transaction could not be opened: {err}"
            ) from None
        writer = PostgresStore(connection)
        try:
            with connection.transaction():
                if not writer.complete():
                    writer.fetch(
                        "SELECT pg_advisory_xact_lock(hashtext(?), hashtext(?))", [LOCK_SPACE, SCHEMA_LOCK]
                    )
                    for statement in schema_statements(self.dialect):
                        writer.fetch(statement)
                for name in sorted(set(names)):  # one order for every writer: no deadlock between them
                    writer.fetch("SELECT pg_advisory_xact_lock(hashtext(?), hashtext(?))", [LOCK_SPACE, name])
                yield writer
        except psycopg.Error as err:
            raise store_error(err) from None
        finally:
            connection.close()

    def insert(self, table: str, columns: dict[str, list[Any]]) -> None:
        import psycopg
        from psycopg import sql

        data = dict(columns_of(columns))
        if not data:
            return
        statement = sql.SQL("COPY {}.{} ({}) FROM STDIN").format(
            sql.Identifier(SCHEMA), sql.Identifier(table), sql.SQL(", ").join(map(sql.Identifier, data))
        )
        try:
            with self.connection.cursor() as cursor, cursor.copy(statement) as copy:
                for row in zip(*data.values()):
                    copy.write_row(row)
        except psycopg.Error as err:
            raise store_error(err) from None

    def in_list(self, column: str) -> str:
        return f"{column} = ANY(?::text[])"

    def view_text(self, database: str, schema: str, view: str) -> str | None:
        rows = self.fetch(
            "SELECT pg_get_viewdef(c.oid) FROM pg_catalog.pg_class c JOIN pg_catalog.pg_namespace n "
            "ON n.oid = c.relnamespace WHERE c.relkind = 'v' AND lower(current_database()) = lower(?) "
            "AND lower(n.nspname) = lower(?) AND lower(c.relname) = lower(?)",
            [database, schema, view],
        )
        return rows[0][0] if rows else None

    def create_view(self, statement: str, shown: str) -> None:
        import psycopg

        try:
            with self.connection.transaction(), self.connection.cursor() as cursor:
                cursor.execute(statement)
        except psycopg.Error as err:
            first = (str(err).strip().splitlines() or [type(err).__name__])[0]
            raise StoreError(f"view {shown} cannot be created or replaced: {first}") from None


def _bound(sql: str) -> str:
    """The store's ``?`` parameters in psycopg's spelling (the store's SQL has no ``%``, no ``?`` in text)."""
    return sql.replace("?", "%s")


def _conninfo(connection: Any) -> str:
    """The parameters the caller's connection was opened with (libpq's own record of them), as a conninfo."""
    from psycopg.conninfo import make_conninfo

    given = {
        option.keyword.decode(): option.val.decode()
        for option in connection.pgconn.info
        if option.val is not None and option.keyword.decode() != "replication"
    }
    return make_conninfo(**given)


def store_error(err: Exception) -> StoreError:
    """A PostgreSQL error met while reading or writing the store, in plain words."""
    import psycopg.errors as errors

    first = (str(err).strip().splitlines() or [type(err).__name__])[0]
    if isinstance(err, errors.UniqueViolation):
        return StoreConflictError(
            f"the model store already holds a row with this key (written by another connection "
            f"meanwhile, or left there by hand): {first}"
        )
    if isinstance(err, (errors.SerializationFailure, errors.DeadlockDetected, errors.LockNotAvailable)):
        return StoreConflictError(
            f"another connection wrote to the model store at the same time; retry ({first})"
        )
    if isinstance(err, errors.ReadOnlySqlTransaction):
        return StoreError(f"the database is open read-only, so the model store cannot be written ({first})")
    if isinstance(err, errors.InsufficientPrivilege):
        return StoreError(
            f"this PostgreSQL role may not use the model store (schema {SCHEMA}): grant it the privileges "
            f"({first})"
        )
    return StoreError(f"the model store could not be used: {first}")
