"""Benchmark: slow faults on a real healthy rig: alerted, reported as drift, or not seen.

    python benchmarks/bench_ramps.py [--train-rows 2000] [--seed 0] [--sigmas 3 6 12]
                                     [--minutes 1 5 15] [--channels Current,Accelerometer1RMS]
                                     [--down]

SKAB's anomaly-free file (../shared/data/skab/anomaly-free, one-second rows of a healthy test
rig, see its README) trains a bundle with `ganlet train`'s defaults on its first rows and
`ganlet compile`'s defaults. Then the rows after training go through `run.py stream` as they
are, and again once per injected fault: from --at rows into the stream, one channel ramps
linearly from its reading to its reading plus (--down: minus) S robust standard deviations (the bundle's own
scale, manifest `scaler`) over M minutes, holds there for --hold-minutes and is then as
recorded. The injection is ours; the rows under it are the rig's. Per fault the table gives:

    outcome     alert (an alert covered part of the fault), drift (no alert in it, but the
                ramped channel was reported as a drift: the gateway said "collect fresh normal
                data and retrain"), grew (no alert; the channel was already a reported drift,
                and a `drift_grew` event said it moved further), nothing. A drift event counts
                only beyond those the untouched stream sent on that channel in the same span
    in alert    share of the fault's hops inside an alert
    delay s     from the ramp's start to the first hop in alert
    outside     alerts opened outside the fault, beyond those of the untouched stream (the
                end of the hold, where the channel drops back to its reading, is itself a step
                and can open one)

A channel that leaves its training range no faster than training ever moved it in a window is
a drift (runtime/drift.py): on a history where the channel only jitters, that pace is its
jitter, so a ramp of several sigmas over minutes can pass as drift. This measures how much of
that a user gets with the defaults (docs/detection.md, stop 35). Each injected stream takes a
few seconds; the whole default grid about five minutes on 2 cores.
"""

from __future__ import annotations

import argparse
import itertools
import json
import sys
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "tests"))

import skab_protocol  # noqa: E402

LABELS = ("datetime", "anomaly", "changepoint")


def injected(rows: pd.DataFrame, channel: str, sigma: float, size: float, at: int,
             ramp_rows: int, hold_rows: int) -> pd.DataFrame:
    """The rows with `channel` ramped by `size` robust sigmas over ramp_rows from row `at`,
    held for hold_rows, then as recorded."""
    out = rows.copy()
    shape = np.zeros(len(out))
    shape[at:at + ramp_rows] = np.arange(1, ramp_rows + 1) / ramp_rows
    shape[at + ramp_rows:at + ramp_rows + hold_rows] = 1.0
    out[channel] = out[channel] + size * sigma * shape
    return out


def opened_times(run) -> list:
    """When each alert of a gateway run opened (run_bundle keeps one event per alert), as naive
    UTC timestamps."""
    return [pd.Timestamp(e["opened"]).tz_localize(None) for e in run.alerts]


def told(run, kind: str, channel: str, start, end) -> int:
    """How many `kind` events a gateway run sent on `channel` between times start and end."""
    return sum(e["event"] == kind and e["channel"] == channel
               and start <= pd.Timestamp(e["time"]).tz_localize(None) < end
               for e in run.events)


def judged(run, base_run, scores: pd.DataFrame, start, end, channel: str) -> dict:
    """One stream's verdict on the fault between times start and end; a drift event counts
    only beyond those the untouched stream sent on the channel in the same span (a warming
    channel's own growth is not the fault's)."""
    inside = (scores["time"] >= start) & (scores["time"] < end)
    alert = scores["alert"].astype(bool)
    hits = scores["time"][inside & alert]
    outside = sum(not (start <= t < end) for t in opened_times(run))
    base_outside = sum(not (start <= t < end) for t in opened_times(base_run))
    more = {kind for kind in ("drift", "drift_grew") if told(run, kind, channel, start, end)
            > told(base_run, kind, channel, start, end)}
    outcome = ("alert" if len(hits) else "drift" if "drift" in more
               else "grew" if "drift_grew" in more else "nothing")
    return {"outcome": outcome, "in_alert": float(alert[inside].mean()),
            "delay_s": (hits.iloc[0] - start).total_seconds() if len(hits) else None,
            "outside": outside - base_outside}


