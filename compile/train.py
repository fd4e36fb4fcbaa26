"""Adversarial training of the teacher, scoring, and the model directory.

Recipe (stable on small data):
1. adversarial phase: G and D with the non-saturating GAN loss, one-sided label smoothing on
   D's real targets, Adam with beta1 = 0.5 and a slower D;
2. encoder inversion: E is fitted so that G(E(x)) reconstructs x (squared error plus a
   discriminator-feature term and a small latent penalty), on lightly noised inputs; G is
   refined at a lower learning rate at the same time so the reconstruction can reach the data.
"""

from __future__ import annotations

import json
import resource
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Optional, Sequence

import numpy as np
import torch
from torch import nn

from ganlet.compile.data import (
    Frame,
    RobustScaler,
    Spans,
    save_json,
    segments_in,
    windows_from,
)
from ganlet.compile.model import Teacher, TeacherConfig
from ganlet.runtime.score import ScoreRule, score_section

Progress = Callable[[str, int, int, dict], None]   # (phase, epoch, epochs, losses)


@dataclass
class TrainedModel:
    teacher: Teacher
    scaler: RobustScaler
    channels: list
    units: list
    period_s: float
    time_col: str
    spans: Spans
    summary: dict                      # the intake report
    history: dict = field(default_factory=dict)
    # scaled series (fit + calibration spans) and their gap-free segments, for distillation
    series: Optional[np.ndarray] = None
    raw: Optional[np.ndarray] = None   # the same rows in raw units (baselines see levels)
    segments: list = field(default_factory=list)
    max_fill_periods: int = 5
    time_zone: str = "UTC"             # zone-less times were read in this zone (--tz)
    decimal: str = "."                 # numbers were written with this decimal mark (--decimal)
    date_order: Optional[str] = None   # numeric dates were read in this order (--dayfirst ...)
    times_from_rows: bool = False      # the file had no time column: a sample per row (--period)

    @property
    def written(self) -> dict:
        """How the training data was written, as the manifest says it (runtime/manifest.py
        trained_dialect and times_from_rows read it)."""
        return {"time_zone": self.time_zone, "decimal_mark": self.decimal,
                "date_order": self.date_order, "times_from_rows": self.times_from_rows}

    def segments_of(self, span: tuple) -> list:
        """Gap-free segments inside a span (fit or calibration) of the kept series."""
        b0, e0 = span
        return [(max(b, b0), min(e, e0)) for b, e in self.segments if min(e, e0) > max(b, b0)]

    def windows_of(self, span: tuple) -> np.ndarray:
        """Every window [N, L, C] that lies inside a span's gap-free segments."""
        return windows_from(self.series, self.segments_of(span), self.teacher.config.window)[0]


def set_seed(seed: int) -> None:
    torch.manual_seed(seed)
    np.random.seed(seed % (2**32))


def train(frame: Frame, spans: Spans, config: TeacherConfig,
          progress: Optional[Progress] = None, max_fill_periods: int = 5,
          rate_channels: Sequence[str] = ()) -> TrainedModel:
    """Fit the scaler on the fit span, then the teacher on its windows. rate_channels are
    watched by their change per period instead of their level (ganlet/runtime/features.py)."""
    set_seed(config.seed)
    features = ["rate" if c in rate_channels else "level" for c in frame.channels]
    scaler = RobustScaler.fit(frame.values[spans.fit[0]:spans.fit[1]], frame.channels, features)
    end = spans.calibration[1]
    series = scaler.transform(frame.values[:end])
    # a rate needs the row before it: segments follow the features' NaN, not the raw values'
    fit_segments = segments_in(series, *spans.fit)
    x_fit, _ = windows_from(series, fit_segments, config.window)
    if len(x_fit) == 0:
        raise ValueError("no training windows; the caller should have chosen a shorter window")
    if len(x_fit) > config.max_train_windows:
        stride = int(np.ceil(len(x_fit) / config.max_train_windows))
        x_fit = x_fit[::stride]
    teacher = Teacher.build(len(frame.channels), config)
    history = fit_teacher(teacher, torch.from_numpy(x_fit), teacher.config, progress)
    history["fit_r2"] = dict(zip(frame.channels, map(float, fit_r2(teacher, x_fit))))
    return TrainedModel(
        teacher=teacher, scaler=scaler, channels=frame.channels, units=frame.units,
        period_s=frame.period_s, time_col=frame.report.time_col, spans=spans,
        summary=frame.report.to_json(), history=history, series=series,
        raw=np.asarray(frame.values[:end], np.float64),
        segments=segments_in(series, 0, end), max_fill_periods=max_fill_periods,
        time_zone=frame.report.time_zone, decimal=frame.report.decimal,
        date_order=frame.report.date_order, times_from_rows=frame.report.times_from_rows,
    )


