"""Compile a trained teacher for a board and pack the self-contained bundle.

model dir -> board -> student plan -> distil -> int8 -> ONNX -> thresholds -> bundle folder
(manifest written through ganlet.runtime.manifest, the reader being the authority).
"""

from __future__ import annotations

import shutil
import tarfile
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable, Optional

import numpy as np

import ganlet.runtime as runtime_pkg
from ganlet.compile import __version__
from ganlet.compile.boards import DEFAULT_BOARD, Board, load_board
from ganlet.compile.distil import (
    DistilConfig,
    agreement,
    calibration_windows,
    distil,
    student_scores,
    teacher_vs_student,
)
from ganlet.compile.export import build_onnx, save_onnx
from ganlet.compile.layout import network_weights
from ganlet.compile.quantise import dequantise_weights, quantisation_report, quantise_weights
from ganlet.compile.sizing import StudentPlan, size_student
from ganlet.compile.train import TrainedModel, load_model
from ganlet.runtime.entry import RUN_PY
from ganlet.runtime.lstm import Network, score_from_residuals
from ganlet.runtime.manifest import SCHEMA_VERSION, write_manifest
from ganlet.runtime.thresholds import calibrate_policy

RUNTIME_DIR = Path(runtime_pkg.__file__).resolve().parent
THRESHOLD_KINDS = ("pot", "rolling", "static")


INSTALL_TXT = """ganlet bundle {name} for board {board}
==========================================================

Detection is advisory condition monitoring. It is NOT a safety function and does not replace
trips, interlocks, relief valves, protection relays or the machine maker's limits; local codes
and licensed practice govern the installation.

Needs: Python >= 3.9 and numpy on the gateway (onnxruntime is used when present). No pip
install of ganlet: this folder carries its own copy of the runtime.

1. Copy the folder, e.g.   scp -r {folder} gateway:/opt/ganlet/{folder}
2. Check it:              python3 /opt/ganlet/{folder}/run.py check
                          (add --key FILE --require-signature if the bundle is signed)
3. Try it on a file:      python3 run.py stream --input readings.csv --scores-out scores.csv
4. Run it as a service, reading the sensor feed on stdin or from a growing CSV file:

   # /etc/systemd/system/ganlet-{name}.service
   [Unit]
   Description=ganlet advisory condition monitoring ({name})
   After=network.target

   [Service]
   Type=simple
   WorkingDirectory=/opt/ganlet/{folder}
   ExecStart=/usr/bin/python3 /opt/ganlet/{folder}/run.py stream --input /var/lib/ganlet/{name}.csv --follow --state /var/lib/ganlet/{name}.state.json --alert-db /var/lib/ganlet/{name}.alerts.sqlite
   Restart=always
   RestartSec=5
   User=ganlet

   [Install]
   WantedBy=multi-user.target

   then: systemctl daemon-reload && systemctl enable --now ganlet-{name}

5. Measure it on the board:  python3 run.py bench

Input: CSV with a header naming the time column ({time_col}) and the channels
({channels}), any order, extra columns ignored; one row every {period:g} s.
Always send the raw reading: a channel marked "(rate)" is watched by its change per period,
which the gateway works out itself.
"""


@dataclass
class CompileOptions:
    board: Optional[str] = None
    threshold: str = "pot"
    distil: DistilConfig = field(default_factory=DistilConfig)
    archive: bool = False
    sign_key: Optional[bytes] = None
    name: Optional[str] = None
    min_hops: int = 3
    close_ratio: float = 0.8
    cooldown_hops: Optional[int] = None


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
            f"threshold: {r['threshold_kind']} (calibrated on {r['calibration_scores']} scores)",
            f"bundle {self.bundle}: {r['bytes']['model_and_weights'] / 1024:.1f} KiB without "
            f"the runtime copy ({r['bytes']['total'] / 1024:.1f} KiB in all)"
            + (f"; archive {self.archive}" if self.archive else ""),
        ])


def student_weights(student) -> dict:
    return network_weights(student.encoder.layers, student.encoder.head,
                           student.generator.layers, student.generator.head)


