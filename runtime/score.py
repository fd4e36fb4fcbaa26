"""The score rule: a window and its reconstruction -> one score and each channel's part.

The network (lstm.py, or model.onnx in onnxruntime, or the teacher on the workstation) gives
each window's reconstruction r = G(E(x)). This module is the one place that turns it into the
score every backend reports, so teacher, student, ONNX and numpy can only differ by their
network arithmetic:

    e      = x - r over the newest k = `steps` steps (manifest score.steps; all steps when
             absent). The LSTMs are causal: the newest steps are reconstructed with the most
             context, and a fault that has left them no longer holds the score up.
    res[c] = mean_t e^2                        statistic "mse" (bundles without the key)
    res[c] = mean_t e^2 + k (mean_t e)^2       statistic "mse+offset"
The second adds the matched filter for an error that holds one sign over the k steps (a
channel off its reconstruction, as a stuck, sagging or blocked sensor is) to the energy
detector: on white error of variance s^2 both terms have expectation s^2, so noise and a single
spike a (2 a^2 / k) count twice, while a held offset b counts (k + 1) b^2: against the noise
it stands out (k + 1) / 2 times more than under "mse", a spike as much as before.

Uncalibrated (manifest score = {"combine": "mean"}): parts[c] = res[c], score = mean of parts.

Calibrated (the manifest's score section carries "regimes"): each channel's error is put in
units of its own normal error in the window's operating regime, so a quiet channel's departure
counts as much as a noisy one's and the score has one scale in every regime:

    u[c]   = sqrt(res[c])                       channel c's error (RMS under "mse"), scaled units
    g      = the regime whose centre is nearest to the window's per-channel means
    parts[c] = u[c] / scale[g][c]               "times the channel's normal error in regime g"
    score  = combine(parts): rms (default), mean or max over channels
A channel's share in an alert is its share of the summed contributions over the alert's hops:
the squared parts for rms (they add up to the squared score), the parts otherwise.

A channel left out (its transmitter lost, blanks.py) has part 0, as if it were reconstructed
exactly, and the regime is the one the others sit nearest. Its 0 stays in the combination (the
rms still divides by every channel): a fault on another channel scores as it would with the
channel there, and the score of normal running is a little lower, never higher; dividing by
the channels left instead raised a one-channel excursion by sqrt(C / (C - 1)) (1.15 on the
demo's four channels) and opened an alert on a stop after a dead transmitter came back.

A window holds a change of operating state when one of its pieces of k steps (counted back from
the newest) sits nearest another regime than the whole window (`state_changes`): a start, a
stop, a duty change inside the window. The score is the same on such windows; only the CUSUM
treats them apart (cusum.py).
"""

from typing import Optional, Tuple

import numpy as np

COMBINE_RULES = ("mean", "rms", "max")
STATISTICS = ("mse", "mse+offset")
RESIDUAL_TEXT = {
    "mse": ("mean over the newest `steps` steps of the window (all steps without `steps`) of the "
            "squared reconstruction error e = x - G(E(x)), per channel, on robust-scaled inputs"),
    "mse+offset": ("mean over the newest k = `steps` steps of the window of e^2, plus k times "
                   "the square of e's mean over those steps, where e = x - G(E(x)), per channel, "
                   "on robust-scaled inputs"),
}


def score_section(centres=None, scale=None, combine: str = "mean",
                  steps: Optional[int] = None, statistic: str = "mse") -> dict:
    """The manifest's `score` section: uncalibrated, or with regime centres and scales."""
    section = {"residual": RESIDUAL_TEXT[statistic], "combine": combine}
    if statistic != "mse":
        section["statistic"] = statistic
    if steps is not None:
        section["steps"] = int(steps)
    if centres is not None:
        section["regimes"] = {"centres": [[float(v) for v in row] for row in centres],
                              "scale": [[float(v) for v in row] for row in scale]}
    return section


