"""Drift: a channel whose level slowly leaves its training envelope.

A slow quantity (a loop temperature, a bearing's ambient) can wander beyond the range it had
while the detector trained, with nothing wrong. Left alone, the network sees a level it never
learned and the score follows it: a flood of alerts, and faults on other channels judged
against a polluted score. Instead, such a channel is reported once as drift and, while the drift
lasts, re-centred onto its envelope's edge before the window reaches the network; the operator
is told to collect fresh normal data and retrain. A channel that leaves the envelope faster than
training ever moved it is left to the score and the alert machine (a step, a burst, a sag).

Per channel c, in scaled units (robust standard deviations of the fit span), each scored hop:
    m_c      level of the window: its median (window_level). A median, not a mean: a channel
             with rare spikes in training (a flow meter's dropouts) would otherwise get an
             envelope and a speed bound as wide as its spikes, and a real departure of its level
             would pass as drift (SKAB valve1 file 1's flow: issue 11's notes)
    envelope [lo_c, hi_c]: the lowest / highest window level of the span the network was
             fitted on (the training span less its calibration span; compile's fit_drift says
             why)
    excess   e_c = max(m_c - hi_c, lo_c - m_c, 0)
    speed    |m_c - m_c one window earlier|, against v_max_c: the largest such change of the
             training span ("normal operation can move this fast")
A channel enters drift once it has been outside its envelope for one window's worth of hops, if
it is leaving no faster than training ever moved: its average pace since it left, excess over
windows spent outside, e_c / (hops outside / hops per window), is at most v_max_c (so a step that
then holds still is left to the score and the alert machine until as long has passed as the
fastest normal movement would have needed to get that far; without it any held step passed as
drift as soon as its window had gone by), its speed is at most v_max_c, and, if its pace has
been above v_max_c at any hop since it left (it outran training), it is not among the channels
of an open or pending alert the score or a held reading raised. That block keeps a fault's own
step (a valve closing) from being re-centred away while its alert holds; a channel that crept
out no faster than training ever moved is a drift whatever is open (blocked too, a slow channel
that left a short training span raised a score alert, the alert kept it out of drift, and the
two held each other open: SKAB valve1 trained on 200 rows, issue 11's notes). An alert the
CUSUM opened keeps no channel out: it says the score crept up, which a drift also does, and the
pace test is what tells the two apart (kept out, a warming channel was never re-centred and
held the CUSUM's alert open for good). The pace is checked again on every hop of the drift,
over all the hops since the channel left: a channel in drift that then runs away faster than
training ever moved is no longer drifting, its drift ends (`drift_ended`, reason "faster") and
the score sees it; the entry check, still counting from when it left, decides whether it
re-enters. Without this, a channel that had slipped a hair past its envelope's edge (SKAB
valve1 file 7: a flow meter's zero reading 0.02 robust sigmas below its training range for one
window) was in drift when its fault came, and the fault's 4-sigma step was re-centred away.
Levels nobody saw move. At the start (the first hop, with no level before it; not after a
restart from a saved state) the levels are taken to have held still for the window before, and
a channel already outside its envelope to have been out for at least a window, having left at
the fastest training pace: it left when nobody watched, so nothing says it moved faster than
training ever did. It is a drift from the first hop, and from there its pace and speed are
measured as any channel's (one that then runs away faster ends its drift). Without this, a
channel that ended training beyond the levels the network was fitted on (a rig still warming
up, at a gateway started after training) had its whole excess counted as one window's
movement, outran training, and an alert the score opened on it kept it out of drift for good
(SKAB's healthy rig, the thermocouple alone at 5-minute rows: one alert open for 25 days;
issue 11's notes, stop 32). After a long gap the departure clock counts the time the gap
stood for: a channel that was out before it has been out through the gap's hops too, and one
that left during it left at most that long ago, so a channel that crept out over a day's outage
becomes a drift, and one that got further than the fastest pace could in the gap is a step.
After the clock is set back how long went unseen is not known: a channel outside is counted out
for as long as the fastest pace needs. Unlike the start, the levels after a gap are not taken
to have held still: a channel enters drift only once a window of them shows its speed, while
the alerts open then are known (SKAB valve1 file 2's fault begins after a 76-second gap: with
the levels taken as held still its temperature was re-centred on the first hop after the gap,
judged against the alert channels of the hop before it, and the fault went unalerted).
The `drift` event is sent once its excess passes MARGIN (a full robust standard deviation
beyond every training window: smaller excursions are the envelope's own sampling error). While
in drift the network sees x_c - sign(m_c) * e_c (the excess removed), so neither that channel
nor the others score it. The drift ends once the channel has been back inside its envelope for
one window's worth of hops (an excursion hovering at the edge is one drift, not a flicker of
many).
A step is the other side of the same test: a channel outside its envelope for one window's
worth of hops, not in drift, that got further than the fastest training pace could have taken
it in the time since it left even with MARGIN taken off its excess (e_c - MARGIN > v_max_c *
windows outside: beyond the envelope's own sampling error, and faster than normal operation
moves; without the margin, a channel creeping out a little faster than v_max was a step for a
window before it became a drift: two false alerts on SKAB's healthy rig). A level the channel
never held for a whole window in training, reached that fast, is evidence of a fault even when
the network reconstructs it (a valve closing by one step of a flow meter's resolution: SKAB
valve1 file 4, where the flow sits one litre a minute low for the whole fault and the score
does not move). With `alert_steps` in the section, `step` also returns each channel's excess in
MARGINs where it is a step (0 elsewhere), and the Judge (detector.py) alerts on it like a held
reading. A step that holds still stops being one once the fastest normal pace could have got
that far, and becomes a drift as above; in between the channel is left to the score.
Events: `drift` when a channel enters drift (channel, how far in robust sigmas, since when, which
side), `drift_grew` each time a reported drift's excess has doubled since it was last announced
(the same fields and `was`, the excess then: a channel still moving away, or a fault on a
channel already in drift, which is re-centred with it so the score cannot see it, is news for
the operator; a few events per drift, 1, 2, 4, 8 ... sigmas, never a flood), `drift_ended`
when it is over (with the largest excess seen, and the reason: "back" inside its envelope, or
"faster" than a drift).
"""