def batches(n: int, size: int, generator: torch.Generator):
    order = torch.randperm(n, generator=generator)
    for k in range(0, n, size):
        yield order[k:k + size]


def fit_teacher(det: Teacher, x: torch.Tensor, cfg: TeacherConfig,
                progress: Optional[Progress] = None) -> dict:
    """The adversarial phase (G against D), then encoder inversion (E, with G refined); one
    seeded generator draws every batch and noise of both, in that order."""
    rng = torch.Generator().manual_seed(cfg.seed)
    history = {"wall_s": {}}
    for phase in (adversarial_phase, inversion_phase):
        started = time.perf_counter()
        name, rows = phase(det, x, cfg, rng, progress)
        history[name] = rows
        history["wall_s"][name] = time.perf_counter() - started
    history["wall_s"]["total"] = sum(history["wall_s"].values())
    history["train_windows"] = len(x)
    history["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return history


def adversarial_phase(det: Teacher, x: torch.Tensor, cfg: TeacherConfig, rng,
                      progress: Optional[Progress]) -> tuple:
    """G learns to fool D on windows of noise: ("adversarial", per-epoch mean losses)."""
    g, d = det.generator, det.discriminator
    bce = nn.BCEWithLogitsLoss()
    opt_g = torch.optim.Adam(g.parameters(), lr=cfg.lr_generator, betas=(0.5, 0.9))
    opt_d = torch.optim.Adam(d.parameters(), lr=cfg.lr_discriminator, betas=(0.5, 0.9))
    rows = []
    for epoch in range(cfg.adversarial_epochs):
        sums, count = {"d_loss": 0.0, "g_loss": 0.0}, 0
        for idx in batches(len(x), cfg.batch_size, rng):
            real = x[idx]
            fake = g(torch.randn(len(idx), x.shape[1], cfg.latent, generator=rng))
            d_loss = (bce(d(real), torch.full((len(idx),), cfg.label_smoothing))
                      + bce(d(fake.detach()), torch.zeros(len(idx))))
            opt_d.zero_grad()
            d_loss.backward()
            opt_d.step()
            g_loss = bce(d(fake), torch.ones(len(idx)))
            opt_g.zero_grad()
            g_loss.backward()
            opt_g.step()
            sums["d_loss"] += float(d_loss.detach()) * len(idx)
            sums["g_loss"] += float(g_loss.detach()) * len(idx)
            count += len(idx)
        rows.append({k: v / count for k, v in sums.items()})
        if progress:
            progress("adversarial", epoch + 1, cfg.adversarial_epochs, rows[-1])
    return "adversarial", rows


def inversion_phase(det: Teacher, x: torch.Tensor, cfg: TeacherConfig, rng,
                    progress: Optional[Progress]) -> tuple:
    """E learns to invert G on noisy real windows (reconstruction + D's features + a latent
    prior), G refined at a lower rate, D frozen: ("inversion", per-epoch mean losses)."""
    g, e, d = det.generator, det.encoder, det.discriminator
    opt_e = torch.optim.Adam(
        [{"params": e.parameters(), "lr": cfg.lr_encoder},
         {"params": g.parameters(), "lr": cfg.lr_generator * cfg.refine_generator_lr_factor}])
    d.requires_grad_(False)
    sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt_e, T_max=max(1, cfg.inversion_epochs))
    rows = []
    for epoch in range(cfg.inversion_epochs):
        sums, count = {"recon": 0.0, "feature": 0.0}, 0
        for idx in batches(len(x), cfg.batch_size, rng):
            real = x[idx]
            z = e(real + cfg.train_noise * torch.randn(real.shape, generator=rng))
            recon = g(z)
            rec_loss = ((recon - real) ** 2).mean()
            feat_loss = ((d.features(recon) - d.features(real)) ** 2).mean()
            loss = rec_loss + cfg.feature_weight * feat_loss + cfg.latent_weight * (z ** 2).mean()
            opt_e.zero_grad()
            loss.backward()
            opt_e.step()
            sums["recon"] += float(rec_loss.detach()) * len(idx)
            sums["feature"] += float(feat_loss.detach()) * len(idx)
            count += len(idx)
        sched.step()
        rows.append({k: v / count for k, v in sums.items()})
        if progress:
            progress("inversion", epoch + 1, cfg.inversion_epochs, rows[-1])
    d.requires_grad_(True)
    return "inversion", rows


