"""The one time parser (runtime/times.py, issue 12 item 3): ISO 8601 and epoch seconds read the
same on every Python the gateway supports, checked against pandas, the standard library's ISO
calendar and zoneinfo, and run under the Python 3.9 gateway interpreter itself."""

import json
import math
import random
import shutil
import subprocess
import sys
from datetime import date, datetime, timezone
from pathlib import Path

import pandas as pd
import pytest
from gateways import gateway, skip_reason

from ganlet.runtime.intake import Dialect, RowError, parse_time
from ganlet.runtime.times import MAX_TIME, MIN_TIME, TimeError, format_time, zone_from_name
from ganlet.runtime.times import parse_time as parse_cell

RUNTIME = Path(__file__).resolve().parent.parent / "runtime"

# Cells pandas.Timestamp reads too (its ISO 8601 reader is the reference here).
ISO_CELLS = [
    "2026-03-02T10:00:00Z", "2026-03-02T10:00:00", "2026-03-02 10:00:00", "2026-03-02T10:00",
    "2026-03-02T10", "2026-03-02", "2026-03-02T10:00:00.5Z", "2026-03-02T10:00:00.123456Z",
    "2026-03-02T10:00:00+01:00", "2026-03-02T10:00:00-05:30", "2026-03-02T10:00:00+0100",
    "2026-03-02T10:00:00+01", "20260302T100000Z", "20260302T100000", "20260302T1000+0100",
    "2026-03-02T10:00:00.5+01:00", "1999-12-31T23:59:59Z", "2024-02-29T12:00:00Z",
    "1900-01-01T00:00:00Z", "9999-12-31T23:59:59Z", "2026-03-02t10:00:00z",
]
# The out-of-range cells, and other cells no gateway may accept.
REFUSED = [
    "1e15", "1e308", "-1e11", "0001-01-01T00:00+05:00", "9999-12-31T23:59:59-05:00", "1e999",
    "nan", "inf", "-inf", "", "   ", "yesterday", "2026-02-30", "2026-13-01", "2026-03-02T24:00",
    "2026-03-02T23:59:60", "2026-03-02T10:61", "2026-W54-1", "2025-W53-1", "2026-W10-8",
    "2026-W10", "2026-061", "02/03/26", "2026-03-02T10:00:00+24:00", "2026-03-02Z",
    "1_700_000_000", "0x10", "１７００００００００", "2026-03-02T10:00:00 UTC", "Mar 2 2026",
    "1899-12-31T23:59:59Z", "1772445600000",
]


def epoch(ts: pd.Timestamp) -> float:
    ts = ts if ts.tzinfo is not None else ts.tz_localize("UTC")
    return (ts - pd.Timestamp("1970-01-01", tz="UTC")).total_seconds()


@pytest.mark.parametrize("cell", ISO_CELLS)
def test_iso_cells_read_as_pandas_reads_them(cell):
    # reference: pandas.Timestamp (naive times taken as UTC, as the gateway does by default)
    assert parse_cell(cell) == pytest.approx(epoch(pd.Timestamp(cell)), abs=1e-6)


@pytest.mark.parametrize("cell", ["1772445600", "1772445600.25", "-86400", ".5", "1.7e9", "+5"])
def test_a_number_is_epoch_seconds(cell):
    assert parse_cell(cell) == float(cell)  # reference: float() of the same text


@pytest.mark.parametrize("cell", REFUSED)
def test_refused_cells_are_bad_time_never_a_crash(cell):
    with pytest.raises(RowError) as info:
        parse_time(cell)
    assert info.value.kind == "bad_time" and info.value.detail


def test_week_dates_match_the_iso_calendar():
    for year in range(2015, 2034):
        weeks = date(year, 12, 28).isocalendar()[1]  # 28 December is always in the last week
        for week in range(1, weeks + 1):
            for day in (1, 4, 7):
                # reference: datetime.date.fromisocalendar (ISO 8601 week calendar)
                want = datetime.combine(date.fromisocalendar(year, week, day), datetime.min.time(),
                                        timezone.utc).timestamp()
                assert parse_cell(f"{year}-W{week:02d}-{day}") == want
                assert parse_cell(f"{year}W{week:02d}{day}T00") == want
        with pytest.raises(TimeError):
            parse_cell(f"{year}-W{weeks + 1:02d}-1")


@pytest.mark.parametrize("zone", ["Europe/Berlin", "America/New_York", "Australia/Lord_Howe"])
def test_zoneless_times_in_a_named_zone_match_pandas(zone):
    tz = zone_from_name(zone)
    stamps = pd.date_range("2026-01-01", "2027-01-01", freq="97min")
    for ts in stamps:
        cell = ts.strftime("%Y-%m-%dT%H:%M:%S")
        # reference: pandas tz_localize; ambiguous=True takes the summer-time (first) reading
        try:
            want = epoch(ts.tz_localize(zone, ambiguous=True, nonexistent="raise"))
        except Exception:  # noqa: BLE001 - pandas raises its own error for a skipped time
            with pytest.raises(TimeError, match="does not exist"):
                parse_cell(cell, tz)
            continue
        assert parse_cell(cell, tz) == want, cell



