"""Progress on a terminal: a live share of rows scanned per pass, and nothing when quiet or not on a terminal."""

from __future__ import annotations

import os
import pty
import subprocess
import sys

SCRIPT = """
import dbfit
con = dbfit.connect()
con.execute("CREATE TABLE t AS SELECT (hash(i) % 7 < 3)::INTEGER AS y, (hash(i, 1) % 1000) / 1000.0 AS x,"
            " (hash(i, 2) % 1000) / 1000.0 AS z FROM range(3000000) r(i)")
dbfit.fit(con, "y ~ x + z + x * z + ln(1 + x) + sqrt(z) + x * x + z * z + exp(x) + exp(z)", "t", progress={progress})
"""


def run_on_terminal(progress: str) -> str:
    leader, follower = pty.openpty()
    process = subprocess.Popen(
        [sys.executable, "-c", SCRIPT.format(progress=progress)], stderr=follower, stdout=subprocess.DEVNULL
    )
    os.close(follower)
    chunks = []
    while True:
        try:
            data = os.read(leader, 4096)
        except OSError:
            break
        if not data:
            break
        chunks.append(data)
    process.wait(timeout=300)
    os.close(leader)
    assert process.returncode == 0
    return b"".join(chunks).decode(errors="replace")


def test_terminal_shows_passes_and_rows_scanned():
    text = run_on_terminal("None")
    assert "dbfit pass 1: deviance" in text
    assert "% of rows scanned" in text


def test_quiet_on_a_terminal_prints_nothing():
    assert run_on_terminal("False") == ""


def test_default_off_a_terminal_prints_nothing():
    done = subprocess.run(
        [sys.executable, "-c", SCRIPT.format(progress="None")], capture_output=True, text=True, timeout=300
    )
    assert done.returncode == 0 and done.stderr == ""
