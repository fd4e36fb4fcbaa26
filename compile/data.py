"""Data intake: a CSV or Parquet sensor history -> a regular frame -> scaled windows.

Everything the user can get wrong is checked here, at the boundary, with a message that says
what to do next. Past this module the data is trusted: a fixed period, no duplicates, no NaN
inside a segment, and no window that spans a long gap.
"""

from __future__ import annotations

import copy
import csv
import io
import json
import re
import warnings
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Optional, Sequence

import numpy as np
import pandas as pd

from ganlet.runtime.features import rate_mask
from ganlet.runtime.features import series as feature_series
from ganlet.runtime.intake import (
    UTF16_MARKS,
    Dialect,
    RowError,
    decimal_comma,
    decode_text,
    digit_grouped,
    separator_directive,
)
from ganlet.runtime.times import DATE_ORDERS, MAX_TIME, MIN_TIME

# Words that make a column a label wherever they stand in its name (Pump1_Fault, is_outlier,
# faultNumber, Normal/Attack): a label trained on as a channel tells the detector the answer
LABEL_WORDS = ("anomaly", "anomalies", "label", "labels", "changepoint", "attack", "outlier",
               "outliers", "fault", "faults", "incident", "incidents")
TIME_NAMES = ("time", "timestamp", "datetime", "date", "ts", "date_time")
ROW_TIME_COLUMN = "time"  # the time column a file without one is given (--period), and so the
                          # one the bundle's gateway feeds must carry
LABEL_NAMES = ("anomaly", "label", "labels", "changepoint", "fault", "target", "is_anomaly",
               "class", "incident", "attack")
# Column-name suffixes we can read a unit from (common practice in plant historians).
UNIT_SUFFIXES = {
    "_mm_s": "mm/s", "_c": "degC", "_degc": "degC", "_bar": "bar", "_a": "A", "_v": "V",
    "_kw": "kW", "_rpm": "rpm", "_hz": "Hz", "_g": "g", "_pct": "%", "_lpm": "L/min",
    "_m3h": "m3/h", "_kpa": "kPa", "_psi": "psi",
}
MIN_WINDOW = 8
# |Spearman rho| of level against time over the fit span above which intake suggests --rate
# (common practice for a monotone-trend screen; not a significance test)
TREND_RHO = 0.5


class IntakeError(ValueError):
    """Bad input data; the message says what is wrong and what to do next."""


@dataclass
class IntakeOptions:
    sep: Optional[str] = None            # None: sniff the delimiter
    time_col: Optional[str] = None       # None: auto-detect
    channels: Optional[Sequence[str]] = None
    exclude: Sequence[str] = ()
    period_s: Optional[float] = None     # None: the median spacing
    max_fill_periods: int = 5            # interpolate gaps up to this many missing periods
    units: dict = field(default_factory=dict)
    decimal: str = "."                   # "," for decimal commas (1,5)
    tz: Optional[str] = None             # zone of zone-less times (None: UTC)
    date_order: Optional[str] = None     # "dayfirst" | "monthfirst" for 02/03/2026
    times_from_rows: bool = False        # a file without a time column: one sample per row,
                                         # period_s apart (rows_as_times)

    def dialect(self) -> Dialect:
        """How time cells are read: the gateway's own rules (runtime/intake.py), so a file
        trains and streams alike."""
        try:
            return Dialect(sep=None, decimal=self.decimal, tz=self.tz, date_order=self.date_order)
        except ValueError as exc:
            raise IntakeError(str(exc)) from None


@dataclass
class IntakeReport:
    source: str
    rows_read: int
    time_col: str
    channels: list
    units: list
    excluded: list
    period_s: float
    start: str
    end: str
    grid_points: int
    unparsable_times: int
    out_of_order: int
    duplicates: int
    missing_points: int
    filled_points: int
    long_gaps: list            # [start, end, missing periods] of gaps split into segments
    segments: int
    channel_ranges: dict       # name -> [min, max] in raw units
    warnings: list = field(default_factory=list)
    time_zone: str = "UTC"     # the zone zone-less times were read in
    decimal: str = "."         # the decimal mark numbers were read with
    date_order: Optional[str] = None  # how numeric dates with the year last were read
    times_from_rows: bool = False  # the file had no time column: its rows were the samples
    # name -> grid points where the channel alone is blank (the row has other readings)
    blank_cells: dict = field(default_factory=dict)
    # name -> the blank run, in grid points (rows missing whole counted in), that 19 in 20 of
    # the channel's blank runs stay within (channels with blank cells only)
    blank_runs: dict = field(default_factory=dict)

    def to_json(self) -> dict:
        return asdict(self)

    def summary(self) -> str:
        lines = [
            f"data      {self.source}",
            f"rows      {self.rows_read} read -> {self.grid_points} on a {fmt_period(self.period_s)} grid",
            f"span      {self.start} .. {self.end}",
            f"repairs   {self.out_of_order} out of order (sorted), {self.duplicates} duplicate "
            f"timestamps (averaged), {self.unparsable_times} unparsable times (dropped)",
            f"gaps      {self.filled_points} points interpolated, {len(self.long_gaps)} long gaps "
            f"-> {self.segments} segment(s)",
        ]
        if self.excluded:
            lines.append(f"excluded  {', '.join(self.excluded)}")
        width = max(len(c) for c in self.channels)
        for name, unit in zip(self.channels, self.units):
            lo, hi = self.channel_ranges[name]
            lines.append(f"  {name:<{width}}  {lo:>10.4g} .. {hi:<10.4g} {unit}")
        return "\n".join(lines)


@dataclass
class Frame:
    """A regular time series: values on a fixed grid, NaN only inside long gaps."""

    times: pd.DatetimeIndex
    values: np.ndarray          # [T, C] float64, raw units
    channels: list
    units: list
    period_s: float
    report: IntakeReport
    # the times of the rows read, in time order: a row count (--train-until 400) counts the
    # file's rows, which a grid with filled gaps outnumbers
    row_times: Optional[np.ndarray] = None

    def segments(self, start: int = 0, stop: Optional[int] = None) -> list:
        """(begin, end) row ranges without NaN, inside [start, stop)."""
        return segments_in(self.values, start, stop)


def segments_in(values: np.ndarray, start: int = 0, stop: Optional[int] = None) -> list:
    """(begin, end) row ranges of `values` without NaN, inside [start, stop)."""
    stop = len(values) if stop is None else stop
    ok = ~np.isnan(values[start:stop]).any(axis=1)
    return [(start + b, start + e) for b, e in runs(ok)]


def runs(mask: np.ndarray) -> list:
    """Half-open ranges of consecutive True values."""
    padded = np.concatenate([[False], mask, [False]]).astype(np.int8)
    edges = np.flatnonzero(np.diff(padded))
    return list(zip(edges[0::2].tolist(), edges[1::2].tolist()))


def fmt_period(seconds: float) -> str:
    if seconds >= 3600 and seconds % 3600 == 0:
        return f"{seconds / 3600:g} h"
    if seconds >= 60 and seconds % 60 == 0:
        return f"{seconds / 60:g} min"
    return f"{seconds:g} s"


