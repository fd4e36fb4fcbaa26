"""The alert state machine: one step per scored hop.

    warm-up   the first `warmup_hops` scores never open an alert; the step that completes the
              warm-up returns "warmed_up" (once; never when warmup_hops is 0)
    open      score > threshold on `min_hops` consecutive hops -> "opened"; the alert starts at
              the first of those hops (open_since_hop) and its peak includes them
    close     score < close_ratio * threshold -> "closed" (hysteresis: between the two levels an
              open alert stays open and a closed one stays closed); with off_hops > 1 (the
              Judge's off-delay, detector.py) only on that many consecutive such hops
    cooldown  for `cooldown_hops` hops after the closing hop no alert opens, and those hops do
              not count towards a new run of `min_hops`

Hops are numbered from 0; `hop` is the number of steps taken. A NaN score or threshold compares
false both ways: it neither opens nor closes, and it breaks a pending run.
After "closed", open_since_hop and peak_score still describe the alert that just closed, until
the next one opens.
"""

import numbers
from typing import Any, Dict, Optional

WARMED_UP = "warmed_up"
OPENED = "opened"
CLOSED = "closed"
ALERTING_KEYS = ("warmup_hops", "min_hops", "close_ratio", "cooldown_hops")
# What opened an alert (the alert events' `opened_by`), judged by the Judge (detector.py): the
# score itself, the CUSUM's evidence of a held rise (cusum.py), a held reading (held.py), or a
# channel's level that stepped out of its training range (drift.py).
BY_SCORE, BY_CUSUM, BY_HELD, BY_STEP = "score", "cusum", "held", "step"
OPENED_BY = (BY_SCORE, BY_CUSUM, BY_HELD, BY_STEP)


def default_alerting(window: int, hop: int) -> dict:
    """The alert settings a bundle gets unless the engineer says otherwise.

    min_hops 3: one or two noisy hops never open an alert (common practice: a short on-delay);
    close_ratio 0.95: a 5 % deadband, so a score hovering at the threshold does not chatter
    (alarm-management common practice: a deadband of a few percent, from memory); with the
    on-delay and the cooldown also against chatter, a wider band mostly kept alerts open long
    after the fault, while the score sat a little above its normal level (SKAB valve1, teacher,
    mean of 3 seeds: 0.8 -> 0.95 took FAR 0.278 -> 0.192 at F1 0.717 -> 0.713; issue 11);
    cooldown: one window's worth of hops, the time a spike takes to leave the window.
    """
    return {"warmup_hops": 0, "min_hops": 3, "close_ratio": 0.95,
            "cooldown_hops": max(1, window // hop)}


class AlertMachine:
    def __init__(self, *, warmup_hops: int, min_hops: int, close_ratio: float,
                 cooldown_hops: int):
        for name, v, lo in (
            ("warmup_hops", warmup_hops, 0),
            ("min_hops", min_hops, 1),
            ("cooldown_hops", cooldown_hops, 0),
        ):
            if isinstance(v, bool) or not isinstance(v, numbers.Integral) or v < lo:
                raise ValueError(f"{name} must be an integer >= {lo}, got {v!r}")
        ratio = float(close_ratio)
        if not 0.0 < ratio <= 1.0:
            raise ValueError(f"close_ratio must be in (0, 1], got {close_ratio!r}")
        self.warmup_hops = int(warmup_hops)
        self.min_hops = int(min_hops)
        self.close_ratio = ratio
        self.cooldown_hops = int(cooldown_hops)
        self.hop = 0
        self.is_open = False
        self.open_since_hop: Optional[int] = None
        self.peak_score = 0.0
        self._run_start: Optional[int] = None  # first hop of the pending run above threshold
        self._run_len = 0
        self._run_peak = 0.0
        self._cooldown_left = 0
        self._quiet = 0  # consecutive hops of an open alert below the closing level

    @property
    def run_len(self) -> int:
        """Consecutive hops above the threshold so far towards min_hops (0 when none)."""
        return self._run_len

    @property
    def cooling(self) -> bool:
        """In the cooldown after an alert closed (no alert opens)."""
        return self._cooldown_left > 0

    @property
    def is_warm(self) -> bool:
        return self.hop >= self.warmup_hops

    def step(self, score: float, threshold: float, off_hops: int = 1) -> Optional[str]:
        """Advance one hop; returns None, "warmed_up", "opened" or "closed". off_hops: hops in a
        row below the closing level that close an open alert."""
        i = self.hop
        self.hop += 1
        score = float(score)
        threshold = float(threshold)
        if i < self.warmup_hops:
            return WARMED_UP if self.hop == self.warmup_hops else None

        if self.is_open:
            self.peak_score = max(self.peak_score, score)
            if score < self.close_ratio * threshold:
                self._quiet += 1
                if self._quiet >= off_hops:
                    self.is_open = False
                    self._quiet = 0
                    self._cooldown_left = self.cooldown_hops
                    return CLOSED
            elif score >= self.close_ratio * threshold:  # a NaN hop leaves the count as it is
                self._quiet = 0
            return None

        if self._cooldown_left > 0:
            self._cooldown_left -= 1
            return None

        if score > threshold:
            if self._run_len == 0:
                self._run_start = i
                self._run_peak = score
            self._run_len += 1
            self._run_peak = max(self._run_peak, score)
            if self._run_len >= self.min_hops:
                self.is_open = True
                self.open_since_hop = self._run_start
                self.peak_score = self._run_peak
                self._reset_run()
                return OPENED
        else:
            self._reset_run()
        return None

    def _reset_run(self) -> None:
        self._run_start = None
        self._run_len = 0
        self._run_peak = 0.0

    def state(self) -> Dict[str, Any]:
        return {
            "warmup_hops": self.warmup_hops,
            "min_hops": self.min_hops,
            "close_ratio": self.close_ratio,
            "cooldown_hops": self.cooldown_hops,
            "hop": self.hop,
            "is_open": self.is_open,
            "open_since_hop": self.open_since_hop,
            "peak_score": self.peak_score,
            "run_start": self._run_start,
            "run_len": self._run_len,
            "run_peak": self._run_peak,
            "cooldown_left": self._cooldown_left,
            "quiet": self._quiet,
        }

    @classmethod
    def from_state(cls, d: Dict[str, Any]) -> "AlertMachine":
        m = cls(**{k: d[k] for k in ALERTING_KEYS})
        m.hop = int(d["hop"])
        m.is_open = bool(d["is_open"])
        m.open_since_hop = None if d["open_since_hop"] is None else int(d["open_since_hop"])
        m.peak_score = float(d["peak_score"])
        m._run_start = None if d["run_start"] is None else int(d["run_start"])
        m._run_len = int(d["run_len"])
        m._run_peak = float(d["run_peak"])
        m._cooldown_left = int(d["cooldown_left"])
        m._quiet = int(d.get("quiet", 0))  # a state from before the off-delay: none counted
        return m
