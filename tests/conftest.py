"""Shared fixtures: a fresh in-memory dbfit connection per test, one PostgreSQL server and one local Spark
session per test session, loaders for open datasets, and the rule that makes an engine test's skip a failure
in CI.

With ``DBFIT_REQUIRE_ENGINES=1`` (``.ci/run`` sets it) a test skipped because PostgreSQL, psycopg, PySpark
or Java is missing fails instead, with the skip's reason; without it such tests are skipped, so a developer
without Java can still run the rest.
"""

from __future__ import annotations

import importlib
import os
import shutil
from types import ModuleType

import numpy as np
import pandas as pd
import pytest

import dbfit

REQUIRE_ENGINES = "DBFIT_REQUIRE_ENGINES"


class EngineMissing(pytest.skip.Exception):  # type: ignore[misc, name-defined]
    """A skip because an engine (PostgreSQL, Spark) or what it needs is not installed here."""


def skip_engine(reason: str) -> None:
    """Skip the test because an engine is missing (a failure when ``DBFIT_REQUIRE_ENGINES=1``)."""
    raise EngineMissing(reason)


def import_engine_module(name: str) -> ModuleType:
    """``name`` imported, or the test skipped as an engine test."""
    try:
        return importlib.import_module(name)
    except ImportError as err:
        skip_engine(f"could not import {name!r}: {err}")
        raise


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_makereport(item, call):
    outcome = yield
    report = outcome.get_result()
    if (
        report.skipped
        and call.excinfo is not None
        and call.excinfo.errisinstance(EngineMissing)
        and os.environ.get(REQUIRE_ENGINES) == "1"
    ):
        report.outcome = "failed"
        report.longrepr = f"{REQUIRE_ENGINES}=1 and this engine test cannot run: {call.excinfo.value.msg}"


@pytest.fixture
def con():
    connection = dbfit.connect()
    yield connection
    connection.close()


@pytest.fixture(scope="session")
def pg_server():
    """psycopg keywords of the one PostgreSQL server of this test session (database ``postgres``)."""
    from pg_server import server_or_skip

    with server_or_skip() as keywords:
        yield keywords


@pytest.fixture(scope="session")
def spark_session():
    """The one local Spark session (``local[2]``) of this test session; stopped at its end."""
    import_engine_module("pyspark")
    if shutil.which("java") is None:
        skip_engine("no Java runtime for Spark")
    os.environ.setdefault("SPARK_LOCAL_IP", "127.0.0.1")
    from pyspark.sql import SparkSession

    session = (
        SparkSession.builder.master("local[2]")
        .appName("dbfit-tests")
        .config("spark.ui.enabled", "false")
        .config("spark.sql.shuffle.partitions", "2")
        .getOrCreate()
    )
    yield session
    session.stop()


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
