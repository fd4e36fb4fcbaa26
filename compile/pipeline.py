"""Whole steps as the CLI runs them: file in, directory out. Tests call these directly.

train:   CSV/Parquet -> frame -> scaler -> teacher -> model directory
compile: model directory -> size -> distil -> quantise -> calibrate -> export -> pack -> bundle
"""

from __future__ import annotations

import hashlib
import json
import shlex
import time
from dataclasses import astuple, dataclass, field, replace
from pathlib import Path
from typing import Callable, Optional

import numpy as np

try:
    import tomllib
except ModuleNotFoundError:   # Python < 3.11
    import tomli as tomllib

from ganlet.compile import __version__
from ganlet.compile.boards import DEFAULT_BOARD, Board, list_boards, load_board
from ganlet.compile.calibrate import (
    DEFAULT_ALARMS_PER_WEEK,
    DRIFT_ACTION,
    Calibration,
    agreement_report,
    calibrate,
    cusum_line,
    held_line,
    tails_text,
)
from ganlet.compile.data import (
    IntakeError,
    IntakeOptions,
    choose_window,
    load_frame,
    parse_period,
    refuse_missing_codes,
    save_json,
    spans_summary,
    split_spans,
    trending_channels,
    without_constant_channels,
)
from ganlet.compile.distil import DistilConfig
from ganlet.compile.export import build_onnx
from ganlet.compile.fidelity import fault_set, fidelity, fidelity_text
from ganlet.compile.int8_fit import Int8FitConfig, fit_int8
from ganlet.compile.model import TeacherConfig
from ganlet.compile.pack import check_name, check_out, pack_bundle, service_unit
from ganlet.compile.pack import install_text as install_notes
from ganlet.compile.quantise import dequantise_weights, quantisation_report, quantise_weights
from ganlet.compile.sizing import StudentPlan, size_student
from ganlet.compile.student_cache import StudentStore
from ganlet.compile.threads import torch_threads
from ganlet.compile.train import TrainedModel, load_model, plot_training, save_model, train
from ganlet.runtime.drift import DRIFT_ACTIONS
from ganlet.runtime.manifest import MANIFEST_NAME, build_manifest
from ganlet.runtime.scorer import NetworkScorer
from ganlet.runtime.thresholds import extrapolation_note

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
    threads: Optional[int] = None               # torch + BLAS threads; None: compile/threads.py

    def intake(self) -> IntakeOptions:
        if self.max_fill < 0:
            raise IntakeError("--max-fill must be 0 or more")
        return IntakeOptions(sep=self.sep, time_col=self.time_col, channels=self.channels,
                             exclude=tuple(self.exclude), period_s=parse_period(self.period),
                             max_fill_periods=self.max_fill, units=dict(self.units),
                             decimal=self.decimal, tz=self.tz, date_order=self.date_order,
                             times_from_rows=self.period is not None)

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
        return "\n".join(learned_summary(h) + [
            f"trained on {h['train_windows']} windows of {self.model.teacher.config.window} "
            f"in {self.seconds:.1f} s (peak RSS {h['peak_rss_mb']:.0f} MB); model in {self.out}"])


# Below this R2 on every channel the network has learned no more than the channels' levels
# (a tenth of a channel's variance: a judgement, not a measured optimum).
LEARNED_R2 = 0.1


def learned_summary(history: dict) -> list:
    """Lines saying how much of each channel the network reconstructs on the windows it was
    fitted on (train.fit_r2), and a note when it learned no more than the channels' levels."""
    r2 = history.get("fit_r2")
    if not r2:
        return []
    return ["learned   R2 of the reconstruction on the fit span: " + ", ".join(
        f"{name} {value:.2f}" for name, value in r2.items())] + learned_note(history)


