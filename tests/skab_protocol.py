"""The SKAB benchmark protocol, through what ships: one module for the test and the benchmark.

SKAB (../shared/data/skab, see its README) valve1: per file the first 400 rows are the training
span (the model's fit and calibration spans come out of them), the rest is the test span; the
binary metric is F1 over all test rows of all files together, with the false-alarm rate (FAR)
and missed-alarm rate (MAR) beside it. Each file gets the defaults a user gets: `ganlet train`'s
TeacherConfig, `ganlet compile` for the default board, the bundle's own threshold policy and
alert machine streamed through `run.py stream` (ganlet.compile.evaluate runs it), the teacher
through the gateway's Detector with its own calibration, the baselines under the same policy,
budget and alert machine. The SKAB folder is test data beside the repository, not part of it.
"""

import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd

REPO = Path(__file__).resolve().parents[1]
SKAB = REPO / ".." / "shared" / "data" / "skab"
TRAIN_ROWS = 400
BUNDLE = "bundle (int8, gateway path)"
# the same bundle through `run.py stream` fed only the test rows: a gateway that starts after
# training, as one deployed does, with no history of its own before the first test row
BUNDLE_FRESH = "bundle, started at test rows"


def skab_files(root: Path = SKAB, group: str = "valve1") -> list:
    """The CSV files of one SKAB folder (valve1: the targets; valve2 and other: the same
    protocol on files nobody tuned to), in the order of their numbered names."""
    return sorted((Path(root) / group).glob("*.csv"),
                  key=lambda p: (0, int(p.stem), "") if p.stem.isdigit() else (1, 0, p.stem))


def incidents_of(path: Path):
    """(incidents DataFrame from the file's own `anomaly` column, labels [rows], times)."""
    from ganlet.compile.data import parse_times

    raw = pd.read_csv(path, sep=";")
    times = parse_times(raw["datetime"]).to_numpy()
    labels = raw["anomaly"].to_numpy() > 0
    pad = np.concatenate([[False], labels, [False]]).astype(np.int8)
    edges = np.flatnonzero(np.diff(pad))
    incidents = pd.DataFrame({"start": times[edges[0::2]], "end": times[edges[1::2] - 1],
                              "kind": "valve"})
    return incidents, labels, times


def train_and_compile(path: Path, train_rows: int, seed: int, out: Path, options,
                      channels=None):
    """`ganlet train` (defaults, the first train_rows rows, one torch thread; `channels`: as
    --channels) and `ganlet compile` (CompileOptions `options`) of one file: (frame,
    model_dir); the bundle is out/bundle."""
    import torch

    from ganlet.compile.data import (
        IntakeOptions,
        load_frame,
        split_spans,
        without_constant_channels,
    )
    from ganlet.compile.model import TeacherConfig
    from ganlet.compile.pipeline import compile_model
    from ganlet.compile.train import save_model, train

    torch.set_num_threads(1)
    frame = load_frame(path, IntakeOptions(channels=channels))
    spans = split_spans(frame, train_rows, 0.2)
    frame = without_constant_channels(frame, spans, named=bool(channels))[0]  # as `ganlet train`
    model = train(frame, spans, replace(TeacherConfig(), seed=seed))
    model_dir = save_model(model, out / "model")
    compile_model(model, out / "bundle", options, model_dir=model_dir)
    return frame, model_dir


def run_file(args) -> dict:
    """Train, compile and evaluate one file (in whichever process calls it): the test rows'
    labels and, per method, alerts and scores on them. With train_rows below TRAIN_ROWS the
    model trains on fewer rows and the rows in between are scored but not counted, so the
    counted rows stay the protocol's. fresh: also the bundle started at the test rows
    (fresh_start)."""
    path, out, seed, distil_epochs, baselines, train_rows, channels, fresh = args
    from ganlet.compile.data import grid_index
    from ganlet.compile.distil import DistilConfig
    from ganlet.compile.evaluate import evaluate
    from ganlet.compile.pipeline import CompileOptions

    warnings.simplefilter("ignore")
    path, out = Path(path), Path(out)
    frame, model_dir = train_and_compile(
        path, train_rows, seed, out,
        CompileOptions(distil=DistilConfig(epochs=distil_epochs, seed=seed)), channels)
    incidents, labels, times = incidents_of(path)
    rows = grid_index(frame, times[TRAIN_ROWS:])      # protocol: score the rows after 400
    trained = grid_index(frame, times[:train_rows])
    mask = np.zeros(len(frame.times), bool)
    mask[rows] = True
    r = evaluate(out / "bundle", path, incidents, eval_mask=mask, model_dir=model_dir,
                 baselines=baselines)
    methods = dict(r.methods)
    if fresh:
        methods[BUNDLE_FRESH] = fresh_start(out / "bundle", path, frame, out / "fresh")
    return {"file": path.stem, "labels": labels[TRAIN_ROWS:],
            "alert": {m.name: m.alert[rows] for m in methods.values()},
            "score": {m.name: m.scores[rows] for m in methods.values()},
            "train_score": {m.name: m.scores[trained] for m in methods.values()}}


def fresh_start(bundle: Path, path: Path, frame, out: Path):
    """The bundle's `run.py stream` fed the rows after TRAIN_ROWS only, its hops placed on the
    file's grid (the training rows get no score)."""
    from ganlet.compile.evaluate import gateway_method
    from ganlet.runtime.manifest import load_bundle

    out.mkdir(parents=True, exist_ok=True)
    feed = rows_from(path, TRAIN_ROWS, out / "test_rows.csv")
    method, _ = gateway_method(load_bundle(bundle), feed, frame, out, "")
    method.name = BUNDLE_FRESH
    return method


