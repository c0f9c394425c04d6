"""The shape of the code: packages by role with imports only downward, and no import cycle (imports made
inside functions counted). The checker is tests/import_layers.py; DEVELOPERS.md shows how to run it."""

from __future__ import annotations

from pathlib import Path

from import_layers import LAYERS, cycles, graph, upward_imports

ROOT = Path(__file__).resolve().parent.parent


def test_the_package_has_no_import_cycle_and_no_upward_import():
    edges = graph(ROOT)
    assert len(edges) > 50  # every module was read
    assert cycles(edges) == []
    assert upward_imports(edges) == []


def test_every_package_of_dbfit_is_a_layer():
    packages = {p.name for p in (ROOT / "dbfit").iterdir() if p.is_dir() and (p / "__init__.py").exists()}
    assert packages == set(LAYERS) - {"errors"}


def test_the_checker_finds_a_cycle_made_inside_a_function_and_an_upward_import(tmp_path):
    package = tmp_path / "dbfit"
    for folder in ("model", "store"):
        (package / folder).mkdir(parents=True)
        (package / folder / "__init__.py").write_text("")
    (package / "__init__.py").write_text("")
    (package / "model" / "fitted.py").write_text("def save():\n    from dbfit.store.tables import write\n")
    (package / "store" / "tables.py").write_text("from dbfit.model.fitted import save\n")
    (package / "model" / "hints.py").write_text(
        "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from dbfit.store.tables import write\n")
    edges = graph(tmp_path)
    assert cycles(edges) == [["dbfit.model.fitted", "dbfit.store.tables"]]
    assert upward_imports(edges) == [("dbfit.model.fitted", "dbfit.store.tables")]
