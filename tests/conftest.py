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
