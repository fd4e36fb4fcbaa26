"""Benchmark: alarms on normal data against the false-alarm budget the bundle was compiled to.

    python benchmarks/bench_normal.py [--train-rows 400 2000 4000] [--seed 0] [--drift report]
                                      [--channels Accelerometer1RMS] [--each-channel]
                                      [--row-minutes 5]

SKAB's anomaly-free file (../shared/data/skab/anomaly-free, 9,405 one-second rows of a healthy
test rig, see its README) is normal operation from start to end. Per training length the first
rows train with `ganlet train`'s defaults, `ganlet compile` packs a bundle for the default board
(budget: one false alarm per week), and every later row goes through `run.py stream` as a
gateway would see it. Prints the alerts raised, the streamed hours, alarms per week, the share
of streamed time inside an open alert, the hops above the threshold, the drift events and the
`drift_grew` events (a reported drift whose excess doubled), how many alerts the CUSUM opened
("off" where the history was too short to arm it) and how many a level step opened
(runtime/drift.py). Every alert here is a false alarm; the budget is a
promise about data like the training span, so the gap between the two is what a short history
costs. `--channels` trains on those channels only (as `ganlet train --channels`): one channel
alone has nothing to dilute its error (docs/detection.md, stop 30); `--each-channel` runs every
channel alone in turn (a one-channel history, as many real files are). `--row-minutes M` re-times
the rows M minutes apart (the readings unchanged): at 5, 2,000 rows are a week of history and
the streamed rows 25 days, so the budget of one false alarm a week can be read against what
the gateway raises. The SKAB folder is test data beside the repository, not part of it.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "tests"))

import skab_protocol  # noqa: E402

WEEK_S = 7 * 86400.0


def run_length(path: Path, rows: int, seed: int, out: Path, drift: str, channels=None) -> dict:
    from ganlet.compile.gateway import read_scores, run_bundle
    from ganlet.compile.pipeline import CompileOptions

    skab_protocol.train_and_compile(path, rows, seed, out, CompileOptions(drift=drift), channels)
    feed = skab_protocol.rows_from(path, rows, out / "feed.csv")  # rows the model never saw
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
            "drifts": sum(e["event"] == "drift" for e in run.events),
            "grew": sum(e["event"] == "drift_grew" for e in run.events)}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--skab", type=Path, default=skab_protocol.SKAB)
    ap.add_argument("--train-rows", type=int, nargs="+", default=[400, 2000, 4000])
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--drift", choices=["report", "recentre"],
                    help="compile's --drift (default: compile's own default)")
    ap.add_argument("--channels", default=None,
                    help="comma-separated channels to train on (default: all)")
    ap.add_argument("--each-channel", action="store_true",
                    help="every channel alone in turn (at the first --train-rows)")
    ap.add_argument("--row-minutes", type=float, default=None,
                    help="re-time the rows this many minutes apart (default: as recorded, 1 s)")
    a = ap.parse_args()
    channels = a.channels.split(",") if a.channels else None
    path = a.skab / "anomaly-free" / "anomaly-free.csv"
    if not path.is_file():
        raise SystemExit(f"no SKAB anomaly-free file at {path}")
    warnings.simplefilter("ignore")
    from ganlet.compile.calibrate import DRIFT_ACTION

    drift = a.drift or DRIFT_ACTION
    runs, what = planned_runs(a, path, channels)
    spacing = f"{a.row_minutes:g} min apart" if a.row_minutes else "as recorded (1 s)"
    print(f"SKAB anomaly-free, seed {a.seed}, defaults (budget 1 false alarm per week), "
          f"--drift {drift}, channels: {what}, rows {spacing}")
    print(f"{'channel' if a.each_channel else 'train rows':>22}  {HEADER}")
    with tempfile.TemporaryDirectory(prefix="ganlet-normal-") as tmp:
        path = retimed(path, a.row_minutes, Path(tmp))
        for k, (label, rows, names) in enumerate(runs):
            started = time.perf_counter()
            r = run_length(path, rows, a.seed, Path(tmp) / str(k), drift, names)
            print(f"{label:>22}  {row_text(r)}  {time.perf_counter() - started:>5.0f}")


def planned_runs(a, path: Path, channels) -> tuple:
    """([(label, training rows, channels)] per run, the channels in words): each training
    length, or with --each-channel every channel alone at the first length."""
    if not a.each_channel:
        return [(str(rows), rows, channels) for rows in a.train_rows], a.channels or "all"
    names = [c for c in pd.read_csv(path, sep=";", nrows=1).columns
             if c not in ("datetime", "anomaly", "changepoint")]
    rows = a.train_rows[0]
    return [(name, rows, [name]) for name in names], f"each alone, {rows} rows trained"


HEADER = (f"{'streamed h':>10}  {'alerts':>6}  {'per week':>9}  {'in alert':>8}  "
          f"{'hops above':>10}  {'drifts':>6}  {'grew':>4}  {'by cusum':>8}  {'by step':>7}  {'s':>5}")


def row_text(r: dict) -> str:
    return (f"{r['hours']:>10.2f}  {r['alerts']:>6}  {r['per_week']:>9.1f}  "
            f"{r['in_alert']:>8.3f}  {r['hops_above']:>10.3f}  {r['drifts']:>6}  {r['grew']:>4}  "
            f"{'off' if r['by_cusum'] is None else r['by_cusum']:>8}  {r['by_step']:>7}")


def retimed(path: Path, minutes, tmp: Path) -> Path:
    """The file with its rows `minutes` apart from its first time (None: as it is)."""
    if minutes is None:
        return path
    if minutes <= 0:
        raise SystemExit("--row-minutes must be above 0")
    raw = pd.read_csv(path, sep=";")
    start = pd.Timestamp(raw["datetime"].iloc[0])
    raw["datetime"] = (start + pd.to_timedelta(np.arange(len(raw)) * minutes, unit="min")
                       ).strftime("%Y-%m-%d %H:%M:%S")
    out = tmp / f"retimed_{minutes:g}min.csv"
    raw.to_csv(out, sep=";", index=False)
    return out


if __name__ == "__main__":
    main()
