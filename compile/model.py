"""The teacher's networks: generator G, discriminator D, encoder E.

G maps a latent sequence to a window, E maps a window back to a latent sequence, D tells real
windows from generated ones. The score is the reconstruction residual of x through E then G
(see DEVELOPERS.md, "the network contract"); D never leaves the workstation.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field, fields, replace

import torch
from torch import nn


@dataclass
class TeacherConfig:
    """Sizes and training recipe. Defaults suit 1k-20k point series of a handful of sensors."""

    window: int = 32
    latent: int = 0                             # 0: auto, max(2, channels // 2) — a bottleneck
    encoder_hidden: tuple = (48, 32)
    generator_hidden: tuple = (24, 48)          # widths grow towards the output
    discriminator_hidden: int = 24
    adversarial_epochs: int = 12
    inversion_epochs: int = 50
    batch_size: int = 64
    max_train_windows: int = 3000               # stride the windows beyond this (speed)
    lr_generator: float = 1e-3
    lr_discriminator: float = 5e-4
    lr_encoder: float = 2e-3
    refine_generator_lr_factor: float = 0.3     # G keeps learning, more slowly, while E is fitted
    feature_weight: float = 0.1                 # discriminator-feature term in the inversion loss
    latent_weight: float = 1e-3                 # keeps E(x) near the prior G was trained on
    label_smoothing: float = 0.9                # one-sided, for D's real targets
    train_noise: float = 0.02                   # input noise while fitting E (denoising)
    seed: int = 0

    def to_json(self) -> dict:
        d = asdict(self)
        d["encoder_hidden"] = list(self.encoder_hidden)
        d["generator_hidden"] = list(self.generator_hidden)
        return d

    @classmethod
    def from_json(cls, d: dict) -> TeacherConfig:
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(d) - known)
        if unknown:
            raise ValueError(f"unknown config field(s): {', '.join(unknown)}; known fields are "
                             f"{', '.join(sorted(known))}")
        d = dict(d)
        for key in ("encoder_hidden", "generator_hidden"):
            if key in d:
                d[key] = tuple(int(v) for v in d[key])
        return cls(**d)


class LSTMStack(nn.Module):
    """Single-layer LSTMs of given widths in sequence, then a linear head per time step."""

    def __init__(self, n_in: int, hidden: tuple, n_out: int):
        super().__init__()
        widths = [n_in, *hidden]
        self.layers = nn.ModuleList(
            nn.LSTM(widths[k], widths[k + 1], batch_first=True) for k in range(len(hidden))
        )
        self.head = nn.Linear(widths[-1], n_out)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        for layer in self.layers:
            x, _ = layer(x)
        return self.head(x)


class Discriminator(nn.Module):
    def __init__(self, n_channels: int, hidden: int):
        super().__init__()
        self.lstm = nn.LSTM(n_channels, hidden, batch_first=True)
        self.head = nn.Linear(hidden, 1)

    def features(self, x: torch.Tensor) -> torch.Tensor:
        out, _ = self.lstm(x)
        return out.mean(dim=1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.features(x)).squeeze(-1)


@dataclass
class Teacher:
    generator: LSTMStack
    encoder: LSTMStack
    discriminator: Discriminator
    config: TeacherConfig = field(default_factory=TeacherConfig)

    @classmethod
    def build(cls, n_channels: int, config: TeacherConfig) -> Teacher:
        config = resolved(config, n_channels)
        return cls(
            generator=LSTMStack(config.latent, tuple(config.generator_hidden), n_channels),
            encoder=LSTMStack(n_channels, tuple(config.encoder_hidden), config.latent),
            discriminator=Discriminator(n_channels, config.discriminator_hidden),
            config=config,
        )

    def reconstruct(self, x: torch.Tensor) -> torch.Tensor:
        return self.generator(self.encoder(x))


def resolved(config: TeacherConfig, n_channels: int) -> TeacherConfig:
    """Fill automatic sizes. A per-step latent narrower than the channels keeps E-G from
    learning the identity, so a channel that breaks the others' pattern leaves a residual."""
    if config.latent > 0:
        return config
    return replace(config, latent=max(2, n_channels // 2))


def residuals(x: torch.Tensor, recon: torch.Tensor) -> torch.Tensor:
    """Per-channel residual of each window: mean over time of the squared error -> [N, C]."""
    return ((x - recon) ** 2).mean(dim=1)
