"""The shape of the code: packages by role with imports only downward, and no import cycle (imports made
inside functions counted). The checker is tests/import_layers.py; DEVELOPERS.md shows how to run it."""

from __future__ import annotations

import subprocess
import sys
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
        "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from dbfit.store.tables import write\n"
    )
    edges = graph(tmp_path)
    assert cycles(edges) == [["dbfit.model.fitted", "dbfit.store.tables"]]
    assert upward_imports(edges) == [("dbfit.model.fitted", "dbfit.store.tables")]


def _run(*command: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", *command], cwd=ROOT, capture_output=True, text=True, timeout=600
    )


def test_lint_and_format_pass_with_the_project_settings():
    # settings in pyproject.toml: line length 110, import sorting, pyflakes, bugbear, pyupgrade
    checked = _run("ruff", "check", "dbfit", "tests")
    assert checked.returncode == 0, checked.stdout[-3000:]
    formatted = _run("ruff", "format", "--check", "dbfit", "tests")
    assert formatted.returncode == 0, formatted.stdout[-3000:]


def test_solver_and_model_packages_type_check_strictly():
    typed = _run("mypy", "dbfit/solver", "dbfit/model")
    assert typed.returncode == 0, typed.stdout[-3000:]