def parse_period(text) -> Optional[float]:
    """'60', '60s', '1min', '1h' -> seconds."""
    if text is None or text == "":
        return None
    if isinstance(text, (int, float)):
        seconds = float(text)
    else:
        try:
            seconds = float(text)
        except ValueError:
            try:
                seconds = pd.Timedelta(str(text)).total_seconds()
            except ValueError as exc:
                raise IntakeError(f"--period {text!r} is not a duration; use seconds (60) or "
                                  "a unit (60s, 1min, 1h)") from exc
    if seconds <= 0:
        raise IntakeError(f"--period must be positive, got {text!r}")
    return seconds


def snapped_period(median: float, notes: list) -> float:
    """The median spacing, snapped to whole seconds (whole ms below 1 s) when within 1 %.

    Loggers sample at whole-second or whole-millisecond periods (common practice); with timing
    jitter the median spacing misses that by a little, and over thousands of rows the error
    adds up to whole periods: rows then collide in one slot and false gaps open between them.
    """
    unit = 1.0 if median >= 1.0 else 0.001
    nice = round(median / unit) * unit
    if nice > 0 and nice != median and abs(nice - median) <= 0.01 * median:
        notes.append(f"median spacing {median:.6g} s taken as {fmt_period(nice)}")
        return float(nice)
    return median


def read_table(path: Path, sep: Optional[str], decimal: str = ".",
               skip_units_row: bool = False) -> pd.DataFrame:
    path = Path(path)
    if not path.exists():
        raise IntakeError(f"{path}: no such file")
    if path.suffix.lower() in (".parquet", ".pq"):
        return pd.read_parquet(path)
    directive = file_separator_directive(path)
    if directive is not None:
        if sep is not None and sep != directive:
            raise IntakeError(f"{path}: its first line says the separator is {directive!r} "
                              f"(sep={directive}), but --sep gives {sep!r}")
        sep = directive
    if sep is None:
        with open(path, newline="", encoding="utf-8", errors="replace") as fh:
            head = fh.read(16384)
        if not head.strip():
            raise IntakeError(f"{path}: the file is empty")
        # with decimal commas a comma cannot be the delimiter (every row has as many of them)
        delimiters = ";\t|" if decimal == "," else ",;\t|"
        try:
            sep = csv.Sniffer().sniff(head, delimiters=delimiters).delimiter
        except csv.Error:
            sep = ";" if decimal == "," else ","
    if sep == decimal:
        raise IntakeError(f"--sep and --decimal are both {sep!r}; give the file's separator")
    try:
        df = read_csv_text(path, sep, decimal, skip_units_row, directive is not None)
    except pd.errors.ParserError as exc:
        refuse_preamble(path, sep)
        raise IntakeError(f"{path}: cannot parse as CSV ({exc}); try --sep") from exc
    df = with_stripped_names(df, path)
    # One column whose name holds another delimiter: the separator is wrong, not the time column.
    if len(df.columns) == 1 and any(d in str(df.columns[0]) for d in ",;\t|"):
        raise IntakeError(f"{path}: read one column {str(df.columns[0])!r} with delimiter "
                          f"{sep!r}; the delimiter looks wrong, give it with --sep")
    return df


def file_separator_directive(path: Path) -> Optional[str]:
    """The separator a first line `sep=;` names (runtime/intake.py SEPARATOR_DIRECTIVE), else
    None; read_csv_text then skips that line, as the gateway does."""
    with open(path, "rb") as fh:
        return separator_directive(fh.readline(64).decode("utf-8", errors="replace"))


def refuse_preamble(path: Path, sep: str) -> None:
    """Lines above the header (an export's title, a date range), found as lines with fewer
    fields than the most common count of the first rows: say how many to remove. The gateway
    takes the first line as the header too."""
    with open(path, encoding="utf-8", errors="replace") as fh:
        head = [line.rstrip("\r\n") for _, line in zip(range(200), fh)]
    counts = [len(line.split(sep)) for line in head]
    common = max(set(counts), key=counts.count)
    first = next((i for i, n in enumerate(counts) if n == common), 0)
    if 0 < first < len(head) and common > 1:
        raise IntakeError(f"{path}: {first} line(s) above the header ({head[0][:60]!r}); "
                          f"remove them: the first line must name the columns, for training "
                          f"and for the gateway")


def with_stripped_names(df: pd.DataFrame, path) -> pd.DataFrame:
    """Column names as the gateway reads a header, each cell stripped of spaces: 'time, flow'
    names 'flow', not ' flow' (before, the bundle then refused the header of the very file it
    was trained on). Two columns that strip to one name are refused, as the gateway does."""
    names = [str(c).strip() if isinstance(c, str) else c for c in df.columns]
    twice = sorted({str(n) for n in names if names.count(n) > 1})
    if twice:
        raise IntakeError(f"{path}: column(s) {', '.join(map(repr, twice))} named more than "
                          "once; give every column its own name")
    return df.set_axis(names, axis=1)


def read_csv_text(path: Path, sep: str, decimal: str, skip_units_row: bool = False,
                  directive: bool = False):
    """The CSV as a table, each line decoded as the gateway decodes it (runtime/intake.py
    decode_text: UTF-8, else Windows-1252, with a warning here); a UTF-16 file is refused.
    skip_units_row: leave out the line under the header (units_row); directive: leave out the
    first line, a separator directive (separator_directive)."""
    skip = ([0] if directive else []) + ([1 + int(directive)] if skip_units_row else []) or None
    raw = path.read_bytes()
    if raw[:2] in UTF16_MARKS:
        raise IntakeError(f"{path}: the file is UTF-16; save it as UTF-8 (or Windows-1252)")
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError:
        pass
    else:
        return pd.read_csv(path, sep=sep, decimal=decimal, skiprows=skip)
    lines = []
    for number, line in enumerate(raw.split(b"\n"), start=1):
        try:
            lines.append(decode_text(line))
        except RowError as exc:
            raise IntakeError(f"{path}: line {number}: {exc.detail}; save the file as "
                              "UTF-8") from None
    warnings.warn(f"{path.name} is not UTF-8: lines read as Windows-1252, as the gateway "
                  "reads them", stacklevel=4)
    text = "\n".join(lines).lstrip("\ufeff")
    return pd.read_csv(io.StringIO(text), sep=sep, decimal=decimal, skiprows=skip)


def refuse_decimal_commas(df: pd.DataFrame, columns, path) -> None:
    """Text columns whose cells are numbers with a decimal comma: say so (the delimiter is
    right; the decimal mark is not the one pandas reads by default)."""
    found = []
    for col in columns:
        cells = df[col].dropna().astype(str).str.strip().head(200)
        if len(cells) and cells.map(decimal_comma).mean() > 0.5:
            found.append((str(col), cells.iloc[0]))
    if found:
        names = ", ".join(c for c, _ in found)
        raise IntakeError(f"{path}: column(s) {names} hold numbers with a decimal comma (e.g. "
                          f"{found[0][1]!r}); read them with --decimal ','")


