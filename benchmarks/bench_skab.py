"""Benchmark: SKAB valve1 under the benchmark's protocol, through what ships (printed).

    python benchmarks/bench_skab.py [--seeds 0 1 2] [--workers 2] [--distil-epochs 80]
                                    [--skab DIR] [--group valve1] [--train-rows 400]

Per file the first 400 rows train with `ganlet train`'s defaults, `ganlet compile` packs a bundle
for the default board, and `ganlet evaluate` runs it through `run.py stream` (its own threshold
policy, false-alarm budget and alert machine), the teacher through the gateway's Detector with
its own calibration, and the baselines under the same policy, budget and alert machine
(tests/skab_protocol.py holds the protocol, shared with tests/test_evaluate.py). The bundle is
also streamed once more, fed only the rows after 400 ("started at test rows"): a gateway that
starts after training, as a deployed one does, knows nothing of the rows before, so where a
channel already sits outside its training range at the start is judged without a history. Prints F1 /
FAR / MAR / ROC AUC pooled over every test row, per seed and their mean, and where the false
alarms and misses sit: before or after a labelled incident in an alert that reaches it (the
alert and the label disagree on the incident's edges), apart from any label, at an incident's
onset, in an incident no alert reaches, or after its alert closed; and per file, the bundle's
FAR and MAR and its share of every wrong row (do the errors spread, or sit in a few files?);
and the central 90 % of the mean of seeds' F1 / FAR / MAR over other draws of as many files
(a bootstrap over files: how much a figure on these 16 files says about other files).
--train-rows below 400
trains on fewer rows and counts the same rows after 400: how much the figures lean on the
training length (the held-out files' spans differ). The SKAB folder is test data beside the
repository, not part of it.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "tests"))

import skab_protocol  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--skab", type=Path, default=skab_protocol.SKAB)
    ap.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--distil-epochs", type=int, default=80)
    ap.add_argument("--group", default="valve1",
                    help="the SKAB folder under --skab: valve1 (issue 11's targets) or another "
                         "(valve2, other), the same protocol on files nobody tuned to")
    ap.add_argument("--train-rows", type=int, default=skab_protocol.TRAIN_ROWS,
                    help="train on the first N rows (at most 400); the rows after 400 are "
                         "counted either way")
    ap.add_argument("--channels", default=None,
                    help="comma-separated channels to train on (default: all); every method "
                         "then sees only those, e.g. the flow alone for a one-channel history")
    a = ap.parse_args()
    channels = a.channels.split(",") if a.channels else None
    try:
        skab_protocol.check_train_rows(a.train_rows)
    except ValueError as err:
        ap.error(f"--train-rows: {err}")
    files = skab_protocol.skab_files(a.skab, a.group)
    if not files:
        raise SystemExit(f"no SKAB CSV files under {a.skab / a.group}")
    print(f"SKAB {a.group}, {len(files)} files, gateway path, defaults, first {a.train_rows} "
          f"rows trained, rows after {skab_protocol.TRAIN_ROWS} counted; seeds {a.seeds}; "
          f"channels: {a.channels or 'all'}")
    print(f"{'seed':>4}  {'method':28s}  {'F1':>6}  {'FAR':>6}  {'MAR':>6}  {'AUC':>6}")
    table = {}
    with tempfile.TemporaryDirectory(prefix="ganlet-skab-") as tmp:
        for seed in a.seeds:
            started = time.perf_counter()
            metrics = skab_protocol.run(seed, Path(tmp), a.workers, a.distil_epochs, files,
                                        train_rows=a.train_rows, channels=channels,
                                        fresh=True)
            for name, k in metrics.items():
                table.setdefault(name, []).append(k)
                print(f"{seed:>4}  {name:28s}  {k['f1']:6.3f}  {k['far']:6.3f}  "
                      f"{k['mar']:6.3f}  {k['auc']:6.3f}")
            print(f"      ({time.perf_counter() - started:.0f} s)")
    print("mean of seeds (what ships: each method under the bundle's policy, budget and alert "
          "machine)")
    for name, rows in table.items():
        mean = {key: float(np.mean([r[key] for r in rows])) for key in ("f1", "far", "mar", "auc")}
        print(f"{'mean':>4}  {name:28s}  {mean['f1']:6.3f}  {mean['far']:6.3f}  "
              f"{mean['mar']:6.3f}  {mean['auc']:6.3f}")
    print_intervals(table)
    print("mean of seeds, where the wrong rows sit (evaluate.error_sites): false alarms as "
          "shares of the normal rows (sum = FAR), misses of the labelled rows (sum = MAR)")
    keys = list(next(iter(table.values()))[0]["sites"])
    print(f"{'':4}  {'method':28s}  " + "  ".join(f"{k:>7}" for k in keys))
    for name, rows in table.items():
        print(f"{'mean':>4}  {name:28s}  " + "  ".join(
            f"{np.mean([r['sites'][k] for r in rows]):7.3f}" for k in keys))
    print_files(table)
    print("mean of seeds, reference rule for comparison: score > 99th percentile of the file's "
          "training scores, per row, no alert machine")
    for name, rows in table.items():
        if name == skab_protocol.BUNDLE_FRESH:
            continue  # no scores on the training rows to take a percentile of
        mean = {key: float(np.mean([r["p99"][key] for r in rows])) for key in ("f1", "far", "mar")}
        print(f"{'p99':>4}  {name:28s}  {mean['f1']:6.3f}  {mean['far']:6.3f}  "
              f"{mean['mar']:6.3f}")


def print_intervals(table: dict) -> None:
    """The mean of seeds' F1 / FAR / MAR with the central 90 % of what other draws of as many
    files give (skab_protocol.file_interval): how far a figure on these files says anything
    about files of the same kind, such as the held-out ones."""
    print("mean of seeds, 90 % interval over files (percentile bootstrap, the files resampled "
          "as the unit, 4,000 draws)")
    print(f"{'':4}  {'method':28s}  {'F1':>13}  {'FAR':>13}  {'MAR':>13}")
    for name, rows in table.items():
        spans = skab_protocol.file_interval([r["files"] for r in rows])
        print(f"{'90 %':>4}  {name:28s}  " + "  ".join(
            f"{spans[k][0]:.3f}..{spans[k][1]:.3f}" for k in ("f1", "far", "mar")))


def print_files(table: dict) -> None:
    """Per file, the bundle's FAR and MAR (mean of seeds) and its share of all false-alarm and
    missed rows: whether the errors spread over the files or sit in a few."""
    bundle = next((name for name in table if name.startswith("bundle")), None)
    if bundle is None:
        return
    runs = [r["files"] for r in table[bundle]]
    false_all = sum(f["false"] for files in runs for f in files.values())
    missed_all = sum(f["missed"] for files in runs for f in files.values())
    print(f"mean of seeds, {bundle} per file: FAR and MAR in the file, and its share of every "
          "false-alarm and missed row")
    print(f"{'file':>6}  {'FAR':>6}  {'MAR':>6}  {'of false':>8}  {'of missed':>9}")
    for name in runs[0]:
        f = [files[name] for files in runs]
        far = np.mean([x["false"] / max(1, x["normal"]) for x in f])
        mar = np.mean([x["missed"] / max(1, x["labelled"]) for x in f])
        print(f"{name:>6}  {far:6.3f}  {mar:6.3f}  "
              f"{sum(x['false'] for x in f) / max(1, false_all):8.3f}  "
              f"{sum(x['missed'] for x in f) / max(1, missed_all):9.3f}")


if __name__ == "__main__":
    main()
