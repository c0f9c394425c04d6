"""Shared fixtures: a fresh in-memory dbfit connection per test, and loaders for open datasets."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import dbfit


@pytest.fixture
def con():
    connection = dbfit.connect()
    yield connection
    connection.close()


def load_frame(con, name: str, frame: pd.DataFrame) -> None:
    """Copy a pandas frame into a real DuckDB table ``name``."""
    con.register("incoming_frame", frame)
    con.execute(f'CREATE TABLE "{name}" AS SELECT * FROM incoming_frame')
    con.unregister("incoming_frame")


def assert_close(actual, expected, rtol: float, what: str) -> None:
    actual, expected = np.asarray(actual, dtype=float), np.asarray(expected, dtype=float)
    np.testing.assert_allclose(actual, expected, rtol=rtol, atol=0, err_msg=what)


def readme_blocks(heading: str) -> dict[str, list[str]]:
    """The fenced code blocks of one README section (from ``heading`` to the next heading), by language."""
    import re
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    start = text.index(heading + "\n")
    following = re.search(r"^#{1,3} ", text[start + len(heading) :], re.MULTILINE)
    section = text[start : start + len(heading) + (following.start() if following else len(text))]
    blocks: dict[str, list[str]] = {}
    for language, body in re.findall(r"```(\w+)\n(.*?)```", section, re.DOTALL):
        blocks.setdefault(language, []).append(body)
    return blocks


@pytest.fixture
def demo_database(tmp_path, monkeypatch, capsys) -> str:
    """A small demo database (``dbfit demo`` on 20,000 rows) as dbfit_demo.duckdb in the working directory."""
    from dbfit.interfaces.demo import run_demo

    monkeypatch.chdir(tmp_path)
    run_demo("dbfit_demo.duckdb", 20_000, quiet=True)
    capsys.readouterr()
    return "dbfit_demo.duckdb"