# ----------------------------------------------------------------------------------------------
# scoring


@torch.no_grad()
def teacher_reconstruct(det: Teacher, windows: np.ndarray, batch: int = 2048) -> np.ndarray:
    """G(E(x)) [N, L, C] of scaled windows [N, L, C]."""
    det.encoder.eval()
    det.generator.eval()
    out = []
    for k in range(0, len(windows), batch):
        x = torch.from_numpy(np.ascontiguousarray(windows[k:k + batch], dtype=np.float32))
        out.append(det.reconstruct(x).numpy())
    return np.concatenate(out) if out else np.zeros((0,) + windows.shape[1:], np.float32)


def score_windows(det: Teacher, windows: np.ndarray, score: Optional[dict] = None):
    """(scores [N], residuals [N, C]): the teacher under the gateway's score rule (a manifest
    score section; default the uncalibrated whole-window mean)."""
    rule = ScoreRule(score or score_section())
    scores, _, res = rule.score(windows, teacher_reconstruct(det, windows))
    return scores, res


def fit_r2(det: Teacher, windows: np.ndarray) -> np.ndarray:
    """Per channel, the coefficient of determination of G(E(x)) on windows [N, L, C]: 1 - its
    mean squared error / the channel's variance about its mean. 0: the network does no better
    than putting out the channel's mean level; 1: it reconstructs the channel exactly."""
    x = windows.reshape(-1, windows.shape[2]).astype(np.float64)
    error = ((x - teacher_reconstruct(det, windows).reshape(x.shape)) ** 2).mean(axis=0)
    spread = x.var(axis=0)
    return np.where(spread > 0, 1 - error / np.where(spread > 0, spread, 1), np.nan)


class TeacherScorer:
    """The teacher as a network backend (reconstructions), for the gateway's detector."""

    name = "teacher"

    def __init__(self, det: Teacher):
        self.det = det

    def reconstruct(self, windows) -> np.ndarray:
        return teacher_reconstruct(self.det, np.asarray(windows, np.float32))


def score_series(det: Teacher, series: np.ndarray, segments, window: int, hop: int = 1):
    """Causal per-point score: the score of the window ending at each point (NaN before the
    first full window of a segment, and between hops). Returns (scores [T], residuals [T, C])."""
    scores = np.full(len(series), np.nan, np.float64)
    res = np.full(series.shape, np.nan, np.float64)
    x, ends = windows_from(series, segments, window, hop)
    if len(x):
        s, r = score_windows(det, x)
        scores[ends] = s
        res[ends] = r
    return scores, res


def scores_on(model: TrainedModel, values_raw: np.ndarray, segments, hop: int = 1):
    """Score raw values (same channels, same grid) with the model's scaler."""
    return score_series(model.teacher, model.scaler.transform(values_raw), segments,
                        model.teacher.config.window, hop)


# ----------------------------------------------------------------------------------------------
# the model directory

WEIGHT_FILES = {"generator": "generator.pt", "encoder": "encoder.pt",
                "discriminator": "discriminator.pt"}


