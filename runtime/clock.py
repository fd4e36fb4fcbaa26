"""Is a row's time plausible? The guard between the input and the detector.

Two checks, each refusing with its own counted kind (intake.REJECT_KINDS):

1. Bounds, for live feeds (`run.py stream --replay` turns them off for recorded history):
   not later than the gateway's own clock plus `max_ahead` ("ahead_of_clock"), and not earlier
   than the bundle's creation minus `backlog` ("before_bundle"). A gateway clock that reads
   earlier than that lower bound is itself wrong (a board without a battery-backed clock, before
   its time is set): the upper bound is then not applied and the service says so once
   (`clock_suspect`).
2. Jumps, always: a row that leaves the stream's timeline - later than the detector would fill
   (more than max_gap_periods missing), or earlier by more than `confirm_rows` periods - is held,
   not fed. If the rows after it go on from the old timeline, the held rows are refused
   ("time_jump" ahead, "out_of_order" behind): a lone typo or bit flip never captures the
   timeline. When `confirm_rows` rows in a row agree on the new timeline the jump is real (a
   long gap in the feed, or the feed's clock was set): a `time_jump` step comes first, then the
   held rows in order; a backward jump restarts the detector's clock, a forward one is a long gap
   to the detector (window reset).
   Rows at most `confirm_rows` periods behind go straight to the detector, which refuses them as
   duplicate_time / out_of_order: a clock set back by so little catches up by itself.

Held rows never reach the detector, so an unconfirmed time never reaches the checkpoint. Nothing
here reads a clock: the service passes the gateway's time in, and the detector gets none.
"""

from typing import List, Optional

from .intake import RowError
from .times import format_time

FEED, REFUSE, JUMP = "feed", "refuse", "jump"
MAX_AHEAD_S = 600.0  # default: NTP keeps clocks within a second; 10 min allows for a drifting RTC
BACKLOG_DAYS = 30.0  # default: rows up to a month older than the bundle (a store-and-forward backlog)
CONFIRM_ROWS = 10  # default: rows that must agree before a jump in time is believed


class Step:
    """One thing the service does with a row the guard was offered: feed it, refuse it, or
    (before the rows of a confirmed jump) record the jump."""

    __slots__ = ("action", "time", "item", "error", "jump")

    def __init__(self, action: str, time: Optional[float] = None, item=None,
                 error: Optional[RowError] = None, jump: Optional[dict] = None):
        self.action = action
        self.time = time
        self.item = item
        self.error = error
        self.jump = jump


class ClockBounds:
    """The earliest and latest times a live row may carry (None: that side is not checked)."""

    def __init__(self, earliest: Optional[float] = None, max_ahead: Optional[float] = None):
        self.earliest = earliest
        self.max_ahead = max_ahead

    def clock_ok(self, now: float) -> bool:
        """False when the gateway's own clock reads earlier than any plausible row."""
        return self.earliest is None or now >= self.earliest

    def check(self, t: float, now: float) -> Optional[RowError]:
        if self.earliest is not None and t < self.earliest:
            return RowError("before_bundle", f"time {format_time(t)} is earlier than "
                            f"{format_time(self.earliest)} (bundle creation minus the backlog "
                            "allowed); for recorded history use --replay")
        if self.max_ahead is not None and self.clock_ok(now) and t > now + self.max_ahead:
            return RowError("ahead_of_clock", f"time {format_time(t)} is {t - now:.0f} s ahead "
                            f"of the gateway clock ({format_time(now)}); check the sender's "
                            "clock and --tz")
        return None


class Timeline:
    """The jump check: which rows reach the detector, and when."""

    def __init__(self, period_s: float, max_gap_periods: int, confirm_rows: int = CONFIRM_ROWS):
        if confirm_rows < 2:
            raise ValueError("confirm_rows must be at least 2")
        self.period_s = float(period_s)
        self.max_gap_periods = int(max_gap_periods)
        self.confirm_rows = int(confirm_rows)
        self.held = []  # (time, item) of rows on a candidate timeline, oldest first

    @property
    def pending(self) -> int:
        return len(self.held)

    def first_held(self):
        return self.held[0][1] if self.held else None

    def offer(self, t: float, item, last: Optional[float]) -> List[Step]:
        """A row with a readable time; `last` is the detector's last accepted time."""
        if last is None or self._fills(last, t):
            return self._drop(last) + [Step(FEED, t, item)]
        if self.held and self._follows(self.held[-1][0], t):
            self.held.append((t, item))
            return self._confirm(last) if len(self.held) >= self.confirm_rows else []
        if self.held and self._near_behind(self.held[-1][0], t):
            return [Step(REFUSE, t, item, error=_behind(t, self.held[-1][0]))]
        if self._near_behind(last, t):
            return [Step(FEED, t, item)]  # the detector refuses it (duplicate / out of order)
        steps = self._drop(last)
        self.held = [(t, item)]
        return steps

    def flush(self, last: Optional[float]) -> List[Step]:
        """End of input: held rows were never confirmed."""
        return self._drop(last, why="the input ended first")

    # ------------------------------------------------------------------ helpers
    def _missing(self, a: float, b: float) -> int:
        # as the detector counts missing periods between two rows
        return max(1, int(round((b - a) / self.period_s))) - 1

    def _fills(self, last: float, t: float) -> bool:
        return t > last and self._missing(last, t) <= self.max_gap_periods

    def _follows(self, prev: float, t: float) -> bool:
        return self._fills(prev, t)

    def _near_behind(self, last: float, t: float) -> bool:
        return last - self.confirm_rows * self.period_s <= t <= last

    def _confirm(self, last: float) -> List[Step]:
        first = self.held[0][0]
        jump = {"direction": "forward" if first > last else "backward", "from": last,
                "to": first, "rows": len(self.held)}
        steps = [Step(JUMP, first, jump=jump)] + [Step(FEED, t, item) for t, item in self.held]
        self.held = []
        return steps

    def _drop(self, last: Optional[float], why: str = "") -> List[Step]:
        why = why or "the rows after it went on from the old timeline"
        steps = []
        for t, item in self.held:
            kind = "time_jump" if last is None or t > last else "out_of_order"
            detail = (f"time {format_time(t)} jumped from {_fmt(last)} and {why} (a jump is "
                      f"believed once {self.confirm_rows} rows agree on it)")
            steps.append(Step(REFUSE, t, item, error=RowError(kind, detail)))
        self.held = []
        return steps


def _fmt(t: Optional[float]) -> str:
    return "the start" if t is None else format_time(t)


def _behind(t: float, last: float) -> RowError:
    if t == last:
        return RowError("duplicate_time", f"time {format_time(t)} seen already")
    return RowError("out_of_order", f"time {format_time(t)} before {format_time(last)}")