def refuse_grouped_digits(texts: dict, decimal: str, path) -> None:
    """Columns whose cells that are not plain numbers are mostly numbers with their digits
    grouped in thousands (runtime/intake.py DIGIT_GROUPS; an export formatted 1,234.5): read as
    text the column would be left out, and in a column of smaller plain numbers the large
    values read as blank, both without a word. `texts`: each column's text cells."""
    found = [(str(col), cells.iloc[0]) for col, cells in texts.items()
             if len(cells) and cells.map(lambda c: digit_grouped(c, decimal)).mean() > 0.5]
    if found:
        names = ", ".join(c for c, _ in found)
        raise IntakeError(f"{path}: column(s) {names} hold numbers with their digits grouped in "
                          f"thousands (e.g. {found[0][1]!r}), which neither ganlet nor the "
                          "gateway reads; export the file with plain numbers (no digit "
                          "grouping)")


def find_time_column(df: pd.DataFrame, requested: Optional[str]) -> str:
    if requested is not None:
        if requested not in df.columns:
            raise IntakeError(f"time column {requested!r} not found; columns are "
                              f"{', '.join(map(str, df.columns))}")
        return requested
    for col in df.columns:
        if str(col).strip().lower() in TIME_NAMES:
            return col
    for col in df.columns:
        if df[col].dtype == object or str(df[col].dtype).startswith(("datetime", "str")):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                parsed = pd.to_datetime(df[col].head(50), errors="coerce")
            if parsed.notna().mean() > 0.9:
                return col
    raise IntakeError("no time column found; name it with --time-col, or, if each row is one "
                      "sample and the rows are evenly spaced, give their spacing with --period "
                      f"(e.g. --period 1s) (columns are {', '.join(map(str, df.columns))})")


def time_column_of(df: pd.DataFrame, opts: IntakeOptions, notes: list, warn: bool = True) -> tuple:
    """(df, its time column, whether the rows gave the times): the column named or found, else,
    with opts.times_from_rows and a period, the rows' own times (rows_as_times), with a note
    (and a warning unless `warn` is False: the file's second reading)."""
    try:
        return df, find_time_column(df, opts.time_col), False
    except IntakeError:
        given = opts.times_from_rows and opts.period_s is not None
        if not given or opts.time_col not in (None, ROW_TIME_COLUMN):
            raise
    notes.append(f"no time column: each of the {len(df)} rows is taken as one sample, "
                 f"{fmt_period(opts.period_s)} apart from 1970-01-01 00:00:00 UTC; "
                 f"the gateway reads live rows by their time, so its feeds need a column "
                 f"{ROW_TIME_COLUMN!r} (ISO 8601 or epoch seconds)")
    if warn:
        warnings.warn(notes[-1], stacklevel=3)
    return rows_as_times(df, opts.period_s), ROW_TIME_COLUMN, True


def rows_as_times(df: pd.DataFrame, period_s: float) -> pd.DataFrame:
    """DF with a first column ROW_TIME_COLUMN of epoch seconds: row k at k x period_s (a file
    whose rows are evenly spaced samples with no time written; `ganlet evaluate` and `verify`
    replay such a file on the gateway with these times, gateway.gateway_csv)."""
    out = df.copy()
    out.insert(0, ROW_TIME_COLUMN, np.round(np.arange(len(df)) * float(period_s), 6))
    return out


_DATE_ONLY = re.compile(r"\d{4}-\d{2}-\d{2}|\d{1,2}[./-]\d{1,2}[./-]\d{4}|\d{4}/\d{1,2}/\d{1,2}")
_TIME_OF_DAY = re.compile(r"\d{1,2}:\d{2}(:\d{2}([.,]\d+)?)?")


def refuse_split_time(df: pd.DataFrame, time_col, path) -> None:
    """A date column beside a time-of-day column (some loggers and spreadsheets write them
    apart): say to join them, instead of reading every row of a day as one timestamp."""
    dates = df[time_col].dropna().astype(str).str.strip().head(200)
    if not len(dates) or not dates.str.fullmatch(_DATE_ONLY).all():
        return
    for col in df.columns:
        cells = df[col].dropna().astype(str).str.strip().head(200)
        if col != time_col and len(cells) and cells.str.fullmatch(_TIME_OF_DAY).all():
            raise IntakeError(
                f"{path}: the time is split over column {time_col!r} (dates) and {col!r} (times "
                f"of day); join them into one column (e.g. '{dates.iloc[0]} {cells.iloc[0]}') "
                "for training and for the gateway")


def refuse_long_format(df: pd.DataFrame, time_col, path) -> None:
    """One reading per row (a historian's narrow export: time, tag, value): most rows share
    their time with others and differ in one column naming the sensor. Read as it stands, every
    sensor's readings at a time would be averaged into one channel without a word; say how to
    pivot it into one column per sensor, the shape training and the gateway read."""
    if len(df) < 4 or df.duplicated([time_col]).mean() < 0.5:
        return
    for col in df.columns:
        names = df[col].nunique()
        if col == time_col or not 2 <= names <= len(df) // 2:
            continue
        if df.duplicated([time_col, col]).mean() < 0.01:
            values = [str(c) for c in df.columns if c not in (time_col, col)]
            shown = ", ".join(repr(str(v)) for v in df[col].dropna().unique()[:3])
            shown += ", ..." if names > 3 else ""
            raise IntakeError(
                f"{path}: rows repeat their time, one per {col!r} ({names} names: {shown}): "
                "the file holds one reading per row; ganlet reads one column per sensor, in "
                "training and on the gateway. Pivot it first, e.g. with pandas: "
                f"df.pivot_table(index={str(time_col)!r}, columns={str(col)!r}, "
                f"values={values[0] if len(values) == 1 else values!r}).reset_index()")


def units_row(df: pd.DataFrame, time_col, dialect: Dialect, notes: list) -> Optional[dict]:
    """{column: unit} when the first data row is a units row, else None: its time cell is not
    a time and its cells make columns text that are numbers below it ('', 'bar', 'degC' under
    the header, as many SCADA exports write). The caller reads the file again without it, so
    the columns are read as numbers with the file's own decimal mark; its cells are the
    columns' units (--units wins). The gateway refuses that line as bad_time, one line."""
    if len(df) < 3 or not _unparsable_time(df[time_col].iloc[0], dialect):
        return None
    below = df.iloc[1:]
    texts = [c for c in df.columns if c != time_col and not pd.api.types.is_numeric_dtype(df[c])]
    if not any(below[c].notna().any() and _numbers(below[c], dialect) for c in texts):
        return None
    units = {str(c): str(df[c].iloc[0]).strip() for c in df.columns
             if c != time_col and pd.notna(df[c].iloc[0]) and str(df[c].iloc[0]).strip()}
    notes.append(f"the first row under the header is a units row, read as units: "
                 f"{', '.join(f'{c} {u}' for c, u in units.items()) or 'none'}")
    warnings.warn(notes[-1], stacklevel=3)
    return units