@pytest.mark.parametrize("zone, back", [("Europe/Berlin", "2026-10-25 01:00"),
                                        ("America/New_York", "2026-11-01 06:00"),
                                        ("Australia/Lord_Howe", "2026-04-04 15:00")])
def test_the_hour_repeated_when_clocks_go_back_is_placed_by_the_row_before(zone, back):
    # A logger writing local wall-clock time goes through the repeated hour twice (Lord Howe:
    # half an hour). Read one row after another, the second pass continues the series.
    # Reference: pandas tz_localize(ambiguous="infer"), which infers the two passes from the
    # order of the times. (`back`: the instant clocks go back, in UTC, from the zone data.)
    utc = pd.date_range(pd.Timestamp(back, tz="UTC") - pd.Timedelta("90min"), periods=40,
                        freq="7min")
    wall = utc.tz_convert(zone).tz_localize(None)
    assert (wall[1:] < wall[:-1]).any()                         # the file steps back once
    tz, after, got = zone_from_name(zone), None, []
    for ts in wall:
        after = parse_cell(ts.strftime("%Y-%m-%dT%H:%M:%S"), tz, after=after)
        got.append(after)
    want = [epoch(t) for t in wall.tz_localize(zone, ambiguous="infer")]
    assert got == want == [epoch(t) for t in utc]
    # alone (no row before) or after a row it repeats, a cell keeps its earlier reading
    second = wall[[k for k in range(1, len(wall)) if wall[k] < wall[k - 1]][0]]
    cell = second.strftime("%Y-%m-%dT%H:%M:%S")
    first = epoch(second.tz_localize(zone, ambiguous=True))
    assert parse_cell(cell, tz) == first == parse_cell(cell, tz, after=first)
    # outside the repeated hour the row before changes nothing (a row out of order stays so)
    assert parse_cell("2026-07-01T12:00:00", tz, after=2e9) == epoch(
        pd.Timestamp("2026-07-01T12:00:00").tz_localize(zone))


def test_explicit_offsets_win_over_the_zone_and_fixed_offsets_work():
    berlin = zone_from_name("Europe/Berlin")
    assert parse_cell("2026-07-01T12:00:00Z", berlin) == epoch(pd.Timestamp("2026-07-01T12:00Z"))
    assert parse_cell("2026-07-01T12:00:00", zone_from_name("+05:30")) == epoch(
        pd.Timestamp("2026-07-01T12:00:00+05:30"))
    with pytest.raises(ValueError, match="unknown here"):
        zone_from_name("Mars/Olympus_Mons")


def test_numeric_dates_need_an_order_and_read_as_told():
    with pytest.raises(RowError, match="--dayfirst"):
        parse_time("10/11/2025 08:30")
    # reference: pandas.to_datetime with dayfirst=True / False
    day = epoch(pd.to_datetime("10/11/2025 08:30", dayfirst=True))
    month = epoch(pd.to_datetime("10/11/2025 08:30", dayfirst=False))
    assert parse_time("10/11/2025 08:30", Dialect(date_order="dayfirst")) == day
    assert parse_time("10.11.2025 08:30", Dialect(date_order="dayfirst")) == day
    assert parse_time("10/11/2025 08:30", Dialect(date_order="monthfirst")) == month
    with pytest.raises(RowError, match="no such date"):
        parse_time("13/25/2025", Dialect(date_order="monthfirst"))
    assert parse_time("2025/11/10 08:30") == day  # year first: no order needed


def test_the_12_hour_clock_reads_as_strptime_reads_it():
    # reference: the standard library's strptime with %I and %p (the C 12-hour clock), over two
    # days minute by minute (every 12 AM / 12 PM boundary), as spreadsheets write it: leading
    # zeros dropped, seconds or not, AM/PM in either case, with or without the space
    start = datetime(2025, 6, 1)
    for k in range(0, 2 * 1440, 7):
        t = start + pd.Timedelta(minutes=k).to_pytimedelta()
        expected = t.replace(tzinfo=timezone.utc).timestamp()
        full = t.strftime("%m/%d/%Y %I:%M:%S %p")
        assert datetime.strptime(full, "%m/%d/%Y %I:%M:%S %p") == t
        short = f"{t.month}/{t.day}/{t.year} {int(t.strftime('%I'))}:{t.minute:02d} "
        for cell in (full, short + t.strftime("%p"), short + t.strftime("%p").lower(),
                     short.rstrip() + t.strftime("%p")):
            assert parse_time(cell, Dialect(date_order="monthfirst")) == expected, cell
    assert parse_time("2025-06-01 1:05 PM +01:00") == parse_time("2025-06-01T12:05:00Z")
    for cell in ("6/1/2025 0:30 AM", "6/1/2025 13:00 PM", "6/1/2025 12:61 PM", "2025-06-01 9:05"):
        with pytest.raises(RowError):
            parse_time(cell, Dialect(date_order="monthfirst"))


def test_decimal_comma_epoch_seconds():
    assert parse_time("1772445600,5", Dialect(sep=";", decimal=",")) == 1772445600.5
    assert parse_time("2026-03-02T10:00:00,5Z") == 1772445600.5  # ISO allows ',' anyway


