"""One input line -> (time, values) or a rejection with a kind. Nothing here keeps state.

Input is CSV text (RFC 4180 cells, read with the standard csv module one line at a time; a
quoted cell may hold the separator but not a line break): a header naming the time column and
the channels (any order; other columns ignored; no name twice), then one sample per line.

Dialect (the same options as `ganlet train`, so one file trains and streams):
    --sep C         separator: , ; TAB or | (default: the one that splits the header into the
                    bundle's columns)
    --decimal ,     decimal comma in numbers and in epoch seconds (1,5); the separator must
                    then be another character. Default: the training data's mark (manifest
                    decimal_mark), else "."
    --tz NAME       zone of times written without one: an IANA name (Europe/Berlin, via the
                    standard zoneinfo module and the system's tzdata), UTC, or a fixed offset
                    +01:00. Default: the zone the bundle was trained in (manifest time_zone),
                    else UTC. Events always carry UTC with 'Z'.
    --dayfirst / --monthfirst
                    how to read numeric dates with the year last (02/03/2026, 02.03.2026);
                    default: the order the training data was read in (manifest
                    date_order); without one they are refused (bad_time) with a message saying
                    so, never read month-first in silence.

Time cells (our own parser, times.py; the same answers on every supported Python):
    epoch seconds   1772445600, 1772445600.25, 1.7e9 (a cell of digits is always epoch seconds,
                    so write basic-format dates with a time: 20260302T000000)
    ISO 8601        2026-03-02T10:00:00Z, 2026-03-02 10:00, 2026-03-02T10:00:00.5+01:00,
                    20260302T100000+0100, 2026-03-02 (midnight), week dates 2026-W10-1 and
                    2026W101; 'T' or spaces before the time; hh, hh:mm, hh:mm:ss or hhmmss;
                    fractions after '.' or ','; zones Z, +hh:mm, +hhmm, +hh (and '-')
    other           2026/03/02 10:00 (year first); 02/03/2026 with --dayfirst or --monthfirst;
                    the 12-hour clock after a date, h:mm[:ss[.f]] AM/PM (6/1/2026 1:05:00 PM)
    refused         ordinal dates (2026-061), hour 24, leap second :60, two-digit years, month
                    names, anything before 1900 or after 9999 (epoch 1e15, 1e308, -1e11, and
                    0001-01-01T00:00+05:00 among them), and a local time the clocks skip when
                    they go forward in the --tz zone. In the hour that repeats when they go
                    back, a zone-less time is read as its first pass, unless that is before
                    the row before it and the second pass is after: a feed in wall-clock time
                    goes through the hour twice, in order (times.parse_time).

A rejected row raises RowError whose `kind` is one of REJECT_KINDS; the service counts them.
"""

import csv
import math
import re
from typing import Iterable, List, Optional, Sequence, Tuple, Union

from .times import DATE_ORDERS, NUMBER, TimeError, zone_from_name, zone_name
from .times import format_time as format_time  # re-exported: events format times through here
from .times import parse_time as parse_time_cell

MAX_LINE_BYTES = 64 * 1024  # longer lines are rejected whole ("too_long")
SEPARATORS = (",", ";", "\t", "|")
DECIMALS = (".", ",")

