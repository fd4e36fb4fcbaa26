"""Benchmark: alarms on normal data against the false-alarm budget the bundle was compiled to.

    python benchmarks/bench_normal.py [--train-rows 400 2000 4000] [--seed 0] [--drift report]
                                      [--channels Accelerometer1RMS]

SKAB's anomaly-free file (../shared/data/skab/anomaly-free, 9,405 one-second rows of a healthy
test rig, see its README) is normal operation from start to end. Per training length the first
rows train with `ganlet train`'s defaults, `ganlet compile` packs a bundle for the default board
(budget: one false alarm per week), and every later row goes through `run.py stream` as a
gateway would see it. Prints the alerts raised, the streamed hours, alarms per week, the share
of streamed time inside an open alert, the hops above the threshold, the drift events, how
many alerts the CUSUM opened ("off" where the history was too short to arm it) and how many a
level step opened (runtime/drift.py). Every alert here is a false alarm; the budget is a
promise about data like the training span, so the gap between the two is what a short history
costs. `--channels` trains on those channels only (as `ganlet train --channels`): one channel
alone has nothing to dilute its error (docs/detection.md, stop 30). The SKAB folder is test data beside the repository, not part of it.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
import warnings
from pathlib import Path

import pandas as pd

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "tests"))

import skab_protocol  # noqa: E402

WEEK_S = 7 * 86400.0


def run_length(path: Path, rows: int, seed: int, out: Path, drift: str, channels=None) -> dict:
    from ganlet.compile.gateway import read_scores, run_bundle
    from ganlet.compile.pipeline import CompileOptions

    skab_protocol.train_and_compile(path, rows, seed, out, CompileOptions(drift=drift), channels)
    raw = pd.read_csv(path, sep=";")
    feed = out / "feed.csv"
    raw.iloc[rows:].to_csv(feed, index=False)          # only rows the model never saw
    run = run_bundle(out / "bundle", feed, out / "gateway")
    scores = read_scores(run.scores)
    hours = (scores["time"].iloc[-1] - scores["time"].iloc[0]).total_seconds() / 3600
    opened = [e for e in run.events if e["event"] == "alert_opened"]
    manifest = json.loads((out / "bundle" / "manifest.json").read_text())
    return {"rows": rows, "hours": hours, "alerts": len(opened),
            "by_cusum": sum(e.get("opened_by") == "cusum" for e in opened)
            if "cusum" in manifest["threshold"] else None,
            "by_step": sum(e.get("opened_by") == "step" for e in opened),
            "per_week": len(opened) / (hours * 3600) * WEEK_S,
            "in_alert": float(scores["alert"].mean()),
            "hops_above": float((scores["score"] > scores["threshold"]).mean()),
            "drifts": sum(e["event"] == "drift" for e in run.events)}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--skab", type=Path, default=skab_protocol.SKAB)
    ap.add_argument("--train-rows", type=int, nargs="+", default=[400, 2000, 4000])
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--drift", choices=["report", "recentre"],
                    help="compile's --drift (default: compile's own default)")
    ap.add_argument("--channels", default=None,
                    help="comma-separated channels to train on (default: all)")
    a = ap.parse_args()
    channels = a.channels.split(",") if a.channels else None
    path = a.skab / "anomaly-free" / "anomaly-free.csv"
    if not path.is_file():
        raise SystemExit(f"no SKAB anomaly-free file at {path}")
    warnings.simplefilter("ignore")
    from ganlet.compile.calibrate import DRIFT_ACTION

    drift = a.drift or DRIFT_ACTION
    print(f"SKAB anomaly-free, seed {a.seed}, defaults (budget 1 false alarm per week), "
          f"--drift {drift}, channels: {a.channels or 'all'}")
    print(f"{'train rows':>10}  {'streamed h':>10}  {'alerts':>6}  {'per week':>9}  "
          f"{'in alert':>8}  {'hops above':>10}  {'drifts':>6}  {'by cusum':>8}  "
          f"{'by step':>7}  {'s':>5}")
    with tempfile.TemporaryDirectory(prefix="ganlet-normal-") as tmp:
        for rows in a.train_rows:
            started = time.perf_counter()
            r = run_length(path, rows, a.seed, Path(tmp) / str(rows), drift, channels)
            print(f"{r['rows']:>10}  {r['hours']:>10.2f}  {r['alerts']:>6}  "
                  f"{r['per_week']:>9.0f}  {r['in_alert']:>8.3f}  {r['hops_above']:>10.3f}  "
                  f"{r['drifts']:>6}  "
                  f"{'off' if r['by_cusum'] is None else r['by_cusum']:>8}  "
                  f"{r['by_step']:>7}  {time.perf_counter() - started:>5.0f}")


if __name__ == "__main__":
    main()
