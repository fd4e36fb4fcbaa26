"""`run.py bench` reports the stream process's own peak memory, not the memory of whoever
spawned it (Linux folds the spawning process's peak into a child's ru_maxrss at exec)."""

import resource
import sys

import numpy as np
import pytest
import runtime_fixtures as fx

from ganlet.runtime.bench import run_bench
from ganlet.runtime.manifest import load_bundle

BALLAST_MB = 300


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="VmHWM is read from /proc")
def test_peak_memory_is_the_stream_process_own(tmp_path):
    bundle = load_bundle(fx.build_bundle(tmp_path / "bundle", onnx_model=False))
    ballast = np.ones(BALLAST_MB * 2 ** 20 // 8)      # touched: resident in this process
    # reference: resource.getrusage(RUSAGE_SELF).ru_maxrss, this process's peak (kB on Linux)
    parent_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    assert parent_mb > BALLAST_MB                     # precondition: a big parent

    report = run_bench(bundle, ["numpy"], hops=5)
    m = report["backends"]["numpy"]
    print(f"parent peak {parent_mb:.1f} MB; stream process peak {m['peak_rss_mb']:.1f} MB "
          f"({m['peak_rss_how']}); cold start {m['cold_start_s']:.2f} s")
    assert m["peak_rss_how"] == "VmHWM" and m["cold_start_s"] is not None
    assert m["peak_rss_mb"] < parent_mb - BALLAST_MB / 2   # none of the ballast is counted
    assert m["peak_rss_mb"] > 5                        # an interpreter with numpy loaded
    assert m["ram_mb"] == m["peak_rss_mb"]
    del ballast
