"""The detector: one validated row in, events out. No I/O of its own.

Two layers, each usable alone:

Judge.step(time, score, parts) -> events     one scored hop: threshold policy, alert machine,
                                             the open alert's record (id, channel shares)
Detector.feed(time, values) -> events        one input row: time order, gap filling, features,
                                             scaling, the ring; every `hop` rows one window is
                                             scored (network backend + score rule) and judged

The gateway service (service.py) wraps a Detector with files, signals and checkpoints; the
workstation's `ganlet verify` and `ganlet evaluate` replay rows or scores through the same
classes, so what they judge is what the gateway does.

Per row (Detector.feed):
  - t == last time -> rejected "duplicate_time"; t < last time -> rejected "out_of_order";
  - m missing periods with m <= max_gap_periods -> the m rows are filled by linear
    interpolation in raw units; more -> the window is reset, a "gap" event is emitted and
    scoring waits until the ring is full again;
  - a blank cell (NaN) is held from the channel's last reading for up to max_gap_periods rows;
    a longer blank loses the channel and the score goes on without it (blanks.py); a row with
    every cell blank is rejected "missing_value";
  - each channel's feature (its level, or its rate: features.py; a rate needs the row before,
    so after a start or a gap the first row only primes it), scaled (f - center) / scale into
    the ring; every `hop` new rows once the ring is full, exactly one window is scored;
  - each grid row's raw readings extend or restart the held-reading runs (held.py).
A rejected row raises RowError and changes nothing.

Events are flat dicts {"event": NAME, ...} (events.py names them).
"""

import hashlib
from collections import deque
from typing import Dict, List, Optional, Sequence

import numpy as np

from . import features
from .alerts import (
    ALERTING_KEYS,
    BY_CUSUM,
    BY_HELD,
    BY_SCORE,
    BY_STEP,
    CLOSED,
    OPENED,
    WARMED_UP,
    AlertMachine,
)
from .blanks import BlankCells
from .cusum import Cusum
from .drift import DriftMonitor, window_level
from .held import HeldReadings
from .intake import RowError, format_time
from .ring import Ring
from .score import ScoreRule, piece_means, shares
from .thresholds import make_threshold, threshold_from_state

# A scaled value this far out is a broken sensor or a unit error, not a measurement; the
# limit also keeps the squared residual far from float32 overflow (~3.4e38).
MAX_SCALED_ABS = 1e6
TOP_CHANNELS = 3  # channels reported per alert
COUNTERS = (
    "lines",  # data lines read (after the header)
    "blank_lines",
    "samples",  # accepted input rows
    "blank_cells",  # channel cells blank in accepted rows (blanks.py)
    "text_cells",  # of them, cells that held text, a quality flag such as "Bad" (intake.py)
    "interpolated",  # samples filled in across short gaps
    "gaps",  # long gaps that reset the window
    "hops",  # windows scored
    "alerts_opened",
    "alerts_closed",
)


def finite_or_none(x) -> Optional[float]:
    x = float(x)
    return x if np.isfinite(x) else None


def alert_id(bundle_id: str, opened: str) -> str:
    """Deterministic: the same bundle and the same start time give the same id on replay."""
    return hashlib.sha256(f"{bundle_id}|{opened}".encode("ascii")).hexdigest()[:20]


