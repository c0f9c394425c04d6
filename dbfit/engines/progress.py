"""Live progress: the share of rows a running scan has read, from DuckDB's query progress.

On a terminal one line is rewritten in place; elsewhere (a notebook's output cell, a log file) a plain line is
written at most every :data:`PLAIN_LINE_SECONDS`, since carriage returns and erase codes do not render there.
"""

from __future__ import annotations

import math
import sys
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import TextIO

import duckdb

POLL_SECONDS = 0.1
PLAIN_LINE_SECONDS = 2.0


@contextmanager
def watch_scan(
    connection: duckdb.DuckDBPyConnection,
    label: str,
    stream: TextIO | None = None,
    *,
    every: float = PLAIN_LINE_SECONDS,
) -> Iterator[None]:
    """While the body runs a query on ``connection``, show its progress on ``stream``: one line kept up to date
    on a terminal, else a plain line at most every ``every`` seconds."""
    stream = stream or sys.stderr
    is_terminal = getattr(stream, "isatty", lambda: False)()
    finished = threading.Event()
    shown = threading.Event()

    def poll() -> None:
        last_line = -math.inf
        while not finished.wait(POLL_SECONDS):
            try:
                share = connection.query_progress()
            except duckdb.Error:
                return
            if share is None or share < 0:
                continue
            text = f"{label}: {share * 100.0 if share <= 1.0 else share:5.1f}% of rows scanned"
            if is_terminal:
                stream.write(f"\r{text}")
            elif time.monotonic() - last_line >= every:
                stream.write(text + "\n")
                last_line = time.monotonic()
            else:
                continue
            stream.flush()
            shown.set()

    thread = threading.Thread(target=poll, daemon=True)
    thread.start()
    try:
        yield
    finally:
        finished.set()
        thread.join()
        if shown.is_set() and is_terminal:
            stream.write("\r\x1b[2K")
            stream.flush()


@contextmanager
def progress_settings(connection: duckdb.DuckDBPyConnection, *, track: bool = True) -> Iterator[None]:
    """Turn off DuckDB's own printed bar (and, with ``track``, on its progress tracking); restore them after.

    Inside the caller's open transaction nothing is changed: a query failing there would leave DuckDB's
    transaction aborted, and a setting could not be restored until the caller's ROLLBACK.
    """
    from dbfit.engines.transactions import in_transaction

    if in_transaction(connection):
        yield
        return
    names = ("enable_progress_bar", "enable_progress_bar_print")
    before = {
        name: connection.execute(f"SELECT current_setting('{name}')").fetchall()[0][0] for name in names
    }
    connection.execute(f"SET enable_progress_bar = {'true' if track else 'false'}")
    connection.execute("SET enable_progress_bar_print = false")
    try:
        yield
    finally:
        for name, value in before.items():
            connection.execute(f"SET {name} = {'true' if value in (True, 'true') else 'false'}")