from collections import deque
from typing import Optional, Sequence

import numpy as np

MARGIN = 1.0  # scaled units: one robust standard deviation of the channel
GROWN = 2.0  # a reported drift is announced again each time its excess has grown this much
MAX_UNSEEN_HOPS = 2 ** 40  # a gap counted as longer is as long: the hop counters stay int64


DRIFT_ACTIONS = ("recentre", "report")
# What each action does to a drifting channel: the drift event's words, and the words of
# `run.py check` and the evaluation report (stated here once).
ACTION_TEXT = {"recentre": "re-centred onto the training range while the drift lasts",
               "report": "scored as it is"}
OPERATOR_ACTION = "collect fresh normal data and retrain"
STEP_TEXT = ("a channel that has stepped out of its training range for a window, further than "
             "the fastest training pace could have taken it plus one robust sigma, alerts")


def action_summary(action: Optional[str]) -> str:
    """What a drift does, in a phrase (`run.py check`, the evaluation report)."""
    if action not in ACTION_TEXT:
        return "not watched"
    return f"reported once, {ACTION_TEXT[action]}"


def window_level(window) -> np.ndarray:
    """Each channel's level over a window [..., L, C]: the median of its L values."""
    return np.median(np.asarray(window, dtype=np.float64), axis=-2)


def drift_section(lo, hi, v_max, action: str, alert_steps: bool = False) -> dict:
    """The manifest's `drift` section. action "recentre" feeds the network the channel
    re-centred onto its envelope while the drift lasts; "report" only reports it. alert_steps:
    a step (see above) alerts (bundles without the key: steps are left to the score)."""
    section = {"lo": [float(v) for v in lo], "hi": [float(v) for v in hi],
               "v_max": [float(v) for v in v_max], "action": action}
    if alert_steps:
        section["alert_steps"] = True
    return section