def learned_note(history: dict) -> list:
    """The note of learned_summary, when no channel reaches LEARNED_R2 (else none)."""
    r2 = history.get("fit_r2")
    if not r2 or max(r2.values()) >= LEARNED_R2:
        return []
    return [f"note: the network reconstructs no channel better than R2 {LEARNED_R2} on the "
            f"{history['train_windows']} windows it was fitted on: it puts out about each "
            "channel's training level, so the score measures how far each channel's newest "
            "readings sit from that level, in units of its normal error. Steps, offsets and "
            "spikes still score; a broken relation between channels that leaves every level "
            "where it was does not. A longer history lets the network learn the relations."]


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
    echo(spans_summary(frame, spans))
    refuse_missing_codes(frame, spans)
    frame, notes = without_constant_channels(frame, spans, named=bool(options.channels))
    for note in notes:
        echo(f"note: {note}")
    window = choose_window(frame, spans, config.window)
    if window != config.window:
        config = replace(config, window=window)
    rate = rate_channels(frame, spans, options.rate, echo)
    with torch_threads(options.threads):
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
    drift: str = DRIFT_ACTION                  # "recentre" a drift away, or "report" it only
    threads: Optional[int] = None                  # torch + BLAS threads; None: compile/threads.py
    int8: Int8FitConfig = field(default_factory=Int8FitConfig)  # epochs 0: plain rounding


STUDENT_SOURCES = {"teacher": "the teacher's own networks (nothing to distil)",
                   "cache": "the student distilled earlier for this teacher, plan and config "
                            "(reused from the model directory)",
                   "distilled": "distilled in {seconds:.1f} s"}


def int8_fit_text(fit: dict) -> str:
    """compile's line on the quantisation-aware fine-tuning (int8_fit.py)."""
    if not fit["epochs"]:
        return "int8: plain rounding (--int8-epochs 0)"
    gain = fit["error_plain"] / max(fit["error_fitted"], 1e-30)
    verdict = (f"{gain:.3g}x closer than plain rounding, kept" if fit["kept"]
               else "no closer than plain rounding, which ships")
    return (f"int8 fit: {fit['epochs']} epochs through the rounding in {fit['seconds']:.1f} s; "
            f"on the calibration windows its reconstructions are {verdict} (mean squared "
            f"distance to fp32 in normal-error units {fit['error_plain']:.3g} -> "
            f"{fit['error_fitted']:.3g})")


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
        source = STUDENT_SOURCES[r["student"]["source"]].format(seconds=r["seconds"]["distil"])
        lines = [
            f"{self.board.name}: {self.plan.network_text()}",
            f"{source}; teacher vs student on the calibration span: Spearman "
            f"{ts['spearman']:.4f}, max abs error {ts['max_abs_error']:.3g}",
            f"int8 vs fp32 student: Spearman {qs['spearman']:.5f}, max rel error "
            f"{qs['max_rel_error']:.2e}; weights {r['quantisation']['bytes_before']} -> "
            f"{r['quantisation']['bytes_after']} bytes",
            int8_fit_text(r["int8_fit"]),
            f"fidelity: {fidelity_text(r['fidelity'])}",
        ]
        if self.plan.teacher_refused:
            lines.append(f"price of {self.board.name}: it cannot hold the teacher itself ("
                         + "; ".join(self.plan.teacher_refused) + "), so it runs this smaller "
                         "student at the fidelity above")
        lines += [
            f"score: {r['regimes']['regimes']} operating regime(s), each channel's normal "
            f"error from the {r['calibration_scores']} calibration-span windows"
            f"{tails_text(r['regimes'])}; threshold: "
            f"{r['threshold_kind']} for at most {r['false_alarms']['budget_per_week']:g} false "
            "alarm(s) per week on normal data" + extrapolation_note(r["false_alarms"]),
            cusum_line(r["cusum"]),
            held_line(r["held"]),
            f"bundle {self.bundle}: {r['bytes']['model_and_weights'] / 1024:.1f} KiB without "
            f"the runtime copy ({r['bytes']['total'] / 1024:.1f} KiB in all)"
            + (f"; archive {self.archive}" if self.archive else ""),
        ]
        return "\n".join(lines)


def plan_board(model: TrainedModel, board: Board) -> StudentPlan:
    """The board's rung of the ladder for this teacher and the data's own period."""
    cfg = model.teacher.config
    return size_student(board, len(model.channels), cfg.latent, cfg.window, model.period_s,
                        (cfg.encoder_hidden, cfg.generator_hidden),
                        history_rows=model.spans.calibration[1])


def check_options(options: CompileOptions) -> str:
    """What compile can refuse before any work; returns the bundle name."""
    if options.drift not in DRIFT_ACTIONS:
        raise ValueError(f"--drift {options.drift!r}: choose {' or '.join(DRIFT_ACTIONS)}")
    return check_name(options.name or "detector")


