"""Render ganlet's HTML reports to PNG in headless Chromium, to look at them as a person does.

    python scripts/report_screenshots.py parity.html detection.html [--out DIR] [--width 1280]

Each page is shot in a tall window (the whole report in one image), then the blank strip below
the page's end is cut off. Uses Debian's `chromium` (apt-get install -y chromium) with a fresh
profile per shot and no background network traffic; nothing is downloaded.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Optional, Sequence

import numpy as np

BROWSERS = ("chromium", "chromium-browser")
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run",
         "--disable-dev-shm-usage", "--hide-scrollbars", "--force-device-scale-factor=1")
TIMEOUT_S = 180


def find_browser() -> Optional[str]:
    return next((path for path in map(shutil.which, BROWSERS) if path), None)


def screenshot(html: Path, png: Path, width: int = 1280, height: int = 8000,
               browser: Optional[str] = None) -> Path:
    """One page -> one PNG of `width` pixels, cut below the page's last non-white row."""
    browser = browser or find_browser()
    if browser is None:
        raise RuntimeError("no chromium found: apt-get install -y chromium")
    png = Path(png).resolve()
    png.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(prefix="ganlet-chromium-") as profile:
        cmd = [browser, *FLAGS, f"--user-data-dir={profile}", f"--screenshot={png}",
               f"--window-size={width},{height}", Path(html).resolve().as_uri()]
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=TIMEOUT_S)
    if proc.returncode != 0 or not png.is_file():
        last = (proc.stderr.strip().splitlines() or ["(no message)"])[-1]
        raise RuntimeError(f"chromium failed on {html} ({proc.returncode}): {last}")
    crop_blank_bottom(png)
    return png


def crop_blank_bottom(png: Path, margin: int = 24) -> None:
    """Cut the white strip below the page's content (the window is taller than the page)."""
    from PIL import Image

    with Image.open(png) as img:
        rgb = np.asarray(img.convert("RGB"))
    inked = np.flatnonzero((rgb < 250).any(axis=(1, 2)))
    if len(inked):
        bottom = min(rgb.shape[0], int(inked[-1]) + margin)
        Image.fromarray(rgb[:bottom]).save(png)


def main(argv: Optional[Sequence[str]] = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("reports", nargs="+", type=Path, help="HTML report files")
    p.add_argument("--out", type=Path, help="folder for the PNGs (default: beside each report)")
    p.add_argument("--width", type=int, default=1280)
    p.add_argument("--height", type=int, default=8000, help="window height before cropping")
    args = p.parse_args(argv)
    for html in args.reports:
        png = (args.out or html.parent) / (html.stem + ".png")
        try:
            screenshot(html, png, args.width, args.height)
        except (RuntimeError, subprocess.TimeoutExpired) as exc:
            sys.stderr.write(f"error: {exc}\n")
            return 1
        print(png)
    return 0


if __name__ == "__main__":
    sys.exit(main())
