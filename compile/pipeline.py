"""Whole steps as the CLI runs them: file in, directory out. Tests call these directly."""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Callable, Optional

try:
    import tomllib
except ModuleNotFoundError:   # Python < 3.11
    import tomli as tomllib

from ganlet.compile.data import (
    IntakeError,
    IntakeOptions,
    choose_window,
    load_frame,
    parse_period,
    save_json,
    split_spans,
    trending_channels,
)
from ganlet.compile.model import DetectorConfig
from ganlet.compile.train import TrainedModel, plot_training, save_model, train

Echo = Callable[[str], None]


@dataclass
class TrainOptions:
    sep: Optional[str] = None
    time_col: Optional[str] = None
    channels: Optional[list] = None
    exclude: list = field(default_factory=list)
    units: dict = field(default_factory=dict)
    period: Optional[str] = None
    max_fill: int = 5
    train_until: object = None
    calibration: float = 0.2
    window: Optional[int] = None
    config_file: Optional[Path] = None
    adversarial_epochs: Optional[int] = None
    inversion_epochs: Optional[int] = None
    seed: Optional[int] = None                   # None: the config's own seed
    rate: list = field(default_factory=list)     # channels watched by their change per period
    config: Optional[DetectorConfig] = None      # used as is when given (tests, demo, fleet)

    def intake(self) -> IntakeOptions:
        if self.max_fill < 0:
            raise IntakeError("--max-fill must be 0 or more")
        return IntakeOptions(sep=self.sep, time_col=self.time_col, channels=self.channels,
                             exclude=tuple(self.exclude), period_s=parse_period(self.period),
                             max_fill_periods=self.max_fill, units=dict(self.units))

    def detector_config(self) -> DetectorConfig:
        cfg = self.config or DetectorConfig()
        if self.config_file is not None:
            cfg = DetectorConfig.from_json(read_config_file(Path(self.config_file)))
        if self.window is not None:
            cfg = replace(cfg, window=self.window)
        if self.adversarial_epochs is not None:
            cfg = replace(cfg, adversarial_epochs=self.adversarial_epochs)
        if self.inversion_epochs is not None:
            cfg = replace(cfg, inversion_epochs=self.inversion_epochs)
        if self.seed is not None:
            cfg = replace(cfg, seed=self.seed)
        if cfg.window < 2:
            raise IntakeError("--window must be at least 2")
        return cfg


def read_config_file(path: Path) -> dict:
    if not path.exists():
        raise IntakeError(f"config file {path} not found")
    text = path.read_text()
    try:
        return tomllib.loads(text) if path.suffix == ".toml" else json.loads(text)
    except (json.JSONDecodeError, tomllib.TOMLDecodeError) as exc:
        raise IntakeError(f"config file {path}: {exc}") from exc


@dataclass
class TrainResult:
    model: TrainedModel
    out: Path
    seconds: float

    def describe(self) -> str:
        h = self.model.history
        return (f"trained on {h['train_windows']} windows of {self.model.detector.config.window} "
                f"in {self.seconds:.1f} s (peak RSS {h['peak_rss_mb']:.0f} MB); "
                f"model in {self.out}")


def rate_channels(frame, spans, asked: list, echo: Echo) -> list:
    """Check --rate names; suggest it for channels that trend over the fit span."""
    unknown = [c for c in asked if c not in frame.channels]
    if unknown:
        raise IntakeError(f"--rate {', '.join(unknown)}: no such channel; the channels are "
                          f"{', '.join(frame.channels)}")
    for name, rho in trending_channels(frame, spans.fit).items():
        if name not in asked:
            echo(f"note: channel {name!r} trends over the fit span (Spearman rho {rho:+.2f}); "
                 f"if it is a slow quantity such as a temperature, --rate {name} watches its "
                 "change per period instead of its level")
    return list(asked)


def train_from_file(data: Path, out: Path, options: TrainOptions,
                    progress=None, echo: Echo = lambda _: None) -> TrainResult:
    started = time.perf_counter()
    frame = load_frame(data, options.intake())
    echo(frame.report.summary())
    config = options.detector_config()
    spans = split_spans(frame, options.train_until, options.calibration)
    window = choose_window(frame, spans, config.window)
    if window != config.window:
        config = replace(config, window=window)
    rate = rate_channels(frame, spans, options.rate, echo)
    model = train(frame, spans, config, progress=progress, max_fill_periods=options.max_fill,
                  rate_channels=rate)
    save_model(model, out)
    plot_training(model, frame, Path(out) / "training.png")
    seconds = time.perf_counter() - started
    save_json(Path(out) / "run.json", {"data": str(data), "seconds": seconds})
    return TrainResult(model=model, out=Path(out), seconds=seconds)
