"""The parity report as a person sees it: rendered by headless Chromium (Debian's `chromium`)
through scripts/report_screenshots.py, the screenshot is a real page (tables styled, figures
drawn), not a blank or broken one."""

import importlib.util
from pathlib import Path

import numpy as np
import pytest
import runtime_fixtures as fx

from ganlet.compile.verify import verify, write_html

SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "report_screenshots.py"
PASS_ROW = (0xE6, 0xF4, 0xE6)     # report.py's background of a passing row (tr.pass td)
ORANGE = (255, 127, 14)           # matplotlib's tab:orange, the onnxruntime series


def load_script():
    spec = importlib.util.spec_from_file_location("report_screenshots", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def pixels_near(rgb: np.ndarray, colour, tolerance: int = 6) -> int:
    return int((np.abs(rgb.astype(int) - np.array(colour)).max(axis=2) <= tolerance).sum())


def test_parity_report_renders_as_a_page(tmp_path):
    shots = load_script()
    if shots.find_browser() is None:
        pytest.skip("chromium is not installed (apt-get install -y chromium)")
    bundle = fx.build_bundle(tmp_path / "bundle")
    fx.write_csv(tmp_path / "feed.csv", fx.raw_values(200, anomalies=[(120, 12, 0, 7.0)]))
    page = write_html(verify(bundle, tmp_path / "feed.csv"), tmp_path / "parity.html")

    png = shots.screenshot(page, tmp_path / "parity.png", width=1100, height=6000)
    from PIL import Image  # reference: Pillow decodes the PNG Chromium wrote

    with Image.open(png) as img:
        rgb = np.asarray(img.convert("RGB"))
    height, width, _ = rgb.shape
    print(f"screenshot {width} x {height} px")
    assert width == 1100
    assert 1500 < height < 6000            # the whole report, cut below its end
    assert (rgb < 250).any(axis=2).mean() > 0.03        # ink: not a blank page
    assert pixels_near(rgb, PASS_ROW) > 2000            # the styled pairs table
    assert pixels_near(rgb, ORANGE, 30) > 200           # the embedded figures were drawn
