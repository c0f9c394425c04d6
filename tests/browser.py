"""Headless Chromium for the HTML report: find it, dump a page's DOM after load, take a screenshot.

Used by the report tests and by ``python tests/browser.py --screenshot``. Each run gets a fresh profile folder
and the switches that keep Chromium off the network (no sync, no component updates, no background traffic).
"""

from __future__ import annotations

import shutil
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

from dbfit.errors import DbfitError

NAMES = ("chromium", "chromium-browser")
QUIET_SWITCHES = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-default-apps",
    "--disable-extensions",
    "--hide-scrollbars",
    "--host-resolver-rules=MAP * ~NOTFOUND",  # no host name resolves: a page that reaches out fails visibly
)


def find_chromium() -> str | None:
    """The path of a Chromium executable on PATH, or None."""
    for name in NAMES:
        found = shutil.which(name)
        if found:
            return found
    return None


@dataclass
class PageRun:
    """What one headless run left: the page's DOM (for ``--dump-dom``) and Chromium's log lines."""

    dom: str
    log: str

    def console_lines(self) -> list[str]:
        """Log lines written by the page's console or by uncaught errors."""
        return [line for line in self.log.splitlines() if ":CONSOLE" in line or "Uncaught" in line]


def run_page(page: Path, *switches: str, timeout: float = 90.0) -> PageRun:
    """Open ``page`` in headless Chromium with ``switches`` and return its output and log."""
    executable = find_chromium()
    if executable is None:
        raise DbfitError("Chromium was not found on PATH; on Debian: apt-get install -y chromium")
    with tempfile.TemporaryDirectory(prefix="dbfit-chromium-") as profile:
        command = [
            executable,
            *QUIET_SWITCHES,
            f"--user-data-dir={profile}",
            "--enable-logging=stderr",
            "--v=0",
            *switches,
            Path(page).resolve().as_uri(),
        ]
        done = subprocess.run(command, capture_output=True, text=True, timeout=timeout, check=False)
    if done.returncode != 0:
        raise DbfitError(f"Chromium exited with status {done.returncode}: {done.stderr[-2000:]}")
    return PageRun(done.stdout, done.stderr)


def dump_dom(page: Path) -> PageRun:
    """The DOM of ``page`` after its load event (scripts in the page have run)."""
    return run_page(page, "--dump-dom")


def screenshot(page: Path, png: Path, width: int = 1100, height: int = 3600) -> Path:
    """A PNG of ``page`` rendered in a ``width`` x ``height`` window."""
    png = Path(png).resolve()
    run_page(page, f"--screenshot={png}", f"--window-size={width},{height}")
    if not png.exists():
        raise DbfitError(f"Chromium did not write the screenshot {png}")
    return png


def main(argv: list[str] | None = None) -> int:
    """``python tests/browser.py --screenshot report.html out.png``: render a written report to a PNG."""
    import argparse

    parser = argparse.ArgumentParser(prog="python tests/browser.py", description="Screenshot a dbfit report.")
    parser.add_argument("--screenshot", nargs=2, metavar=("REPORT_HTML", "OUT_PNG"), required=True)
    parser.add_argument("--width", type=int, default=1100)
    parser.add_argument("--height", type=int, default=3600)
    args = parser.parse_args(argv)
    print(screenshot(Path(args.screenshot[0]), Path(args.screenshot[1]), args.width, args.height))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
