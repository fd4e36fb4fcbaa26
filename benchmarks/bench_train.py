"""Benchmark: teacher training time and peak memory on the demo data (printed, not asserted).

    python benchmarks/bench_train.py [--threads 2] [--out /tmp/ganlet-bench-train]

Target (issue: workstation training): <= 3 minutes on 2 cores with the default settings.
"""

from __future__ import annotations

import argparse
import json
import resource
import tempfile
import time
from pathlib import Path

import torch

from ganlet.compile.pipeline import TrainOptions, train_from_file
from ganlet.examples import pump_station

TARGET_S = 180.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--out", type=Path, default=None)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    out = args.out or Path(tempfile.mkdtemp(prefix="ganlet-bench-train-"))
    info = pump_station.generate(out / "data")
    started = time.perf_counter()
    result = train_from_file(Path(info["data"]), out / "model",
                             TrainOptions(train_until=info["train_end"], seed=7))
    wall = time.perf_counter() - started
    h = result.model.history
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    figures = {
        "threads": args.threads, "rows": info["rows"], "train_windows": h["train_windows"],
        "window": result.model.teacher.config.window,
        "adversarial_s": round(h["wall_s"]["adversarial"], 2),
        "inversion_s": round(h["wall_s"]["inversion"], 2),
        "train_from_file_s": round(wall, 2), "target_s": TARGET_S,
        "ratio_to_target": round(wall / TARGET_S, 3), "peak_rss_mb": round(peak, 1),
    }
    print(json.dumps(figures, indent=2))


if __name__ == "__main__":
    main()
