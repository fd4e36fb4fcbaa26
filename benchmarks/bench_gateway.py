"""Benchmark: the gateway runtime on a bundle (printed, not asserted).

    python benchmarks/bench_gateway.py --bundle ganlet-demo/bundle [--hops 2000]

Runs the bundle's own `run.py bench --json` in a fresh process per backend (so one backend's
imports do not inflate the other's memory) and prints the figures beside the issue's targets
for the default board's student on this machine: p50 per hop <= 1 ms with numpy, peak RSS
<= 60 MB with numpy, cold start <= 0.5 s.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path

TARGETS = {"latency_ms_p50": 1.0, "peak_rss_mb": 60.0, "cold_start_s": 0.5}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--bundle", type=Path, required=True)
    parser.add_argument("--hops", type=int, default=2000)
    args = parser.parse_args()
    run_py = args.bundle / "run.py"
    if not run_py.exists():
        sys.exit(f"{run_py} not found; build a bundle with `ganlet demo` or `ganlet compile`")
    for backend in ("numpy", "onnxruntime"):
        proc = subprocess.run([sys.executable, str(run_py), "bench", "--backend", backend,
                               "--hops", str(args.hops), "--json"],
                              capture_output=True, text=True, check=False)
        if proc.returncode != 0:
            print(f"[{backend}] not available: {proc.stderr.strip().splitlines()[-1:]}")
            continue
        report = json.loads(proc.stdout)
        figures = report["backends"][backend] if "backends" in report else report
        print(f"[{backend}]")
        for key in ("latency_ms_p50", "latency_ms_p99", "hops_per_s", "peak_rss_mb",
                    "cold_start_s"):
            value = figures.get(key)
            target = TARGETS.get(key) if backend == "numpy" else None
            ratio = f"  ratio to target {value / target:.2f}" if target and value else ""
            print(f"  {key:<16} {value}{ratio}")


if __name__ == "__main__":
    main()