class ScoreRule:
    """Residuals [N, C] (+ window means [N, C]) -> (scores [N], parts [N, C])."""

    def __init__(self, section: dict):
        combine = section.get("combine") if isinstance(section, dict) else None
        if combine not in COMBINE_RULES:
            raise ValueError(f"score.combine {combine!r} unknown; this runtime knows "
                             f"{', '.join(COMBINE_RULES)}")
        self.combine = combine
        self.statistic = section.get("statistic", "mse")
        if self.statistic not in STATISTICS:
            raise ValueError(f"score.statistic {self.statistic!r} unknown; this runtime knows "
                             f"{', '.join(STATISTICS)}")
        self.steps = section.get("steps")
        if self.steps is not None and not (isinstance(self.steps, int) and self.steps >= 1):
            raise ValueError(f"score.steps must be an integer >= 1, got {self.steps!r}")
        self.centres = self.scale = None  # type: Optional[np.ndarray]
        regimes = section.get("regimes")
        if regimes is not None:
            self.centres = np.asarray(regimes["centres"], dtype=np.float64)
            self.scale = np.asarray(regimes["scale"], dtype=np.float64)
            if self.centres.ndim != 2 or self.scale.shape != self.centres.shape:
                raise ValueError("score.regimes: centres and scale must both be "
                                 "[regimes, channels]")
            if not (np.isfinite(self.scale).all() and (self.scale > 0).all()):
                raise ValueError("score.regimes.scale must be finite and > 0")

    @property
    def calibrated(self) -> bool:
        return self.scale is not None

    def residuals(self, windows, recon) -> np.ndarray:
        """[N, L, C] windows and reconstructions -> [N, C] residual statistic of the newest
        `steps` steps (float32, as the ONNX graph's ReduceMean)."""
        x = np.asarray(windows, dtype=np.float32)
        r = np.asarray(recon, dtype=np.float32)
        if self.steps is not None:
            x, r = x[:, -self.steps:], r[:, -self.steps:]
        err = x - r
        res = np.mean(err * err, axis=1, dtype=np.float32)
        if self.statistic == "mse+offset":
            offset = np.mean(err, axis=1, dtype=np.float32)
            res = res + np.float32(err.shape[1]) * offset * offset
        return res

    def score(self, windows, recon, live=None) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(scores [N], parts [N, C], residuals [N, C]) of windows and their reconstructions;
        the regime comes from the windows' per-channel means."""
        res = self.residuals(windows, recon)
        scores, parts = self.apply(res, np.asarray(windows, np.float64).mean(axis=1), live)
        return scores, parts, res

    def regime(self, means, live=None) -> np.ndarray:
        """The nearest regime centre to each window's per-channel means [N, C] -> [N], over
        the `live` channels (all when None); a NaN (a lost cell, `fill`) counts nowhere."""
        m = np.asarray(means, dtype=np.float64)
        if self.centres is None or len(self.centres) == 1:
            return np.zeros(len(m), dtype=np.int64)
        centres = self.centres
        if live is not None:
            m, centres = m[:, live], centres[:, live]
        d = (m[:, None, :] - centres[None, :, :]) ** 2
        if np.isnan(m).any():
            d = np.where(np.isnan(d), 0.0, d)
        return np.argmin(d.sum(axis=2), axis=1)

    def fill(self, window) -> np.ndarray:
        """The window [L, C] with its lost cells (NaN, blanks.py) filled: each row's at the
        centre of the regime that row's known channels sit nearest, so the network sees the lost
        channel follow the starts and stops the others show; the scaler's centre (0) without
        regimes."""
        w = np.array(window, dtype=np.float32)
        lost = np.isnan(w)
        if self.centres is None:
            w[lost] = 0.0
            return w
        rows = lost.any(axis=1)
        nearest = self.centres[self.regime(w[rows])]  # per row, over its known channels
        w[rows] = np.where(lost[rows], nearest, w[rows])
        return w

    def state_changes(self, means, pieces, live=None) -> np.ndarray:
        """Whether each window holds a change of operating state: one of its pieces (piece_means)
        sits nearest another regime than the whole window's per-channel means [N, C] -> [N].
        Never without regimes. The CUSUM (cusum.py) counts such windows as its median."""
        p = np.asarray(pieces, dtype=np.float64)
        whole = self.regime(means, live)
        if self.centres is None or len(self.centres) == 1 or p.shape[1] == 0:
            return np.zeros(len(whole), dtype=bool)
        n, count, channels = p.shape
        each = self.regime(p.reshape(n * count, channels), live).reshape(n, count)
        return (each != whole[:, None]).any(axis=1)

    def apply(self, residuals, means=None, live=None) -> Tuple[np.ndarray, np.ndarray]:
        """(scores, parts) of residuals [N, C]; `live` [C]: the channels whose parts count (all
        when None); the others' parts are 0, as if reconstructed exactly (blanks.py)."""
        res = np.asarray(residuals, dtype=np.float32)
        if res.ndim != 2:
            raise ValueError(f"residuals must have shape [N, C], got {res.shape}")
        if self.scale is None:
            parts = res
        else:
            if means is None:
                raise ValueError("a calibrated score needs the windows' per-channel means")
            u = np.sqrt(np.maximum(res.astype(np.float64), 0.0))
            parts = (u / self.scale[self.regime(means, live)]).astype(np.float32)
        if live is not None and not live.all():
            parts = np.where(live, parts, np.float32(0.0)).astype(np.float32)
        return combine(parts, self.combine), parts

    def contributions(self, parts) -> np.ndarray:
        """What each channel adds to the score, additively: parts^2 for rms, else parts."""
        p = np.asarray(parts, dtype=np.float64)
        return p * p if self.combine == "rms" else p


def piece_means(windows, steps: Optional[int]) -> np.ndarray:
    """[N, L, C] windows -> [N, P, C]: the per-channel means of each run of `steps` steps,
    counted back from the newest step (P = L // steps; the scored steps are the newest piece).
    None (all steps scored): one piece, the whole window."""
    w = np.asarray(windows, dtype=np.float64)
    n, length, channels = w.shape
    size = length if steps is None else min(int(steps), length)
    count = length // size
    return w[:, length - count * size:].reshape(n, count, size, channels).mean(axis=2)


def combine(parts: np.ndarray, how: str) -> np.ndarray:
    """[N, C] -> [N] by the manifest's combine rule, in float32."""
    p = np.asarray(parts, dtype=np.float32)
    if how == "rms":
        return np.sqrt(np.mean(p * p, axis=1, dtype=np.float32))
    if how == "max":
        return np.max(p, axis=1)
    return np.mean(p, axis=1, dtype=np.float32)


def shares(contributions) -> np.ndarray:
    """Each channel's share of the summed contributions (all zero when they are)."""
    p = np.asarray(contributions, dtype=np.float64)
    total = float(p.sum())
    return p / total if total > 0 else np.zeros_like(p)