def test_format_time_matches_the_standard_library_and_never_raises():
    rng = random.Random(3)
    for _ in range(3000):
        t = rng.uniform(MIN_TIME, MAX_TIME - 1)
        if rng.random() < 0.5:
            t = round(t, rng.choice([0, 1, 3, 6]))
        # reference: datetime.fromtimestamp, formatted as the runtime always has
        dt = datetime.fromtimestamp(t, tz=timezone.utc)
        want = dt.strftime("%Y-%m-%dT%H:%M:%S") + (
            f".{dt.microsecond // 1000:03d}Z" if dt.microsecond else "Z")
        assert format_time(t) == want
    for bad in (float("nan"), float("inf"), 1e308, -1e11, MAX_TIME, "x", None):
        assert format_time(bad).startswith("invalid:")


def _mutations(rng: random.Random, n: int):
    seeds = ISO_CELLS + REFUSED + ["1772445600", "2026-W10-1", "02/03/2026 10:00"]
    alphabet = "0123456789-:+.,TZWtz /e\u00e9\x00"
    for _ in range(n):
        cell = list(rng.choice(seeds))
        for _ in range(rng.randint(1, 4)):
            op = rng.random()
            pos = rng.randint(0, len(cell))
            if op < 0.4 and cell:
                cell[min(pos, len(cell) - 1)] = rng.choice(alphabet)
            elif op < 0.7:
                cell.insert(pos, rng.choice(alphabet))
            elif cell:
                del cell[min(pos, len(cell) - 1)]
        yield "".join(cell)


def test_fuzzed_cells_parse_in_range_or_are_refused():
    rng = random.Random(12)
    parsed = refused = 0
    for order in (None, "dayfirst"):
        dialect = Dialect(tz="Europe/Berlin", date_order=order)
        for cell in _mutations(rng, 10000):
            try:
                t = parse_time(cell, dialect)
            except RowError as exc:
                assert exc.kind == "bad_time"
                refused += 1
                continue
            parsed += 1
            assert math.isfinite(t) and MIN_TIME <= t < MAX_TIME, cell
            assert abs(parse_time(format_time(t)) - t) < 1e-3  # the way back reads the same
    assert parsed > 500 and refused > 5000  # both sides were exercised


# ------------------------------------------------------------------------------------------
# the same answers under the Python 3.9 gateway

TABLE_SCRIPT = r"""
import json, sys
from ganlet.runtime.intake import Dialect, RowError, parse_time
cells, dialects = json.load(sys.stdin)
out = []
for d in dialects:
    dialect = Dialect(**d)
    for cell in cells:
        try:
            out.append(repr(parse_time(cell, dialect)))
        except RowError as exc:
            out.append(exc.kind + ": " + exc.detail)
print(json.dumps(out))
"""
DIALECTS = [{}, {"tz": "Europe/Berlin"}, {"tz": "America/New_York", "date_order": "monthfirst"},
            {"tz": "+05:30", "date_order": "dayfirst"}, {"sep": ";", "decimal": ","}]


def _table(argv, cells, cwd, env=None):
    proc = subprocess.run([*argv, "-c", TABLE_SCRIPT], input=json.dumps([cells, DIALECTS]),
                          capture_output=True, text=True, cwd=cwd, env=env, timeout=300)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


def test_python39_gateway_reads_times_exactly_as_the_host(tmp_path):
    gw = gateway("py39-numpy1.19")
    if gw is None:
        pytest.skip(skip_reason("py39-numpy1.19"))
    pkg = tmp_path / "ganlet"
    shutil.copytree(RUNTIME, pkg / "runtime", ignore=shutil.ignore_patterns("__pycache__"))
    (pkg / "__init__.py").write_text("")
    # the 3.9-vs-3.11 cells, the tables above, week dates, zones, and fuzzed cells
    cells = ISO_CELLS + REFUSED + [
        "2026-03-02T10:00:00+0100", "2026-03-02T10:00:00.5Z", "20260302T000000Z", "2026-W10-1",
        "2026W101", "2026-03-29T02:30:00", "2026-10-25T02:30:00", "2026-11-01T01:30:00",
        "10/11/2025 08:30", "10.11.2025", "1772445600,5", "2026-03-02 10:00 +01:00",
        "6/1/2025 12:00:00 AM", "6/1/2025 12:30 pm", "2025-06-01 1:05PM +01:00", "6/1/2025 0:30 AM",
    ] + list(_mutations(random.Random(5), 1500))
    host = _table([sys.executable], cells, tmp_path)
    py39 = _table(list(gw.argv_prefix), cells, tmp_path, env=gw.env)
    differ = [(c, h, o) for c, h, o in zip(cells * len(DIALECTS), host, py39) if h != o]
    print(f"python {gw.python_version} vs host: {len(host)} answers compared, "
          f"{len(differ)} differ, {sum(not a.startswith('bad_time') for a in host)} times read")
    assert len(host) == len(py39) == len(cells) * len(DIALECTS)
    assert differ == []
