"""Facts of the trade about the per-row log loss -[y log p + (1 - y) log(1 - p)] (common practice),
checked on the deviance that dbfit's statistics query returns (deviance = 2 x total log loss for 0/1 targets).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import dbfit


@pytest.fixture
def rows(con):
    con.execute("""CREATE TABLE rows AS SELECT (i % 2)::INTEGER AS y, (i % 2) * 2 - 1.0 AS sign,
                   ((i * 37) % 11) / 11.0 - 0.5 AS x FROM range(60) r(i)""")
    return con


def deviance_at(con, formula: str, start: list[float]) -> float:
    reports: list[dbfit.IterationReport] = []
    dbfit.fit(con, formula, "rows", start=start, max_iter=1, progress=reports.append)
    return reports[0].deviance


def test_loss_is_zero_when_prediction_equals_label(rows):
    # Common practice: log loss 0 when p = y exactly; here p = sigmoid(+/-1000) rounds to the label.
    assert deviance_at(rows, "y ~ sign - 1", [1000.0]) == 0.0


def test_loss_grows_without_bound_towards_the_wrong_extreme(rows):
    # Common practice: the loss of a row goes to infinity as p approaches the wrong label (about |eta| per row).
    losses = [deviance_at(rows, "y ~ sign - 1", [-s]) / 2 for s in (1.0, 10.0, 100.0, 1000.0)]
    assert all(later > earlier for earlier, later in zip(losses, losses[1:]))
    assert losses[-1] == pytest.approx(60 * 1000.0, rel=1e-12)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    a=st.lists(st.floats(-8, 8), min_size=3, max_size=3),
    b=st.lists(st.floats(-8, 8), min_size=3, max_size=3),
)
def test_average_loss_is_convex_in_the_coefficients(rows, a, b):
    # Common practice: the average log loss is convex, so at the midpoint it is at most the average of the ends.
    formula = "y ~ x + sign"
    middle = list((np.array(a) + np.array(b)) / 2)
    ends = (deviance_at(rows, formula, a) + deviance_at(rows, formula, b)) / 2
    assert deviance_at(rows, formula, middle) <= ends + 1e-9 * (1 + abs(ends))
