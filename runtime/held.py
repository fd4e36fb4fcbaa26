"""Held readings: a transmitter that keeps repeating its last reading.

A live sensor's noise moves its reading at nearly every sample; a frozen transmitter, a stalled
input card or a stale value on a bus repeats it. The score cannot see that while the process
stays where the reading froze: a held reading looks like a quiet one (the demo's stuck
discharge sensor scored as normal for an hour, until the pump changed duty).

Per channel the normal history gives p, the share of consecutive readings that are identical
(one repeat and one change are added to the counts, so a history without a repeat gives a small
p, never 0). If repeats come independently, a run of identical readings is geometric: it
reaches L + 1 readings with chance p^L, and a run starts at a share (1 - p) of the rows, so runs
longer than L start at a rate (1 - p) p^L per row. The limit L of a channel is the smallest run
length with that rate at most the channel's part of RISK_SHARE of the budget's risk per row.
The model is exact when every value repeats with the same chance (readings spread evenly over
the values they take); where some values repeat more (the mode of a quantised bell-shaped
noise), long runs come from those and pass L more often: for Gaussian noise at a fine
resolution 2^(L/2) / sqrt(L + 1) times as often (2 at L = 4, 3 at L = 6; the sum over values of
p_k^(L+1), with p_k following the density), which the 1 % share absorbs.

A channel is watched only if its history agrees with that model: its longest run is not
improbable under it (a run at least as long somewhere in its n readings has a chance of at least
ALPHA) and is no longer than L. A channel that holds for reasons of its own (a motor current of
0 while stopped, a flow meter's dropouts, a coarse resolution, a value logged faster than it
updates) fails the test and is not watched (its limit is null): that is decided from its
history, not by name.

The Judge (detector.py) hands the alert machine level + |level| x (run / limit - 1) of the
channel with the largest ratio (level x run / limit for a positive level): a run longer than
its limit passes the level whatever the score's sign, the alert names that channel and
closes when the reading moves again. A run that passes its limit while an alert the score,
the CUSUM, a step or another held reading opened is open cannot open one of its own; the Judge
says it at once as `reading_held` (channel, readings, limit, the open alert's id), once per run,
so a frozen transmitter is not hidden behind an alert about something else until that one has
closed and cooled down. Runs restart after a gap or a clock reset (the readings
before it are not known to lead up to the ones after it). The limits sit in the threshold policy
under HELD_KEY.
"""

import math
from typing import Any, Dict, List, Optional, Sequence

import numpy as np

from .thresholds import HELD_KEY

RISK_SHARE = 0.01  # the check may add at most 1 % to the budgeted false-alarm rate: a frozen
#                    reading is so unlike noise that a small share costs a reading or two of delay
ALPHA = 0.05       # the usual significance level for rejecting the run model (common practice)


