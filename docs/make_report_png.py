"""Regenerate ``docs/report.png``: run the demo, then screenshot its report with Chromium.

Usage (from the repository root, in the project's virtual environment)::

    python docs/make_report_png.py                  # the demo with its default settings
    python docs/make_report_png.py --sims 20        # quicker
    python docs/make_report_png.py --release DIR    # screenshot an existing release instead

Needs a Chromium or Chrome binary on the PATH (``apt-get install -y chromium``). The page
is rendered headless at ``--window-size``, then scaled to ``--width`` pixels with Pillow.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

from PIL import Image

BROWSERS = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--no-first-run", "--hide-scrollbars", "--force-device-scale-factor=1")
DOCS = Path(__file__).resolve().parent


def find_browser() -> str:
    """Path of the first Chromium-like browser on the PATH."""
    for name in BROWSERS:
        path = shutil.which(name)
        if path:
            return path
    raise SystemExit("No Chromium found on the PATH; install it (apt-get install -y chromium) "
                     "and run this script again.")


def run_demo(folder: Path, sims: int) -> Path:
    """Run ``coldindex demo`` into ``folder`` and return the release's report.html."""
    subprocess.run([sys.executable, "-m", "coldindex.cli", "demo", str(folder), "--sims",
                    str(sims)], check=True, stdout=subprocess.DEVNULL)
    return folder / "release" / "release-1" / "report.html"


def screenshot(report: Path, out: Path, window: tuple[int, int], width: int) -> None:
    """Render ``report`` headless, scale the picture to ``width`` pixels and write ``out``."""
    browser = find_browser()
    with tempfile.TemporaryDirectory() as tmp:
        shot = Path(tmp) / "shot.png"
        subprocess.run([browser, *FLAGS, f"--screenshot={shot}",
                        f"--window-size={window[0]},{window[1]}", report.resolve().as_uri()],
                       check=True, timeout=180, stdout=subprocess.DEVNULL,
                       stderr=subprocess.DEVNULL)
        with Image.open(shot) as im:
            rgb = im.convert("RGB")
            height = round(rgb.height * width / rgb.width)
            rgb.resize((width, height), Image.Resampling.LANCZOS).save(out, optimize=True)


def main(argv: list[str] | None = None) -> int:
    """Entry point."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sims", type=int, default=200, help="simulations a year for the demo")
    parser.add_argument("--release", type=Path, help="an existing release folder to show")
    parser.add_argument("--out", type=Path, default=DOCS / "report.png")
    parser.add_argument("--window-size", default="1100,1340", help="browser window WIDTH,HEIGHT")
    parser.add_argument("--width", type=int, default=800, help="width of the written picture")
    args = parser.parse_args(argv)
    w, h = (int(v) for v in args.window_size.split(","))
    with tempfile.TemporaryDirectory() as tmp:
        report = (args.release / "report.html" if args.release
                  else run_demo(Path(tmp) / "demo", args.sims))
        screenshot(report, args.out, (w, h), args.width)
    sys.stdout.write(f"Wrote {args.out}\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
