"""One argument order: model name, then formula, then source, then what the call creates; ``version`` by keyword.

The spellings of the earlier release keep working for one release with a DeprecationWarning (Python) or a
``note`` (SQL). Data: the Spector and Mazzeo grade data as shipped by statsmodels (``sm.datasets.spector``).
"""

from __future__ import annotations

import inspect
import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from conftest import load_frame

import dbfit

FORMULA = "GRADE ~ GPA + TUCE + PSI"


@pytest.fixture
def spector(con):
    load_frame(con, "spector", sm.datasets.spector.load_pandas().data)
    dbfit.fit(con, FORMULA, "spector", name="grades", progress=False)
    return con


def _no_warning(call):
    with warnings.catch_warnings():
        warnings.simplefilter("error", DeprecationWarning)
        return call()


def _view_scores(con, view: str) -> list[float]:
    return [p for (p,) in con.execute(f'SELECT probability FROM "{view}" ORDER BY GPA, TUCE, PSI').fetchall()]


def test_publish_takes_the_source_then_the_view(spector) -> None:
    made = _no_warning(lambda: dbfit.publish(spector, "grades", "spector", "grade_scores"))
    assert made["view"] == '"grade_scores"'
    again = _no_warning(
        lambda: dbfit.publish(spector, "grades", "spector", "grade_scores")
    )  # dbfit's own view
    assert again["view"] == '"grade_scores"'
    _no_warning(lambda: dbfit.publish(spector, "grades", view="by_keyword", source="spector"))
    _no_warning(lambda: dbfit.publish(spector, "grades", None, "fitted_source"))
    assert _view_scores(spector, "by_keyword") == _view_scores(spector, "grade_scores")
    assert _view_scores(spector, "fitted_source") == _view_scores(spector, "grade_scores")


def test_publish_in_the_earlier_order_warns_and_still_works(spector) -> None:
    _no_warning(lambda: dbfit.publish(spector, "grades", "spector", "today"))
    with pytest.warns(DeprecationWarning, match=r"publish\(con, model, source, view\)"):
        made = dbfit.publish(
            spector, "grades", "earlier", "spector"
        )  # view first: 'earlier' is no relation yet
    assert made["view"] == '"earlier"'
    with pytest.warns(DeprecationWarning):
        dbfit.publish(spector, "grades", "earlier", "spector")  # now a view dbfit published: still the view
    with pytest.warns(DeprecationWarning):
        dbfit.publish(spector, "grades", "only_view")  # three positionals: the view, on the fitted source
    with pytest.warns(DeprecationWarning):
        dbfit.publish(spector, "grades", "view_then_keyword", source="spector")
    for view in ("earlier", "only_view", "view_then_keyword"):
        assert _view_scores(spector, view) == _view_scores(spector, "today")
    tables = {name for (name,) in spector.execute("SELECT table_name FROM duckdb_tables()").fetchall()}
    assert "spector" in tables  # never replaced by a view


def test_publish_refuses_the_source_or_view_twice(spector) -> None:
    with pytest.raises(dbfit.DbfitError, match="once each"):
        dbfit.publish(spector, "grades", "spector", "v", view="w")
    with pytest.raises(dbfit.DbfitError, match="needs the name of the view"):
        dbfit.publish(spector, "grades", source="spector")


def test_publish_segments_takes_the_source_then_the_view(con) -> None:
    frame = sm.datasets.spector.load_pandas().data
    load_frame(con, "spector", frame)
    dbfit.fit(con, "GRADE ~ GPA + TUCE", "spector", name="by_psi", by="PSI", progress=False)
    made = _no_warning(lambda: dbfit.publish_segments(con, "by_psi", "spector", "psi_scores"))
    assert made["segments"] == 2
    with pytest.warns(DeprecationWarning, match=r"publish_segments\(con, model, source, view\)"):
        dbfit.publish_segments(con, "by_psi", "psi_scores_earlier", "spector")
    assert _view_scores(con, "psi_scores_earlier") == _view_scores(con, "psi_scores")


def test_sql_fit_takes_the_formula_then_the_source(spector) -> None:
    today = spector.execute(
        f"SELECT term, estimate, note FROM dbfit.fit('sql_grades', '{FORMULA}', 'spector')"
    ).fetchall()
    assert [note for *_, note in today] == [None] * 4
    earlier = spector.execute(
        f"SELECT term, estimate, note FROM dbfit.fit('sql_grades', 'spector', '{FORMULA}')"
    ).fetchall()
    assert [row[:2] for row in earlier] == [row[:2] for row in today]
    assert all("deprecated" in note and "dbfit.fit(model, formula, source)" in note for *_, note in earlier)
    query = "SELECT * FROM spector WHERE PSI IN (0, 1)"
    from_query = spector.execute(f"SELECT estimate FROM dbfit.fit('q', '{FORMULA}', '{query}')").fetchall()
    assert np.allclose([e for (e,) in from_query], [e for _, e, _ in today], rtol=1e-12, atol=0)


def test_sql_fit_in_the_earlier_order_with_segments_notes_every_row(spector) -> None:
    rows = spector.execute(
        "SELECT segment, note FROM dbfit.fit('seg', 'spector', 'GRADE ~ GPA', by := 'PSI')"
    ).fetchall()
    assert {float(segment) for segment, _ in rows} == {0.0, 1.0}
    assert all(note.startswith("deprecated") for _, note in rows)


def test_drift_is_the_python_name_of_population_stability(spector) -> None:
    today = _no_warning(lambda: dbfit.drift(spector, "grades", "spector")).to_pylist()
    sql = spector.sql("SELECT * FROM dbfit.drift('grades', 'spector')").to_arrow_table().to_pylist()
    assert today == sql
    with pytest.warns(DeprecationWarning, match=r"dbfit\.drift"):
        earlier = dbfit.population_stability(spector, "grades", "spector").to_pylist()
    assert earlier == today


def test_version_is_keyword_only_and_the_positional_version_warns(spector) -> None:
    dbfit.fit(spector, "GRADE ~ GPA", "spector", name="grades", progress=False)
    for function in (
        dbfit.load,
        dbfit.drop_model,
        dbfit.promote,
        dbfit.publish,
        dbfit.score,
        dbfit.assess,
        dbfit.assessment_tables,
        dbfit.drift,
    ):
        kind = inspect.signature(function).parameters["version"].kind
        assert kind is inspect.Parameter.KEYWORD_ONLY, function.__name__
    first = _no_warning(lambda: dbfit.load(spector, "grades", version=1))
    with pytest.warns(DeprecationWarning, match="version=..."):
        assert dbfit.load(spector, "grades", 1).labels == first.labels
    with pytest.warns(DeprecationWarning):
        assert dbfit.promote(spector, "grades", 1, force=True)["decision"] == "promoted"
    assert dbfit.load(spector, "grades").version == 1
    with pytest.warns(DeprecationWarning):
        assert dbfit.drop_model(spector, "grades", 2) == [("grades", 2)]
    assert _no_warning(lambda: dbfit.drop_model(spector, "grades", version=1)) == [("grades", 1)]


def test_fit_says_it_returns_a_model_or_a_segmented_fit() -> None:
    assert inspect.signature(dbfit.fit).return_annotation == "Model | SegmentedFit"
