"""A bundle built here runs, and scores the same, on real gateway interpreters (issue 12).

References outside the project: Debian bookworm's own arm64 `python3.11` and `python3-numpy`
packages run under qemu-user-static (a Cortex-A53 model), and CPython 3.9 with numpy 1.19.5
from PyPI, the oldest the board profiles promise. Each is built once per machine by
scripts/gateway_*.sh (see tests/gateways.py); one that cannot be built here is skipped with
the builder's reason.
"""

import csv
import json
import platform
import subprocess

import numpy as np
import pytest
import runtime_fixtures as fx
from gateways import gateway, skip_reason

from ganlet.runtime.events import read_provenance
from ganlet.runtime.manifest import load_bundle

N_ROWS = 200  # emulation is slow: keep the feed short
OTHER_GATEWAYS = ("py39-numpy1.19", "arm64-debian")
RUN_TIMEOUT_S = 600


@pytest.fixture(scope="module")
def bundle_and_feed(tmp_path_factory):
    folder = tmp_path_factory.mktemp("gateways")
    bundle = fx.build_bundle(folder / "bundle")
    feed = folder / "feed.csv"
    # one injected fault so the scores span normal and anomalous windows; the vibration
    # transmitter silent on rows 40-89, so the blank-cell path (runtime/blanks.py) runs too
    fx.write_csv(feed, fx.raw_values(N_ROWS, anomalies=[(120, 12, 0, 7.0)]))
    fx.blank_out(feed, range(40, 90), channel=2)
    return bundle, feed


def run_bundle(gw, bundle, *args, cwd):
    return subprocess.run([*gw.argv_prefix, str(bundle / "run.py"), *args], env=gw.env,
                          cwd=cwd, capture_output=True, text=True, timeout=RUN_TIMEOUT_S,
                          stdin=subprocess.DEVNULL)


def check_and_stream(gw, bundle, feed, out_dir):
    """`run.py check`, then `run.py stream` on the feed; returns the scores CSV rows."""
    out_dir.mkdir(parents=True, exist_ok=True)
    check = run_bundle(gw, bundle, "check", cwd=out_dir)
    assert check.returncode == 0 and "bundle OK" in check.stdout, check.stderr
    scores = out_dir / "scores.csv"
    stream = run_bundle(gw, bundle, "stream", "--input", str(feed), "--scores-out", str(scores),
                        "--backend", "numpy", cwd=out_dir)
    assert stream.returncode == 0, stream.stderr
    with open(scores, newline="") as fh:
        # reference: the standard csv module, past the `#` provenance lines
        rows = list(csv.DictReader(line for line in fh if not line.startswith("#")))
    assert len(rows) == (N_ROWS - 16) // 4 + 1  # one score per hop (fixture: window 16, hop 4)
    check_provenance(gw, bundle, scores)
    return rows


def check_provenance(gw, bundle, scores):
    """The scores file says which interpreter on which machine produced it."""
    with open(scores, "rb") as fh:
        said = read_provenance(fh)
    assert said["bundle_id"] == load_bundle(bundle).bundle_id
    assert said["python"] == gw.python_version and said["numpy"] == gw.numpy_version
    # qemu-aarch64 reports the emulated machine (uname -m of Linux arm64: aarch64)
    assert said["machine"] == ("aarch64" if gw.name == "arm64-debian" else platform.machine())


@pytest.fixture(scope="module")
def host_rows(bundle_and_feed, tmp_path_factory):
    bundle, feed = bundle_and_feed
    return check_and_stream(gateway("host"), bundle, feed, tmp_path_factory.mktemp("host"))


@pytest.mark.slow
@pytest.mark.parametrize("name", OTHER_GATEWAYS)
def test_bundle_scores_like_the_host(name, bundle_and_feed, host_rows, tmp_path):
    gw = gateway(name)
    if gw is None:
        pytest.skip(skip_reason(name))
    bundle, feed = bundle_and_feed
    rows = check_and_stream(gw, bundle, feed, tmp_path)

    assert [r["time"] for r in rows] == [r["time"] for r in host_rows]
    assert [r["alert"] for r in rows] == [r["alert"] for r in host_rows]
    got = np.array([float(r["score"]) for r in rows])
    want = np.array([float(r["score"]) for r in host_rows])
    manifest = json.loads((bundle / "manifest.json").read_text())
    tolerance = manifest["parity"]["tolerances"]["score_rel"]
    print(f"{name} (python {gw.python_version}, numpy {gw.numpy_version}): max relative score "
          f"difference vs host {np.max(np.abs(got - want) / np.abs(want)):.3g}")
    np.testing.assert_allclose(got, want, rtol=tolerance, atol=0)