def save_model(model: TrainedModel, out: Path) -> Path:
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    det = model.teacher
    for part, name in WEIGHT_FILES.items():
        torch.save(getattr(det, part).state_dict(), out / name)
    save_json(out / "config.json", det.config.to_json())
    save_json(out / "scaler.json", model.scaler.to_json())
    save_json(out / "data_summary.json", model.summary)
    save_json(out / "history.json", model.history)
    save_json(out / "model.json", {
        "format": "ganlet.model/1",
        "channels": model.channels, "units": model.units, "period_s": model.period_s,
        "time_col": model.time_col, "spans": model.spans.to_json(),
        "max_fill_periods": model.max_fill_periods, "time_zone": model.time_zone,
        "decimal": model.decimal, "date_order": model.date_order,
        "times_from_rows": model.times_from_rows,
        "segments": [list(s) for s in model.segments],
    })
    arrays = {"series": model.series.astype(np.float32)}
    if model.raw is not None:
        arrays["raw"] = model.raw
    np.savez_compressed(out / "series.npz", **arrays)
    return out


def load_model(path: Path) -> TrainedModel:
    path = Path(path)
    meta_file = path / "model.json"
    if not meta_file.exists():
        raise FileNotFoundError(f"{path} is not a model directory (no model.json); "
                                "create one with `ganlet train DATA --out DIR`")
    meta = json.loads(meta_file.read_text())
    config = TeacherConfig.from_json(json.loads((path / "config.json").read_text()))
    det = Teacher.build(len(meta["channels"]), config)
    for part, name in WEIGHT_FILES.items():
        state = torch.load(path / name, weights_only=True)
        getattr(det, part).load_state_dict(state)
    spans = Spans(**{k: tuple(v) for k, v in meta["spans"].items()})
    with np.load(path / "series.npz", allow_pickle=False) as npz:
        series = npz["series"]
        raw = npz["raw"] if "raw" in npz.files else None
    return TrainedModel(
        teacher=det, scaler=RobustScaler.from_json(json.loads((path / "scaler.json").read_text())),
        channels=meta["channels"], units=meta["units"], period_s=meta["period_s"],
        time_col=meta["time_col"], spans=spans,
        summary=json.loads((path / "data_summary.json").read_text()),
        history=json.loads((path / "history.json").read_text()), series=series, raw=raw,
        segments=[tuple(s) for s in meta["segments"]],
        max_fill_periods=meta.get("max_fill_periods", 5),
        time_zone=meta.get("time_zone", "UTC"), decimal=meta.get("decimal", "."),
        date_order=meta.get("date_order"), times_from_rows=meta.get("times_from_rows", False),
    )


def plot_training(model: TrainedModel, frame: Frame, png: Path) -> Path:
    """Loss curves and the score over the training data (fit and calibration spans)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    h = model.history
    fig, axes = plt.subplots(3, 1, figsize=(10, 8), constrained_layout=True)
    adv = h.get("adversarial", [])
    if adv:
        axes[0].plot([r["d_loss"] for r in adv], label="D loss")
        axes[0].plot([r["g_loss"] for r in adv], label="G loss")
    axes[0].set_title("adversarial phase")
    axes[0].set_xlabel("epoch")
    axes[0].legend()
    inv = h.get("inversion", [])
    axes[1].semilogy([r["recon"] for r in inv], label="reconstruction")
    axes[1].semilogy([r["feature"] for r in inv], label="D-feature")
    axes[1].set_title("encoder inversion (G refined)")
    axes[1].set_xlabel("epoch")
    axes[1].legend()
    end = model.spans.calibration[1]
    scores, _ = score_series(model.teacher, model.series, model.segments,
                             model.teacher.config.window)
    t = frame.times[:end]
    axes[2].plot(t, scores[:end], lw=0.6, color="tab:blue")
    cal = model.spans.calibration
    axes[2].axvspan(frame.times[cal[0]], frame.times[cal[1] - 1], color="tab:orange", alpha=0.15,
                    label="calibration span")
    axes[2].set_yscale("log")
    axes[2].set_title("score over the training data (window ending at each point)")
    axes[2].legend()
    fig.savefig(png, dpi=110)
    plt.close(fig)
    return Path(png)
