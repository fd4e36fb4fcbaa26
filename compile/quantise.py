"""int8 weights: symmetric, one scale per output channel, zero point 0.

quantize_linear / dequantize_linear follow the ONNX QuantizeLinear / DequantizeLinear operators
(opset 20) for int8 with zero point 0:
    q = saturate(round_half_to_even(x / scale))   saturate to [-128, 127]
    y = float32(q) * scale
so the numbers written to weights.npz are the numbers the ONNX model's DequantizeLinear nodes
reproduce. Symmetric scales are max|row| / 127, so quantised weights land in [-127, 127].

Key conventions (DEVELOPERS.md): "*.lstmK.W" and "*.lstmK.R" ([1, 4H, I|H]) are per-row on
axis 1, "*.head.W" ([out, in]) per-row on axis 0; each gets a float32 companion "KEY.scale".
Biases ("*.B", "*.head.b") stay float32.
"""

from typing import Dict, Optional

import numpy as np

from ganlet.runtime.weights import SCALE_SUFFIX, dequantise, dequantise_dict, row_axis

QMIN, QMAX = -128, 127  # int8 saturation range (ONNX QuantizeLinear)
SYMMETRIC_MAX = 127  # symmetric: use +-127 so the range is the same on both sides


def _broadcast_scale(scale: np.ndarray, shape: tuple, axis: Optional[int]) -> np.ndarray:
    """Shape a scalar or 1-D scale so it broadcasts along `axis` (ONNX per-axis semantics)."""
    scale = np.asarray(scale, dtype=np.float32)
    if scale.ndim == 0:
        return scale
    if scale.ndim != 1:
        raise ValueError("scale must be a scalar or a 1-D array (one value per channel)")
    ndim = len(shape)
    if axis is None:
        axis = 1  # the ONNX operators' default axis
    if not -ndim <= axis < ndim:
        raise ValueError(f"axis {axis} out of range for a {ndim}-D array")
    if shape[axis] != scale.shape[0]:
        raise ValueError(f"{scale.shape[0]} scales for {shape[axis]} channels on axis {axis}")
    bshape = [1] * ndim
    bshape[axis] = scale.shape[0]
    return scale.reshape(bshape)


def quantize_linear(x: np.ndarray, scale: np.ndarray, axis: Optional[int] = None) -> np.ndarray:
    """y = saturate(round_half_even(x / scale)) as int8; per-axis when `scale` is 1-D."""
    x = np.asarray(x, dtype=np.float32)
    if np.isnan(x).any():
        raise ValueError("cannot quantise NaN values")
    s = _broadcast_scale(scale, x.shape, axis)
    if not (np.isfinite(s).all() and (s > 0).all()):
        raise ValueError("scales must be finite and > 0")
    # float32 division, as the operator does for float32 inputs; np.rint is half-to-even.
    # Clip before the integer cast so huge values (and inf) saturate instead of wrapping.
    q = np.clip(np.rint(x / s), QMIN, QMAX)
    return q.astype(np.int8)


def dequantize_linear(q: np.ndarray, scale: np.ndarray, axis: Optional[int] = None) -> np.ndarray:
    """y = float32(q) * scale (zero point 0); per-axis when `scale` is 1-D.

    Delegates to the gateway's reader (ganlet.runtime.weights.dequantise) so the workstation and
    the device compute this product with one piece of code.
    """
    return dequantise(q, scale, 1 if axis is None else axis)  # 1: the ONNX operator's default


def symmetric_scales(w: np.ndarray, axis: int) -> np.ndarray:
    """One float32 scale per index of `axis`: max|w| over the other axes / 127.

    A row that is all zeros (or so small its scale underflows) gets scale 1.0: it quantises to
    zeros either way, and nothing divides by zero.
    """
    w = np.asarray(w, dtype=np.float32)
    if not np.isfinite(w).all():
        raise ValueError("weights contain NaN or inf; fix training before quantising")
    axis = axis % w.ndim
    others = tuple(a for a in range(w.ndim) if a != axis)
    peak = np.abs(w).max(axis=others) if others else np.abs(w)
    scale = (peak / np.float32(SYMMETRIC_MAX)).astype(np.float32)
    scale[scale == 0] = 1.0
    return scale


def quantise_weights(weights: Dict[str, np.ndarray]) -> Dict[str, np.ndarray]:
    """Float32 contract dict -> the dict that goes into weights.npz (int8 + KEY.scale, biases)."""
    out: Dict[str, np.ndarray] = {}
    for key, value in weights.items():
        if key.endswith(SCALE_SUFFIX):
            raise ValueError(f"{key!r}: these weights look quantised already")
        value = np.asarray(value, dtype=np.float32)
        axis = row_axis(key)
        if axis is None:
            out[key] = value.copy()
            continue
        scale = symmetric_scales(value, axis)
        out[key] = quantize_linear(value, scale, axis)
        out[key + SCALE_SUFFIX] = scale
    return out


def dequantise_weights(qweights: Dict[str, np.ndarray]) -> Dict[str, np.ndarray]:
    """Inverse of quantise_weights: a float32 contract dict in ONNX layout.

    The gateway's own reader does the arithmetic (ganlet.runtime.weights.dequantise_dict), so
    workstation and device dequantise with the same code; here every matrix must be quantised.
    """
    for key in qweights:
        if not key.endswith(SCALE_SUFFIX) and row_axis(key) is not None \
                and key + SCALE_SUFFIX not in qweights:
            raise ValueError(f"{key!r} has no companion {key + SCALE_SUFFIX!r}")
    return dequantise_dict(qweights)


def quantisation_report(
    weights: Dict[str, np.ndarray], qweights: Dict[str, np.ndarray]
) -> dict:
    """Per key: max abs error, relative error (max abs error / max |w|), bytes before/after."""
    restored = dequantise_weights(qweights)
    per_key = {}
    total_before = total_after = 0
    for key, w in weights.items():
        w = np.asarray(w, dtype=np.float32)
        err = float(np.abs(w - restored[key]).max()) if w.size else 0.0
        peak = float(np.abs(w).max()) if w.size else 0.0
        before = int(w.nbytes)
        after = int(np.asarray(qweights[key]).nbytes)
        if key + SCALE_SUFFIX in qweights:
            after += int(np.asarray(qweights[key + SCALE_SUFFIX]).nbytes)
        per_key[key] = {
            "max_abs_error": err,
            "relative_error": err / peak if peak > 0 else 0.0,
            "bytes_before": before,
            "bytes_after": after,
        }
        total_before += before
        total_after += after
    return {
        "keys": per_key,
        "max_abs_error": max((v["max_abs_error"] for v in per_key.values()), default=0.0),
        "max_relative_error": max((v["relative_error"] for v in per_key.values()), default=0.0),
        "bytes_before": total_before,
        "bytes_after": total_after,
        "compression": total_before / total_after if total_after else 0.0,
    }