def calibrate(kind: str, scores: np.ndarray) -> dict:
    """The board's threshold policy from calibration scores; POT needs enough tail to fit, so
    a short calibration span falls back to the rolling policy (said in the report)."""
    if kind == "pot":
        try:
            return calibrate_policy("pot", scores)
        except ValueError:
            return calibrate_policy("rolling", scores, min_count=min(32, len(scores)))
    if kind == "rolling":
        return calibrate_policy("rolling", scores, min_count=min(32, len(scores)))
    return calibrate_policy(kind, scores)


def copy_runtime(bundle: Path) -> None:
    pkg = bundle / "ganlet" / "runtime"
    pkg.mkdir(parents=True, exist_ok=True)
    (bundle / "ganlet" / "__init__.py").write_text("")
    for src in sorted(RUNTIME_DIR.glob("*.py")):
        shutil.copy2(src, pkg / src.name)


def compile_model(model: TrainedModel, out: Path, options: CompileOptions,
                  progress=None, echo: Callable[[str], None] = lambda _: None,
                  model_dir: Optional[Path] = None) -> CompileResult:
    if options.threshold not in THRESHOLD_KINDS:
        raise ValueError(f"--threshold {options.threshold!r}: choose one of "
                         f"{', '.join(THRESHOLD_KINDS)}")
    out = Path(out)
    # Refuse an unusable --out before minutes of distillation, not after.
    if out.exists() and not out.is_dir():
        raise ValueError(f"{out} is a file; --out needs a folder for the bundle")
    if out.exists() and any(out.iterdir()) and not (out / "manifest.json").exists():
        raise ValueError(f"{out} exists and is not a bundle; choose an empty or new folder")
    timings = {}
    board = load_board(options.board or DEFAULT_BOARD)
    cfg = model.detector.config
    plan = size_student(board, len(model.channels), cfg.latent, cfg.window, model.period_s)
    echo(plan.describe())

    started = time.perf_counter()
    student = distil(model, plan, options.distil, progress=progress)
    timings["distil"] = time.perf_counter() - started
    started = time.perf_counter()
    fp32 = student_weights(student)
    qweights = quantise_weights(fp32)
    device_weights = dequantise_weights(qweights)
    x_cal, _ = calibration_windows(model)
    if len(x_cal) < 2:
        raise ValueError("the calibration span holds fewer than 2 windows; train with a longer "
                         "history or a larger --calibration fraction")
    fp32_scores, _ = student_scores(student, x_cal)
    _, device_res = Network(device_weights).forward(x_cal)
    device_scores = score_from_residuals(device_res)
    policy = calibrate(options.threshold, device_scores)
    timings["quantise"] = time.perf_counter() - started

    started = time.perf_counter()
    if out.exists() and any(out.iterdir()):
        shutil.rmtree(out)      # replacing an earlier bundle (checked above)
    out.mkdir(parents=True, exist_ok=True)
    save_onnx(build_onnx(qweights, len(model.channels), quantised=True), out / "model.onnx")
    np.savez(out / "weights.npz", **qweights)
    copy_runtime(out)
    (out / "run.py").write_text(RUN_PY)
    name = options.name or "detector"
    (out / "INSTALL.txt").write_text(INSTALL_TXT.format(
        name=name, board=board.name, folder=out.name, time_col=model.time_col,
        channels=", ".join(c + (" (rate)" if f == "rate" else "")
                           for c, f in zip(model.channels, model.scaler.features)),
        period=model.period_s))
    report = {
        "teacher_vs_student": teacher_vs_student(model, student),
        "student_vs_int8": agreement(fp32_scores, device_scores),
        "quantisation": {k: v for k, v in quantisation_report(fp32, qweights).items()
                         if k != "keys"},
        "threshold_kind": policy["kind"],
        "calibration_scores": int(len(device_scores)),
    }
    manifest = {
        "schema_version": SCHEMA_VERSION,
        "tool_version": __version__,
        "created": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "name": name,
        "time_column": model.time_col,
        "channels": [{"name": c, "unit": u} for c, u in zip(model.channels, model.units)],
        "period_s": float(model.period_s),
        "max_gap_periods": int(model.max_fill_periods),
        "scaler": {"kind": "robust", "center": list(model.scaler.center),
                   "scale": list(model.scaler.scale), "features": list(model.scaler.features)},
        "window": int(plan.window),
        "hop": int(plan.hop),
        "network": {"encoder": list(plan.encoder_hidden), "latent": int(plan.latent),
                    "generator": list(plan.generator_hidden), "weights": "weights.npz",
                    "onnx": "model.onnx", "quantisation": "int8-symmetric-per-channel",
                    "onnx_opset": 20},
        "score": {"residual": "mean over the window of the squared reconstruction error "
                              "x - G(E(x)), per channel, on robust-scaled inputs",
                  "combine": "mean"},
        "threshold": policy,
        "alerting": {"warmup_hops": 0, "min_hops": int(options.min_hops),
                     "close_ratio": float(options.close_ratio),
                     "cooldown_hops": int(options.cooldown_hops
                                          if options.cooldown_hops is not None
                                          else max(1, plan.window // plan.hop))},
        "board": {"name": board.name, "cpu_class": board.cpu_class,
                  "budget": {"storage_kb": board.storage_budget_kb,
                             "ram_mb": board.ram_budget_mb,
                             "hop_ms": plan.hop_seconds_budget * 1e3,
                             "mflops_single_core": board.mflops_single_core,
                             "onnxruntime": board.onnxruntime},
                  "estimate": {"flops_per_hop": plan.flops_per_hop,
                               "hop_ms": plan.hop_seconds_estimate * 1e3,
                               "ram_mb": plan.ram_bytes / 2**20,
                               "storage_kb": plan.storage_bytes / 1024,
                               "weights_bytes": plan.weights_bytes}},
        # Device vs workstation on the same int8 weights: only float rounding may differ.
        "parity": {"tolerances": {"score_rel": 1e-4, "spearman_min": 0.999,
                                  "sample_agreement_min": 0.995, "event_match_hops": 3,
                                  "teacher_spearman_min": 0.95}},
        "teacher": {"config": cfg.to_json(), "agreement": report["teacher_vs_student"]},
    }
    if model_dir is not None:
        # The fp32 student stays on the workstation, beside its teacher, for `ganlet verify`.
        students = Path(model_dir) / "students"
        students.mkdir(exist_ok=True)
        student_file = students / f"{board.name}-{name}.npz"
        np.savez(student_file, **fp32)
        manifest["teacher"]["model_dir"] = str(Path(model_dir).resolve())
        manifest["teacher"]["student_weights"] = str(student_file.resolve())
    write_manifest(out, manifest, sign_key=options.sign_key)
    timings["pack"] = time.perf_counter() - started
    report["seconds"] = timings
    sizes = {p.relative_to(out).as_posix(): p.stat().st_size for p in out.rglob("*") if p.is_file()}
    core = sum(v for k, v in sizes.items() if not k.startswith("ganlet/"))
    report["bytes"] = {"model_and_weights": core, "total": sum(sizes.values()), "files": sizes}
    if core > board.storage_budget_kb * 1024:
        raise ValueError(f"the packed bundle is {core / 1024:.1f} KB without the runtime copy, "
                         f"over board {board.name!r}'s {board.storage_budget_kb} KB budget; "
                         "choose a larger board")
    archive = None
    if options.archive:
        archive = out.with_name(out.name + ".tar.gz")
        with tarfile.open(archive, "w:gz") as tar:
            tar.add(out, arcname=out.name)
    return CompileResult(out, archive, plan, board, report)


def compile_dir(model_dir: Path, out: Path, options: CompileOptions, progress=None,
                echo: Callable[[str], None] = lambda _: None) -> CompileResult:
    return compile_model(load_model(model_dir), out, options, progress=progress, echo=echo,
                         model_dir=model_dir)
