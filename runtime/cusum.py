"""CUSUM of the log score beside the threshold: faults that hold the score a little high for long.

A sagging pressure or a slowly blocking filter can hold the score at two or three times its
normal level for an hour without one hop passing a level set for one rare hop a week. Page's
CUSUM (Page, Biometrika 1954) accumulates the evidence of such a hold:

    S_t = min(CAP x limit, max(0, S_{t-1} + log(score_t / median) - allowance))

- median: the normal score's median (the history's); log(score / median) reads the score on the
  ratio scale it lives on (multiples of normal error), where one wild hop adds only the log of
  its ratio: a single spike cannot carry the evidence, a held rise does;
- allowance = log(q90 / median), q90 the history's 90th percentile: a hop in the normal top
  decile adds evidence, any lower hop takes it away, so on normal data S returns to 0 within a
  few hops of every excursion;
- limit: the evidence passed once per the budget's share of alarms, fitted by POT (a GPD on
  the history's excursion peaks above their median, as the threshold's own tail, thresholds.py;
  a fitted tail heavier than exponential, or a shape too far below 0 to be estimated, is
  extrapolated as exponential, tail_fit), and never
  below the largest excursion peak of the history, which is normal;
- CAP = 2: a long fault's evidence stops at twice the limit, so the alert it holds open closes
  about limit / allowance normal hops after the fault ends (a normal hop takes the allowance
  away on average); without a cap the demo's hours-long bearing wear held its alert open over
  the cavitation that followed it.

The Judge (detector.py) hands the alert machine max(score, level x S / limit): the score, or the
evidence in the score's units, so one machine opens, holds and closes on either. Evidence is not
gathered while the machine cools down after an alert (those windows still hold the alert's
data), it restarts at 0 when an alert closes or after a gap, and an alert the score opened is
judged on the score alone. While a channel is re-centred as drift (drift.py) the CUSUM gathers
nothing and drops what it held: the network then sees a channel pinned to its envelope's edge,
whose small lasting excess is the re-centring's residue, exactly what the CUSUM would add up
(SKAB's anomaly-free rig trained on 2,000 rows: a CUSUM alert opened on the warm-up and stayed
open through 99.8 % of the stream); the score still alerts on anything that passes the level.
The median, allowance and limit are fixed: the CUSUM never learns from the stream. Its settings
sit in the threshold policy under CUSUM_KEY.

State changes (STATE_CHANGE_KEY true): a window that holds a change of operating state
(score.py `state_changes`: a start, a stop, a duty change) counts as a hop at the normal median,
in the history the limit is fitted on and on the gateway alike: its transient adds nothing and
the evidence falls by the allowance, as on a typical normal hop. The CUSUM is the judge of a
rise held in steady running; a state change is judged by the threshold alone. Its transient is
the largest normal error there is, so counted it carried the history's longest excursions and
set the limit (the demo's midday stops; windows holding a change are about a sixth of its
hops), and on the gateway a stop's transient, added to a fault's evidence, crossed the limit
after the fault had ended. Holding the evidence still instead (neither adding nor taking
away) kept an alert open through the duty change after a fault, for an hour
(docs/detection.md). The median and the allowance stay those of every hop, so a steady hop
needs what it needed before to add evidence; the limit falls because the excursions lose their
transients. A section without the key (bundles from before it) counts every hop's score.
"""

import math
from typing import Any, Dict, List, Optional, Sequence

import numpy as np

from .thresholds import CUSUM_KEY, _num, pot_quantile, tail_fit

CAP = 2.0                    # evidence stops at CAP x limit (see above)
ALLOWANCE_QUANTILE = 0.9     # the normal score quantile a hop must pass to add evidence
# The limit is a GPD fit on the excursion peaks above their median: at least 20 excursions, so
# at least 10 peaks for the fit, the pot threshold's own minimum (thresholds.py, from memory:
# a GPD fit on fewer is not worth having). Fewer: compile leaves the CUSUM out.
MIN_EXCURSIONS = 20
STATE_CHANGE_KEY = "state_change_as_median"  # the cusum section's optional flag (see above)


