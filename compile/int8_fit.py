"""Quantisation-aware fine-tuning: float weights whose int8 rounding reproduces the network.

Rounding every weight to int8 (quantise.py, max|row| / 127 a step) moves each reconstruction a
little. The shipped score divides each channel's residual by that channel's normal error
(runtime/score.py), so on a channel the network reconstructs well a small move counts for much:
on the demo teacher (seed 7) plain rounding left the int8 network's scores on the calibration
span at Spearman 0.72 against the fp32 network's, and at seed 5 the gateway's test-span scores
failed the parity check's rank bar against the teacher (0.89 < 0.95).

So before quantising, the network is trained for a few epochs *through* the rounding (fake
quantisation with the straight-through estimator, common practice for quantisation-aware
training): each weight matrix is rounded exactly as quantise_weights will round it, the gradient
passes the rounding unchanged, and the loss is the rounded network's distance to the fp32
network's own reconstructions of the distillation windows (distil.py: real, synthesised and
perturbed windows, so large errors are matched too), each channel in units of the fp32
network's RMS error on that channel: the units the score uses. The result is then quantised by
quantise_weights as before: the same int8 format and ONNX graph, only better-chosen numbers.

The fitted weights ship only when their int8 rounding, run through the gateway's own numpy
network, is closer to the fp32 network than plain rounding on the calibration span's windows
(which the fit never sees); otherwise plain rounding ships (the report says which).
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np
import torch
from torch.func import functional_call

from ganlet.compile.distil import DistilConfig, distillation_windows
from ganlet.compile.layout import network_weights, stacks_from_weights
from ganlet.compile.quantise import QMAX, QMIN, SYMMETRIC_MAX, dequantise_weights, quantise_weights
from ganlet.compile.train import TrainedModel, set_seed
from ganlet.runtime.lstm import Network

CHECK_WINDOWS = 1000   # windows the plain / fitted comparison is run on (strided in time)


@dataclass
class Int8FitConfig:
    epochs: int = 6            # 0: plain rounding
    lr: float = 1e-4           # small: the weights only move by about a rounding step
    batch_size: int = 128
    seed: int = 0


@dataclass
class Int8Fit:
    weights: dict              # float32 contract dict to quantise (the fp32 one when not kept)
    error_plain: float         # mean squared error in normal-error units, plain rounding
    error_fitted: float        # the same for the fitted weights' rounding
    kept: bool                 # the fitted weights ship
    epochs: int
    seconds: float

    def report(self) -> dict:
        return {"epochs": self.epochs, "error_plain": self.error_plain,
                "error_fitted": self.error_fitted, "kept": self.kept,
                "seconds": self.seconds}


def fake_int8(w: torch.Tensor) -> torch.Tensor:
    """w rounded as quantise_weights rounds it (symmetric, one scale per row, round half to
    even, saturated), with the straight-through gradient: forward the rounded value,
    backward the identity."""
    peak = w.detach().abs().amax(dim=1, keepdim=True)
    scale = peak / SYMMETRIC_MAX
    scale = torch.where(scale == 0, torch.ones_like(scale), scale)
    rounded = torch.clamp(torch.round(w / scale), QMIN, QMAX) * scale
    return w + (rounded - w).detach()


def _rounded_forward(module: torch.nn.Module, x: torch.Tensor) -> torch.Tensor:
    params = {name: fake_int8(p) if "weight" in name else p
              for name, p in module.named_parameters()}
    return functional_call(module, params, (x,))


def _strided(windows: np.ndarray) -> np.ndarray:
    return windows[::max(1, int(np.ceil(len(windows) / CHECK_WINDOWS)))]


def normal_error(fp32: dict, windows: np.ndarray) -> np.ndarray:
    """Per channel: the fp32 network's RMS reconstruction error on `windows` (floored)."""
    recon = Network(fp32).reconstruct(windows)
    return np.maximum(np.sqrt(np.mean((windows - recon) ** 2, axis=(0, 1))), 1e-12)


def int8_error(weights: dict, windows: np.ndarray, target: np.ndarray,
               unit: np.ndarray) -> float:
    """Mean squared distance, in `unit`s per channel, of the int8 rounding of `weights` (as the
    gateway's numpy network computes it) from `target` reconstructions."""
    device = dequantise_weights(quantise_weights(weights))
    recon = Network(device).reconstruct(windows)
    return float(np.mean(((recon - target) / unit) ** 2))


def fit_int8(model: TrainedModel, fp32: dict, cfg: Int8FitConfig = Int8FitConfig()) -> Int8Fit:
    """Fine-tune `fp32` (a contract dict: the teacher's own networks or a distilled student)
    through the int8 rounding; see the module docstring."""
    started = time.perf_counter()
    x = distillation_windows(model, DistilConfig(seed=cfg.seed))
    unit = normal_error(fp32, _strided(x))
    check = _strided(model.windows_of(model.spans.calibration))  # windows it is not fitted on
    target = Network(fp32).reconstruct(check)
    plain = int8_error(fp32, check, target, unit)
    if cfg.epochs <= 0:
        return Int8Fit(fp32, plain, plain, False, 0, time.perf_counter() - started)
    fitted = _train_through_rounding(fp32, x, unit, cfg)
    error = int8_error(fitted, check, target, unit)
    kept = error < plain
    return Int8Fit(fitted if kept else fp32, plain, error, kept, cfg.epochs,
                   time.perf_counter() - started)


def _train_through_rounding(fp32: dict, windows: np.ndarray, unit: np.ndarray,
                            cfg: Int8FitConfig) -> dict:
    set_seed(cfg.seed)
    encoder, generator = stacks_from_weights(fp32)
    xt = torch.from_numpy(np.asarray(windows, np.float32))
    with torch.no_grad():
        target = torch.cat([generator(encoder(xt[k:k + 2048])) for k in range(0, len(xt), 2048)])
    scale = torch.from_numpy(np.asarray(unit, np.float32))
    params = list(encoder.parameters()) + list(generator.parameters())
    opt = torch.optim.Adam(params, lr=cfg.lr)
    sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=cfg.epochs)
    order_rng = torch.Generator().manual_seed(cfg.seed)
    for _ in range(cfg.epochs):
        order = torch.randperm(len(xt), generator=order_rng)
        for k in range(0, len(xt), cfg.batch_size):
            idx = order[k:k + cfg.batch_size]
            recon = _rounded_forward(generator, _rounded_forward(encoder, xt[idx]))
            loss = (((recon - target[idx]) / scale) ** 2).mean()
            opt.zero_grad()
            loss.backward()
            opt.step()
        sched.step()
    return network_weights(encoder.layers, encoder.head, generator.layers, generator.head)
