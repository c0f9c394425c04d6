"""Importing dbfit stays light: heavy libraries load at their first use, not at ``import dbfit``."""

from __future__ import annotations

import subprocess
import sys


def test_import_dbfit_does_not_load_scipy() -> None:
    run = subprocess.run(
        [sys.executable, "-c", "import dbfit, sys; print('scipy' in sys.modules)"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert run.returncode == 0, run.stderr
    assert run.stdout.strip() == "False"


def test_a_tail_probability_still_loads_scipy_when_needed() -> None:
    code = (
        "import sys; from dbfit.assessment.metrics import chi_square_tail; "
        "print(round(chi_square_tail(3.841458820694124, 1), 12), 'scipy' in sys.modules)"
    )
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr
    # 3.8415 is the 95 % point of chi-square with 1 degree of freedom (textbook chi-square tables)
    assert run.stdout.split() == ["0.05", "True"]
