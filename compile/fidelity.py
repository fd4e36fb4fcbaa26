"""What a board's network costs against the teacher: the figures `ganlet compile` prints per
board and the manifest's `fidelity` section carries.

- agreement: the device's scores (the numpy network on the dequantised int8 weights, as the
  gateway computes them) against the teacher's on the calibration span's windows: Spearman rank
  correlation and max abs error (calibrate.agreement).
- F1 gap on injected faults: every calibration window once as it is and once with one fault
  injected by distil.perturb (spike burst, level shift, frozen channel or noise on one channel;
  a fixed seed, so every board is judged on the same faults). Teacher and device each flag a
  window when its score exceeds the 99th percentile of its own scores on the unchanged windows
  (the same 1 % false-alarm budget for both, common practice), and F1 counts the flags against
  "a fault was injected". f1_gap = teacher F1 - device F1: how much of the teacher's power to
  tell these faults from normal the board's network loses. It is a like-for-like comparison
  on synthetic faults, not detection quality on real incidents (that is `ganlet evaluate`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ganlet.compile.calibrate import agreement, network_scores
from ganlet.compile.distil import perturb
from ganlet.compile.train import TrainedModel, score_windows

FAULT_SEED = 14
ALARM_QUANTILE = 0.99
MAX_WINDOWS = 2000          # calibration windows beyond this are strided (time)
METHOD = ("device vs teacher on the calibration windows; F1 on the same windows with one "
          "distil.perturb fault each (seed 14), flags above each network's 99th percentile "
          "of its own clean scores")


@dataclass
class FaultSet:
    windows: np.ndarray          # the clean windows, then the same windows with a fault each
    clean: int                   # how many clean windows lead
    teacher_scores: np.ndarray


def fault_set(model: TrainedModel) -> FaultSet:
    """The calibration windows, clean and faulty, with the teacher's scores (computed once per
    teacher: every board is compared with the same numbers)."""
    clean = model.windows_of(model.spans.calibration)
    if len(clean) < 2:
        raise ValueError("the calibration span holds fewer than 2 windows; train with a longer "
                         "history or a larger --calibration fraction")
    if len(clean) > MAX_WINDOWS:
        clean = clean[::int(np.ceil(len(clean) / MAX_WINDOWS))]
    faulty = perturb(clean, np.random.default_rng(FAULT_SEED))
    windows = np.concatenate([clean, faulty]).astype(np.float32)
    scores, _ = score_windows(model.teacher, windows)
    return FaultSet(windows, len(clean), np.asarray(scores, np.float64))


def detection_f1(scores: np.ndarray, clean: int) -> float:
    """F1 of "score above the ALARM_QUANTILE of the clean scores" against "fault injected"."""
    scores = np.asarray(scores, np.float64)
    flagged = scores > np.quantile(scores[:clean], ALARM_QUANTILE)
    truth = np.arange(len(scores)) >= clean
    tp = int(np.sum(flagged & truth))
    fp = int(np.sum(flagged & ~truth))
    fn = int(np.sum(~flagged & truth))
    return 2 * tp / (2 * tp + fp + fn) if tp else 0.0


def fidelity(faults: FaultSet, device_weights: dict, is_teacher: bool) -> dict:
    """The manifest's fidelity section for one board's network."""
    device = np.asarray(network_scores(device_weights, faults.windows), np.float64)
    n = faults.clean
    agree = agreement(faults.teacher_scores[:n], device[:n])
    f1_teacher = detection_f1(faults.teacher_scores, n)
    f1_device = detection_f1(device, n)
    return {"network": "teacher" if is_teacher else "student", "windows": n,
            "spearman": agree["spearman"], "max_abs_error": agree["max_abs_error"],
            "f1_teacher": f1_teacher, "f1_device": f1_device,
            "f1_gap": f1_teacher - f1_device, "method": METHOD}


def fidelity_text(fid: dict) -> str:
    return (f"device vs teacher on {fid['windows']} calibration windows: Spearman "
            f"{fid['spearman']:.4f}, max abs error {fid['max_abs_error']:.3g}; F1 on injected "
            f"faults: teacher {fid['f1_teacher']:.3f}, device {fid['f1_device']:.3f} "
            f"(gap {fid['f1_gap']:+.3f})")