def _numbers(cells: pd.Series, dialect: Dialect) -> bool:
    """Every non-blank cell of the first 200 is a number as the gateway reads one."""
    try:
        for cell in cells.dropna().head(200):
            dialect.number("", str(cell))
    except RowError:
        return False
    return True


def _unparsable_time(cell, dialect: Dialect) -> bool:
    if cell is None or (not isinstance(cell, str) and pd.isna(cell)):
        return True
    try:
        dialect.time(str(cell).strip())
    except RowError:
        return True
    return False


def unit_for(name: str, given: dict) -> str:
    if name in given:
        return given[name]
    lower = name.lower()
    for suffix in sorted(UNIT_SUFFIXES, key=len, reverse=True):
        if lower.endswith(suffix):
            return UNIT_SUFFIXES[suffix]
    return ""


def load_frame(path, options: Optional[IntakeOptions] = None) -> Frame:
    """Read, clean and regularise one sensor history."""
    opts = options or IntakeOptions()
    dialect = opts.dialect()
    df = read_table(Path(path), opts.sep, opts.decimal)
    if len(df) == 0:
        raise IntakeError(f"{path}: no data rows")
    notes: list = []
    df, time_col, from_rows = time_column_of(df, opts, notes)
    refuse_split_time(df, time_col, path)
    refuse_long_format(df, time_col, path)
    row_units = units_row(df, time_col, dialect, notes)
    if row_units is not None:
        df = read_table(Path(path), opts.sep, opts.decimal, skip_units_row=True)
        df = rows_as_times(df, opts.period_s) if from_rows else df
    channels, excluded = pick_channels(df, time_col, opts, path, notes)
    times_np, values, unparsable = timed_rows(df, time_col, channels, dialect, notes)
    channels, values, excluded = without_blank_columns(channels, values, excluded,
                                                       bool(opts.channels), notes)
    times_np, values, out_of_order = sorted_by_time(times_np, values, notes)

    dt = np.diff(times_np).astype("timedelta64[ns]").astype(np.int64) / 1e9
    positive = dt[dt > 0]
    if len(positive) == 0:
        raise IntakeError(f"{path}: all rows share one timestamp; need a time series")
    period = opts.period_s or snapped_period(float(np.median(positive)), notes)
    grid, grid_times, duplicates = on_grid(times_np, values, period, float(np.median(positive)),
                                           notes)
    absent = np.isnan(grid)
    blank = (absent & ~absent.all(axis=1, keepdims=True)).sum(axis=0)
    blank_runs = {str(c): typical_blank_run(absent[:, j])
                  for j, c in enumerate(channels) if blank[j]}
    missing, filled, long_gaps = fill_short_gaps(grid, grid_times, opts.max_fill_periods)

    segs = runs(~np.isnan(grid).any(axis=1))
    ranges = {name: [float(np.nanmin(grid[:, j])), float(np.nanmax(grid[:, j]))]
              for j, name in enumerate(channels)}
    units = [unit_for(c, {**(row_units or {}), **opts.units}) for c in channels]
    report = IntakeReport(
        source=str(path), rows_read=int(len(df)), time_col=str(time_col),
        channels=[str(c) for c in channels], units=units, excluded=[str(c) for c in excluded],
        period_s=period, start=str(grid_times[0]), end=str(grid_times[-1]),
        grid_points=len(grid), unparsable_times=unparsable, out_of_order=out_of_order,
        duplicates=int(duplicates), missing_points=int(missing.sum()), filled_points=int(filled),
        long_gaps=long_gaps, segments=len(segs), channel_ranges=ranges, warnings=notes,
        time_zone=dialect.zone_name, decimal=dialect.decimal, date_order=dialect.date_order,
        times_from_rows=from_rows,
        blank_cells={str(c): int(n) for c, n in zip(channels, blank)}, blank_runs=blank_runs,
    )
    return Frame(grid_times, grid, [str(c) for c in channels], units, period, report,
                 row_times=times_np)


def as_numbers(cells: pd.Series, decimal: str = ".") -> pd.Series:
    """A column's cells as numbers, NaN for a cell that is not one; a column pandas left as text
    (a few cells of it are) still has its numbers in the file's decimal mark."""
    if pd.api.types.is_numeric_dtype(cells):
        return cells
    text = cells.astype(str).str.strip()
    if decimal == ",":
        text = text.str.replace(",", ".", regex=False)
    return pd.to_numeric(text.where(cells.notna()), errors="coerce")


def text_cells(cells: pd.Series, decimal: str = ".") -> pd.Series:
    """The column's non-blank cells that are not numbers, stripped (none in a numeric column)."""
    if pd.api.types.is_numeric_dtype(cells):
        return pd.Series([], dtype=object)
    present = cells.dropna()
    return present[as_numbers(present, decimal).isna()].astype(str).str.strip()


def mostly_numbers(cells: pd.Series, text: pd.Series) -> bool:
    """More than half of the column's non-blank cells are numbers (`text`: the others): a
    measurement, some of whose cells may be a historian's quality flag ("Bad", "Comm Fail"); a
    status or name column is mostly text."""
    if pd.api.types.is_numeric_dtype(cells):
        return True
    return len(text) < 0.5 * int(cells.notna().sum())


def note_text_cells(cells: pd.Series, text: pd.Series, name, notes: list) -> None:
    """Say how many of a channel's cells hold text (read as blank, as the gateway reads a text
    cell beside other channels' numbers: runtime/intake.py Header.parse)."""
    if len(text):
        shown = ", ".join(repr(t) for t in text.value_counts().index[:3])
        notes.append(f"channel {str(name)!r}: {len(text)} of {len(cells)} cells hold text "
                     f"({shown}), read as blank, as the gateway reads them")
        warnings.warn(notes[-1], stacklevel=3)


def counts_rows(cells: pd.Series) -> bool:
    """The column is k, k+1, k+2, ... in file order: a row number (the index column pandas'
    to_csv writes, with an empty header read as "Unnamed: 0", or a sample id). It tells the
    network only where a row sits, and on the gateway every new row is a level training never
    saw: a drift from the first hop. A counter that measures something (a totaliser, a cycle
    count) does not step by exactly one every row."""
    if len(cells) < 3 or not pd.api.types.is_numeric_dtype(cells) or cells.isna().any():
        return False
    steps = np.diff(cells.to_numpy(np.float64))
    return bool((steps == 1.0).all())


def _first_counts(cells: pd.Series) -> str:
    return ", ".join(f"{v:g}" for v in cells.to_numpy(np.float64)[:3])


def label_word(name) -> Optional[str]:
    """The word that makes a column a label: its whole name (LABEL_NAMES, any case), or one of
    LABEL_WORDS among the words of its name (split at anything not a letter or digit and
    between camelCase words); None for any other column."""
    text = str(name).strip()
    if text.lower() in LABEL_NAMES:
        return text.lower()
    words = re.findall(r"[A-Z]+(?![a-z])|[A-Z]?[a-z]+|[0-9]+", text)
    return next((w.lower() for w in words if w.lower() in LABEL_WORDS), None)


