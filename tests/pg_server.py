"""A throwaway PostgreSQL server for the tests: initdb in a temporary directory, start on a free loopback port.

PostgreSQL refuses to run as root, so under root the binaries run as the ``postgres`` system user through
runuser, in a directory of our own under /tmp (pytest's tmp_path is not readable by that user).
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

RUNUSER = "/usr/sbin/runuser"


def find_binaries() -> Path | None:
    """The newest installed PostgreSQL bin directory holding initdb and pg_ctl, if any."""

    def major(path: str) -> int:
        name = Path(path).parent.name
        return int(name) if name.isdigit() else -1

    candidates = sorted(glob.glob("/usr/lib/postgresql/*/bin"), key=major, reverse=True)
    found = [Path(c) for c in candidates if (Path(c) / "initdb").exists() and (Path(c) / "pg_ctl").exists()]
    if not found and shutil.which("initdb") and shutil.which("pg_ctl"):
        return Path(shutil.which("initdb")).parent
    return found[0] if found else None


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@contextmanager
def running_server(binaries: Path) -> Iterator[dict[str, object]]:
    """Start a server and yield psycopg connection keywords; stop it and delete its files afterwards."""
    root = Path(tempfile.mkdtemp(prefix="dbfit-pg-", dir="/tmp"))
    as_root = os.geteuid() == 0
    prefix = [RUNUSER, "-u", "postgres", "--"] if as_root else []
    user = "postgres" if as_root else pwd.getpwuid(os.geteuid()).pw_name
    if as_root:
        account = pwd.getpwnam("postgres")
        os.chown(root, account.pw_uid, account.pw_gid)
    data, log, port = root / "data", root / "server.log", free_port()

    def run(*command: str) -> None:
        subprocess.run(prefix + list(command), check=True, capture_output=True, timeout=120)

    run(
        str(binaries / "initdb"), "-D", str(data), "-U", user, "-A", "trust", "--locale=C.UTF-8", "-E", "UTF8"
    )
    options = f"-p {port} -c listen_addresses=127.0.0.1 -k {root} -c fsync=off"
    run(str(binaries / "pg_ctl"), "-D", str(data), "-l", str(log), "-o", options, "-w", "start")
    try:
        yield {"host": "127.0.0.1", "port": port, "user": user, "dbname": "postgres"}
    finally:
        subprocess.run(
            prefix + [str(binaries / "pg_ctl"), "-D", str(data), "-m", "fast", "-w", "stop"],
            capture_output=True,
            timeout=120,
        )
        shutil.rmtree(root, ignore_errors=True)


@contextmanager
def server_or_skip() -> Iterator[dict[str, object]]:
    """``running_server`` on the installed binaries; the test is skipped as an engine test (a failure under
    ``DBFIT_REQUIRE_ENGINES=1``, see conftest) when psycopg or PostgreSQL is missing."""
    from conftest import import_engine_module, skip_engine

    import_engine_module("psycopg")
    binaries = find_binaries()
    if binaries is None:
        skip_engine("PostgreSQL server binaries (initdb, pg_ctl) are not installed")
    with running_server(binaries) as keywords:
        yield keywords


@contextmanager
def fresh_database(keywords: dict[str, object], name: str) -> Iterator[dict[str, object]]:
    """A new empty database ``name`` on the server of ``keywords`` (its keywords yielded), dropped after."""
    import psycopg
    from psycopg import sql

    with psycopg.connect(**keywords, autocommit=True) as admin:
        admin.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(sql.Identifier(name)))
        admin.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))
    try:
        yield {**keywords, "dbname": name}
    finally:
        with psycopg.connect(**keywords, autocommit=True) as admin:
            admin.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(sql.Identifier(name)))


@contextmanager
def superuser_connection() -> Iterator[object]:
    """An autocommit psycopg connection, as the superuser that initdb made, to a server started for the caller;
    skips the test when psycopg or the PostgreSQL binaries are absent."""
    import psycopg

    with server_or_skip() as keywords, psycopg.connect(**keywords, autocommit=True) as connection:
        yield connection