class Judge:
    """One scored hop -> events: the threshold in force, the alert machine's step, and the
    record of the open alert (its channels' shares accumulate over its hops)."""

    def __init__(self, bundle_id: str, channels: Sequence[str], units: Sequence[str],
                 policy: dict, alerting: dict):
        self.bundle_id = bundle_id
        self.channels = list(channels)
        self.units = list(units)
        self.threshold = make_threshold(dict(policy))
        self.cusum = Cusum.from_policy(policy)  # None: single hops only
        self.held = HeldReadings.from_policy(policy, len(self.channels))  # None: not watched
        self.machine = AlertMachine(**{k: alerting[k] for k in ALERTING_KEYS})
        # the last min_hops hops: an alert opens at the first of them (open_since_hop)
        self.recent = deque(maxlen=self.machine.min_hops)  # (hop, time, parts)
        self.alert = None  # type: Optional[dict]
        self.level = float("nan")  # the threshold applied to the last hop

    @property
    def is_open(self) -> bool:
        return self.machine.is_open

    @property
    def cause(self) -> Optional[str]:
        """What opened the alert on record (alerts.OPENED_BY); None with none, or from a state
        older than the key."""
        return None if self.alert is None else self.alert.get("opened_by")

    def step(self, t: float, score: float, parts: Optional[np.ndarray] = None,
             drifting: bool = False, steps: Optional[np.ndarray] = None,
             state_change: bool = False) -> List[dict]:
        """One scored hop; `drifting`: a channel of it was re-centred as drift; `steps`: each
        channel's excess in MARGINs where it is a step, else 0 (drift.py); `state_change`: its
        window holds a change of operating state (score.py), which the CUSUM counts as normal."""
        parts = np.zeros(len(self.channels)) if parts is None else np.asarray(parts, np.float64)
        self.level = float(self.threshold.level)
        hop = self.machine.hop
        was_open = self.machine.is_open
        worst_step = float(np.max(steps)) if steps is not None and len(steps) else 0.0
        judged = self._judged(score, drifting, worst_step, state_change)
        transition = self.machine.step(judged, self.level, self._off_hops())
        if not was_open and not self.machine.is_open and judged <= self.level:
            self.threshold.absorb(score)  # only what it judged normal, never inside an alert
        self.recent.append((hop, t, parts))
        if self.alert is not None:  # an open alert (its closing hop included) collects parts
            self._add(parts)
        events = [{"event": "score", "time": format_time(t), "hop": hop,
                   "score": finite_or_none(score), "threshold": finite_or_none(self.level),
                   "alert_open": self.machine.is_open}]
        if transition == WARMED_UP:
            events.append({"event": "warmed_up", "time": format_time(t), "hop": hop})
        elif transition == OPENED:
            events.append(self._open(self._opened_by(score, worst_step)))
        elif transition == CLOSED:
            events.append(self._alert_event("alert_closed", closed=format_time(t)))
            self.alert = None
            if self.cusum is not None:  # its evidence belongs to the alert, not to what follows
                self.cusum.clear()
        return events + self._held_news(t)

    def see(self, raw: Sequence[float]) -> None:
        """One grid row's raw readings (the held-reading runs count rows, not hops)."""
        if self.held is not None:
            self.held.add(raw)

    def _judged(self, score: float, drifting: bool, worst_step: float,
                state_change: bool = False) -> float:
        """What the alert machine compares with the level: the score, the CUSUM's evidence in
        the score's units (cusum.py; it gathers none while the machine cools down), a held
        reading's run (held.py) or a step's excess (drift.py) in the same units. An open alert
        is judged on what opened it (the score and the CUSUM together, as the CUSUM's evidence
        includes the score), and one the score or the CUSUM opened also on the steps."""
        if self.cusum is not None and not self.machine.cooling:
            if drifting:  # the score's small excess is the re-centring's residue
                self.cusum.clear()
            else:
                self.cusum.add(score, state_change)
        by = self.cause
        step = self._in_score_units(worst_step) if worst_step > 0 else -np.inf
        if by == BY_SCORE:
            # closes when the score falls back and no channel is a step: a fault's level can
            # stay off its training range after the network's error on it has settled
            return max(score, step)
        held = self._held_judged()
        if by == BY_HELD:
            return held  # closes when the reading moves again
        if by == BY_STEP:
            return step  # closes when the channel is back, or no longer a step (drift.py)
        judged = score if self.cusum is None else self.cusum.judged(score, self.level)
        judged = max(judged, step)  # a step is above the level, or -inf
        return max(judged, held) if held > self.level else judged

    def _off_hops(self) -> int:
        """Hops an open alert must stay below its closing level before it closes. A step or a
        held reading is there or not (its judged value drops from far above the level to
        nothing), so the deadband cannot carry its alert through one hop of a level flickering
        at its envelope's edge, and the cooldown then kept the fault's alert shut for a window
        (SKAB valve1 file 4, a flow meter alternating between two readings: issue 11's notes,
        stop 36); such an alert closes after as many quiet hops as open one (an on-delay and an
        off-delay of the same length: alarm-management common practice, from memory). The
        score and the CUSUM move by degrees and close on their first hop below the deadband:
        an off-delay there lengthened every alert and cost more false rows than it found."""
        return self.machine.min_hops if self.cause in (BY_STEP, BY_HELD) else 1

    def _held_news(self, t: float) -> List[dict]:
        """`reading_held` for each channel whose run has just passed its limit while an alert
        about something else is open (held.py); with none open, the run opens its own alert."""
        a = self.alert
        if self.held is None or a is None or not self.machine.is_open:
            return []
        own = None  # the channel whose held run opened this alert, which names it already
        if self.cause == BY_HELD:  # `moved` is set once the opening hop is over
            own = (a.get("moved") or {}).get("name") or self.channels[self.held.worst()]
        return [{"event": "reading_held", "channel": self.channels[c], "unit": self.units[c],
                 "time": format_time(t), "readings": self.held.runs[c],
                 "limit": self.held.limits[c], "alert_id": a["alert_id"]}
                for c in self.held.newly_past() if self.channels[c] != own]

    def _held_judged(self) -> float:
        """The worst held run in the score's units: above the level by the level's size times
        how far the run is past its limit, so above it exactly when a run is past its limit,
        whatever the sign of the score (a baseline's score in `ganlet evaluate` may be
        negative)."""
        if self.held is None:
            return -np.inf
        return self._in_score_units(self.held.ratio())

    def _in_score_units(self, ratio: float) -> float:
        """A ratio to its limit (> 1: past it) as a score: above the level by the level's size
        times how far past, so above it exactly when the ratio is above 1."""
        return self.level + abs(self.level) * (ratio - 1.0)

    def held_channel(self, score: float) -> dict:
        """`moved` of an alert a held reading opened: the channel, and how many identical
        readings in a row it has shown."""
        c = self.held.worst()
        return {"name": self.channels[c], "unit": self.units[c],
                "held_readings": self.held.runs[c], "score": finite_or_none(score)}

    def _opened_by(self, score: float, worst_step: float) -> str:
        if self.held is not None and self.held.ratio() > 1.0:
            return BY_HELD  # the most specific: it names the channel and what it does
        if score > self.level:
            return BY_SCORE
        return BY_STEP if worst_step > 1.0 else BY_CUSUM

    def reset_run(self) -> None:
        """After a long gap the hops before it no longer lead up to the hops after it."""
        self.recent.clear()
        if self.cusum is not None:
            self.cusum.clear()
        if self.held is not None:
            self.held.clear()

    def alert_channels(self) -> np.ndarray:
        """Channels of an open or pending alert: those whose contribution to the last hop is
        at least the average (all False when nothing is open or pending, or the open alert is
        the CUSUM's: drift.py says why)."""
        pending = self.machine.is_open or self.machine.run_len > 0
        crept = self.cause == BY_CUSUM
        if not pending or not self.recent or crept:
            return np.zeros(len(self.channels), dtype=bool)
        last = self.recent[-1][2]
        return last >= last.sum() / max(1, len(last))

    def _add(self, parts: np.ndarray) -> None:
        self.alert["parts_sum"] = [a + float(b) for a, b in zip(self.alert["parts_sum"], parts)]
        self.alert["hops"] += 1

    def _open(self, opened_by: str) -> dict:
        since = self.machine.open_since_hop
        run = [(h, t, p) for h, t, p in self.recent if h >= since]
        opened = format_time(run[0][1])
        self.alert = {"alert_id": alert_id(self.bundle_id, opened), "opened": opened,
                      "opened_hop": since, "threshold": self.level, "opened_by": opened_by,
                      "parts_sum": [0.0] * len(self.channels), "hops": 0}
        for _, _, p in run:
            self._add(p)
        return self._alert_event("alert_opened", closed=None)

    def _alert_event(self, name: str, closed: Optional[str]) -> dict:
        a = self.alert
        event = {"event": name, "alert_id": a["alert_id"], "bundle_id": self.bundle_id,
                 "opened": a["opened"], "closed": closed,
                 "peak_score": finite_or_none(self.machine.peak_score),
                 "threshold": finite_or_none(a["threshold"]), "hops": a["hops"],
                 "channels": self._top_channels()}
        if a.get("moved") is not None:  # set at the opening (Detector.moved); older states lack it
            event["moved"] = a["moved"]
        if a.get("opened_by") is not None:  # older states lack it
            event["opened_by"] = a["opened_by"]
        return event

    def _top_channels(self) -> List[Dict]:
        share = shares(self.alert["parts_sum"])
        order = sorted(range(len(share)), key=lambda i: (-share[i], i))[:TOP_CHANNELS]
        return [{"name": self.channels[i], "unit": self.units[i], "share": round(float(share[i]), 6)}
                for i in order]

    def state(self) -> dict:
        return {"threshold": self.threshold.state(), "machine": self.machine.state(),
                "recent": [[h, t, [float(v) for v in p]] for h, t, p in self.recent],
                "alert": self.alert,
                "cusum": None if self.cusum is None else self.cusum.state(),
                "held": None if self.held is None else self.held.state()}

    def restore(self, d: dict) -> None:
        self.threshold = threshold_from_state(d["threshold"])
        self.machine = AlertMachine.from_state(d["machine"])
        self.recent = deque(
            ((int(h), float(t), np.asarray(p, dtype=np.float64)) for h, t, p in d["recent"]),
            maxlen=self.machine.min_hops,
        )
        self.alert = d["alert"]
        if self.cusum is not None:  # a state from before the CUSUM existed starts it at 0
            saved = d.get("cusum")
            self.cusum.restore(0.0 if saved is None else saved)
        if self.held is not None:  # a state from before the check existed starts with no runs
            saved = d.get("held")
            if saved is not None:
                self.held.restore(saved)
            else:
                self.held.clear()


