"""What the network sees of each channel: its level, or its rate (the change over one period).

A slow quantity that wanders over days (a motor or fluid temperature) leaves the range it had
while the detector trained, normal or not, and its level alone then raises the score. Watching
such a channel by its rate keeps its fast behaviour in view and drops the slow wander; the
price is that a slow excursion on it is no longer seen, and is left to limit alarms.

    level   x[t]
    rate    x[t] - x[t-1], on the regular grid (NaN when x[t-1] is unknown)

The scaler (center, scale) of a channel applies to its feature. `series()` is the batch form
used on the workstation; the gateway keeps the previous raw row and calls `row()`.
"""

from typing import Optional, Sequence

import numpy as np

FEATURE_KINDS = ("level", "rate")


def rate_mask(features: Sequence[str]) -> np.ndarray:
    return np.asarray([f == "rate" for f in features], dtype=bool)


def series(values: np.ndarray, rate: np.ndarray) -> np.ndarray:
    """[T, C] raw values -> [T, C] float64 features; a rate channel's first row is NaN."""
    out = np.array(values, dtype=np.float64, copy=True)
    if rate.any():
        cols = np.flatnonzero(rate)
        out[1:, cols] = out[1:, cols] - np.asarray(values, dtype=np.float64)[:-1, cols]
        out[0, cols] = np.nan
    return out


def row(values: np.ndarray, previous: Optional[np.ndarray], rate: np.ndarray) -> np.ndarray:
    """One raw float64 row -> its features, given the raw row one period before (None:
    unknown). Without rate channels the row itself is returned (the gateway's common case)."""
    if not rate.any():
        return values
    out = values.copy()
    out[rate] = np.nan if previous is None else values[rate] - previous[rate]
    return out
