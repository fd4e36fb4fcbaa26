"""Where rows come from: a CSV file (optionally followed by name, like `tail -F`) or standard
input.

A source yields Records, one per input line, in arrival order:

    Record(lineno, time, values)      a parsed row for the detector
    Record(lineno, error=RowError)    a refused line (time set when it was readable)
    Record(lineno)                    a blank line
    Record(lineno, header=...)        a header line: "first", "same", "changed" (remapped) or
                                      "unusable" (a channel is missing: the rows after it are
                                      refused as "unusable_header" until a usable header comes;
                                      never read in the old column order)
    Record(event=...)                 something about the input itself: "input_waiting" (a
                                      followed file that does not exist yet), "input_rotated"
                                      (the followed name now holds a new file, or the file was
                                      truncated: read from its start)
Every record carries `pos`, a Position: where a restart resumes exactly after it.

The service (service.py) owns what happens to them; a source only reads and parses. Reading can
be interrupted by a stop signal (Control.handler raises Stop while a read blocks).
"""

import os
import time
from typing import Iterator, List, Optional

from .intake import (
    MAX_LINE_BYTES,
    Dialect,
    Header,
    HeaderError,
    RowError,
    decode_line,
    header_sep,
    separator_directive,
)

POLL_S = 0.2  # follow: wait between reads at end of file
TAIL_BYTES = 64  # bytes before a resume offset that must match for an exact resume


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


class Position:
    """After a line: byte offset in the current file, the bytes just before it, the line number,
    the data lines so far, and the header line in force."""

    __slots__ = ("offset", "tail", "lineno", "rows", "header")

    def __init__(self, offset: int, tail: bytes, lineno: int, rows: int, header: Optional[str]):
        self.offset = offset
        self.tail = tail
        self.lineno = lineno
        self.rows = rows
        self.header = header

    def state(self) -> dict:
        return {"offset": self.offset, "tail": self.tail.hex(), "lineno": self.lineno,
                "rows": self.rows, "header": self.header}

    @classmethod
    def from_state(cls, d: dict) -> "Position":
        """ValueError when `d` is not a Position's state."""
        ints = [d.get(k) for k in ("offset", "lineno", "rows")]
        if not all(type(v) is int and v >= 0 for v in ints) or not isinstance(d.get("tail"), str):
            raise ValueError("input position is malformed")
        if d.get("header") is not None and not isinstance(d["header"], str):
            raise ValueError("input position header is malformed")
        return cls(ints[0], bytes.fromhex(d["tail"]), ints[1], ints[2], d.get("header"))


class Record:
    __slots__ = ("lineno", "time", "values", "error", "header", "event", "pos", "text_cells")

    def __init__(self, lineno: int, time: Optional[float] = None,
                 values: Optional[List[float]] = None, error: Optional[RowError] = None,
                 header: Optional[str] = None, event: Optional[dict] = None, pos=None,
                 text_cells: int = 0):
        self.lineno = lineno
        self.text_cells = text_cells  # channel cells that held text, read as blank (intake.py)
        self.time = time
        self.values = values
        self.error = error
        self.header = header
        self.event = event
        self.pos = pos

    @property
    def blank(self) -> bool:
        return (self.values is None and self.error is None and self.header is None
                and self.event is None)


# ---------------------------------------------------------------------- byte streams
class StreamInput:
    """An open binary stream (standard input, or a file opened once)."""

    def __init__(self, fh, name: str = "-", owned: bool = False):
        self.fh = fh
        self.name = name
        self.owned = owned  # opened here: closed here

    def readline(self, limit: int) -> bytes:
        return self.fh.readline(limit)

    def at_end(self, tail: bytes) -> Optional[dict]:
        return None  # nothing changes under an open stream

    def seek_to(self, pos: Position) -> bool:
        """Position the stream just after `pos` when the bytes before it are the same."""
        try:
            if not self.fh.seekable():
                return False
            start = pos.offset - len(pos.tail)
            if start < 0:
                return False
            self.fh.seek(start)
            if self.fh.read(len(pos.tail)) == pos.tail:
                return True
            self.fh.seek(0)
        except (OSError, ValueError):
            pass
        return False

    def close(self) -> None:
        if self.owned and self.fh is not None:
            self.fh.close()


