"""Whole steps as the CLI runs them: file in, directory out. Tests call these directly.

train:   CSV/Parquet -> frame -> scaler -> teacher -> model directory
compile: model directory -> size -> distil -> quantise -> calibrate -> export -> pack -> bundle
"""

from __future__ import annotations

import hashlib
import json
import shlex
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Callable, Optional

import numpy as np

try:
    import tomllib
except ModuleNotFoundError:   # Python < 3.11
    import tomli as tomllib

from ganlet.compile import __version__
from ganlet.compile.boards import DEFAULT_BOARD, Board, load_board
from ganlet.compile.calibrate import (
    DEFAULT_ALARMS_PER_WEEK,
    DRIFT_ACTION,
    Calibration,
    agreement_report,
    calibrate,
)
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
from ganlet.compile.distil import DistilConfig, distil
from ganlet.compile.export import build_onnx
from ganlet.compile.model import TeacherConfig
from ganlet.compile.pack import check_name, check_out, pack_bundle, service_unit
from ganlet.compile.pack import install_text as install_notes
from ganlet.compile.quantise import dequantise_weights, quantisation_report, quantise_weights
from ganlet.compile.sizing import StudentPlan, size_student
from ganlet.compile.train import TrainedModel, load_model, plot_training, save_model, train
from ganlet.runtime.drift import DRIFT_ACTIONS
from ganlet.runtime.manifest import MANIFEST_NAME, build_manifest
from ganlet.runtime.scorer import NetworkScorer