def pick_channels(df: pd.DataFrame, time_col, opts: IntakeOptions, path,
                  notes: list) -> tuple:
    """(channels, excluded columns): --channels as named, else every column of numbers that
    is not the time, a label column or --exclude'd (a column of text is left out, and said)."""
    excluded = [c for c in df.columns if c != time_col and label_word(c) is not None]
    for c in excluded:
        if str(c).strip().lower() not in LABEL_NAMES:
            notes.append(f"column {str(c)!r} is taken for a label (its name says "
                         f"{label_word(c)!r}): left out (name it in --channels to train on it)")
            warnings.warn(notes[-1], stacklevel=3)
    excluded += [c for c in opts.exclude if c in df.columns and c not in excluded]
    missing_excl = [c for c in opts.exclude if c not in df.columns]
    if missing_excl:
        raise IntakeError(f"--exclude names unknown column(s): {', '.join(missing_excl)}")
    if opts.channels:
        unknown = [c for c in opts.channels if c not in df.columns]
        if unknown:
            raise IntakeError(f"--channels names unknown column(s): {', '.join(unknown)}; "
                              f"columns are {', '.join(map(str, df.columns))}")
        channels = list(opts.channels)
        texts = {c: text_cells(df[c], opts.decimal) for c in channels}
        refuse_grouped_digits(texts, opts.decimal, path)
        not_numeric = [c for c in channels if not mostly_numbers(df[c], texts[c])]
        refuse_decimal_commas(df, not_numeric, path)
        if not_numeric:
            raise IntakeError(f"channel(s) {', '.join(not_numeric)} are not numeric")
    else:
        candidates = [c for c in df.columns if c != time_col and c not in excluded
                      and not pd.api.types.is_bool_dtype(df[c])]
        texts = {c: text_cells(df[c], opts.decimal) for c in candidates}
        refuse_grouped_digits(texts, opts.decimal, path)
        text = [c for c in candidates if not mostly_numbers(df[c], texts[c])]
        refuse_decimal_commas(df, text, path)
        counters = [c for c in candidates if c not in text and counts_rows(df[c])]
        channels = [c for c in candidates if c not in text and c not in counters]
        for c in text:
            notes.append(f"column {str(c)!r} holds text, not numbers: left out")
            warnings.warn(notes[-1], stacklevel=3)
        for c in counters:
            notes.append(f"column {str(c)!r} counts the rows ({_first_counts(df[c])}, ...): a "
                         "row number, not a measurement: left out (name it in --channels to "
                         "keep it)")
            warnings.warn(notes[-1], stacklevel=3)
        excluded += text + counters
    for c in channels:
        note_text_cells(df[c], texts[c], c, notes)
    if not channels:
        refuse_decimal_commas(df, [c for c in df.columns if c != time_col], path)
        raise IntakeError(f"{path}: no numeric channel found besides the time column "
                          f"{time_col!r}; check --sep, or name channels with --channels")
    return channels, excluded


# Spreadsheet serial dates (days since 1899-12-30) of 1955 .. 2100: read as epoch seconds they
# are times on 1970-01-01 spaced a fraction of a second apart (one day = 1.0)
SERIAL_DAYS = (20000.0, 73051.0)


def refuse_serial_days(raw: pd.Series, time_col) -> None:
    """A numeric time column that holds spreadsheet serial dates (45413.0007 is 2024-05-01
    00:01) is refused: as epoch seconds it trained on a 0.0007 s grid on 1 January 1970, and the
    gateway refused every live row as older than the bundle."""
    if not pd.api.types.is_numeric_dtype(raw) or pd.api.types.is_bool_dtype(raw):
        return
    t = pd.to_numeric(raw, errors="coerce").dropna().to_numpy(np.float64)
    if len(t) < 2 or not ((t >= SERIAL_DAYS[0]) & (t <= SERIAL_DAYS[1])).all():
        return
    steps = np.diff(np.sort(t))
    steps = steps[steps > 0]
    if len(steps) and np.median(steps) < 1.0:
        example = pd.Timestamp("1899-12-30") + pd.to_timedelta(t[0], unit="D")
        raise IntakeError(
            f"column {str(time_col)!r} holds numbers like {t[0]:.6g}: spreadsheet serial dates "
            f"(days since 1899-12-30; {t[0]:.6g} is {example:%Y-%m-%d %H:%M:%S}), not epoch "
            "seconds; export the times as text (ISO 8601, as the gateway reads them), e.g. "
            "pandas.to_datetime(df[col], unit='D', origin='1899-12-30')")


def timed_rows(df: pd.DataFrame, time_col, channels: list, dialect, notes: list) -> tuple:
    """(times, values [N, C] with NaN for anything not finite, rows dropped): rows whose time
    does not parse are dropped, unless they are more than 1 % of the file (then it is refused)."""
    raw_times = df[time_col]
    refuse_serial_days(raw_times, time_col)
    times = parse_times(raw_times, dialect)
    bad_time = times.isna().to_numpy()
    if bad_time.mean() > 0.01 or bad_time.all():
        first = int(np.flatnonzero(bad_time)[0])
        raise IntakeError(f"column {time_col!r}: {int(bad_time.sum())} of {len(df)} times cannot "
                          f"be parsed (first at data row {first + 1}: {str(raw_times.iloc[first])!r}); "
                          f"{time_problem(raw_times.iloc[first], dialect)}"
                          f"{date_order_hint(raw_times, dialect)}; use ISO 8601 "
                          "(2026-03-02T10:00:00) or epoch seconds, or pick another column with "
                          "--time-col")
    values = df[channels].apply(as_numbers, decimal=dialect.decimal).to_numpy(
        dtype=np.float64, copy=True)
    values[~np.isfinite(values)] = np.nan
    if bad_time.any():
        notes.append(f"{int(bad_time.sum())} rows with unparsable times dropped")
    return times.to_numpy()[~bad_time], values[~bad_time], int(bad_time.sum())


def without_blank_columns(channels: list, values: np.ndarray, excluded: list, named: bool,
                          notes: list) -> tuple:
    """(channels, values, excluded): a column with no number in any row (a spare input, a tag
    never wired) is left out with a note when picked by default; named in --channels, it is
    refused. Checked before the gap filling, which reads a row with any blank cell as a gap and
    would otherwise blank every channel."""
    blank = [j for j in range(len(channels)) if np.isnan(values[:, j]).all()]
    if not blank:
        return channels, values, excluded
    names = [str(channels[j]) for j in blank]
    if named or len(blank) == len(channels):
        raise IntakeError(f"channel(s) {', '.join(map(repr, names))} hold no number in any row; "
                          "leave them out of --channels, or check --sep and --decimal")
    for name in names:
        notes.append(f"column {name!r} holds no number in any row: left out")
        warnings.warn(notes[-1], stacklevel=3)
    keep = [j for j in range(len(channels)) if j not in blank]
    return ([channels[j] for j in keep], values[:, keep],
            excluded + [channels[j] for j in blank])