REJECT_KINDS = (
    "too_long",  # line longer than MAX_LINE_BYTES
    "bad_encoding",  # not UTF-8, or a NUL / carriage return inside the line
    "column_count",  # fewer or more cells than the header
    "bad_time",  # time cell empty or not a time we read (see the docstring)
    "missing_value",  # every channel cell is blank (one blank cell is read as NaN: blanks.py)
    "non_numeric",  # no channel cell a number, some text; or a number written another way
    "non_finite",  # NaN or +-inf
    "out_of_range",  # finite, but absurdly far from the scaler's center (service)
    "out_of_order",  # time earlier than the last accepted sample (service)
    "duplicate_time",  # time equal to the last accepted sample (service)
    "unusable_header",  # after a header line lacking a channel, until a usable header (source)
    "ahead_of_clock",  # later than the gateway clock plus --max-ahead (clock.py)
    "before_bundle",  # earlier than the bundle's creation minus --backlog-days (clock.py)
    "time_jump",  # jumped ahead and the rows after it did not confirm the jump (clock.py)
)
_EPOCH_COMMA = re.compile(r"[+-]?[0-9]+,[0-9]*")
# A channel cell is a number as pandas.read_csv reads one (times.NUMBER) or one of its
# infinities: Python's float() also takes "1_000", "NAN" and other scripts' digits, which
# training read as text, so the gateway read them as numbers where training saw a blank.
_INFINITE = re.compile(r"[+-]?inf(?:inity)?", re.IGNORECASE)
# A number written with a decimal comma (and maybe thousands dots): 1,5  -0,25  1.234,5. The
# gateway refuses such a cell with a hint when its --decimal is "."; the workstation's intake
# names such columns with decimal_comma (compile/data.py refuse_decimal_commas).
DECIMAL_COMMA = re.compile(r"[+-]?(\d{1,3}(\.\d{3})+|\d+),\d+")
DECIMAL_HINT = " (a decimal comma? pass --decimal ,)"
# A number with its digits grouped in thousands, where nothing else reads it so (a decimal part
# after the groups, or two groups or more): 1,234.5  1,234,567 beside a decimal point; 1.234,5
# 1.234.567 beside a decimal comma. Neither side reads one (pandas.read_csv does not without
# `thousands`, and a value read as blank or as text would drop the reading without a word): the
# gateway refuses such a cell with this hint, the workstation such a column (compile/data.py
# refuse_grouped_digits). "1,234" alone may be a decimal comma: the hint above.
DIGIT_GROUPS = {".": re.compile(r"[+-]?\d{1,3}(?:,\d{3})+\.\d+|[+-]?\d{1,3}(?:,\d{3}){2,}"),
                ",": re.compile(r"[+-]?\d{1,3}(?:\.\d{3})+,\d+|[+-]?\d{1,3}(?:\.\d{3}){2,}")}
GROUPS_HINT = " (digits grouped in thousands? send plain numbers: 1234.5)"

# A first line `sep=;` (quoted or not, any case): the line a spreadsheet writes above a CSV's
# header to name its separator. Both sides skip it and read the file with that separator unless
# one is given (sources.py CsvSource; compile/data.py read_table).
SEPARATOR_DIRECTIVE = re.compile(r'\ufeff?"?sep=([^\r\n"])"?', re.IGNORECASE)

# Cells read as a blank reading (NaN): what pandas.read_csv reads as missing by default, so the
# gateway reads a file's gaps as the workstation did when it trained on such a file.
BLANK_CELLS = frozenset((
    "", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND", "1.#QNAN",
    "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null"))


def decimal_comma(cell: str) -> bool:
    """The cell is a number written with a decimal comma (DECIMAL_COMMA)."""
    return DECIMAL_COMMA.fullmatch(cell.strip()) is not None


def separator_directive(line: str) -> Optional[str]:
    """The separator a `sep=X` first line names (SEPARATOR_DIRECTIVE), else None."""
    found = SEPARATOR_DIRECTIVE.fullmatch(line.strip())
    return found.group(1) if found else None


def digit_grouped(cell: str, decimal: str = ".") -> bool:
    """The cell is a number with its digits grouped in thousands (DIGIT_GROUPS)."""
    return DIGIT_GROUPS[decimal].fullmatch(cell.strip()) is not None


class RowError(Exception):
    def __init__(self, kind: str, detail: str):
        super().__init__(f"{kind}: {detail}")
        self.kind = kind
        self.detail = detail


class HeaderError(Exception):
    """The header cannot feed this bundle (a channel or the time column is absent)."""


class NoTimeColumn(HeaderError):
    """The header lacks the bundle's time column."""