class Cusum:
    """The evidence S of a held rise; see the module docstring."""

    def __init__(self, median: float, allowance: float, limit: float,
                 state_change_as_median: bool = False):
        self.median = _num("threshold.cusum.median", median, 0.0, lo_open=True)
        self.allowance = _num("threshold.cusum.allowance", allowance, 0.0)
        self.limit = _num("threshold.cusum.limit", limit, 0.0, lo_open=True)
        if not isinstance(state_change_as_median, bool):
            raise ValueError(f"threshold.cusum.{STATE_CHANGE_KEY} must be true or false")
        self.state_change_as_median = state_change_as_median
        self.evidence = 0.0

    @classmethod
    def from_policy(cls, policy: Dict[str, Any]) -> "Optional[Cusum]":
        section = policy.get(CUSUM_KEY)
        if section is None:
            return None
        required = ["allowance", "limit", "median"]
        if not isinstance(section, dict) or sorted(set(section) - {STATE_CHANGE_KEY}) != required:
            raise ValueError('threshold.cusum must be {"median": m, "allowance": a, '
                             f'"limit": h}}, optionally with "{STATE_CHANGE_KEY}": true or false')
        return cls(section["median"], section["allowance"], section["limit"],
                   section.get(STATE_CHANGE_KEY, False))

    def add(self, score: float, state_change: bool = False) -> None:
        """Take one hop's score (non-finite scores change nothing); a window holding a change of
        operating state counts as the median when the section says so."""
        if state_change and self.state_change_as_median:
            score = self.median
        if math.isfinite(score):
            step = math.log(max(score, 1e-300) / self.median) - self.allowance
            self.evidence = min(CAP * self.limit, max(0.0, self.evidence + step))

    def judged(self, score: float, level: float) -> float:
        """What the alert machine compares with `level`: the score or the evidence, scaled."""
        if not (math.isfinite(score) and math.isfinite(level)):
            return score  # compares false both ways, as without the CUSUM
        return max(score, level * self.evidence / self.limit)

    def clear(self) -> None:
        self.evidence = 0.0

    def state(self) -> float:
        return self.evidence

    def restore(self, evidence: Any) -> None:
        ok = (isinstance(evidence, (int, float)) and not isinstance(evidence, bool)
              and 0.0 <= evidence <= CAP * self.limit)
        if not ok:
            raise ValueError("the CUSUM's evidence is malformed")
        self.evidence = float(evidence)


# ---------------------------------------------------------------- fitted on the workstation

def excursion_peaks(scores: np.ndarray, median: float, allowance: float) -> List[float]:
    """The peak evidence of each excursion (a run of S > 0 that returned to 0) of the uncapped
    CUSUM over `scores`, in order; a run still open at the end is left out (its peak is not
    known)."""
    peaks, s, top = [], 0.0, 0.0
    steps = np.log(np.maximum(np.asarray(scores, np.float64), 1e-300) / median) - allowance
    for step in steps:
        s = max(0.0, s + float(step))
        if s > 0:
            top = max(top, s)
        elif top > 0:
            peaks.append(top)
            top = 0.0
    return peaks


def cusum_off(why: str, excursions: int = 0) -> Dict[str, Any]:
    """calibrate_cusum's answer when the CUSUM stays off, and why."""
    return {"section": None, "excursions": int(excursions), "why_off": why}


def calibrate_cusum(pieces: Sequence[np.ndarray], risk: float,
                    state_changes: Optional[Sequence[np.ndarray]] = None) -> Dict[str, Any]:
    """The CUSUM section for a risk per hop (its share of the false-alarm budget), from normal
    scores in `pieces` (each a stretch in hop order), and what it was fitted on:
    {"section": {...} or None, "excursions": n, "why_off": text or None}.
    `state_changes`: per piece, which hops' windows hold a change of operating state; they
    count as the median (the section then says so) in the excursions. Median and allowance are
    every hop's.

    With N scores showing n excursions, a risk per hop q allows q N / n exceedances per
    excursion: the limit is the GPD tail quantile of the peaks at that probability."""
    changes = ([np.zeros(len(p), bool) for p in pieces] if state_changes is None
               else [np.asarray(h, bool) for h in state_changes])
    kept = [(np.asarray(p, np.float64), h) for p, h in zip(pieces, changes)]
    finite = [p[np.isfinite(p)] for p, _ in kept]
    scores = np.concatenate(finite) if finite else np.zeros(0)
    if scores.size == 0 or not (scores > 0).all():
        return cusum_off("its scores must be positive (a ratio scale)")
    median = float(np.median(scores))
    allowance = max(0.0, math.log(float(np.quantile(scores, ALLOWANCE_QUANTILE)) / median))
    counted = [np.where(h, median, p)[np.isfinite(p)] for p, h in kept]
    peaks = np.asarray([v for p in counted for v in excursion_peaks(p, median, allowance)])
    if peaks.size < MIN_EXCURSIONS:
        return cusum_off(f"the history shows {peaks.size} excursions of the evidence and its "
                         f"limit needs {MIN_EXCURSIONS}: compile from a longer normal history to "
                         "arm it", peaks.size)
    u = float(np.median(peaks))
    excesses = peaks[peaks > u] - u
    if excesses.size == 0:
        return cusum_off("every excursion of the evidence peaks alike", peaks.size)
    xi, sigma = tail_fit(excesses)
    chance = risk * scores.size / peaks.size  # exceedances allowed per excursion
    limit = pot_quantile(u, xi, sigma, chance, int(peaks.size), int(excesses.size))
    # the history is normal: a limit one of its own excursions passed would have alarmed on it
    section = {"median": median, "allowance": allowance, "limit": max(limit, float(peaks.max()))}
    if state_changes is not None:
        section[STATE_CHANGE_KEY] = True
    return {"section": section, "excursions": int(peaks.size), "why_off": None}
