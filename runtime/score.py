"""The score rule: per-channel residuals of a window -> one score and each channel's part.

The network (lstm.py, or model.onnx in onnxruntime, or the teacher on the workstation) gives
each window's per-channel residual res[c] = mean over time of (x - G(E(x)))^2. This module is
the one place that turns residuals into the score every backend reports, so teacher, student,
ONNX and numpy can only differ by their network arithmetic:

    parts[c] = res[c]                   the channel's part (its share in an alert names it)
    score    = mean over c of parts[c]  (manifest score.combine = "mean")
"""

from typing import Tuple

import numpy as np

COMBINE_RULES = ("mean",)
RESIDUAL_TEXT = ("mean over the window of the squared reconstruction error x - G(E(x)), per "
                 "channel, on robust-scaled inputs")


def score_section() -> dict:
    """The manifest's `score` section for this rule."""
    return {"residual": RESIDUAL_TEXT, "combine": "mean"}


class ScoreRule:
    """Residuals [N, C] -> (scores [N], parts [N, C]), as the manifest's score section says."""

    def __init__(self, section: dict):
        combine = section.get("combine") if isinstance(section, dict) else None
        if combine not in COMBINE_RULES:
            raise ValueError(f"score.combine {combine!r} unknown; this runtime knows "
                             f"{', '.join(COMBINE_RULES)}")
        self.combine = combine

    def apply(self, residuals) -> Tuple[np.ndarray, np.ndarray]:
        parts = np.asarray(residuals, dtype=np.float32)
        if parts.ndim != 2:
            raise ValueError(f"residuals must have shape [N, C], got {parts.shape}")
        return np.mean(parts, axis=1, dtype=np.float32), parts


def shares(parts) -> np.ndarray:
    """Each channel's share of the summed parts (all zero when the parts are)."""
    p = np.asarray(parts, dtype=np.float64)
    total = float(p.sum())
    return p / total if total > 0 else np.zeros_like(p)