class FollowedPath(StreamInput):
    """A file followed by name (tail -F): waits for it to exist, and at end of file notices a
    new file under the name (rename rotation) or a truncated one (copy-truncate rotation: the
    size fell below our position, or the bytes before it changed). As with tail -F, a
    copy-truncate that lands while a burst of rows is being read (not at end of file) is seen
    late: the rows written before the reader looks again are read from the wrong place."""

    def __init__(self, path: str):
        super().__init__(None, path, owned=True)
        self.waiting_said = False
        self._open()

    def _open(self) -> bool:
        try:
            self.fh = open(self.name, "rb")
        except FileNotFoundError:
            return False
        return True

    def readline(self, limit: int) -> bytes:
        return self.fh.readline(limit) if self.fh is not None else b""

    def at_end(self, tail: bytes) -> Optional[dict]:
        """After a pause at end of file: has the name changed files, or the file its bytes?"""
        if self.fh is None:
            if self._open():
                return None
            if self.waiting_said:
                return None
            self.waiting_said = True
            return {"event": "input_waiting", "input": self.name,
                    "action": "waiting for the file to appear"}
        return self._rotation(tail)

    def _rotation(self, tail: bytes) -> Optional[dict]:
        try:
            now = os.stat(self.name)
        except FileNotFoundError:
            return None  # moved away, the new file not there yet: keep waiting
        mine = os.fstat(self.fh.fileno())
        if (now.st_dev, now.st_ino) != (mine.st_dev, mine.st_ino):
            if self.fh.tell() < mine.st_size:
                return None  # the old file grew before it was renamed: read that first
            self.fh.close()
            self.fh = None
            self._open()
            return {"event": "input_rotated", "input": self.name, "how": "renamed",
                    "action": "reading the new file from its start"}
        if now.st_size < self.fh.tell() or not self._still_reads(tail):
            self.fh.seek(0)
            return {"event": "input_rotated", "input": self.name, "how": "truncated",
                    "action": "reading the file from its start"}
        return None

    def _still_reads(self, tail: bytes) -> bool:
        """The bytes before our position are still the ones we read: a copy-truncate rotation
        that grew past our position before we looked shows up here, not in the size."""
        here = self.fh.tell()
        # pread, not seek + read: a buffered reader would answer from its stale buffer
        return os.pread(self.fh.fileno(), len(tail), here - len(tail)) == tail

    def seek_to(self, pos: Position) -> bool:
        return self.fh is not None and super().seek_to(pos)


def open_input(name: str, follow: bool, stdin=None) -> StreamInput:
    """'-' is standard input; a path is opened now (OSError if it cannot be), or with follow
    waited for and followed by name."""
    if name == "-":
        return StreamInput(stdin, "-")
    if follow:
        return FollowedPath(name)
    return StreamInput(open(name, "rb"), name, owned=True)


class _Lines:
    """Lines of an input, each at most MAX_LINE_BYTES; longer ones come back as TOO_LONG, and
    notices about the input itself (waiting, rotation) as dicts.

    With follow=True, end of file means "wait for more": idle() is called between polls and a
    partial last line is kept until its newline arrives (or the file is rotated).
    """

    TOO_LONG = object()

    def __init__(self, source: StreamInput, follow: bool, idle, control: Control):
        self.source = source
        self.follow = follow
        self.idle = idle
        self.control = control
        self.offset = 0  # bytes of the current file consumed
        self.tail = b""  # the last TAIL_BYTES of them

    def _read(self) -> bytes:
        self.control.in_read = True
        try:
            if self.control.stop_signal is not None:
                raise Stop()
            return self.source.readline(MAX_LINE_BYTES + 2)
        finally:
            self.control.in_read = False

    def __iter__(self):
        pending, too_long = b"", False
        while True:
            chunk = self._read()
            if not chunk:
                if not self.follow:
                    if pending or too_long:
                        yield self.TOO_LONG if too_long else pending
                    return
                if self.idle is not None:
                    self.idle()
                time.sleep(POLL_S)
                # after the pause, before reading on: the name may hold another file by now
                notice = self.source.at_end(self.tail)
                if notice is None:
                    continue
                if notice["event"] == "input_rotated":
                    if pending or too_long:  # the old file's last line, without its newline
                        yield self.TOO_LONG if too_long else pending
                    pending, too_long, self.offset, self.tail = b"", False, 0, b""
                yield notice
                continue
            self.offset += len(chunk)
            self.tail = (self.tail + chunk)[-TAIL_BYTES:]
            pending += chunk
            if len(pending) > MAX_LINE_BYTES + 1:
                too_long, pending = True, b""
            if chunk.endswith(b"\n"):
                yield self.TOO_LONG if too_long else pending[:-1]
                pending, too_long = b"", False