def compile_model(model: TrainedModel, out: Path, options: CompileOptions,
                  progress=None, echo: Echo = lambda _: None,
                  model_dir: Optional[Path] = None) -> CompileResult:
    """One teacher -> one bundle for one board. model_dir (the teacher's folder) holds the
    cache of distilled students and receives the workstation's record of the bundle (the fp32
    student, for `ganlet verify --model`)."""
    name = check_options(options)
    out = check_out(out)
    board = load_board(options.board or DEFAULT_BOARD)
    with torch_threads(options.threads):
        plan = plan_board(model, board)
        echo(plan.describe())
        echo_learned_note(model, echo)
        return compile_plan(model, out, plan, board, options, name, StudentStore(model_dir),
                            progress, model_dir)


def compile_boards(model: TrainedModel, out_root: Path, boards: list, options: CompileOptions,
                   progress=None, echo: Echo = lambda _: None,
                   model_dir: Optional[Path] = None) -> list:
    """One teacher -> one bundle per board in OUT_ROOT/<board>/. Every board is sized (and
    every output folder checked) before any work; boards whose plans share a student shape
    share one distillation, and boards that share a student and hop share its calibration."""
    name = check_options(options)
    names = [b.name for b in boards]
    if len(set(names)) != len(names):
        raise ValueError(f"--board lists a board twice: {', '.join(names)}")
    outs = [check_out(Path(out_root) / b.name) for b in boards]
    with torch_threads(options.threads):
        plans = [plan_board(model, b) for b in boards]
        for plan in plans:
            echo(plan.describe())
        echo_learned_note(model, echo)
        store = StudentStore(model_dir)
        return [compile_plan(model, out, plan, board, options, name, store, progress, model_dir)
                for out, plan, board in zip(outs, plans, boards)]


def echo_learned_note(model: TrainedModel, echo: Echo) -> None:
    """Train's note when the network learned no more than the channels' levels
    (learned_summary), again for whoever compiles without having seen training's output."""
    for line in learned_note(model.history):
        echo(line)


def compile_plan(model: TrainedModel, out: Path, plan: StudentPlan, board: Board,
                 options: CompileOptions, name: str, store: StudentStore, progress=None,
                 model_dir: Optional[Path] = None) -> CompileResult:
    """The stages after sizing: student (teacher, cache or distil) -> quantise -> calibrate ->
    fidelity -> export -> pack. Work that depends on the student alone is done once per store."""
    timings = {}
    started = time.perf_counter()
    student = store.student(model, plan, options.distil, progress)
    timings["distil"] = time.perf_counter() - started
    started = time.perf_counter()
    fp32 = student.fp32
    fit = store.once(("int8", student.key, astuple(options.int8)),
                     lambda: fit_int8(model, fp32, options.int8))
    qweights = quantise_weights(fit.weights)
    device = dequantise_weights(qweights)
    cal = store.once(("calibrate", student.key, plan.hop, options.threshold,
                      options.alarms_per_week, options.drift,
                      json.dumps(options.alerting, sort_keys=True)),
                     lambda: calibrate(model, NetworkScorer(device, "device"), plan.window,
                                       plan.hop, options.threshold, options.alarms_per_week,
                                       options.alerting, options.distil.seed, options.drift))
    cal.report.update(agreement_report(model, cal.score, fp32, device))
    fid = store.once(("fidelity", student.key),
                     lambda: fidelity(store.once("faults", lambda: fault_set(model)),
                                      device, plan.teacher))
    timings["quantise"] = time.perf_counter() - started
    started = time.perf_counter()
    manifest = bundle_manifest(model, plan, board, cal, name, fidelity=fid)
    packed = pack_bundle(out, manifest, qweights, build_onnx(qweights, len(model.channels)),
                         install_text(model, board, name, out, signing_kinds(options)),
                         board.storage_budget_kb, options.sign_key, options.archive,
                         ed25519_key=options.ed25519_key,
                         unit=service_unit(name, signing_kinds(options)))
    timings["pack"] = time.perf_counter() - started
    report = {**cal.report, "seconds": timings, "bytes": packed.bytes,
              "quantisation": {k: v for k, v in quantisation_report(fp32, qweights).items()
                               if k != "keys"},
              "fidelity": fid, "int8_fit": fit.report(),
              "student": {"source": student.source, "key": student.key,
                          "distil_seconds": student.distil_seconds, "plan": plan.to_json()}}
    if model_dir is not None:
        record_student(Path(model_dir), out, fp32, report, fit.weights)
    return CompileResult(out, packed.archive, plan, board, report)


