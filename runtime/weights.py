"""Reading weights.npz: int8 matrices with per-row float32 scales, float32 biases.

Layout (DEVELOPERS.md): every quantised key K has a float32 companion "K.scale" with one
symmetric scale per output row; the value is int8 * scale in float32, i.e. the ONNX
DequantizeLinear operator with zero point 0. Row axis: 1 for LSTM W / R ([1, 4H, *]),
0 for head.W ([out, in]). Keys without a companion are returned as float32.
"""

import os
from typing import Dict, Optional, Union

import numpy as np

SCALE_SUFFIX = ".scale"


def dequantise(q: np.ndarray, scale: np.ndarray, axis: int) -> np.ndarray:
    """float32(q) * scale, with a 1-D scale broadcast along `axis` (a scalar scale is per-tensor)."""
    q = np.asarray(q)
    if q.dtype != np.int8:
        raise ValueError(f"expected int8 values, got {q.dtype}")
    s = np.asarray(scale, dtype=np.float32)
    if s.ndim == 1:
        if not -q.ndim <= axis < q.ndim:
            raise ValueError(f"axis {axis} out of range for a {q.ndim}-D array")
        if s.shape[0] != q.shape[axis]:
            raise ValueError(f"{s.shape[0]} scales for {q.shape[axis]} rows on axis {axis}")
        shape = [1] * q.ndim
        shape[axis] = s.shape[0]
        s = s.reshape(shape)
    elif s.ndim != 0:
        raise ValueError("scale must be a scalar or a 1-D array (one value per row)")
    if not np.isfinite(s).all():
        raise ValueError("scales must be finite")
    return (q.astype(np.float32) * s).astype(np.float32, copy=False)


def row_axis(key: str) -> Optional[int]:
    """The axis that holds one int8 scale per row for a contract key: 1 for an LSTM W / R
    ([1, 4H, *]), 0 for a head.W ([out, in]); None for a key that stays float32 (biases)."""
    if key.endswith(".head.W"):
        return 0
    if ".lstm" in key and (key.endswith(".W") or key.endswith(".R")):
        return 1
    if key.endswith(".B") or key.endswith(".head.b"):
        return None
    raise ValueError(f"key {key!r} is not part of the network contract (see DEVELOPERS.md)")


def load_weights(path: Union[str, os.PathLike]) -> Dict[str, np.ndarray]:
    """Load weights.npz (no pickles) and return a float32 ONNX-layout dict, dequantised."""
    with np.load(path, allow_pickle=False) as npz:
        raw = {k: npz[k] for k in npz.files}
    return dequantise_dict(raw, where=f"{path}: ")


def dequantise_dict(raw: Dict[str, np.ndarray], where: str = "") -> Dict[str, np.ndarray]:
    """A weights.npz-style dict -> float32 ONNX-layout dict: every key with a "KEY.scale"
    companion is int8 and dequantised; other keys are converted to float32."""
    out: Dict[str, np.ndarray] = {}
    for key, value in raw.items():
        value = np.asarray(value)
        if key.endswith(SCALE_SUFFIX):
            if key[: -len(SCALE_SUFFIX)] not in raw:
                raise ValueError(f"{where}{key!r} has no matching matrix")
            continue
        scale_key = key + SCALE_SUFFIX
        if scale_key in raw:
            if value.dtype != np.int8:
                raise ValueError(f"{where}{key!r} has a scale but is {value.dtype}, not int8")
            axis = row_axis(key)
            if axis is None:
                raise ValueError(f"{where}{key!r} has a scale but is a bias; biases stay float32")
            out[key] = dequantise(value, raw[scale_key], axis)
        else:
            if value.dtype.kind not in "fiu":
                raise ValueError(f"{where}{key!r} is {value.dtype}, expected numbers")
            out[key] = value.astype(np.float32)
    return out
