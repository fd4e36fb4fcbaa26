"""Where a board's network comes from, each distillation done once.

A student depends on the teacher (its encoder and generator weights, its config and the scaled
fit-span windows it distils on), the student's shape (channels, latent, encoder and generator
widths, window: not the board, not the hop) and the DistilConfig (seed included). Two boards
whose plans share a shape share one student; a student distilled before, for the same teacher,
shape and config, is read back from MODEL_DIR/distilled/ instead of distilled again. A changed
teacher, shape, config, ganlet or torch version gives another key, so a stale student is never
reused. The top rung of the ladder (the teacher itself) is the teacher's own weights.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable, Optional

import numpy as np

from ganlet.compile import __version__
from ganlet.compile import distil as distil_mod
from ganlet.compile.layout import network_weights
from ganlet.compile.sizing import StudentPlan
from ganlet.compile.train import TrainedModel

CACHE_DIR = "distilled"     # in a model directory


@dataclass
class PreparedStudent:
    key: str
    fp32: dict                  # the contract weight dict, float32
    source: str                 # "teacher" | "distilled" | "cache"
    distil_seconds: float = 0.0  # what distilling it took (when it was distilled)
    history: list = field(default_factory=list)


def teacher_digest(model: TrainedModel) -> str:
    """SHA-256 of what a student learns from: E and G weights, the config, the fit windows."""
    digest = hashlib.sha256()
    teacher = model.teacher
    for part in ("encoder", "generator"):
        for name, tensor in sorted(getattr(teacher, part).state_dict().items()):
            array = tensor.detach().cpu().numpy()
            digest.update(f"{part}.{name}:{array.dtype}:{array.shape}".encode())
            digest.update(np.ascontiguousarray(array).tobytes())
    digest.update(json.dumps(teacher.config.to_json(), sort_keys=True).encode())
    fit = model.segments_of(model.spans.fit)
    digest.update(json.dumps(fit).encode())
    for begin, end in fit:
        digest.update(np.ascontiguousarray(model.series[begin:end], np.float32).tobytes())
    return digest.hexdigest()


def student_key(teacher: str, plan: StudentPlan, n_channels: int,
                cfg: distil_mod.DistilConfig) -> tuple:
    """(hex key, its parts): what decides a distilled student's weights."""
    import torch

    parts = {"teacher": teacher, "channels": n_channels, "latent": plan.latent,
             "encoder": list(plan.encoder_hidden), "generator": list(plan.generator_hidden),
             "window": plan.window, "distil": asdict(cfg), "ganlet": __version__,
             "torch": torch.__version__}
    text = json.dumps(parts, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest(), parts


class StudentStore:
    """Students by key: in memory for one command, on disk in the model directory (when
    given) across commands. `once` memoises other per-student work (calibration, fidelity)."""

    def __init__(self, model_dir: Optional[Path] = None):
        self.folder = Path(model_dir) / CACHE_DIR if model_dir is not None else None
        self.memo: dict = {}
        self._teacher: dict = {}

    def once(self, key, make: Callable):
        if key not in self.memo:
            self.memo[key] = make()
        return self.memo[key]

    def student(self, model: TrainedModel, plan: StudentPlan, cfg: distil_mod.DistilConfig,
                progress=None) -> PreparedStudent:
        teacher = self.teacher_key(model)
        if plan.teacher:
            return self.once(("teacher", teacher), lambda: own_weights(model, teacher))
        key, parts = student_key(teacher, plan, len(model.channels), cfg)
        return self.once(("student", key),
                         lambda: self.read(key) or self.distil(model, plan, cfg, key, parts,
                                                               progress))

    def teacher_key(self, model: TrainedModel) -> str:
        known = self._teacher.get(id(model))
        if known is None or known[0] is not model:
            known = self._teacher[id(model)] = (model, teacher_digest(model))
        return known[1]

    def distil(self, model, plan, cfg, key, parts, progress) -> PreparedStudent:
        started = time.perf_counter()
        student = distil_mod.distil(model, plan, cfg, progress=progress)
        prepared = PreparedStudent(key, student.weights(), "distilled",
                                   time.perf_counter() - started, student.history)
        if self.folder is not None:
            self.write(prepared, parts)
        return prepared

    def paths(self, key: str) -> tuple:
        return self.folder / f"{key[:24]}.npz", self.folder / f"{key[:24]}.json"

    def read(self, key: str) -> Optional[PreparedStudent]:
        if self.folder is None:
            return None
        weights, meta = self.paths(key)
        if not (weights.is_file() and meta.is_file()):
            return None
        try:
            record = json.loads(meta.read_text())
            if record.get("key") != key:
                return None
            with np.load(weights, allow_pickle=False) as npz:
                fp32 = {name: npz[name] for name in npz.files}
        except (OSError, ValueError):     # a damaged entry is distilled again, not trusted
            return None
        return PreparedStudent(key, fp32, "cache", record.get("distil_seconds", 0.0),
                               record.get("history", []))

    def write(self, prepared: PreparedStudent, parts: dict) -> None:
        """Weights first, then the record that makes the entry count: a crash in between
        leaves an entry `read` ignores."""
        self.folder.mkdir(parents=True, exist_ok=True)
        weights, meta = self.paths(prepared.key)
        atomic_write(weights, lambda fh: np.savez(fh, **prepared.fp32))
        record = {"key": prepared.key, "parts": parts, "distil_seconds": prepared.distil_seconds,
                  "history": prepared.history}
        atomic_write(meta, lambda fh: fh.write(json.dumps(record, indent=2).encode()))


def own_weights(model: TrainedModel, teacher: str) -> PreparedStudent:
    """The top rung: the teacher's own encoder and generator as the contract weight dict."""
    t = model.teacher
    fp32 = network_weights(t.encoder.layers, t.encoder.head, t.generator.layers,
                           t.generator.head)
    return PreparedStudent("teacher-" + teacher, fp32, "teacher")


def atomic_write(path: Path, write: Callable) -> None:
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
