"""One input line -> (time, values) or a rejection with a kind. Nothing here keeps state.

Input is CSV text: a header naming the time column and the channels (any order, extra columns
ignored), then one sample per line. Times are ISO 8601 (naive means UTC) or epoch seconds.
A rejected row raises RowError whose `kind` is one of REJECT_KINDS; the service counts them.
"""

import math
from datetime import datetime, timezone
from typing import List, Optional, Tuple

MAX_LINE_BYTES = 64 * 1024  # longer lines are rejected whole ("too_long")

REJECT_KINDS = (
    "too_long",  # line longer than MAX_LINE_BYTES
    "bad_encoding",  # not UTF-8
    "column_count",  # fewer or more cells than the header
    "bad_time",  # time cell empty or neither ISO 8601 nor epoch seconds
    "missing_value",  # a channel cell is empty
    "non_numeric",  # a channel cell is not a number
    "non_finite",  # NaN or +-inf
    "out_of_range",  # finite, but absurdly far from the scaler's center (service)
    "out_of_order",  # time earlier than the last accepted sample (service)
    "duplicate_time",  # time equal to the last accepted sample (service)
)

_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


class RowError(Exception):
    def __init__(self, kind: str, detail: str):
        super().__init__(f"{kind}: {detail}")
        self.kind = kind
        self.detail = detail


class HeaderError(Exception):
    """The header cannot feed this bundle (a channel or the time column is absent)."""


def _split(line: str) -> List[str]:
    # Plain comma separation: sensor CSV carries numbers and times, never quoted commas.
    return [cell.strip().strip('"').strip() for cell in line.split(",")]


def parse_time(cell: str) -> float:
    """ISO 8601 (naive = UTC, 'Z' accepted) or epoch seconds -> epoch seconds (float)."""
    if not cell:
        raise RowError("bad_time", "empty time cell")
    try:
        t = float(cell)
    except ValueError:
        t = None
    if t is not None:
        if not math.isfinite(t):
            raise RowError("bad_time", f"time {cell!r} is not finite")
        return t
    text = cell[:-1] + "+00:00" if cell[-1] in "zZ" else cell
    try:
        dt = datetime.fromisoformat(text)
    except ValueError:
        raise RowError("bad_time", f"time {cell[:40]!r} is neither ISO 8601 nor epoch seconds") from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    return (dt - _EPOCH).total_seconds()


def format_time(t: float) -> str:
    """Epoch seconds -> ISO 8601 UTC with 'Z' (milliseconds only when needed)."""
    dt = datetime.fromtimestamp(t, tz=timezone.utc)
    if dt.microsecond:
        return dt.strftime("%Y-%m-%dT%H:%M:%S.") + f"{dt.microsecond // 1000:03d}Z"
    return dt.strftime("%Y-%m-%dT%H:%M:%SZ")


class Header:
    """Column positions of the time column and of each model channel, in model order."""

    def __init__(self, line: str, time_column: str, channels: List[str]):
        cells = _split(line.lstrip("\ufeff").rstrip("\r\n"))
        self.n_cells = len(cells)
        if time_column not in cells:
            raise HeaderError(
                f"input header has no time column {time_column!r} (columns: {cells[:20]}); "
                "the first line must name the columns"
            )
        missing = [c for c in channels if c not in cells]
        if missing:
            raise HeaderError(
                f"input header lacks channel(s) {missing} the model needs (columns: {cells[:20]})"
            )
        self.time_index = cells.index(time_column)
        self.channel_index = [cells.index(c) for c in channels]
        self.channels = list(channels)

    def time_of(self, line: str) -> Optional[float]:
        """The row's time if its time cell can be read, else None (used when resuming)."""
        cells = _split(line)
        if len(cells) != self.n_cells:
            return None
        try:
            return parse_time(cells[self.time_index])
        except RowError:
            return None

    def parse(self, line: str) -> Tuple[float, List[float]]:
        """A data line (no newline) -> (epoch seconds, values in model channel order)."""
        cells = _split(line)
        if len(cells) != self.n_cells:
            raise RowError("column_count", f"{len(cells)} cells, header has {self.n_cells}")
        t = parse_time(cells[self.time_index])
        values = []
        for name, idx in zip(self.channels, self.channel_index):
            cell = cells[idx]
            if not cell:
                raise RowError("missing_value", f"channel {name!r} is empty")
            try:
                v = float(cell)
            except ValueError:
                raise RowError("non_numeric", f"channel {name!r}: {cell[:40]!r}") from None
            if not math.isfinite(v):
                raise RowError("non_finite", f"channel {name!r}: {cell[:40]!r}")
            values.append(v)
        return t, values


def decode_line(raw: bytes) -> Optional[str]:
    """Bytes of one line (newline stripped by the reader) -> text; None for a blank line."""
    if len(raw) > MAX_LINE_BYTES:
        raise RowError("too_long", f"{len(raw)} bytes > {MAX_LINE_BYTES}")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise RowError("bad_encoding", "line is not UTF-8") from None
    text = text.rstrip("\r")
    if not text.strip():
        return None
    return text