def sorted_by_time(times_np: np.ndarray, values: np.ndarray, notes: list) -> tuple:
    """(times, values, rows out of order): sorted, stably, with a note and a warning."""
    out_of_order = int((np.diff(times_np) < np.timedelta64(0)).sum())
    if out_of_order:
        order = np.argsort(times_np, kind="stable")
        times_np, values = times_np[order], values[order]
        notes.append(f"{out_of_order} rows were out of time order; sorted")
        warnings.warn(f"{out_of_order} rows were out of time order; sorted them", stacklevel=3)
    return times_np, values, out_of_order


def on_grid(times_np: np.ndarray, values: np.ndarray, period: float, spacing: float,
            notes: list) -> tuple:
    """(grid [n_slots, C], grid times, duplicate timestamps): every row on the grid
    t0 + k * period; rows sharing a slot are averaged; empty slots are NaN."""
    t0 = times_np[0]
    offsets = (times_np - t0).astype("timedelta64[ns]").astype(np.int64) / 1e9
    # Round half up: each slot takes [t - P/2, t + P/2). np.rint rounds half to even, which
    # gives uneven bins (1, 3, 1, 3 rows) when resampling onto a coarser grid.
    slot = np.floor(offsets / period + 0.5).astype(np.int64)
    n_slots = int(slot[-1]) + 1
    if n_slots > 100 * len(slot) + 1000:
        raise IntakeError(f"a period of {fmt_period(period)} puts {len(slot)} rows on {n_slots} "
                          "grid points (mostly empty); the data's median spacing is "
                          f"{fmt_period(spacing)}: use a period near that")
    # Duplicates are rows repeating a timestamp; distinct times sharing a slot (a --period
    # coarser than the data) are resampling, not duplicates.
    duplicates = len(times_np) - len(np.unique(times_np))
    if duplicates:
        notes.append(f"{duplicates} duplicate timestamps resolved by averaging")
    merged = len(np.unique(times_np)) - len(np.unique(slot))
    if merged:
        notes.append(f"{merged} rows averaged onto the {fmt_period(period)} grid")
    grid = np.full((n_slots, values.shape[1]), np.nan)
    grid_df = pd.DataFrame(values).groupby(slot).mean()
    grid[grid_df.index.to_numpy()] = grid_df.to_numpy()
    grid_times = pd.DatetimeIndex(t0 + (np.arange(n_slots) * period * 1e9)
                                  .astype("timedelta64[ns]"))
    return grid, grid_times, duplicates


def typical_blank_run(absent: np.ndarray) -> int:
    """The run length, in grid points, that 19 in 20 of a channel's blank runs stay within."""
    lengths = [e - b for b, e in runs(absent)]
    return int(np.percentile(lengths, 95, method="higher"))


def fill_short_gaps(grid: np.ndarray, grid_times, max_fill_periods: int) -> tuple:
    """Interpolate, in place, inside gaps of at most max_fill_periods grid points (a row missing
    one channel counts as a gap too); longer gaps split the series, their rows' readings kept
    as read (a row with a channel blank is no training point, but the gateway scores it, and
    evaluation counts it). Returns (missing rows mask, points filled, long gaps [first, last,
    points])."""
    missing = np.isnan(grid).any(axis=1)
    filled, long_gaps = 0, []
    interpolated = pd.DataFrame(grid).interpolate(method="linear",
                                                  limit_area="inside").to_numpy()
    for b, e in runs(missing):
        if e - b <= max_fill_periods and b > 0 and e < len(grid):
            filled += e - b
            grid[b:e] = interpolated[b:e]
        else:
            long_gaps.append([str(grid_times[b]), str(grid_times[e - 1]), e - b])
    return missing, filled, long_gaps


# ----------------------------------------------------------------------------------------------
# spans, scaling, windows


@dataclass
class Spans:
    """Chronological row ranges on the frame's grid: fit | calibration, then an unused rest."""

    fit: tuple
    calibration: tuple
    rest: tuple

    def to_json(self) -> dict:
        return {k: list(v) for k, v in asdict(self).items()}


def split_spans(frame: Frame, train_until=None, calibration_fraction: float = 0.2) -> Spans:
    """train_until: None (all), a count of the file's rows (int), a fraction of the grid
    (0<f<=1) or a timestamp string."""
    n = len(frame.values)
    if train_until is None:
        end = n
    elif isinstance(train_until, float) and 0 < train_until <= 1:
        end = int(round(n * train_until))
    elif isinstance(train_until, int):
        end = rows_end(frame, train_until)
    else:
        try:
            stamp = pd.Timestamp(str(train_until))
        except ValueError as exc:
            raise IntakeError(f"--train-until {train_until!r}: give a row count, a fraction "
                              "such as 0.6, or a time") from exc
        end = int(np.searchsorted(frame.times.values, stamp.to_datetime64(), side="right"))
    if end <= 1:
        raise IntakeError(f"--train-until {train_until!r} leaves no training rows")
    if not 0 < calibration_fraction < 1:
        raise IntakeError("--calibration must be a fraction between 0 and 1")
    cal_start = int(round(end * (1 - calibration_fraction)))
    return Spans(fit=(0, cal_start), calibration=(cal_start, end), rest=(end, n))


def spans_summary(frame: Frame, spans: Spans) -> str:
    """Where training ends, in the file's rows and in time: what --train-until and
    --calibration did."""
    t, (cal_start, end) = frame.times, spans.calibration
    lines = [f"training  {t[0]} .. {t[end - 1]}: {file_rows(frame, end)} rows of the file, "
             f"{end} grid points; calibration from {t[cal_start]} ({end - cal_start} points)"]
    if end < len(t):
        lines.append(f"untrained {t[end]} .. {t[-1]}: {len(t) - end} grid points")
    return "\n".join(lines)


def file_rows(frame: Frame, end: int) -> int:
    """How many of the file's rows fall on the grid points before `end` (grid_index's
    rounding, as rows_end)."""
    if frame.row_times is None or end <= 0:
        return end
    return int((grid_index(frame, frame.row_times) < end).sum())


def rows_end(frame: Frame, rows: int) -> int:
    """The grid index after the file's first `rows` rows (in time order). Counted on the grid,
    gaps the intake filled would count as rows: SKAB's files miss about one second in twenty,
    so their first 400 grid points end at the file's row 380 or so."""
    if frame.row_times is None or rows <= 0:
        return min(max(rows, 0), len(frame.values))
    if rows >= len(frame.row_times):
        return len(frame.values)
    return int(grid_index(frame, frame.row_times[rows - 1:rows])[0]) + 1