class HeldReadings:
    """Per channel, how many identical readings in a row it has shown; see the module
    docstring."""

    def __init__(self, limits: Sequence[Optional[int]]):
        self.limits = list(limits)
        n = len(self.limits)
        self.runs = [0] * n
        self.last = [None] * n  # type: List[Optional[float]]
        self.told = [False] * n  # the run past its limit was announced (newly_past)

    @classmethod
    def from_policy(cls, policy: Dict[str, Any], channels: int) -> "Optional[HeldReadings]":
        section = policy.get(HELD_KEY)
        if section is None:
            return None
        limits = section.get("limits") if isinstance(section, dict) else None
        if (not isinstance(section, dict) or sorted(section) != ["limits"]
                or not isinstance(limits, list)
                or len(limits) != channels
                or not all(v is None or (type(v) is int and v >= 1) for v in limits)):
            raise ValueError(f'threshold.held must be {{"limits": [...]}}: {channels} entries, '
                             "each a run length >= 1 or null (channel not watched)")
        if all(v is None for v in limits):
            return None
        return cls(limits)

    def add(self, row: Sequence[float]) -> None:
        """One grid row's readings (raw units; NaN where a cell is blank: it ends the run and
        starts none, as in run_lengths)."""
        for c, limit in enumerate(self.limits):
            if limit is None:
                continue
            v = float(row[c])
            if math.isnan(v):
                self.runs[c], self.last[c], self.told[c] = 0, None, False
                continue
            held = v == self.last[c]
            self.runs[c] = self.runs[c] + 1 if held else 1
            self.told[c] = self.told[c] and held
            self.last[c] = v

    def newly_past(self) -> List[int]:
        """Watched channels whose run has passed its limit and was not yet announced; each is
        announced once per run (a new reading or a blank starts a new one)."""
        past = [c for c, lim in enumerate(self.limits)
                if lim and self.runs[c] > lim and not self.told[c]]
        for c in past:
            self.told[c] = True
        return past

    def worst(self) -> int:
        """The watched channel with the largest run / limit."""
        ratios = [self.runs[c] / lim if lim else -1.0 for c, lim in enumerate(self.limits)]
        return int(np.argmax(ratios))

    def ratio(self) -> float:
        """Run / limit of the worst channel: above 1 when a reading is held past its limit."""
        c = self.worst()
        return self.runs[c] / self.limits[c]

    def clear(self) -> None:
        self.runs = [0] * len(self.limits)
        self.last = [None] * len(self.limits)
        self.told = [False] * len(self.limits)

    def state(self) -> Dict[str, list]:
        return {"runs": list(self.runs), "last": list(self.last), "told": list(self.told)}

    def restore(self, d: Any) -> None:
        n = len(self.limits)
        # a state from before `told`: a run already past its limit counts as announced
        told = d.get("told") if isinstance(d, dict) else None
        if isinstance(d, dict) and told is None and isinstance(d.get("runs"), list):
            told = [type(r) is int and bool(lim) and r > lim
                    for r, lim in zip(d["runs"], self.limits)]
        ok = (isinstance(d, dict) and sorted(k for k in d if k != "told") == ["last", "runs"]
              and isinstance(d["runs"], list) and isinstance(d["last"], list)
              and isinstance(told, list) and all(type(v) is bool for v in told)
              and len(d["runs"]) == len(d["last"]) == len(told) == n
              and all(type(r) is int and r >= 0 for r in d["runs"])
              and all((v is None) == (r == 0) for v, r in zip(d["last"], d["runs"]))
              and all(v is None or (isinstance(v, (int, float)) and not isinstance(v, bool)
                                    and math.isfinite(v)) for v in d["last"]))
        if not ok:
            raise ValueError("the held-reading runs are malformed")
        self.runs = list(d["runs"])
        self.last = [None if v is None else float(v) for v in d["last"]]
        self.told = list(told)


# ---------------------------------------------------------------- fitted on the workstation

def run_lengths(x: np.ndarray) -> np.ndarray:
    """Lengths of the runs of identical consecutive values in x, in order (NaN ends a run and
    belongs to none)."""
    x = np.asarray(x, np.float64)
    lengths, run, last = [], 0, None
    for v in x:
        if not math.isfinite(v):
            if run:
                lengths.append(run)
            run, last = 0, None
        elif v == last:
            run += 1
        else:
            if run:
                lengths.append(run)
            run, last = 1, v
    if run:
        lengths.append(run)
    return np.asarray(lengths, dtype=np.int64)


def channel_limit(x: np.ndarray, risk: float) -> Dict[str, Any]:
    """One channel's limit for a risk per row: {"limit": L or None, "repeat": p, "longest": run,
    "chance": of a run that long in the history under the model}."""
    runs = run_lengths(x)
    rows = int(runs.sum())
    repeats = rows - len(runs)
    p = (repeats + 1) / (max(rows - 1, 0) + 2)
    limit = 1
    while (1 - p) * p ** limit > risk:
        limit += 1
    longest = int(runs.max()) if runs.size else 0
    # P(some run >= longest in `rows` readings) ~ 1 - exp(-starts x p^(longest - 1))
    chance = -math.expm1(-rows * (1 - p) * p ** max(longest - 1, 0))
    # a reading that never changed shows no run's end to fit p on (a setpoint, a spare input)
    watched = len(runs) >= 2 and chance >= ALPHA and longest <= limit
    return {"limit": limit if watched else None, "repeat": p, "longest": longest,
            "chance": chance}


def calibrate_held(history: np.ndarray, risk_per_row: float) -> Dict[str, Any]:
    """The held section for a history [rows, channels] in raw units (NaN where a row is
    missing) and the budget's risk per row: {"section": {"limits": [...]} or None, "channels":
    [channel_limit(...)]}. Each channel gets an equal part of RISK_SHARE x risk_per_row."""
    history = np.asarray(history, np.float64)
    share = RISK_SHARE * risk_per_row / max(1, history.shape[1])
    found = [channel_limit(history[:, c], share) for c in range(history.shape[1])]
    limits = [f["limit"] for f in found]
    section = {"limits": limits} if any(v is not None for v in limits) else None
    return {"section": section, "channels": found}