class Dialect:
    """How a line's cells are read: separator (None: chosen from the header), decimal mark,
    the zone of zone-less times and the order of numeric dates."""

    def __init__(self, sep: Optional[str] = None, decimal: str = ".", tz: Optional[str] = None,
                 date_order: Optional[str] = None):
        if sep is not None and (len(sep) != 1 or sep in "\"\r\n"):
            raise ValueError(f"separator {sep!r}: give one character such as , ; | or a TAB")
        if decimal not in DECIMALS:
            raise ValueError(f"decimal mark {decimal!r}: give . or ,")
        if sep is not None and sep == decimal:
            raise ValueError(f"separator and decimal mark are both {sep!r}; with --decimal , "
                             "the file needs another separator (--sep ';')")
        if date_order is not None and date_order not in DATE_ORDERS:
            raise ValueError(f"date order {date_order!r}: give one of {', '.join(DATE_ORDERS)}")
        self.sep = sep
        self.decimal = decimal
        self.zone = zone_from_name(tz)
        self.zone_name = zone_name(self.zone)
        self.date_order = date_order

    def with_sep(self, sep: str) -> "Dialect":
        other = Dialect.__new__(Dialect)
        other.__dict__.update(self.__dict__)
        other.sep = sep
        return other

    def split(self, text: str, sep: Optional[str] = None) -> List[str]:
        sep = sep or self.sep or ","
        if "\0" in text or "\r" in text:
            raise RowError("bad_encoding", "line holds a NUL or carriage-return character")
        if '"' not in text:
            return [cell.strip() for cell in text.split(sep)]
        try:
            cells = next(csv.reader([text], delimiter=sep, strict=True), [])
        except csv.Error as exc:
            raise RowError("bad_encoding", f"not one CSV record ({exc})") from None
        return [cell.strip() for cell in cells]

    def time(self, cell: str, after: Optional[float] = None) -> float:
        """`after`: the previous row's time, which places a wall-clock time in the hour that
        repeats when clocks go back (times.parse_time)."""
        if self.decimal == "," and _EPOCH_COMMA.fullmatch(cell):
            cell = cell.replace(",", ".")
        try:
            return parse_time_cell(cell, self.zone, self.date_order, after)
        except TimeError as exc:
            raise RowError("bad_time", str(exc)) from None

    def hint(self, cell: str) -> str:
        """Why a cell that is not a number in this dialect is a number written another way
        ("" for text, such as a quality flag)."""
        if digit_grouped(cell, self.decimal):
            return GROUPS_HINT
        return DECIMAL_HINT if self.decimal == "." and decimal_comma(cell) else ""

    def number(self, name: str, cell: str) -> float:
        """A channel cell's value; NaN for a blank cell (BLANK_CELLS)."""
        if cell in BLANK_CELLS:
            return math.nan
        text = cell.replace(",", ".") if self.decimal == "," else cell
        if NUMBER.fullmatch(text):
            v = float(text)
            if math.isfinite(v):
                return v
        elif not _INFINITE.fullmatch(text):
            raise RowError("non_numeric", f"channel {name!r}: {cell[:40]!r}{self.hint(cell)}")
        raise RowError("non_finite", f"channel {name!r}: {cell[:40]!r}")  # inf, or 1e999


def parse_time(cell: str, dialect: Optional[Dialect] = None) -> float:
    """One time cell -> epoch seconds, or RowError("bad_time")."""
    return (dialect or _UTC).time(cell.strip())


def channel_values(cells: Iterable[Tuple[str, Union[str, float]]],
                   dialect: Optional[Dialect] = None) -> Tuple[List[float], int]:
    """(channel name, cell) pairs of one row -> (values, how many cells held text), by the
    rule Header.parse states; the MQTT source reads a sample's values by it too, its JSON
    numbers passed as floats already checked finite."""
    dialect = dialect or _UTC
    values, text = [], []  # type: List[float], List[RowError]
    for name, cell in cells:
        if isinstance(cell, float):
            values.append(cell)
            continue
        try:
            values.append(dialect.number(name, cell))
        except RowError as exc:
            if exc.kind != "non_numeric" or dialect.hint(cell):
                raise  # a number written another way: read as blank it would drop the reading
            values.append(math.nan)
            text.append(exc)
    if all(math.isnan(v) for v in values):
        if text:
            raise text[0]
        raise RowError("missing_value", "every channel cell is blank")
    return values, len(text)


def header_sep(text: str, time_column: str, dialect: Dialect,
               channels: Sequence[str] = ()) -> Optional[str]:
    """The separator under which `text` names the time column (and, preferably, every
    channel): the given one, else the first of SEPARATORS that does; None for a data line."""
    candidates = [dialect.sep] if dialect.sep else list(SEPARATORS)
    named = []
    for sep in candidates:
        try:
            cells = dialect.split(text, sep)
        except RowError:
            continue  # quotes that do not fit this separator
        if time_column in cells:
            if all(c in cells for c in channels):
                return sep
            named.append(sep)
    return named[0] if named else None


