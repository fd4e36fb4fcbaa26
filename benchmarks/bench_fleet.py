"""Benchmark: wall time of the same fleet on 1 and on 2 Dask worker processes (printed).

    python benchmarks/bench_fleet.py [--assets 4] [--days 4]

Each asset gets invented demo data (a different seed), small training settings, the default
board, and the whole task: train -> compile -> verify -> evaluate. Both runs start from empty
result folders, so nothing is skipped.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

from ganlet.compile import fleet

TEMPLATE = """
[fleet]
name = "bench fleet (invented)"
out = "{out}"
board = "a53-512"

[train]
adversarial_epochs = 4
inversion_epochs = 15
max_train_windows = 1000

[distil]
epochs = 10
"""

ASSET = """
[[asset]]
id = "station-{k}"
data = "data/station-{k}.csv"
incidents = "data/station-{k}-incidents.csv"
[asset.invented]
seed = {seed}
days = {days}
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--assets", type=int, default=4)
    parser.add_argument("--days", type=float, default=4.0)
    args = parser.parse_args()
    root = Path(tempfile.mkdtemp(prefix="ganlet-bench-fleet-"))
    walls = {}
    for workers in (1, 2):
        text = TEMPLATE.format(out=f"out-{workers}") + "".join(
            ASSET.format(k=k, seed=100 + k, days=args.days) for k in range(args.assets))
        path = root / f"fleet-{workers}.toml"
        path.write_text(text)
        spec = fleet.load_fleet(path)
        started = time.perf_counter()
        results = fleet.run_fleet(spec, workers=workers)
        walls[workers] = time.perf_counter() - started
        print(f"{workers} worker(s): {walls[workers]:.1f} s wall for {args.assets} assets")
        print(fleet.summary_table(results))
    print(f"speed-up 1 -> 2 workers: {walls[1] / walls[2]:.2f}x "
          f"(ratio of wall times 2/1 = {walls[2] / walls[1]:.2f})")


if __name__ == "__main__":
    main()