STUDENTS_DIR = "students"   # in a model directory: the fp32 students of its bundles

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
    config: Optional[TeacherConfig] = None      # used as is when given (tests, demo, fleet)
    decimal: str = "."                           # input dialect, as the gateway reads it
    tz: Optional[str] = None
    date_order: Optional[str] = None             # "dayfirst" | "monthfirst"

    def intake(self) -> IntakeOptions:
        if self.max_fill < 0:
            raise IntakeError("--max-fill must be 0 or more")
        return IntakeOptions(sep=self.sep, time_col=self.time_col, channels=self.channels,
                             exclude=tuple(self.exclude), period_s=parse_period(self.period),
                             max_fill_periods=self.max_fill, units=dict(self.units),
                             decimal=self.decimal, tz=self.tz, date_order=self.date_order)

    def detector_config(self) -> TeacherConfig:
        cfg = self.config or TeacherConfig()
        if self.config_file is not None:
            cfg = TeacherConfig.from_json(read_config_file(Path(self.config_file)))
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
        return (f"trained on {h['train_windows']} windows of {self.model.teacher.config.window} "
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


# ----------------------------------------------------------------------------------------------
# compile: size -> distil -> quantise -> calibrate -> export -> pack, each stage taking the
# previous stage's output


@dataclass
class CompileOptions:
    board: Optional[str] = None
    threshold: str = "pot"
    distil: DistilConfig = field(default_factory=DistilConfig)
    archive: bool = False
    sign_key: Optional[bytes] = None       # HMAC secret -> manifest.hmac
    ed25519_key: Optional[bytes] = None    # PEM private key -> manifest.ed25519
    name: Optional[str] = None
    alerting: dict = field(default_factory=dict)   # overrides of the default alert settings
    alarms_per_week: float = DEFAULT_ALARMS_PER_WEEK   # false-alarm budget on normal data
    drift: str = DRIFT_ACTION                  # "report" a drift, or "recentre" it away


@dataclass
class CompileResult:
    bundle: Path
    archive: Optional[Path]
    plan: StudentPlan
    board: Board
    report: dict

    def describe(self) -> str:
        r = self.report
        ts = r["teacher_vs_student"]
        qs = r["student_vs_int8"]
        return "\n".join([
            f"distilled in {r['seconds']['distil']:.1f} s; teacher vs student on the calibration "
            f"span: Spearman {ts['spearman']:.4f}, max abs error {ts['max_abs_error']:.3g}",
            f"int8 vs fp32 student: Spearman {qs['spearman']:.5f}, max rel error "
            f"{qs['max_rel_error']:.2e}; weights {r['quantisation']['bytes_before']} -> "
            f"{r['quantisation']['bytes_after']} bytes",
            f"score: {r['regimes']['regimes']} operating regime(s); threshold: "
            f"{r['threshold_kind']} calibrated on {r['calibration_scores']} scores for at most "
            f"{r['false_alarms']['budget_per_week']:g} false alarm(s) per week on normal data",
            f"bundle {self.bundle}: {r['bytes']['model_and_weights'] / 1024:.1f} KiB without "
            f"the runtime copy ({r['bytes']['total'] / 1024:.1f} KiB in all)"
            + (f"; archive {self.archive}" if self.archive else ""),
        ])


def compile_model(model: TrainedModel, out: Path, options: CompileOptions,
                  progress=None, echo: Echo = lambda _: None,
                  model_dir: Optional[Path] = None) -> CompileResult:
    """One teacher -> one bundle for one board. model_dir (the teacher's folder) receives the
    workstation's record of the bundle (the fp32 student, for `ganlet verify --model`)."""
    name = check_name(options.name or "detector")
    out = check_out(out)
    if options.drift not in DRIFT_ACTIONS:
        raise ValueError(f"--drift {options.drift!r}: choose {' or '.join(DRIFT_ACTIONS)}")
    board = load_board(options.board or DEFAULT_BOARD)
    cfg = model.teacher.config
    timings = {}
    plan = size_student(board, len(model.channels), cfg.latent, cfg.window, model.period_s)
    echo(plan.describe())
    started = time.perf_counter()
    student = distil(model, plan, options.distil, progress=progress)
    timings["distil"] = time.perf_counter() - started
    started = time.perf_counter()
    fp32 = student.weights()
    qweights = quantise_weights(fp32)
    timings["quantise"] = time.perf_counter() - started
    started = time.perf_counter()
    device = dequantise_weights(qweights)
    cal = calibrate(model, NetworkScorer(device, "device"), plan.window, plan.hop,
                    options.threshold, options.alarms_per_week, options.alerting,
                    options.distil.seed, options.drift)
    cal.report.update(agreement_report(model, cal.score, fp32, device))
    timings["calibrate"] = time.perf_counter() - started
    started = time.perf_counter()
    manifest = bundle_manifest(model, plan, board, cal, name)
    packed = pack_bundle(out, manifest, qweights, build_onnx(qweights, len(model.channels)),
                         install_text(model, board, name, out, signing_kinds(options)),
                         board.storage_budget_kb, options.sign_key, options.archive,
                         ed25519_key=options.ed25519_key,
                         unit=service_unit(name, signing_kinds(options)))
    timings["pack"] = time.perf_counter() - started
    report = {**cal.report, "seconds": timings, "bytes": packed.bytes,
              "quantisation": {k: v for k, v in quantisation_report(fp32, qweights).items()
                               if k != "keys"}}
    if model_dir is not None:
        record_student(Path(model_dir), out, fp32, report)
    return CompileResult(out, packed.archive, plan, board, report)


def bundle_manifest(model: TrainedModel, plan: StudentPlan, board: Board, cal: Calibration,
                    name: str) -> dict:
    return build_manifest(
        name=name, time_column=model.time_col, channels=list(zip(model.channels, model.units)),
        period_s=model.period_s, max_gap_periods=model.max_fill_periods,
        scaler=model.scaler.to_json(), window=plan.window, hop=plan.hop,
        network={"encoder": plan.encoder_hidden, "latent": plan.latent,
                 "generator": plan.generator_hidden},
        score=cal.score, threshold=cal.policy, alerting=cal.alerting, drift=cal.drift,
        false_alarms=cal.false_alarms, time_zone=model.time_zone,
        board={"name": board.name, "cpu_class": board.cpu_class,
               "budget": {"storage_kb": board.storage_budget_kb, "ram_mb": board.ram_budget_mb,
                          "hop_ms": plan.hop_seconds_budget * 1e3,
                          "mflops_single_core": board.mflops_single_core,
                          "onnxruntime": board.onnxruntime},
               "estimate": {"flops_per_hop": plan.flops_per_hop,
                            "hop_ms": plan.hop_seconds_estimate * 1e3,
                            "ram_mb": plan.ram_bytes / 2**20,
                            "storage_kb": plan.storage_bytes / 1024,
                            "weights_bytes": plan.weights_bytes}},
        tool_version=__version__)


def signing_kinds(options: CompileOptions) -> list:
    """The signatures this compile writes (the manifest's "signing" list, in its order)."""
    return [kind for kind, key in (("hmac-sha256", options.sign_key),
                                   ("ed25519", options.ed25519_key)) if key is not None]


def install_text(model: TrainedModel, board: Board, name: str, out: Path,
                 signing=()) -> str:
    channels = ", ".join(c + (" (rate)" if f == "rate" else "")
                         for c, f in zip(model.channels, model.scaler.features))
    return install_notes(name, board.name, shlex.quote(Path(out).name), model.time_col,
                         channels, model.period_s, signing)


def record_student(model_dir: Path, bundle: Path, fp32: dict, report: dict) -> Path:
    """The workstation's record of a bundle, beside its teacher and keyed by the bundle id: the
    fp32 student (for `ganlet verify --model`) and the compile report. Nothing of it goes into
    the bundle."""
    bundle_id = hashlib.sha256((bundle / MANIFEST_NAME).read_bytes()).hexdigest()
    students = model_dir / STUDENTS_DIR
    students.mkdir(exist_ok=True)
    np.savez(students / f"{bundle_id[:16]}.npz", **fp32)
    save_json(students / f"{bundle_id[:16]}.json", {"bundle_id": bundle_id, "report": report})
    return students / f"{bundle_id[:16]}.npz"


def student_file(model_dir: Path, bundle_id: str) -> Path:
    """Where record_student keeps the fp32 student of a bundle."""
    return Path(model_dir) / STUDENTS_DIR / f"{bundle_id[:16]}.npz"


def compile_dir(model_dir: Path, out: Path, options: CompileOptions, progress=None,
                echo: Echo = lambda _: None) -> CompileResult:
    return compile_model(load_model(model_dir), out, options, progress=progress, echo=echo,
                         model_dir=model_dir)