class DriftMonitor:
    def __init__(self, section: dict, channels: Sequence[str], window: int, hop: int):
        self.lo = np.asarray(section["lo"], dtype=np.float64)
        self.hi = np.asarray(section["hi"], dtype=np.float64)
        self.v_max = np.asarray(section["v_max"], dtype=np.float64)
        n = len(channels)
        if not (self.lo.shape == self.hi.shape == self.v_max.shape == (n,)):
            raise ValueError(f"drift: lo, hi and v_max must list {n} numbers (one per channel)")
        if not (np.all(np.isfinite(self.lo)) and np.all(self.hi >= self.lo)
                and np.all(self.v_max >= 0)):
            raise ValueError("drift: need finite lo <= hi and v_max >= 0 per channel")
        self.action = section.get("action", "report")
        if self.action not in DRIFT_ACTIONS:
            raise ValueError(f"drift.action must be one of {', '.join(DRIFT_ACTIONS)}")
        self.recentre = self.action == "recentre"
        self.alert_steps = section.get("alert_steps", False)
        if not isinstance(self.alert_steps, bool):
            raise ValueError("drift.alert_steps must be true or false")
        self.channels = list(channels)
        self.in_drift = np.zeros(n, dtype=bool)
        self.reported = np.zeros(n, dtype=bool)
        self.since = [None] * n  # type: List[Optional[str]]
        self.peak = np.zeros(n)
        self.told = np.zeros(n)  # the excess a reported drift was last announced at
        self.inside = np.zeros(n, dtype=np.int64)  # hops back inside, per channel in drift
        # hops since the channel left its envelope: outside in a row before a drift, every hop
        # (inside or out) during one, so the pace is always measured over the whole departure
        self.outside = np.zeros(n, dtype=np.int64)
        # since it left, the channel was once further out than the fastest training pace allows
        self.outran = np.zeros(n, dtype=bool)
        # no hop seen yet; until the first hop after the start or a gap, the hops that went
        # unseen (-1: not known, as at the start)
        self.fresh, self.unseen = True, -1
        # window levels one window earlier: hops back = ceil(window / hop)
        self.past = deque(maxlen=max(1, -(-window // hop)))

    def excess(self, levels: np.ndarray) -> np.ndarray:
        return np.maximum(np.maximum(levels - self.hi, self.lo - levels), 0.0)

    def departure(self, levels: np.ndarray, c: int) -> dict:
        """How far channel c's level is outside its envelope, and on which side: the words of
        a drift event and of a step alert's `moved`."""
        return {"excess": round(float(self.excess(levels)[c]), 6),
                "side": "above" if levels[c] > self.hi[c] else "below"}

    def step(self, time_text: str, levels, blocked, left_out=None) -> tuple:
        """One scored hop, given the window's levels [C]: (offset [C] to subtract from the
        window, events, steps [C]: each channel's excess in MARGINs where it is a step and
        alert_steps is on, else 0). A channel `left_out` (blanks.py) is not watched: its state
        stays as it was and its level counts as its last one."""
        m = np.array(levels, dtype=np.float64)
        frozen = np.zeros(len(m), dtype=bool) if left_out is None else np.asarray(left_out)
        if self.fresh:
            self._start(m)
        if self.unseen is not None:
            self._count_unseen(m, ~frozen)
        if frozen.any() and self.past:
            m[frozen] = self.past[-1][frozen]
        full = len(self.past) == self.past.maxlen
        speed = np.abs(m - self.past[0]) if full else np.full(len(m), np.inf)
        self.past.append(m)
        e = self.excess(m)
        events = []
        for c in np.flatnonzero(~frozen):
            if self.in_drift[c]:
                self.outside[c] += 1
                self.inside[c] = self.inside[c] + 1 if e[c] <= 0 else 0
                self.peak[c] = max(self.peak[c], e[c])
                if self.inside[c] >= self.past.maxlen:
                    events += self._end(c, time_text, "back")
                    self.outside[c] = 0
                elif e[c] > self.v_max[c] * self.outside[c] / self.past.maxlen:
                    events += self._end(c, time_text, "faster")
            else:
                self.outside[c] = self.outside[c] + 1 if e[c] > 0 else 0
                windows_out = self.outside[c] / self.past.maxlen
                paced = e[c] <= self.v_max[c] * windows_out
                self.outran[c] = self.outside[c] > 0 and (self.outran[c] or (
                    windows_out >= 1 and not paced))
                if (windows_out >= 1 and paced and speed[c] <= self.v_max[c]
                        and not (blocked[c] and self.outran[c])):
                    self.in_drift[c], self.since[c], self.peak[c] = True, time_text, e[c]
            if self.in_drift[c] and not self.reported[c] and e[c] > MARGIN:
                self.reported[c], self.told[c] = True, e[c]
                events.append({"event": "drift", "channel": self.channels[c],
                               "time": time_text, "since": self.since[c],
                               **self.departure(m, c),
                               "action": ACTION_TEXT[self.action] + "; " + OPERATOR_ACTION})
            elif self.in_drift[c] and self.reported[c] and e[c] >= GROWN * self.told[c]:
                events.append({"event": "drift_grew", "channel": self.channels[c],
                               "time": time_text, "since": self.since[c],
                               **self.departure(m, c), "was": round(float(self.told[c]), 6)})
                self.told[c] = e[c]
        offset = np.where(self.in_drift & self.recentre & ~frozen,
                          np.where(m > self.hi, e, -e), 0.0)
        return offset, events, np.where(frozen, 0.0, self._steps(e))

    def _start(self, m: np.ndarray) -> None:
        """The first hop: the levels held still for the window before (the module docstring's
        rule for levels nobody saw move)."""
        self.fresh = False
        self.past.extend([m] * self.past.maxlen)

    def _count_unseen(self, m: np.ndarray, live: np.ndarray) -> None:
        """The first hop after the start or a gap: the departure clock runs on through the hops
        that went unseen, and a channel that left in them left at most that long ago; when how
        long is not known, as long as the fastest pace needs (a channel left out stays as it
        was)."""
        needed = self._paced_hops(self.excess(m))
        if self.unseen < 0:
            clock = np.maximum(self.outside, needed)
        else:
            clock = np.where(self.outside > 0, self.outside + self.unseen,
                             np.minimum(needed, self.unseen))
        self.outside = np.where(live, clock, self.outside)
        self.unseen = None

    def _paced_hops(self, e: np.ndarray) -> np.ndarray:
        """Per channel outside: the hops the fastest training pace needs to get this far, and
        a window at least, less the one the hop itself counts (0 inside, or with no pace)."""
        per_window = self.past.maxlen
        paced = (e > 0) & (self.v_max > 0)
        hops = np.zeros(len(e), dtype=np.int64)
        hops[paced] = np.maximum(np.ceil(e[paced] / self.v_max[paced] * per_window),
                                 per_window) - 1
        return hops

    def _steps(self, e: np.ndarray) -> np.ndarray:
        """Excess in MARGINs of the channels that are steps this hop (0 elsewhere)."""
        if not self.alert_steps:
            return np.zeros(len(e))
        windows_out = self.outside / self.past.maxlen
        beyond = e - MARGIN > self.v_max * windows_out
        step = ~self.in_drift & (windows_out >= 1) & beyond
        return np.where(step, e / MARGIN, 0.0)

    def _end(self, c: int, time_text: str, reason: str) -> list:
        events = []
        if self.reported[c]:
            events.append({"event": "drift_ended", "channel": self.channels[c],
                           "time": time_text, "since": self.since[c],
                           "peak_excess": round(float(self.peak[c]), 6), "reason": reason})
        self.in_drift[c], self.reported[c], self.told[c] = False, False, 0.0
        self.since[c], self.inside[c] = None, 0
        return events

    def reset(self, unseen_hops: int = -1) -> None:
        """After a long gap (unseen_hops: the hops it stood for) or a clock set back (-1: how
        long is not known) the window one window earlier is gone."""
        self.past.clear()
        self.unseen = min(int(unseen_hops), MAX_UNSEEN_HOPS)

    def state(self) -> dict:
        return {"in_drift": [bool(v) for v in self.in_drift],
                "reported": [bool(v) for v in self.reported], "since": list(self.since),
                "peak": [float(v) for v in self.peak], "inside": [int(v) for v in self.inside],
                "told": [float(v) for v in self.told],
                "outside": [int(v) for v in self.outside],
                "outran": [bool(v) for v in self.outran], "fresh": self.fresh,
                "unseen": self.unseen, "past": [[float(v) for v in m] for m in self.past]}

    def restore(self, d: dict) -> None:
        # a state from before these keys: neither starting nor after a gap
        unseen = d.get("unseen")
        if unseen is not None and not -1 <= int(unseen) <= MAX_UNSEEN_HOPS:
            raise ValueError(f"drift.unseen must be -1 .. {MAX_UNSEEN_HOPS}")
        self.fresh, self.unseen = bool(d.get("fresh", False)), None if unseen is None else int(unseen)
        self.in_drift = np.asarray(d["in_drift"], dtype=bool)
        self.reported = np.asarray(d["reported"], dtype=bool)
        self.since = list(d["since"])
        self.peak = np.asarray(d["peak"], dtype=np.float64)
        # a state from before `told`: a reported drift was last announced at its largest excess
        self.told = np.asarray(d.get("told", np.where(self.reported, self.peak, 0.0)),
                               dtype=np.float64)
        self.inside = np.asarray(d["inside"], dtype=np.int64)
        self.outside = np.asarray(d["outside"], dtype=np.int64)
        # a state from before `outran` existed: every channel outside counts as having outrun
        # (the block as it was then)
        self.outran = np.asarray(d.get("outran", self.outside > 0), dtype=bool)
        self.past.clear()
        self.past.extend(np.asarray(m, dtype=np.float64) for m in d["past"])
