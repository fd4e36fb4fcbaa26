"""Blank cells: one channel's reading is missing while the other channels' readings arrive.

A transmitter fails, a cable is cut, a bus stops updating one tag: the rows keep coming with
one cell empty. Refusing such rows whole would stop all detection for the sake of one channel
(it did: SKAB's healthy rig with its pressure blank from row 3,500 on scored nothing after).

Per channel, counted in the grid rows read (not those filled in across a gap):
  - a blank of at most max_gap_periods rows (the bound within which whole missing rows are
    filled, detector.py) is filled with the channel's last reading while it lasts; the reading
    that ends it replaces those cells in the ring by the straight line between the two
    readings (a level channel), as the workstation's intake fills a short gap, so the windows
    after it see what training saw. Rows filled in across a short gap of whole rows hold it
    too without counting (the row ending the gap is what is blank), and a blank right after a
    long gap is held from the reading before it;
  - a longer blank loses the channel: a `channel_lost` event names it (and its first blank
    row). Its cells stay NaN in the ring; each hop shows the network, in their place, the centre
    of the operating regime the row's other channels sit nearest (ScoreRule.fill), so the
    network still sees the pump start and stop. Its part counts 0 in the score, as if it were
    reconstructed exactly, and the held-reading check and the drift monitor leave it alone;
  - it is back (`channel_back`) once it has read for a whole window in a row (`window` rows,
    one more for a rate channel): its part rejoins the score, and no scored part mixes the
    fill with readings. A blank before that keeps it lost, with no second event, so a channel
    that reads only now and then (logged slower than the others) is lost once, not flapping.
A blank before any reading of the channel (at the start, or after the clock was reset) has
nothing to hold: the channel is lost at once.
A row with every channel blank carries nothing but a time and is refused (`missing_value`).
"""

from typing import List, Optional, Sequence, Tuple

import numpy as np


class BlankCells:
    STATE_KEYS = ("run", "blank_since", "lost_since", "read", "read_since")

    def __init__(self, channels: Sequence[str], max_gap_periods: int, rejoin_rows: int):
        self.channels = list(channels)
        self.max_gap = int(max_gap_periods)
        self.rejoin_rows = int(rejoin_rows)
        n = len(self.channels)
        self.run = [0] * n  # blank rows read in a row (rows filled in across a gap not counted)
        self.blank_since = [None] * n  # type: List[Optional[str]]  # that run's first row
        self.lost_since = [None] * n  # type: List[Optional[str]]  # first blank row of a loss
        self.read = [0] * n  # readings in a row since a lost channel read again
        self.read_since = [None] * n  # type: List[Optional[str]]  # the first of them
        self.none_left_out = np.zeros(n, dtype=bool)

    @property
    def left_out(self) -> np.ndarray:
        """The channels lost: left out of the score until they rejoin."""
        if all(s is None for s in self.lost_since):
            return self.none_left_out
        return np.asarray([s is not None for s in self.lost_since], dtype=bool)

    @property
    def quiet(self) -> bool:
        """No channel in a blank or lost: a row without a blank cell changes nothing."""
        return not any(self.run) and all(s is None for s in self.lost_since)

    def plan(self, rows: List[Tuple[float, np.ndarray]], last: Optional[np.ndarray],
             time_text) -> Tuple[list, list, dict]:
        """Grid rows (time, raw with NaN where blank: the rows filled in across a short gap of
        whole rows, then the row read) and the last filled raw row before them ->
        ([(time, raw filled where held, NaN where lost; the channels left out after it; the
        short blanks it ends as (channel, rows))], events, the state after them). Changes
        nothing: `commit` the state once the row is accepted (None: nothing changes)."""
        if self.quiet and not np.isnan(rows[-1][1]).any():
            # every row's common case: the rows filled in before the row read lie between it
            # and `last`, neither with a blank, so nothing is blank and nothing changes
            return [(t, raw, self.none_left_out, []) for t, raw in rows], [], None
        st = {k: list(getattr(self, k)) for k in self.STATE_KEYS}
        filled, events = [], []
        for i, (t, raw) in enumerate(rows):
            raw = np.array(raw, dtype=np.float64)
            now = time_text(t)
            ended = []  # (channel, rows) of the short blanks this reading ends
            filled_in = i < len(rows) - 1  # a row filled in across a short gap of whole rows
            for c in range(len(raw)):
                if np.isnan(raw[c]) and filled_in:
                    # blank only because the row ending the gap is: held, not counted, so a
                    # short gap and one blank cell do not add up to a lost channel
                    if st["lost_since"][c] is None and last is not None:
                        raw[c] = last[c]
                    continue
                if np.isnan(raw[c]):
                    events += self._blank(st, c, now, last, raw)
                    continue
                if st["run"][c] and st["lost_since"][c] is None:
                    ended.append((c, st["run"][c]))
                events += self._reading(st, c, now)
            filled.append((t, raw, np.asarray([s is not None for s in st["lost_since"]]),
                           ended))
            last = raw
        return filled, events, st

    def _blank(self, st: dict, c: int, now: str, last, raw: np.ndarray) -> list:
        """A blank cell: held while the blank is short, else the channel is (or stays) lost;
        a lost channel that had begun to read again is lost again, with no second event."""
        st["run"][c] += 1
        if st["run"][c] == 1:
            st["blank_since"][c] = now
        if st["lost_since"][c] is not None:
            st["read"][c], st["read_since"][c] = 0, None
            return []
        if last is not None and not np.isnan(last[c]) and st["run"][c] <= self.max_gap:
            raw[c] = last[c]
            return []
        st["lost_since"][c] = st["blank_since"][c]
        return [{"event": "channel_lost", "channel": self.channels[c], "time": now,
                 "since": st["blank_since"][c], "blank_rows": st["run"][c],
                 "max_gap_periods": self.max_gap,
                 "action": ("scored without it until it reads again for a whole window; "
                            "check the transmitter, its wiring and its tag")}]

    def _reading(self, st: dict, c: int, now: str) -> list:
        """A reading: a lost channel rejoins once rejoin_rows readings in a row have come."""
        st["run"][c], st["blank_since"][c] = 0, None
        if st["lost_since"][c] is None:
            return []
        st["read"][c] += 1
        if st["read"][c] == 1:
            st["read_since"][c] = now
        if st["read"][c] < self.rejoin_rows:
            return []
        event = {"event": "channel_back", "channel": self.channels[c], "time": now,
                 "since": st["lost_since"][c], "reading_since": st["read_since"][c],
                 "readings": st["read"][c]}
        st["lost_since"][c], st["read"][c], st["read_since"][c] = None, 0, None
        return [event]

    def commit(self, state: Optional[dict]) -> None:
        if state is None:
            return
        for k in self.STATE_KEYS:
            setattr(self, k, list(state[k]))

    def state(self) -> dict:
        return {k: list(getattr(self, k)) for k in self.STATE_KEYS}

    def restore(self, d: Optional[dict]) -> None:
        """A state from before blank cells were accepted has none."""
        n = len(self.channels)
        if d is None:
            d = {k: [0 if k in ("run", "read") else None] * n for k in self.STATE_KEYS}
        ok = (isinstance(d, dict) and all(isinstance(d.get(k), list) and len(d[k]) == n
                                          for k in self.STATE_KEYS)
              and all(type(v) is int and v >= 0 for v in d["run"] + d["read"])
              and all(v is None or isinstance(v, str)
                      for v in d["blank_since"] + d["lost_since"] + d["read_since"]))
        if not ok:
            raise ValueError("the blank-cell state is malformed")
        self.commit(d)
