"""Fixed-size ring of the last `window` scaled samples, [window, channels] float32.

push() writes one row in place (no allocation per sample); window() returns the rows oldest
first. `filled` counts rows pushed since the last reset, so the service knows when the ring is
full and when a hop is due. A lost channel's cell is NaN (blanks.py); each hop fills it.
"""


import numpy as np


class Ring:
    def __init__(self, window: int, n_channels: int):
        if window < 1 or n_channels < 1:
            raise ValueError("window and n_channels must be >= 1")
        self.size = int(window)
        self.n_channels = int(n_channels)
        self.buf = np.zeros((self.size, self.n_channels), dtype=np.float32)
        self.next = 0  # index the next row goes to
        self.filled = 0  # rows pushed since reset (not capped)

    @property
    def is_full(self) -> bool:
        return self.filled >= self.size

    def push(self, row) -> None:
        self.buf[self.next] = row
        self.next = (self.next + 1) % self.size
        self.filled += 1

    def set_back(self, k: int, c: int, value: float) -> None:
        """Overwrite channel c of the row k rows back from the newest (k = 1: the newest)."""
        self.buf[(self.next - k) % self.size, c] = value

    def window(self) -> np.ndarray:
        """The last `size` rows, oldest first, as a new [size, channels] array."""
        if not self.is_full:
            raise ValueError(f"ring holds {self.filled} of {self.size} rows")
        return np.concatenate([self.buf[self.next :], self.buf[: self.next]], axis=0)

    def reset(self) -> None:
        self.buf[:] = 0.0
        self.next = 0
        self.filled = 0

    def state(self) -> dict:
        # float32 -> float (exactly representable as a double) keeps the checkpoint JSON exact;
        # a lost channel's cell (NaN, blanks.py) is null
        rows = [[None if v != v else v for v in row] for row in self.buf.astype(float).tolist()]
        return {
            "size": self.size,
            "n_channels": self.n_channels,
            "next": self.next,
            "filled": self.filled,
            "rows": rows,
        }

    @classmethod
    def from_state(cls, d: dict) -> "Ring":
        ring = cls(d["size"], d["n_channels"])
        if not (isinstance(d["rows"], list) and all(isinstance(r, list) for r in d["rows"])):
            raise ValueError("ring state rows must be a list of rows")
        rows = np.asarray([[np.nan if v is None else v for v in row] for row in d["rows"]],
                          dtype=np.float32)
        if rows.shape != ring.buf.shape:
            raise ValueError(f"ring state has shape {rows.shape}, expected {ring.buf.shape}")
        ring.buf[:] = rows
        ring.next = int(d["next"])
        ring.filled = int(d["filled"])
        return ring
