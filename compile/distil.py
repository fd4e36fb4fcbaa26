"""Knowledge distillation: a board-sized student E_s, G_s learns to reproduce the teacher.

The teacher labels three kinds of windows: the real training windows, windows its own generator
synthesises from the prior (more data than a short history gives), and perturbed real windows
(spikes, offsets, a frozen channel, noise) so that the student also copies the teacher's
*large* scores, the ones that raise alerts. The loss matches the teacher's reconstruction and
its per-channel residuals in log space (scores span decades).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Callable, Optional

import numpy as np
import torch

from ganlet.compile.layout import network_weights
from ganlet.compile.model import LSTMStack, residuals
from ganlet.compile.sizing import StudentPlan
from ganlet.compile.train import TrainedModel, set_seed


@dataclass
class DistilConfig:
    epochs: int = 80
    batch_size: int = 128
    lr: float = 3e-3
    synthetic_factor: float = 1.0      # generated windows per real window
    perturbed_factor: float = 0.5      # perturbed real windows per real window
    max_real_windows: int = 3000
    residual_weight: float = 0.5
    seed: int = 0


@dataclass
class Student:
    encoder: LSTMStack
    generator: LSTMStack
    plan: StudentPlan
    history: list = field(default_factory=list)
    seconds: float = 0.0

    def reconstruct(self, x: torch.Tensor) -> torch.Tensor:
        return self.generator(self.encoder(x))

    def weights(self) -> dict:
        """The student as the float32 weight dict of the network contract (ONNX layout)."""
        return network_weights(self.encoder.layers, self.encoder.head,
                               self.generator.layers, self.generator.head)


def perturb(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Off-normal versions of real windows: the teacher's answer there is worth copying too."""
    out = x.copy()
    n, length, channels = out.shape
    kind = rng.integers(0, 4, size=n)
    ch = rng.integers(0, channels, size=n)
    for i in range(n):
        c = ch[i]
        if kind[i] == 0:      # spike burst
            at = rng.integers(0, length, size=max(1, length // 16))
            out[i, at, c] += rng.choice([-1, 1]) * rng.uniform(3, 10)
        elif kind[i] == 1:    # level shift over the window's tail
            start = rng.integers(0, length)
            out[i, start:, c] += rng.choice([-1, 1]) * rng.uniform(1, 5)
        elif kind[i] == 2:    # frozen channel
            start = rng.integers(0, length // 2)
            out[i, start:, c] = out[i, start, c]
        else:                 # noise
            out[i, :, c] += rng.normal(0, rng.uniform(0.3, 2.0), size=length)
    return out.astype(np.float32)


def distillation_windows(model: TrainedModel, cfg: DistilConfig) -> np.ndarray:
    window = model.teacher.config.window
    real = model.windows_of(model.spans.fit)
    if len(real) > cfg.max_real_windows:
        real = real[:: int(np.ceil(len(real) / cfg.max_real_windows))]
    rng = np.random.default_rng(cfg.seed)
    gen = torch.Generator().manual_seed(cfg.seed)
    n_syn = int(len(real) * cfg.synthetic_factor)
    with torch.no_grad():
        z = torch.randn(n_syn, window, model.teacher.config.latent, generator=gen)
        synthetic = model.teacher.generator.eval()(z).numpy().astype(np.float32)
    n_pert = int(len(real) * cfg.perturbed_factor)
    perturbed = perturb(real[rng.integers(0, len(real), size=n_pert)], rng)
    return np.concatenate([real, synthetic, perturbed])


def distil(model: TrainedModel, plan: StudentPlan, cfg: Optional[DistilConfig] = None,
           progress: Optional[Callable[[str, int, int, dict], None]] = None) -> Student:
    cfg = cfg or DistilConfig()
    started = time.perf_counter()
    set_seed(cfg.seed)
    teacher = model.teacher
    n_channels = len(model.channels)
    x = distillation_windows(model, cfg)
    with torch.no_grad():
        xt = torch.from_numpy(x)
        teacher.encoder.eval()
        teacher.generator.eval()
        target = torch.cat([teacher.reconstruct(xt[k:k + 2048]) for k in range(0, len(xt), 2048)])
        target_res = residuals(xt, target)
    encoder = LSTMStack(n_channels, tuple(plan.encoder_hidden), plan.latent)
    generator = LSTMStack(plan.latent, tuple(plan.generator_hidden), n_channels)
    params = list(encoder.parameters()) + list(generator.parameters())
    opt = torch.optim.Adam(params, lr=cfg.lr)
    sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=max(1, cfg.epochs))
    rng = torch.Generator().manual_seed(cfg.seed)
    history = []
    for epoch in range(cfg.epochs):
        order = torch.randperm(len(xt), generator=rng)
        total, count = 0.0, 0
        for k in range(0, len(xt), cfg.batch_size):
            idx = order[k:k + cfg.batch_size]
            recon = generator(encoder(xt[idx]))
            res = residuals(xt[idx], recon)
            loss = ((recon - target[idx]) ** 2).mean() + cfg.residual_weight * (
                (torch.log1p(res) - torch.log1p(target_res[idx])) ** 2).mean()
            opt.zero_grad()
            loss.backward()
            opt.step()
            total += float(loss.detach()) * len(idx)
            count += len(idx)
        sched.step()
        history.append({"loss": total / count})
        if progress:
            progress("distil", epoch + 1, cfg.epochs, history[-1])
    encoder.eval()
    generator.eval()
    return Student(encoder, generator, plan, history, time.perf_counter() - started)