@dataclass
class RobustScaler:
    """Each channel's feature (its level, or its rate: ganlet/runtime/features.py), then
    (f - median) / (IQR / 1.349): the IQR of a normal distribution is 1.349 sigma."""

    center: list
    scale: list
    features: list = None      # "level" | "rate" per channel; None: all level

    def __post_init__(self):
        if self.features is None:
            self.features = ["level"] * len(self.center)

    @classmethod
    def fit(cls, values: np.ndarray, channels: Sequence[str],
            features: Optional[Sequence[str]] = None) -> RobustScaler:
        features = list(features or ["level"] * len(channels))
        values = feature_series(values, rate_mask(features))
        center = np.nanmedian(values, axis=0)
        q75, q25 = np.nanpercentile(values, [75, 25], axis=0)
        scale = (q75 - q25) / 1.349
        std = np.nanstd(values, axis=0)
        for j, name in enumerate(channels):
            if holds_one_value(std[j], center[j]):
                what = "(its rate) is" if features[j] == "rate" else "is"
                raise IntakeError(f"channel {name!r} {what} constant over the training span "
                                  f"(value {center[j]:g}); it carries no information — drop "
                                  "it with --channels or --exclude")
            if scale[j] <= 1e-12 * max(1.0, abs(center[j])):
                scale[j] = std[j]   # a mostly-constant channel with rare moves: fall back to std
        return cls(center=center.tolist(), scale=scale.tolist(), features=features)

    @property
    def rate(self) -> np.ndarray:
        return rate_mask(self.features)

    def transform(self, values: np.ndarray) -> np.ndarray:
        """Raw rows [T, C] in time order -> scaled features (a rate channel's first row NaN)."""
        f = feature_series(values, self.rate)
        return ((f - np.asarray(self.center)) / np.asarray(self.scale)).astype(np.float32)

    def to_json(self) -> dict:
        return {"kind": "robust", "center": self.center, "scale": self.scale,
                "features": self.features}

    @classmethod
    def from_json(cls, d: dict) -> RobustScaler:
        return cls(center=list(d["center"]), scale=list(d["scale"]),
                   features=d.get("features"))


# A reading this many times the range of a channel's other readings beyond them is not a
# measurement of the same quantity (rule of thumb): repeated exactly, it is a logger's code for a
# missing or failed reading (-9999, 65535, ...)
CODE_REACH = 10.0


def missing_codes(values: np.ndarray, channels: Sequence[str]) -> dict:
    """name -> (value, rows, reach) for each channel whose lowest or highest reading occurs at
    least twice, exactly, more than CODE_REACH times the range of its other readings beyond
    them (reach: how many times)."""
    found = {}
    for j, name in enumerate(channels):
        v = values[:, j][np.isfinite(values[:, j])]
        for code in (v.min(), v.max()) if len(v) else ():
            others = v[v != code]
            spread = others.max() - others.min() if len(others) > 1 else 0.0
            rows = int((v == code).sum())
            if spread <= 0 or rows < 2:
                continue
            reach = max(others.min() - code, code - others.max()) / spread
            if reach > CODE_REACH:
                found[name] = (float(code), rows, float(reach))
    return found


def refuse_missing_codes(frame: Frame, spans: Spans) -> None:
    """Training on a code as a reading wrecks the channel's windows and the thresholds
    calibrated on them (a temperature's -9999 scored thousands of sigmas), so it is refused
    with the fix."""
    codes = missing_codes(frame.values[:spans.calibration[1]], frame.channels)
    if codes:
        name, (code, rows, reach) = next(iter(codes.items()))
        raise IntakeError(
            f"channel {name!r} reads exactly {code:g} in {rows} rows of the training span, "
            f"{reach:.0f} times the range of its other readings beyond them: a code for a "
            f"missing or failed reading? Blank those cells (pandas: df[{name!r}] = "
            f"df[{name!r}].replace({code:g}, float('nan'))) and train again, and send them "
            "blank to the gateway, which holds a blank from the last reading"
            + (f"; also {', '.join(map(repr, list(codes)[1:]))}" if len(codes) > 1 else ""))


def holds_one_value(std: float, center: float) -> bool:
    """A channel whose spread is nil against its level (or not known) carries no information."""
    return not np.isfinite(std) or std <= 1e-12 * max(1.0, abs(center))


def constant_channels(frame: Frame, span: tuple) -> dict:
    """{name: value} of the channels whose level holds one value over `span`."""
    values = frame.values[span[0]:span[1]]
    center = np.nanmedian(values, axis=0)
    std = np.nanstd(values, axis=0)
    return {name: float(center[j]) for j, name in enumerate(frame.channels)
            if holds_one_value(std[j], center[j])}


def without_constant_channels(frame: Frame, spans: Spans, named: bool) -> tuple:
    """(frame, notes): a channel picked by default (all numeric columns) that holds one value
    over the fit span is left out, with a note: the network cannot learn what never moved, and
    a setpoint or a status column often does not. A channel the engineer named (`named`: from
    --channels) stays, so the scaler's error says what to do."""
    constant = {} if named else constant_channels(frame, spans.fit)
    if not constant:
        return frame, []
    if len(constant) == len(frame.channels):
        raise IntakeError("every channel is constant over the training span; train on a history "
                          "where the machine runs")
    keep = [j for j, name in enumerate(frame.channels) if name not in constant]
    notes = [f"channel {name!r} is constant over the training span (value {value:g}): left out, "
             "as it carries no information; if it moves in service, train on a history where "
             "it moves (named in --channels, it is refused instead)"
             for name, value in constant.items()]
    report = replace(frame.report, channels=[frame.channels[j] for j in keep],
                     units=[frame.units[j] for j in keep],
                     excluded=frame.report.excluded + list(constant),
                     channel_ranges={frame.channels[j]: frame.report.channel_ranges[
                         frame.channels[j]] for j in keep},
                     warnings=frame.report.warnings + notes)
    return Frame(frame.times, frame.values[:, keep], report.channels, report.units,
                 frame.period_s, report, frame.row_times), notes


def trending_channels(frame: Frame, span: tuple, min_rho: float = TREND_RHO) -> dict:
    """Channels whose level follows time over the span (|Spearman rho| >= min_rho, scipy):
    candidates to watch by their rate. name -> rho."""
    from scipy.stats import spearmanr

    b, e = span
    out = {}
    t = np.arange(e - b)
    for j, name in enumerate(frame.channels):
        v = frame.values[b:e, j]
        ok = np.isfinite(v)
        if ok.sum() < 10 or np.nanstd(v) == 0:
            continue
        rho = float(spearmanr(t[ok], v[ok]).statistic)
        if abs(rho) >= min_rho:
            out[name] = rho
    return out


def windows_from(values: np.ndarray, segments: Sequence[tuple], length: int, hop: int = 1):
    """Sliding windows [N, length, C] inside segments, and the row index each window ends at."""
    blocks, ends = [], []
    for b, e in segments:
        if e - b < length:
            continue
        view = np.lib.stride_tricks.sliding_window_view(values[b:e], length, axis=0)
        idx = np.arange(0, e - b - length + 1, hop)
        blocks.append(np.transpose(view[idx], (0, 2, 1)))
        ends.append(b + idx + length - 1)
    if not blocks:
        return np.zeros((0, length, values.shape[1]), np.float32), np.zeros(0, np.int64)
    return np.ascontiguousarray(np.concatenate(blocks), dtype=np.float32), np.concatenate(ends)


def longest_segment(frame: Frame, span: tuple) -> int:
    segs = frame.segments(*span)
    return max((e - b for b, e in segs), default=0)


