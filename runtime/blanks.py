"""Blank cells: one channel's reading is missing while the other channels' readings arrive.

A transmitter fails, a cable is cut, a bus stops updating one tag: the rows keep coming with
one cell empty. Refusing such rows whole would stop all detection for the sake of one channel
(it did: SKAB's healthy rig with its pressure blank from row 3,500 on scored nothing after).

Per channel, counted in grid rows:
  - a blank of at most max_gap_periods rows is filled with the channel's last reading, the
    same bound within which whole missing rows are filled (detector.py);
  - a longer blank loses the channel: a `channel_lost` event names it (and its first blank
    row). Its cells stay NaN in the ring; each hop shows the network, in their place, the centre
    of the operating regime the row's other channels sit nearest (ScoreRule.fill), so the
    network still sees the pump start and stop. Its part counts 0 in the score, as if it were
    reconstructed exactly, and the held-reading check and the drift monitor leave it alone;
  - when readings come back, `channel_back`; its part rejoins the score once the window holds
    only its readings again (`window` rows, one more for a rate channel), so no scored part
    mixes the fill with readings.
A blank before any reading of the channel has nothing to hold: the channel is lost at once.
A row with every channel blank carries nothing but a time and is refused (`missing_value`).
"""

from typing import List, Optional, Sequence, Tuple

import numpy as np


class BlankCells:
    def __init__(self, channels: Sequence[str], max_gap_periods: int, rejoin_rows: int):
        self.channels = list(channels)
        self.max_gap = int(max_gap_periods)
        self.rejoin_rows = int(rejoin_rows)
        n = len(self.channels)
        self.run = [0] * n  # blank grid rows in a row, per channel
        self.blank_since = [None] * n  # type: List[Optional[str]]  # time of the run's first
        self.lost_since = [None] * n  # type: List[Optional[str]]  # time of the lost event
        self.to_rejoin = [0] * n  # rows still to come before a channel that is back rejoins

    @property
    def left_out(self) -> np.ndarray:
        """Channels whose part the score leaves out: lost, or back but not yet rejoined."""
        return np.asarray([s is not None or r > 0
                           for s, r in zip(self.lost_since, self.to_rejoin)], dtype=bool)

    def plan(self, rows: List[Tuple[float, np.ndarray]], last: Optional[np.ndarray],
             time_text) -> Tuple[list, list, dict]:
        """Grid rows (time, raw with NaN where blank) and the last filled raw row before them ->
        ([(time, raw filled where held, NaN where lost; the channels left out after it)],
        events, the state after them). Changes nothing: `commit` the state once the row is
        accepted."""
        run, lost, rejoin = list(self.run), list(self.lost_since), list(self.to_rejoin)
        since = list(self.blank_since)
        filled, events = [], []
        for t, raw in rows:
            raw = np.array(raw, dtype=np.float64)
            for c in range(len(raw)):
                if np.isnan(raw[c]):
                    run[c] += 1
                    if run[c] == 1:
                        since[c] = time_text(t)
                    held = (last is not None and not np.isnan(last[c]) and lost[c] is None
                            and run[c] <= self.max_gap)
                    raw[c] = last[c] if held else np.nan
                    if not held and lost[c] is None:
                        lost[c], rejoin[c] = time_text(t), 0
                        events.append(self._lost(c, lost[c], since[c], run[c]))
                else:
                    if lost[c] is not None:
                        events.append(self._back(c, since[c], time_text(t), run[c]))
                        lost[c], rejoin[c] = None, self.rejoin_rows
                    elif rejoin[c] > 0:
                        rejoin[c] -= 1
                    run[c], since[c] = 0, None
            left_out = [s is not None or r > 0 for s, r in zip(lost, rejoin)]
            filled.append((t, raw, np.asarray(left_out, dtype=bool)))
            last = raw
        return filled, events, {"run": run, "blank_since": since, "lost_since": lost,
                                "to_rejoin": rejoin}

    def commit(self, state: dict) -> None:
        self.run = list(state["run"])
        self.blank_since = list(state["blank_since"])
        self.lost_since = list(state["lost_since"])
        self.to_rejoin = list(state["to_rejoin"])

    def _lost(self, c: int, now: str, since: str, run: int) -> dict:
        return {"event": "channel_lost", "channel": self.channels[c], "time": now,
                "since": since, "blank_rows": run, "max_gap_periods": self.max_gap,
                "action": ("scored without it: its part is left out of the score until a "
                           "whole window holds its readings again; check the transmitter "
                           "and its wiring")}

    def _back(self, c: int, since: str, now: str, run: int) -> dict:
        return {"event": "channel_back", "channel": self.channels[c], "time": now,
                "since": since, "blank_rows": run, "rejoins_after_rows": self.rejoin_rows}

    def state(self) -> dict:
        return {"run": list(self.run), "blank_since": list(self.blank_since),
                "lost_since": list(self.lost_since), "to_rejoin": list(self.to_rejoin)}

    def restore(self, d: Optional[dict]) -> None:
        """A state from before blank cells were accepted has none."""
        n = len(self.channels)
        if d is None:
            d = {"run": [0] * n, "blank_since": [None] * n, "lost_since": [None] * n,
                 "to_rejoin": [0] * n}
        keys = ("run", "blank_since", "lost_since", "to_rejoin")
        ok = (isinstance(d, dict) and all(isinstance(d.get(k), list) and len(d[k]) == n
                                          for k in keys)
              and all(type(v) is int and v >= 0 for v in d["run"] + d["to_rejoin"])
              and all(v is None or isinstance(v, str) for v in d["blank_since"] + d["lost_since"]))
        if not ok:
            raise ValueError("the blank-cell state is malformed")
        self.commit(d)
