"""Where rows come from: a CSV file (optionally followed as it grows) or standard input.

A source yields Records, one per input line after the header, in arrival order:

    Record(lineno, time, values, error)   values set: a parsed row for the detector
                                          error set: a RowError (time set if it was readable)
                                          neither: a blank line

The service (service.py) owns what happens to them; a source only reads and parses. Reading can
be interrupted by a stop signal (Control.handler raises Stop while a read blocks).
"""

import time
from typing import Iterator, List, Optional

from .intake import MAX_LINE_BYTES, Header, HeaderError, RowError, decode_line

POLL_S = 0.2  # follow: wait between reads at end of file


class Stop(Exception):
    """Raised from the signal handler while the loop is blocked reading input."""


class Control:
    """Signal state shared by the service loop and a blocking read."""

    def __init__(self):
        self.stop_signal = None  # type: Optional[int]
        self.in_read = False

    def handler(self, signum, frame):
        self.stop_signal = signum
        if self.in_read:
            raise Stop()


class Record:
    __slots__ = ("lineno", "time", "values", "error")

    def __init__(self, lineno: int, time: Optional[float] = None,
                 values: Optional[List[float]] = None, error: Optional[RowError] = None):
        self.lineno = lineno
        self.time = time
        self.values = values
        self.error = error

    @property
    def blank(self) -> bool:
        return self.values is None and self.error is None


class _Lines:
    """Lines of a binary stream, each at most MAX_LINE_BYTES; longer ones come back as TOO_LONG.

    With follow=True, end of file means "wait for more": idle() is called between polls and a
    partial last line is kept until its newline arrives.
    """

    TOO_LONG = object()

    def __init__(self, fh, follow: bool, idle, control: Control):
        self.fh = fh
        self.follow = follow
        self.idle = idle
        self.control = control

    def _read(self) -> bytes:
        self.control.in_read = True
        try:
            if self.control.stop_signal is not None:
                raise Stop()
            return self.fh.readline(MAX_LINE_BYTES + 2)
        finally:
            self.control.in_read = False

    def __iter__(self):
        pending = b""
        too_long = False
        while True:
            chunk = self._read()
            if not chunk:
                if self.follow:
                    self.idle()
                    time.sleep(POLL_S)
                    continue
                if pending or too_long:
                    yield self.TOO_LONG if too_long else pending
                return
            pending += chunk
            if len(pending) > MAX_LINE_BYTES + 1:
                too_long = True
                pending = b""
            if chunk.endswith(b"\n"):
                yield self.TOO_LONG if too_long else pending[:-1]
                pending = b""
                too_long = False


class CsvSource:
    """CSV text: a header naming the time column and the channels, then one row per line."""

    def __init__(self, fh, time_column: str, channels: List[str], follow: bool, idle,
                 control: Control):
        self.lines = _Lines(fh, follow, idle, control)
        self.time_column = time_column
        self.channels = channels

    def __iter__(self) -> Iterator[Record]:
        header = None
        lineno = 0
        for raw in self.lines:
            lineno += 1
            try:
                if raw is _Lines.TOO_LONG:
                    raise RowError("too_long", f"line longer than {MAX_LINE_BYTES} bytes")
                text = decode_line(raw)
            except RowError as exc:
                if header is None:
                    raise HeaderError(f"line {lineno}: header unreadable ({exc})") from None
                yield Record(lineno, error=exc)
                continue
            if header is None:
                if text is not None:
                    header = Header(text, self.time_column, self.channels)
                continue
            yield self._record(header, lineno, text)

    @staticmethod
    def _record(header: Header, lineno: int, text: Optional[str]) -> Record:
        if text is None:
            return Record(lineno)
        try:
            t, values = header.parse(text)
        except RowError as exc:
            return Record(lineno, time=header.time_of(text), error=exc)
        return Record(lineno, time=t, values=values)