def choose_window(frame: Frame, spans: Spans, requested: int) -> int:
    """The requested window, or a shorter one (with a warning) when the history is short.

    Rule (common practice): the fit span needs at least 4 windows' worth of points and the
    calibration span at least one window plus a few scores.
    """
    fit_len = longest_segment(frame, spans.fit)
    cal_len = longest_segment(frame, spans.calibration)
    usable = min(fit_len // 4, cal_len - 8)
    if usable >= requested:
        return requested
    if usable < MIN_WINDOW:
        need_fit = 4 * MIN_WINDOW
        need_total = int(np.ceil(max(need_fit / max(1e-9, spans_fraction(spans)),
                                     (MIN_WINDOW + 8) / max(1e-9, 1 - spans_fraction(spans)))))
        raise IntakeError(
            f"too few points for any usable window: the longest gap-free run is {fit_len} points "
            f"in the fit span and {cal_len} in the calibration span; a window of {MIN_WINDOW} "
            f"needs at least {need_fit} and {MIN_WINDOW + 8}, i.e. about {need_total} "
            "gap-free training points in all" + sparse_channel_hint(frame.report, requested))
    warnings.warn(f"short history: using a window of {usable} points instead of {requested}",
                  stacklevel=2)
    return int(usable)


def sparse_channel_hint(report: IntakeReport, window: int) -> str:
    """Training needs rows with every channel read: name the channels blank on at least a
    tenth of the grid's rows, which is what breaks a history into pieces when a channel is
    logged slower than the others (the gateway scores without such a channel: blanks.py).
    Where 19 in 20 of their blank runs are shorter than a window (every window then holds
    readings of theirs), say the --max-fill that keeps them: their blanks filled by straight
    lines in training and held from the last reading at the gateway (max_gap_periods)."""
    sparse = {c: n for c, n in report.blank_cells.items() if n >= 0.1 * report.grid_points}
    if not sparse:
        return ""
    worst = sorted(sparse, key=lambda c: -sparse[c])
    said = ", ".join(f"{c!r} on {sparse[c]} of {report.grid_points}" for c in worst)
    hint = (f". Blank while the other channels read: {said} grid points (logged slower than "
            f"the others?); leave it out with --exclude {','.join(worst)}")
    fill = max(report.blank_runs.get(c, 0) for c in worst)
    if 0 < fill < window:
        hint += (f", or keep it with --max-fill {fill} (19 in 20 of its blanks span at most "
                 f"{fill} points: they are filled by straight lines in training and held from "
                 "its last reading at the gateway; whole-row gaps that short are filled too)")
    return hint


def spans_fraction(spans: Spans) -> float:
    total = spans.calibration[1] - spans.fit[0]
    return (spans.fit[1] - spans.fit[0]) / max(1, total)


def save_json(path: Path, obj) -> None:
    Path(path).write_text(json.dumps(obj, indent=2, default=str) + "\n")


def parse_times(raw: pd.Series, dialect: Optional[Dialect] = None) -> pd.Series:
    """Times as naive UTC datetimes (NaT where unparsable). Text goes through the gateway's own
    parser (runtime/times.py) under `dialect` (zone of zone-less times, date order, decimal
    mark), numbers are epoch seconds, datetimes are kept (aware ones in UTC). load_frame and
    grid_index share it so raw rows map onto the grid they were read into."""
    if pd.api.types.is_datetime64_any_dtype(raw):
        times = pd.Series(raw)
        if times.dt.tz is not None:
            times = times.dt.tz_convert("UTC").dt.tz_localize(None)
        return times
    if pd.api.types.is_numeric_dtype(raw) and not pd.api.types.is_bool_dtype(raw):
        seconds = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=np.float64)
    else:
        seconds = _seconds_in_file_order(raw, dialect or Dialect())
    return pd.Series(epoch_to_datetime(seconds), index=raw.index)


def _seconds_in_file_order(raw: pd.Series, dialect: Dialect) -> np.ndarray:
    """Each text cell read as the gateway reads a row, after the row before it (NaN where
    unparsable): a local time in the hour that repeats when clocks go back is placed by the
    time before it (runtime/times.py parse_time)."""
    seconds = np.full(len(raw), np.nan)
    after = None
    for i, cell in enumerate(raw):
        if not isinstance(cell, str):
            continue
        try:
            seconds[i] = after = dialect.time(cell.strip(), after)
        except RowError:
            continue
    return seconds


# datetime64[ns] reaches 2262-04-11; the gateway's parser accepts up to year 9999
_NS_LIMIT = float(np.iinfo(np.int64).max) / 1e9 - 1


def epoch_to_datetime(seconds: np.ndarray) -> np.ndarray:
    """Epoch seconds (float) -> datetime64[ns], NaT outside what either side can hold; whole
    seconds and the fraction apart, so nanoseconds are not lost to float rounding."""
    ok = np.isfinite(seconds) & (seconds >= max(MIN_TIME, -_NS_LIMIT)) & (
        seconds < min(MAX_TIME, _NS_LIMIT))
    out = np.full(len(seconds), np.datetime64("NaT"), dtype="datetime64[ns]")
    whole = np.floor(seconds[ok])
    ns = whole.astype(np.int64) * 1_000_000_000 + np.round((seconds[ok] - whole) * 1e9).astype(
        np.int64)
    out[ok] = ns.astype("datetime64[ns]")
    return out


def date_order_hint(raw: pd.Series, dialect: Dialect) -> str:
    """Where no date order was given and the column itself settles it (a day past 12 in one
    field: 28/12/2015 is day first), which flag reads it; "" otherwise. Still asked, not
    assumed: the gateway reads one row at a time, and 03/04/2026 alone says nothing."""
    if dialect.date_order is not None or pd.api.types.is_numeric_dtype(raw):
        return ""
    cells = raw.dropna().astype(str)
    read = {}
    for order in DATE_ORDERS:
        other = copy.copy(dialect)
        other.date_order = order
        read[order] = bool(parse_times(cells, other).notna().all())
    if read["dayfirst"] == read["monthfirst"]:
        return ""
    order = "dayfirst" if read["dayfirst"] else "monthfirst"
    return (f" (this column reads only as {order.replace('first', ' first')}: train with "
            f"--{order}; the bundle then reads it so)")


def time_problem(cell, dialect: Dialect) -> str:
    """Why the gateway's parser refuses a time cell (for error messages)."""
    try:
        dialect.time(str(cell).strip())
    except RowError as exc:
        return exc.detail
    return "outside the times a datetime64 can hold"


def grid_index(frame: Frame, times) -> np.ndarray:
    """The grid row each timestamp falls on (rounded to the nearest period); text times are read
    in the frame's zone and date order."""
    parsed = parse_times(pd.Series(times), Dialect(tz=frame.report.time_zone,
                                                   date_order=frame.report.date_order))
    if parsed.isna().any():
        raise IntakeError(f"{int(parsed.isna().sum())} times cannot be parsed")
    stamps = parsed.to_numpy()
    offset = (stamps - frame.times.values[0]).astype("timedelta64[ns]").astype(np.int64) / 1e9
    slot = np.floor(offset / frame.period_s + 0.5).astype(np.int64)   # as load_frame rounds
    return np.clip(slot, 0, len(frame.times) - 1)