def bundle_manifest(model: TrainedModel, plan: StudentPlan, board: Board, cal: Calibration,
                    name: str, fidelity: Optional[dict] = None) -> dict:
    return build_manifest(
        name=name, time_column=model.time_col, channels=list(zip(model.channels, model.units)),
        period_s=model.period_s, max_gap_periods=model.max_fill_periods,
        scaler=model.scaler.to_json(), window=plan.window, hop=plan.hop,
        network={"encoder": plan.encoder_hidden, "latent": plan.latent,
                 "generator": plan.generator_hidden},
        score=cal.score, threshold=cal.policy, alerting=cal.alerting, drift=cal.drift,
        false_alarms=cal.false_alarms, **model.written,
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
        tool_version=__version__, fidelity=fidelity)


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


def record_student(model_dir: Path, bundle: Path, fp32: dict, report: dict,
                   int8_source: dict) -> Path:
    """The workstation's record of a bundle, beside its teacher and keyed by the bundle id: the
    fp32 student (for `ganlet verify --model`), the float weights its int8 weights are the
    rounding of (int8_fit.py) and the compile report. Nothing of it goes into the bundle."""
    bundle_id = hashlib.sha256((bundle / MANIFEST_NAME).read_bytes()).hexdigest()
    students = model_dir / STUDENTS_DIR
    students.mkdir(exist_ok=True)
    np.savez(students / f"{bundle_id[:16]}.npz", **fp32)
    np.savez(int8_source_file(model_dir, bundle_id), **int8_source)
    save_json(students / f"{bundle_id[:16]}.json", {"bundle_id": bundle_id, "report": report})
    return students / f"{bundle_id[:16]}.npz"


def student_file(model_dir: Path, bundle_id: str) -> Path:
    """Where record_student keeps the fp32 student of a bundle."""
    return Path(model_dir) / STUDENTS_DIR / f"{bundle_id[:16]}.npz"


def int8_source_file(model_dir: Path, bundle_id: str) -> Path:
    """Where record_student keeps the float weights a bundle's int8 weights round."""
    return Path(model_dir) / STUDENTS_DIR / f"{bundle_id[:16]}.int8-source.npz"


def compile_dir(model_dir: Path, out: Path, options: CompileOptions, progress=None,
                echo: Echo = lambda _: None) -> CompileResult:
    return compile_model(load_model(model_dir), out, options, progress=progress, echo=echo,
                         model_dir=model_dir)


ALL_BOARDS = "all"


def boards_named(text: str) -> list:
    """--board a,b (names or .toml paths) or --board all (every shipped profile)."""
    names = [part.strip() for part in str(text).split(",") if part.strip()]
    if names == [ALL_BOARDS]:
        return list_boards()
    if not names:
        raise ValueError("--board: give a board name, a .toml path, a comma-separated list or "
                         "'all'")
    return [load_board(n) for n in names]


def compile_boards_dir(model_dir: Path, out_root: Path, boards: list, options: CompileOptions,
                       progress=None, echo: Echo = lambda _: None) -> list:
    return compile_boards(load_model(model_dir), out_root, boards, options, progress=progress,
                          echo=echo, model_dir=model_dir)


def boards_table(results: list) -> str:
    """One row per board: what it runs and what that costs against the teacher."""
    header = ("board", "network", "params", "hop", "spearman", "max err", "F1 gap", "KiB",
              "source", "seconds")
    rows = [header]
    for r in results:
        fid, plan = r.report["fidelity"], r.plan
        shape = f"enc {list(plan.encoder_hidden)} gen {list(plan.generator_hidden)}"
        rows.append((r.board.name, ("teacher " if plan.teacher else "student ") + shape,
                     str(plan.parameters), str(plan.hop), f"{fid['spearman']:.4f}",
                     f"{fid['max_abs_error']:.3g}", f"{fid['f1_gap']:+.3f}",
                     f"{r.report['bytes']['model_and_weights'] / 1024:.1f}",
                     r.report["student"]["source"], f"{sum(r.report['seconds'].values()):.1f}"))
    widths = [max(len(row[i]) for row in rows) for i in range(len(header))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip() for row in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines + ["", "spearman, max err: device vs teacher scores on the "
                              "calibration span; F1 gap: teacher F1 - device F1 on injected "
                              "faults (compile/fidelity.py)"])