# ---------------------------------------------------------------------- CSV records
class CsvSource:
    """CSV text: a header naming the time column and the channels, then one row per line."""

    def __init__(self, fh, time_column: str, channels: List[str], follow: bool = False,
                 idle=None, control: Optional[Control] = None,
                 dialect: Optional[Dialect] = None):
        self.input = fh if isinstance(fh, StreamInput) else StreamInput(fh)
        self.lines = _Lines(self.input, follow, idle, control or Control())
        self.time_column = time_column
        self.channels = channels
        self.dialect = dialect or Dialect()
        self.header = None  # type: Optional[Header]
        self.header_text = None  # type: Optional[str]  # the last header line, usable or not
        self.lineno = 0
        self.rows = 0  # data lines (neither header nor notice)
        # the last row time read: places a wall-clock time in the hour that repeats when
        # clocks go back (times.parse_time); the service sets it when resuming mid-file
        self.last_time = None  # type: Optional[float]

    def resume_at(self, pos: Position) -> bool:
        """Continue right after `pos` when the input still holds the same bytes there (same
        file, not rotated); False leaves the input at its start."""
        if pos.header is None or not self.input.seek_to(pos):
            return False
        try:
            self._take_header(pos.header)
        except HeaderError:
            pass  # it was unusable then too: rows stay refused until a usable header
        self.lines.offset, self.lines.tail = pos.offset, pos.tail
        self.lineno, self.rows = pos.lineno, pos.rows
        return True

    def position(self) -> Position:
        return Position(self.lines.offset, self.lines.tail, self.lineno, self.rows,
                        self.header_text)

    def __iter__(self) -> Iterator[Record]:
        for raw in self.lines:
            if isinstance(raw, dict):
                yield Record(self.lineno, event=dict(raw, line=self.lineno), pos=self.position())
                continue
            self.lineno += 1
            rec = self._record(raw)
            if rec is not None:  # None: a blank line before the header
                rec.pos = self.position()
                yield rec

    def _record(self, raw) -> Optional[Record]:
        lineno = self.lineno
        if self.header_text is not None:
            self.rows += 1  # every line after the first header that is not a header itself
        try:
            if raw is _Lines.TOO_LONG:
                raise RowError("too_long", f"line longer than {MAX_LINE_BYTES} bytes")
            text = decode_line(raw)
        except RowError as exc:
            if self.header_text is None:
                raise HeaderError(f"line {lineno}: header unreadable ({exc})") from None
            return Record(lineno, error=exc)
        if text is None:
            return Record(lineno) if self.header_text is not None else None
        if self.header_text is None:
            named = separator_directive(text)
            if named is not None:  # a spreadsheet's `sep=;` above the header: not the header
                if self.dialect.sep is None:
                    self.dialect = self.dialect.with_sep(named)
                return None
            self._take_header(text)
            return Record(lineno, header="first")
        return self._row(lineno, text)

    def _row(self, lineno: int, text: str) -> Record:
        if self.header is None:  # after an unusable header line
            if header_sep(text, self.time_column, self.dialect):
                return self._header_line(lineno, text)
            return Record(lineno, error=RowError(
                "unusable_header", f"the header in force lacks a channel: {self.header_text[:80]!r}"))
        try:
            t, values, text_cells = self.header.parse(text, self.last_time)
        except RowError as exc:
            if header_sep(text, self.time_column, self.dialect):
                return self._header_line(lineno, text)
            t = self.header.time_of(text, self.last_time)
            self.last_time = self.last_time if t is None else t
            return Record(lineno, time=t, error=exc)
        self.last_time = t
        return Record(lineno, time=t, values=values, text_cells=text_cells)

    def _header_line(self, lineno: int, text: str) -> Record:
        self.rows -= 1  # counted as a data line above; it is a header
        before = self.header
        try:
            self._take_header(text)
        except HeaderError as exc:
            return Record(lineno, header="unusable", event={
                "event": "header_changed", "line": lineno, "action": "refusing_rows",
                "problem": str(exc)})
        if before is not None and before.same_layout(self.header):
            return Record(lineno, header="same")
        return Record(lineno, header="changed", event={
            "event": "header_changed", "line": lineno, "action": "remapped",
            "columns": self.header.dialect.split(text)[:50]})

    def _take_header(self, text: str) -> None:
        """Make `text` the header in force; HeaderError leaves none in force (rows refused)."""
        self.header_text = text
        self.header = None
        self.header = Header(text, self.time_column, self.channels, self.dialect)