def arguments():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--skab", type=Path, default=skab_protocol.SKAB)
    ap.add_argument("--train-rows", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--sigmas", type=float, nargs="+", default=[3, 6, 12])
    ap.add_argument("--down", action="store_true", help="ramp the channels down instead of up")
    ap.add_argument("--minutes", type=float, nargs="+", default=[1, 5, 15])
    ap.add_argument("--hold-minutes", type=float, default=5)
    ap.add_argument("--at", type=int, default=1000, help="rows into the stream the ramp starts")
    ap.add_argument("--stream-rows", type=int, default=2600)
    ap.add_argument("--channels", default=None,
                    help="comma-separated channels to ramp (default: every channel)")
    return ap.parse_args()


def bundle_scales(bundle: Path, asked) -> tuple:
    """(the bundle's channel names, each one's robust scale, the channels to ramp)."""
    manifest = json.loads((bundle / "manifest.json").read_text())
    names = [c["name"] for c in manifest["channels"]]
    channels = asked.split(",") if asked else names
    unknown = sorted(set(channels) - set(names))
    if unknown:
        raise SystemExit(f"not channels of the bundle: {', '.join(unknown)}; it has "
                         f"{', '.join(names)}")
    return names, dict(zip(names, manifest["scaler"]["scale"])), channels


def stream(bundle: Path, frame: pd.DataFrame, work: Path):
    """The bundle's `run.py stream` on the rows: (the run, its scores)."""
    from ganlet.compile.gateway import read_scores, run_bundle

    feed = work.with_suffix(".csv")
    frame.to_csv(feed, sep=";", index=False)
    run = run_bundle(bundle, feed, work)
    return run, read_scores(run.scores)


def main() -> None:
    a = arguments()
    path = a.skab / "anomaly-free" / "anomaly-free.csv"
    if not path.is_file():
        raise SystemExit(f"no SKAB anomaly-free file at {path}")
    warnings.simplefilter("ignore")
    from ganlet.compile.pipeline import CompileOptions

    raw = pd.read_csv(path, sep=";")
    rows = raw.iloc[a.train_rows:a.train_rows + a.stream_rows].reset_index(drop=True)
    period = pd.to_datetime(raw["datetime"]).diff().median().total_seconds()
    if a.at + 1 >= len(rows):
        raise SystemExit(f"--at {a.at} is past the {len(rows)} streamed rows")
    times = pd.to_datetime(rows["datetime"])
    ramp_rows = {m: max(1, int(round(m * 60 / period))) for m in a.minutes}
    hold_rows = int(round(a.hold_minutes * 60 / period))
    with tempfile.TemporaryDirectory(prefix="ganlet-ramps-") as tmp:
        tmp = Path(tmp)
        skab_protocol.train_and_compile(path, a.train_rows, a.seed, tmp, CompileOptions())
        bundle = tmp / "bundle"
        names, sigma, channels = bundle_scales(bundle, a.channels)
        base_run, _ = stream(bundle, rows, tmp / "untouched")
        print(f"SKAB anomaly-free, {a.train_rows} rows trained (seed {a.seed}), defaults, "
              f"ramps {'down' if a.down else 'up'}; {len(rows)} rows streamed; untouched: "
              f"{len(opened_times(base_run))} alert(s), "
              f"{sum(e['event'] == 'drift' for e in base_run.events)} drift event(s)")
        print(f"{'channel':>22}  {'sigmas':>6}  {'ramp min':>8}  {'outcome':>7}  "
              f"{'in alert':>8}  {'delay s':>7}  {'outside':>7}")
        tally = {"alert": 0, "drift": 0, "grew": 0, "nothing": 0}
        for channel, size, minutes in itertools.product(channels, a.sigmas, a.minutes):
            fault = injected(rows, channel, sigma[channel], -size if a.down else size, a.at,
                             ramp_rows[minutes], hold_rows)
            run, scores = stream(bundle, fault,
                                 tmp / f"{names.index(channel)}_{size:g}_{minutes:g}")
            end_row = min(a.at + ramp_rows[minutes] + hold_rows, len(rows) - 1)
            r = judged(run, base_run, scores, times.iloc[a.at], times.iloc[end_row], channel)
            tally[r["outcome"]] += 1
            delay = "-" if r["delay_s"] is None else f"{r['delay_s']:.0f}"
            print(f"{channel:>22}  {size:>6g}  {minutes:>8g}  {r['outcome']:>7}  "
                  f"{r['in_alert']:>8.3f}  {delay:>7}  {r['outside']:>7}", flush=True)
    print(f"of {sum(tally.values())} faults: {tally['alert']} alerted, {tally['drift']} "
          f"reported only as a drift, {tally['grew']} only as a drift that grew, "
          f"{tally['nothing']} not seen")


if __name__ == "__main__":
    main()