def rows_from(path: Path, start: int, feed: Path) -> Path:
    """A gateway feed of a SKAB file's rows from `start` on (its label columns left out)."""
    raw = pd.read_csv(path, sep=";")
    raw.drop(columns=[c for c in ("anomaly", "changepoint") if c in raw.columns]
             ).iloc[start:].to_csv(feed, index=False)
    return feed


def p99_alerts(out: dict, name: str) -> np.ndarray:
    """The reference rule of issue 11's first measurement, for comparison only: a test row is
    flagged when its score exceeds the 99th percentile of the file's training-span scores (no
    alert machine, no budget)."""
    train = out["train_score"][name]
    level = np.nanpercentile(train, 99) if np.isfinite(train).any() else np.inf
    return out["score"][name] > level


def pooled(outs: list) -> dict:
    """Per method: point metrics over every file's test rows together, the ROC AUC of its
    score (sklearn.metrics.roc_auc_score), under "p99" the point metrics of p99_alerts, and
    under "sites" where its false alarms and misses sit (evaluate.error_sites, file by file,
    summed) as shares of the normal and of the labelled rows (they add up to FAR and MAR)."""
    from sklearn.metrics import roc_auc_score

    from ganlet.compile.evaluate import FALSE_ALARM_SITES, error_sites, point_metrics

    y = np.concatenate([o["labels"] for o in outs])
    metrics = {}
    for name in outs[0]["alert"]:
        m = point_metrics(y, np.concatenate([o["alert"][name] for o in outs]))
        s = np.concatenate([o["score"][name] for o in outs])
        ok = np.isfinite(s)
        m["auc"] = float(roc_auc_score(y[ok], s[ok]))
        m["p99"] = point_metrics(y, np.concatenate([p99_alerts(o, name) for o in outs]))
        rows = [error_sites(o["labels"], o["alert"][name]) for o in outs]
        normal, labelled = int((~y).sum()), int(y.sum())
        m["sites"] = {k: sum(r[k] for r in rows) / (normal if k in FALSE_ALARM_SITES
                                                     else labelled) for k in rows[0]}
        m["files"] = {o.get("file", str(i)): per_file(o["labels"], o["alert"][name])
                      for i, o in enumerate(outs)}
        metrics[name] = m
    return metrics


def per_file(labels: np.ndarray, alert: np.ndarray) -> dict:
    """One file's false-alarm and missed rows, and its normal and labelled rows."""
    labels, alert = np.asarray(labels, bool), np.asarray(alert, bool)
    return {"false": int((alert & ~labels).sum()), "normal": int((~labels).sum()),
            "missed": int((~alert & labels).sum()), "labelled": int(labels.sum())}


COUNTS = ("false", "normal", "missed", "labelled")


def file_interval(runs: list, level: float = 0.90, resamples: int = 4000,
                  seed: int = 0) -> dict:
    """How far the pooled figures move when other files of the same kind are drawn: a
    percentile bootstrap over files (Efron and Tibshirani, An Introduction to the Bootstrap,
    1993, ch. 13). runs: per seed, {file: per_file counts}; each resample draws as many files
    as there are, with replacement, the same draw for every seed, and pools their rows per
    seed; the figure is the mean over seeds, as the targets read. Returns {"f1" | "far" |
    "mar": (low, high)}, the central `level` of the resampled figures. The files are the unit:
    rows within a file are not independent, and the held-out sets are other files."""
    from ganlet.compile.evaluate import rates

    names = list(runs[0])
    counts = np.array([[[run[n][k] for k in COUNTS] for n in names] for run in runs], float)
    draws = np.random.default_rng(seed).integers(0, len(names), (resamples, len(names)))
    false, normal, missed, labelled = np.moveaxis(counts[:, draws].sum(axis=2), -1, 0)
    figures = rates(tp=labelled - missed, fp=false, fn=missed, tn=normal - false)
    tails = (100 * (1 - level) / 2, 100 * (1 + level) / 2)
    return {k: tuple(float(q) for q in np.percentile(figures[k].mean(axis=0), tails))
            for k in ("f1", "far", "mar")}


def check_train_rows(train_rows: int) -> None:
    """The protocol's test rows are those after TRAIN_ROWS: fewer training rows may be asked
    for, never more."""
    if not 0 < train_rows <= TRAIN_ROWS:
        raise ValueError(f"train rows must be 1..{TRAIN_ROWS}: the rows after {TRAIN_ROWS} "
                         "are the protocol's test rows")


def run(seed: int, root: Path, workers: int = 2, distil_epochs: int = 80,
        files=None, baselines=None, train_rows: int = TRAIN_ROWS, channels=None,
        fresh: bool = False) -> dict:
    """Every valve1 file at one seed, `workers` processes; pooled metrics per method (the
    baselines named, all of evaluate.BASELINES by default). train_rows: see run_file;
    channels: as `ganlet train --channels` (every method then sees only those); fresh: also
    the bundle started at the test rows (fresh_start)."""
    check_train_rows(train_rows)
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    from ganlet.compile.evaluate import BASELINES

    files = files or skab_files()
    baselines = BASELINES if baselines is None else tuple(baselines)
    jobs = [(str(f), str(Path(root) / f"seed{seed}" / f.stem), seed, distil_epochs, baselines,
             train_rows, channels, fresh) for f in files]
    ctx = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(workers, mp_context=ctx) as pool:
        outs = list(pool.map(run_file, jobs))
    return pooled(outs)