class Detector:
    """Per-row state: time, last raw row, ring, counters, and the Judge of the scored hops."""

    def __init__(self, bundle, scorer):
        self.bundle = bundle
        self.scorer = scorer
        self.rule = ScoreRule(bundle.manifest["score"])
        section = bundle.manifest.get("drift")
        self.drift = (DriftMonitor(section, bundle.channels, bundle.window, bundle.hop)
                      if section is not None else None)
        self.ring = Ring(bundle.window, len(bundle.channels))
        self.judge = Judge(bundle.bundle_id, bundle.channels, bundle.units,
                           bundle.threshold_policy, bundle.alerting)
        # only a CUSUM that counts state changes as normal needs them (cusum.py)
        cusum = self.judge.cusum
        self.watch_state_changes = cusum is not None and cusum.state_change_as_median
        self.blanks = BlankCells(bundle.channels, bundle.max_gap_periods,
                                 bundle.window + int(bundle.rate.any()))
        self.counters = {k: 0 for k in COUNTERS}
        self.errors = {}  # type: Dict[str, int]  # rejected rows by kind (the service counts)
        self.last_time = None  # type: Optional[float]
        self.last_raw = None  # type: Optional[np.ndarray]  # raw row at last_time
        self.last_hop = None  # type: Optional[dict]  # what the last scored hop saw (inspection)

    # ------------------------------------------------------------------ state
    def state(self) -> dict:
        return {
            "ring": self.ring.state(),
            "judge": self.judge.state(),
            "drift": self.drift.state() if self.drift is not None else None,
            "blanks": self.blanks.state(),
            "counters": dict(self.counters),
            "errors": dict(self.errors),
            "last_time": self.last_time,
            # a lost channel's cell is NaN, kept as null: the checkpoint stays strict JSON
            "last_raw": None if self.last_raw is None else [finite_or_none(v)
                                                            for v in self.last_raw],
        }

    def restore(self, d: dict) -> None:
        self.ring = Ring.from_state(d["ring"])
        self.judge.restore(d["judge"])
        if self.drift is not None:
            self.drift.restore(d["drift"])
        self.blanks.restore(d.get("blanks"))
        self.counters.update(d["counters"])
        self.errors.update(d["errors"])
        self.last_time = d["last_time"]
        self.last_raw = None if d["last_raw"] is None else np.asarray(
            [np.nan if v is None else v for v in d["last_raw"]], np.float64)

    # ------------------------------------------------------------------ rows
    def feed(self, t: float, values: Sequence[float]) -> List[dict]:
        """One parsed row. Raises RowError for rows it refuses (nothing changes then)."""
        self._check_order(t)
        raw = np.asarray(values, dtype=np.float64)
        blank = int(np.isnan(raw).sum())
        if blank == len(raw):
            raise RowError("missing_value", "every channel is blank")
        grid, gap = self._grid_rows(t, raw)
        # a blank is held from the last reading even across a long gap: the ring is refilled
        # after one, and a blank in the refill would otherwise lose its channel for a window
        filled, blank_events, blanks_after = self.blanks.plan(grid, self.last_raw, format_time)
        last = None if gap else self.last_raw  # a rate starts afresh after a long gap
        rows = self._scaled_rows(filled, last)
        # the row is accepted: from here on the state changes
        events = []
        self.counters["samples"] += 1
        self.counters["blank_cells"] += blank
        if gap:
            self.counters["gaps"] += 1
            events.append({
                "event": "gap", "start": format_time(self.last_time), "end": format_time(t),
                "missing_periods": gap, "max_gap_periods": self.bundle.max_gap_periods,
                "action": "window_reset",
                "samples_to_refill": self.bundle.window + int(self.bundle.rate.any()),
            })
            self.ring.reset()
            self.judge.reset_run()
            if self.drift is not None:  # the hops of the gap and of the window's refill
                self.drift.reset((gap + self.bundle.window) // self.bundle.hop)
        self.counters["interpolated"] += len(rows) - 1
        self.blanks.commit(blanks_after)
        events += blank_events
        held = self.last_raw  # what a short blank's cells were held at (plan)
        for (tk, x), (_, r), (_, now, _, ended) in zip(rows, grid, filled):
            self.judge.see(r)  # blank cells as NaN: they neither hold nor move a reading
            if ended:
                self._redraw_short_blanks(ended, held, now)
            if x is not None:
                events += self._push(x, tk)
            held = now
        self.last_raw = filled[-1][1]
        self.last_time = t
        return events

    def channels_lost(self) -> List[str]:
        """The channels scored without at the moment (blanks.py): heartbeats and the stop
        event carry them, so a loss announced before a restart is not forgotten."""
        return [c for c, lost in zip(self.bundle.channels, self.blanks.left_out) if lost]

    def restart_clock(self) -> None:
        """The feed's clock was set back (a jump the service's clock guard confirmed): the next
        row starts a new timeline, as after a long gap (window reset, no filling across it)."""
        self.ring.reset()
        self.judge.reset_run()
        if self.drift is not None:
            self.drift.reset()
        self.last_time = None
        self.last_raw = None

    def _check_order(self, t: float) -> None:
        if self.last_time is None:
            return
        if t == self.last_time:
            raise RowError("duplicate_time", f"time {format_time(t)} seen already")
        if t < self.last_time:
            raise RowError("out_of_order",
                           f"time {format_time(t)} before {format_time(self.last_time)}")

    def _grid_rows(self, t: float, raw: np.ndarray):
        """(the grid rows this row stands for: filled-in ones, then itself; missing periods
        when the gap is too long to fill, else 0)."""
        if self.last_time is None:
            return [(t, raw)], 0
        steps = max(1, int(round((t - self.last_time) / self.bundle.period_s)))
        missing = steps - 1
        if missing > self.bundle.max_gap_periods:
            return [(t, raw)], missing
        previous = self.last_raw
        # linear in raw units, as the workstation's intake fills short gaps
        filled = [(self.last_time + (t - self.last_time) * k / steps,
                   previous + (raw - previous) * (k / steps)) for k in range(1, steps)]
        return filled + [(t, raw)], 0

    def _redraw_short_blanks(self, ended, held, now) -> None:
        """The reading `now` ends short blanks [(channel, rows)] that were held at `held`: their
        cells in the ring become the straight line between the two readings (blanks.py); a
        rate channel keeps the held cells, and so do cells a long gap's window reset dropped."""
        for c, rows in ended:
            if self.bundle.rate[c]:
                continue
            for k in range(1, min(rows, self.ring.filled) + 1):  # k rows back from the newest
                v = held[c] + (now[c] - held[c]) * (rows + 1 - k) / (rows + 1)
                self.ring.set_back(k, c, (v - self.bundle.center[c]) / self.bundle.scale[c])

    def _scaled_rows(self, filled, previous):
        """(time, scaled features or None while a rate channel has no previous row) per grid
        row (time, raw, channels left out); RowError when a value is absurdly far out."""
        rows = []
        for tk, r, left_out, _ in filled:
            f = features.row(r, previous, self.bundle.rate)
            previous = r
            x = self.bundle.scaled(f)
            known = ~np.isnan(x)  # a lost channel's cell stays NaN: each hop fills it
            if not (np.abs(x[known]) <= MAX_SCALED_ABS).all():  # also float32 overflow (inf)
                raise RowError(
                    "out_of_range",
                    f"a value is more than {MAX_SCALED_ABS:g} scale units from center",
                )
            rows.append((tk, x if known.all() or (known | left_out).all() else None))
        return rows

    def _push(self, row: np.ndarray, t: float) -> List[dict]:
        self.ring.push(row)
        extra = self.ring.filled - self.ring.size
        if extra < 0 or extra % self.bundle.hop:
            return []
        return self._hop(t, self.ring.window())

    def _hop(self, t: float, window: np.ndarray) -> List[dict]:
        """Score one window: drift re-centring, network, score rule, then the Judge."""
        left_out = self.blanks.left_out
        live = ~left_out if left_out.any() else None
        if live is not None and not live.any():
            return []  # nothing left to score until a channel rejoins
        if np.isnan(window).any():
            window = self.rule.fill(window)
        means = window.mean(axis=0, dtype=np.float64)
        drift_events, drifting, steps, levels = [], False, None, None
        if self.drift is not None:
            levels = window_level(window)
            offset, drift_events, steps = self.drift.step(format_time(t), levels,
                                                          self.judge.alert_channels(), left_out)
            drifting = bool(offset.any())
            if drifting:
                window = (window - offset).astype(np.float32)
                means = means - offset
        recon = self.scorer.reconstruct(window[None])
        residuals = self.rule.residuals(window[None], recon)
        scores, parts = self.rule.apply(residuals, means[None], live)
        change = self.watch_state_changes and bool(self.rule.state_changes(
            means[None], piece_means(window[None], self.rule.steps), live)[0])
        self.counters["hops"] += 1
        self.last_hop = {"time": t, "window": window, "means": means, "residuals": residuals[0],
                         "score": float(scores[0]), "parts": parts[0], "state_change": change}
        events = self.judge.step(t, float(scores[0]), self.rule.contributions(parts[0]),
                                 drifting, steps, change)
        for e in events:
            if e["event"] == "alert_opened":
                e["moved"] = self.judge.alert["moved"] = self._moved(
                    self.judge.alert["opened_by"], window, recon, float(scores[0]), steps,
                    levels, live)
            if e["event"] in ("alert_opened", "alert_closed"):
                self.counters["alerts_" + e["event"].split("_")[1]] += 1
        return events + drift_events

    def _moved(self, opened_by: str, window, recon, score: float, steps, levels,
               live=None) -> dict:
        """The alert's `moved` channel: the held reading's, the step's (its window level as the
        drift monitor saw it, before any re-centring), or the network's."""
        if opened_by == BY_HELD:
            return self.judge.held_channel(score)
        if opened_by == BY_STEP:
            c = int(np.argmax(steps))
            return {"name": self.judge.channels[c], "unit": self.judge.units[c],
                    **self.drift.departure(levels, c), "score": finite_or_none(score)}
        return self.moved(window, recon, score, live)

    def moved(self, window: np.ndarray, recon: np.ndarray, score: float, live=None) -> dict:
        """The channel whose steps, replaced by the network's own reconstruction of them, lower
        the score most (one forward pass per channel, at an alert's opening). A reconstruction
        error spreads to the channels the latent can no longer explain, so the channel with the
        largest error is often not the one that moved: on the demo's stuck pressure sensor
        vibration held 40 % of the error, and putting discharge pressure back on its
        reconstruction took the score from 14.9 to 8.1. Every step of the window is replaced,
        not only the scored ones: the LSTMs read the whole window, so a departure older than
        the scored steps (a sag held for half an hour) still pulled the others' reconstruction
        of them, and the newest steps alone put back named another channel. Over 20 draws of
        the demo nobody tuned to (bench_demo.py, seeds 61 to 157) the alerts the score or the
        CUSUM opened named a channel their incident moves 89 -> 100 times of 106; the pressure
        sag's 9 -> 17 of 20 (issue 11's notes, stop 38)."""
        trial = np.repeat(window[None], window.shape[1], axis=0)
        for c in range(window.shape[1]):
            trial[c, :, c] = recon[0, :, c]
        without = self.rule.score(trial, self.scorer.reconstruct(trial), live)[0]
        c = int(np.argmin(np.where(live, without, np.inf) if live is not None else without))
        return {"name": self.judge.channels[c], "unit": self.judge.units[c],
                "score_without": finite_or_none(float(without[c])),
                "score": finite_or_none(score)}
