"""Benchmark: SKAB valve1 under the benchmark's protocol, level vs rate features (printed).

    python benchmarks/bench_skab.py [--skab ../shared/data/skab] [--seeds 0 1 2 3]

Per file the first 400 rows train (the last 20 % of them calibrate), the rest is the test
span; metrics are pooled over all files' test rows, alerts from the static rule and the alert
machine that `ganlet evaluate` uses. For each seed and feature choice it prints the teacher's
F1 / FAR / MAR for three feature choices (all levels; the two thermal channels by rate; per
file, the channels the trend screen of `ganlet train` flags), IsolationForest on every
channel's level (what `evaluate` reports) and
IsolationForest on the detector's own scaled features. Teacher only: the bundle tracks the
teacher within 0.01 F1 here (tests/test_evaluate.py checks the bundle itself).
The SKAB folder is test data beside the repository, not part of it.
"""

from __future__ import annotations

import argparse
import multiprocessing
import warnings
from concurrent.futures import ProcessPoolExecutor
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd

REPO = Path(__file__).resolve().parents[1]
THERMAL = ("Temperature", "Thermocouple")   # SKAB README: motor body and loop fluid temperature


def one_file(args):
    path, seed, rate = args
    import torch

    from ganlet.compile.data import (
        RobustScaler,
        grid_index,
        load_frame,
        parse_times,
        segments_in,
        split_spans,
        trending_channels,
    )
    from ganlet.compile.evaluate import Rule, baseline_scores, default_alerting
    from ganlet.compile.model import TeacherConfig
    from ganlet.compile.train import score_series, train

    torch.set_num_threads(1)
    warnings.simplefilter("ignore")
    config = replace(TeacherConfig(window=16, adversarial_epochs=10, inversion_epochs=40,
                                    encoder_hidden=(32,), generator_hidden=(16, 32), latent=4),
                     seed=seed)
    frame = load_frame(path)
    spans = split_spans(frame, 400, 0.2)
    if rate == "screen":    # what the trend screen of `ganlet train` suggests for this file
        rate = list(trending_channels(frame, spans.fit))
    model = train(frame, spans, config, rate_channels=rate)
    series = model.scaler.transform(frame.values)
    scores, _ = score_series(model.teacher, series, segments_in(series), config.window)
    levels = RobustScaler.fit(frame.values[spans.fit[0]:spans.fit[1]], frame.channels)
    level_series = levels.transform(frame.values)
    (f0, f1), (c0, c1) = spans.fit, spans.calibration
    methods = {"teacher": scores}
    for name, x in (("IsolationForest on levels", level_series),
                    ("IsolationForest on features", series)):
        fit = x[f0:f1]
        methods[name] = baseline_scores(fit[np.isfinite(fit).all(axis=1)], x)["IsolationForest"]
    rule = Rule("static", default_alerting(config.window))
    raw = pd.read_csv(path, sep=";")
    test_rows = grid_index(frame, parse_times(raw["datetime"]).to_numpy()[400:])
    out = {"labels": raw["anomaly"].to_numpy()[400:] > 0}
    for name, s in methods.items():
        cal = s[c0:c1]
        _, _, alert = rule.apply(cal[np.isfinite(cal)], s)
        out[name] = alert[test_rows]
    return out


def main() -> None:
    from ganlet.compile.evaluate import point_metrics

    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--skab", type=Path, default=REPO / ".." / "shared" / "data" / "skab")
    ap.add_argument("--seeds", type=int, nargs="+", default=[0])
    ap.add_argument("--workers", type=int, default=2)
    a = ap.parse_args()
    files = sorted((a.skab / "valve1").glob("*.csv"), key=lambda p: int(p.stem))
    if not files:
        raise SystemExit(f"no SKAB valve1 files under {a.skab}")
    print(f"SKAB valve1, {len(files)} files, static rule, pooled test rows")
    print(f"{'seed':>4}  {'features':12s}  {'method':28s}  {'F1':>6}  {'FAR':>6}  {'MAR':>6}")
    ctx = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(a.workers, mp_context=ctx) as pool:
        for seed in a.seeds:
            for label, rate in (("levels", ()), ("thermal=rate", THERMAL),
                                ("screened", "screen")):
                outs = list(pool.map(one_file, [(str(f), seed, rate) for f in files]))
                y = np.concatenate([o["labels"] for o in outs])
                for name in ("teacher", "IsolationForest on levels",
                             "IsolationForest on features"):
                    k = point_metrics(y, np.concatenate([o[name] for o in outs]))
                    print(f"{seed:>4}  {label:12s}  {name:28s}  {k['f1']:6.3f}  "
                          f"{k['far']:6.3f}  {k['mar']:6.3f}")


if __name__ == "__main__":
    main()
