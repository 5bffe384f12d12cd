"""Screenshots of the demo report at a desktop (1400 px) and a phone (420 px) width in headless
Chromium, to check the page by eye: tables scroll sideways inside their section, figures stay
readable and open at full size.

    python benchmarks/screenshot_report.py                  # small demo, screenshots/ below
    python benchmarks/screenshot_report.py --report DIR     # an existing report folder

Needs the Debian package ``chromium`` (``apt-get install -y chromium``). The screenshots go to
``benchmarks/screenshots/`` (ignored by git); the browser runs with a fresh profile and with
background networking, updates and sync off, so it loads nothing but the page.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
WIDTHS = (1400, 420)
# Tall enough for the whole page at either width; the browser clips what lies below.
HEIGHT = 16000
FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--hide-scrollbars",
)


def browser() -> str:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    sys.exit("headless Chromium not found: apt-get install -y chromium")


def demo_report(folder: Path) -> Path:
    from stackdr.cli import main

    args = ["demo", "--out", str(folder), "--n", "600", "--bootstrap", "50", "--no-progress"]
    if main(args) != 0:
        sys.exit("the demo failed")
    return folder / "report.html"


def screenshot(page: Path, width: int, target: Path) -> Path:
    with tempfile.TemporaryDirectory() as profile:
        subprocess.run(
            [
                browser(),
                *FLAGS,
                f"--user-data-dir={profile}",
                f"--window-size={width},{HEIGHT}",
                f"--screenshot={target}",
                page.resolve().as_uri(),
            ],
            check=True,
            capture_output=True,
            timeout=180,
        )
    return target


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--report", type=Path, help="report folder (default: a fresh demo)")
    parser.add_argument("--out", type=Path, default=HERE / "screenshots", help="image folder")
    args = parser.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    page = args.report / "report.html" if args.report else demo_report(args.out / "demo")
    for width in WIDTHS:
        print(f"wrote {screenshot(page, width, args.out / f'report_{width}px.png')}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