class Header:
    """Column positions of the time column and of each model channel, in model order."""

    def __init__(self, line: str, time_column: str, channels: List[str], dialect: Dialect):
        text = line.lstrip("\ufeff").rstrip("\r\n")
        sep = header_sep(text, time_column, dialect, channels) or dialect.sep or ","
        self.dialect = dialect.with_sep(sep)
        self.text = text
        try:
            cells = self.dialect.split(text)
        except RowError as exc:
            raise HeaderError(f"input header unreadable ({exc})") from None
        self.n_cells = len(cells)
        _check_columns(cells, time_column, channels)
        self.time_index = cells.index(time_column)
        self.channel_index = [cells.index(c) for c in channels]
        self.channels = list(channels)

    def same_layout(self, other: "Header") -> bool:
        return (self.dialect.sep, self.n_cells, self.time_index, self.channel_index) == (
            other.dialect.sep, other.n_cells, other.time_index, other.channel_index)

    def time_of(self, line: str, after: Optional[float] = None) -> Optional[float]:
        """The row's time if its time cell can be read, else None (used when resuming)."""
        try:
            cells = self.dialect.split(line)
            if len(cells) != self.n_cells:
                return None
            return self.dialect.time(cells[self.time_index], after)
        except RowError:
            return None

    def parse(self, line: str, after: Optional[float] = None) -> Tuple[float, List[float], int]:
        """A data line (no newline) -> (epoch seconds, values in model channel order, how many
        channel cells held text); `after`: the previous row's time (Dialect.time).

        A channel cell holding text (a historian's quality flag: "Bad", "Comm Fail") while
        another channel reads a number is read as a blank reading (blanks.py), so one failed
        transmitter does not refuse the other channels' readings; a cell that is a number
        written another way is still refused with a hint (Dialect.hint: a decimal comma, the
        feed's --decimal being wrong; digits grouped in thousands), and so is a row whose every
        channel cell is text or blank."""
        cells = self.dialect.split(line)
        if len(cells) != self.n_cells:
            raise RowError("column_count", f"{len(cells)} cells, header has {self.n_cells}")
        t = self.dialect.time(cells[self.time_index], after)
        values, n_text = channel_values(
            zip(self.channels, (cells[i] for i in self.channel_index)), self.dialect)
        return t, values, n_text


def _check_columns(cells: List[str], time_column: str, channels: Sequence[str]) -> None:
    twice = sorted({c for c in cells if c and cells.count(c) > 1})
    if twice:
        raise HeaderError(f"input header names column(s) {twice} more than once; give every "
                          "column its own name")
    if time_column not in cells:
        raise NoTimeColumn(
            f"input header has no time column {time_column!r} (columns: {cells[:20]}); "
            "the first line must name the columns"
        )
    missing = [c for c in channels if c not in cells]
    if missing:
        raise HeaderError(
            f"input header lacks channel(s) {missing} the model needs (columns: {cells[:20]})"
        )


# A line that is not UTF-8 is read as Windows-1252, the encoding spreadsheets and SCADA tools on
# Windows write CSV in ('Temperatur °C'); `ganlet train` reads such a file the same way, so a
# header names the same channels on both sides. A UTF-16 line (its byte-order mark) is refused.
FALLBACK_ENCODING = "cp1252"
UTF16_MARKS = (b"\xff\xfe", b"\xfe\xff")


def decode_text(raw: bytes) -> str:
    """One line's bytes as text: UTF-8, else Windows-1252 (FALLBACK_ENCODING)."""
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError:
        if raw.startswith(UTF16_MARKS):
            raise RowError("bad_encoding", "line is UTF-16; write the file as UTF-8") from None
        try:
            return raw.decode(FALLBACK_ENCODING)
        except UnicodeDecodeError:
            raise RowError("bad_encoding", "line is neither UTF-8 nor Windows-1252") from None


def decode_line(raw: bytes) -> Optional[str]:
    """Bytes of one line (newline stripped by the reader) -> text; None for a blank line.
    Leading NUL bytes are dropped: they are the hole a copy-truncate rotation leaves when the
    writer does not append."""
    if len(raw) > MAX_LINE_BYTES:
        raise RowError("too_long", f"{len(raw)} bytes > {MAX_LINE_BYTES}")
    text = decode_text(raw.lstrip(b"\0")).rstrip("\r")
    if not text.strip():
        return None
    return text


_UTC = Dialect()
