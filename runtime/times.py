"""Time cells -> epoch seconds (UTC) and back: the one time parser of the gateway and of training.

Our own grammar, the same on every Python the runtime supports (3.9+): datetime.fromisoformat
accepts different strings on 3.9 and 3.11, so it is not used. The accepted formats are listed in
intake.py's docstring; in short:

    epoch seconds       1772445600   1772445600.25   -5e3    (a cell of digits is always this)
    ISO 8601 date       2026-03-02   20260302 (basic: only with a time part)   2026-W10-1
                        2026W101     2026/03/02
    numeric, year last  02/03/2026  02.03.2026  02-03-2026    only with a date order (dayfirst
                        or monthfirst): 03/04 cannot be read safely without one
    time of day         T or spaces, then hh[:mm[:ss[.f]]] or hh[mm[ss[.f]]]; ',' or '.' before
                        the fraction; or the 12-hour clock, h:mm[:ss[.f]] AM/PM (1:05 PM)
    zone                Z  +hh:mm  +hhmm  +hh (also '-'), optionally after one space; without a
                        zone the time is read in the stream's zone (UTC unless told otherwise)

Times must fall in 1900-01-01 .. 9999-12-31 UTC. Anything else raises RowError("bad_time") with
a detail saying why. format_time is the way back: ISO 8601 UTC with 'Z'.
"""

import math
import re
from datetime import datetime, timedelta, timezone, tzinfo
from functools import lru_cache
from typing import Optional, Tuple

MIN_TIME = -2208988800.0  # 1900-01-01T00:00:00Z
MAX_TIME = 253402300800.0  # 10000-01-01T00:00:00Z, excluded
DATE_ORDERS = ("dayfirst", "monthfirst")
MAX_CELL = 64  # longer time cells are refused before any regex sees them

# A decimal number in ASCII digits, as pandas.read_csv reads one: an epoch-seconds time cell,
# and a channel cell (intake.py)
NUMBER = re.compile(r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_DATES = (  # (form, pattern); groups per form are read in _date_fields
    ("calendar", re.compile(r"([0-9]{4})-([0-9]{2})-([0-9]{2})")),
    ("week", re.compile(r"([0-9]{4})-W([0-9]{2})-([0-9])")),
    ("basic", re.compile(r"([0-9]{4})([0-9]{2})([0-9]{2})(?=[Tt])")),
    ("week", re.compile(r"([0-9]{4})W([0-9]{2})([0-9])")),
    ("yearfirst", re.compile(r"([0-9]{4})/([0-9]{1,2})/([0-9]{1,2})")),
    ("yearlast", re.compile(r"([0-9]{1,2})([./-])([0-9]{1,2})\2([0-9]{4})")),
)
_ZONE = r"(?: ?(?P<zone>[Zz]|[+-][0-9]{2}(?::?[0-9]{2})?))?"
_FRAC = r"(?:[.,](?P<frac>[0-9]+))?"
_TIMES = (
    re.compile(r"(?P<h>[0-9]{2})(?::(?P<m>[0-9]{2})(?::(?P<s>[0-9]{2})" + _FRAC + ")?)?" + _ZONE),
    re.compile(r"(?P<h>[0-9]{2})(?:(?P<m>[0-9]{2})(?:(?P<s>[0-9]{2})" + _FRAC + ")?)?" + _ZONE),
    # the 12-hour clock of spreadsheet and US exports: 1:05 PM, 12:00:00 AM (one or two hour
    # digits, minutes always, AM or PM in any case, after at most one space)
    re.compile(r"(?P<h>[0-9]{1,2}):(?P<m>[0-9]{2})(?::(?P<s>[0-9]{2})" + _FRAC + ")? ?"
               r"(?P<half>[AaPp][Mm])" + _ZONE),
)
_SEPARATOR = re.compile(r"[Tt]| +")
# the form loggers write most, read in one match (the general path gives the same answer)
_COMMON = re.compile(r"([0-9]{4})-([0-9]{2})-([0-9]{2})[T ]([0-9]{2}):([0-9]{2}):([0-9]{2})"
                     r"(?:\.([0-9]+))?(Z|[+-][0-9]{2}:[0-9]{2})?")


class TimeError(ValueError):
    """A time cell that cannot be read; the message says why (intake turns it into bad_time)."""


# ---------------------------------------------------------------------- calendar arithmetic
@lru_cache(maxsize=64)  # one entry per day seen: a feed's rows share a few dates
def days_from_civil(y: int, m: int, d: int) -> int:
    """Days since 1970-01-01 of a proleptic Gregorian date (H. Hinnant's algorithm)."""
    y -= m <= 2
    era = (y if y >= 0 else y - 399) // 400
    yoe = y - era * 400
    doy = (153 * (m + (-3 if m > 2 else 9)) + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


def civil_from_days(z: int) -> Tuple[int, int, int]:
    """The inverse of days_from_civil."""
    z += 719468
    era = (z if z >= 0 else z - 146096) // 146097
    doe = z - era * 146097
    yoe = (doe - doe // 1460 + doe // 36524 - doe // 146096) // 365
    doy = doe - (365 * yoe + yoe // 4 - yoe // 100)
    mp = (5 * doy + 2) // 153
    d = doy - (153 * mp + 2) // 5 + 1
    m = mp + (3 if mp < 10 else -9)
    return yoe + era * 400 + (m <= 2), m, d


def _is_leap(y: int) -> bool:
    return y % 4 == 0 and (y % 100 != 0 or y % 400 == 0)


def _days_in_month(y: int, m: int) -> int:
    return (31, 29 if _is_leap(y) else 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31)[m - 1]


def _iso_weekday(days: int) -> int:
    return (days + 3) % 7 + 1  # 1970-01-01 was a Thursday (4); Monday = 1


def _weeks_in_year(y: int) -> int:
    jan1 = _iso_weekday(days_from_civil(y, 1, 1))
    return 53 if jan1 == 4 or (jan1 == 3 and _is_leap(y)) else 52


def _week_date(y: int, w: int, wd: int) -> Tuple[int, int, int]:
    if not (1 <= w <= _weeks_in_year(y) and 1 <= wd <= 7):
        raise TimeError(f"week date {y}-W{w:02d}-{wd}: no such week or day")
    jan4 = days_from_civil(y, 1, 4)
    monday1 = jan4 - (_iso_weekday(jan4) - 1)
    return civil_from_days(monday1 + (w - 1) * 7 + (wd - 1))


# ---------------------------------------------------------------------- zones
def zone_from_name(name: Optional[str]) -> tzinfo:
    """'UTC' (or None), a fixed offset '+01:00', or an IANA name through zoneinfo."""
    if name is None or name in ("UTC", "Z", "utc"):
        return timezone.utc
    fixed = re.fullmatch(r"([+-])([0-9]{2}):?([0-9]{2})", name)
    if fixed:
        sign = -1 if fixed.group(1) == "-" else 1
        offset = timedelta(hours=int(fixed.group(2)), minutes=int(fixed.group(3)))
        if offset >= timedelta(hours=24):
            raise ValueError(f"time zone offset {name!r} is 24 hours or more")
        return timezone(sign * offset)
    try:
        from zoneinfo import ZoneInfo

        return ZoneInfo(name)
    except (ImportError, ValueError, KeyError, OSError):  # ZoneInfoNotFoundError is a KeyError
        raise ValueError(
            f"time zone {name!r} is unknown here: give an IANA name such as Europe/Berlin, UTC "
            "or a fixed offset such as +01:00 (IANA names need the system's tzdata or the "
            "tzdata package)"
        ) from None


def zone_name(zone: tzinfo) -> str:
    return getattr(zone, "key", None) or ("UTC" if zone is timezone.utc else str(zone))


def _local_offset(zone: tzinfo, y, mo, d, h, mi, s, fold: int = 0) -> float:
    """Seconds east of UTC for a wall-clock time in `zone`; in the hour that repeats when
    clocks go back, its earlier reading (fold 0) or its later one (fold 1); TimeError in the
    hour skipped when they go forward."""
    if zone is timezone.utc:
        return 0.0
    try:
        local = datetime(y, mo, d, h, mi, s, tzinfo=zone, fold=fold)
        back = local.astimezone(timezone.utc).astimezone(zone)
        offset = local.utcoffset()
    except (OverflowError, ValueError):
        raise TimeError("time out of range in its zone") from None
    if back.replace(tzinfo=None) != local.replace(tzinfo=None):
        raise TimeError(f"{local.replace(tzinfo=None)} does not exist in {zone_name(zone)} "
                        "(clocks went forward)")
    return offset.total_seconds()


# ---------------------------------------------------------------------- parsing
def parse_time(cell: str, zone: tzinfo = timezone.utc, date_order: Optional[str] = None,
               after: Optional[float] = None) -> float:
    """One time cell -> epoch seconds. Raises TimeError saying why it cannot.

    A zone-less time in the hour that repeats when clocks go back is read as its earlier
    instant, unless that lies before `after` (the time of the row before it) and the later
    instant lies after: a feed written in local wall-clock time goes through that hour twice,
    and its second pass continues the series. Read as the earlier instant, the second pass
    went an hour back in time: training averaged the two passes together and left an hour's
    gap, the gateway restarted its clock and dated that hour's events an hour early."""
    text = cell.strip()
    if not text:
        raise TimeError("empty time cell")
    if len(text) > MAX_CELL:
        raise TimeError(f"time cell of {len(text)} characters")
    if NUMBER.fullmatch(text):
        return checked_time(float(text), text, epoch=True)
    common = _COMMON.fullmatch(text)
    if common:
        y, mo, d, h, mi, s = map(int, common.groups()[:6])
        frac = float("0." + common.group(7)) if common.group(7) else 0.0
        offset = _offset(common.group(8))
    else:
        y, mo, d, rest = _date_fields(text, date_order)
        h, mi, s, frac, offset = _time_fields(rest, text)
    _check_fields(y, mo, d, h, mi, s)
    wall = days_from_civil(y, mo, d) * 86400.0 + h * 3600 + mi * 60 + s
    if offset is None:
        offset = _local_offset(zone, y, mo, d, h, mi, s)
        if after is not None and wall - offset + frac < after:
            later = _local_offset(zone, y, mo, d, h, mi, s, fold=1)
            if wall - later + frac > after:
                offset = later
    return checked_time(wall - offset + frac, text)


def checked_time(t: float, text: str, epoch: bool = False) -> float:
    """Epoch seconds t if it lies in 1900..9999, else TimeError quoting `text` (with a hint
    for milliseconds when `epoch`)."""
    if not math.isfinite(t) or not MIN_TIME <= t < MAX_TIME:
        hint = " (epoch milliseconds? give seconds)" if epoch and 1e11 < abs(t) < 1e14 else ""
        raise TimeError(f"time {text[:40]!r} lies outside 1900..9999{hint}")
    return t


def _date_fields(text: str, date_order: Optional[str]):
    for form, pattern in _DATES:
        m = pattern.match(text)
        if not m:
            continue
        g = m.groups()
        if form == "week":
            y, mo, d = _week_date(int(g[0]), int(g[1]), int(g[2]))
        elif form == "yearlast":
            y, mo, d = _year_last(g, date_order, text)
        else:
            y, mo, d = int(g[0]), int(g[1]), int(g[2])
        return y, mo, d, text[m.end():]
    if re.match(r"[0-9]{4}-?[0-9]{3}(?![0-9])", text):
        raise TimeError(f"ordinal date {text[:40]!r} is not supported; use YYYY-MM-DD")
    raise TimeError(f"time {text[:40]!r} is neither ISO 8601 nor epoch seconds")


def _year_last(g, date_order: Optional[str], text: str) -> Tuple[int, int, int]:
    a, b, y = int(g[0]), int(g[2]), int(g[3])
    if date_order == "dayfirst":
        return y, b, a
    if date_order == "monthfirst":
        return y, a, b
    raise TimeError(f"date {text[:40]!r} has day and month in an order only you know: pass "
                    "--dayfirst (day/month/year) or --monthfirst (month/day/year)")


def _time_fields(rest: str, text: str):
    """(hour, minute, second, fraction, offset seconds or None) from what follows the date."""
    if not rest:
        return 0, 0, 0, 0.0, None
    sep = _SEPARATOR.match(rest)
    if sep:
        body = rest[sep.end():]
        for pattern in _TIMES:
            m = pattern.fullmatch(body)
            if m:
                frac = float("0." + m.group("frac")) if m.group("frac") else 0.0
                return (_hour(m, text), int(m.group("m") or 0), int(m.group("s") or 0), frac,
                        _offset(m.group("zone")))
    raise TimeError(f"time {text[:40]!r}: the time of day is not hh:mm[:ss[.f]][zone] or "
                    "h:mm[:ss] AM/PM")


def _hour(m, text: str) -> int:
    """The hour of a time-of-day match on the 24-hour clock: 12 AM is 0, 12 PM is 12, 1 PM 13."""
    h = int(m.group("h"))
    half = (m.groupdict().get("half") or "").upper()
    if not half:
        return h
    if not 1 <= h <= 12:
        raise TimeError(f"time {text[:40]!r}: an hour of the 12-hour clock is 1 to 12")
    return h % 12 + (12 if half == "PM" else 0)


def _offset(zone: Optional[str]) -> Optional[float]:
    if zone is None:
        return None
    if zone in "Zz":
        return 0.0
    digits = zone[1:].replace(":", "")
    hours, minutes = int(digits[:2]), int(digits[2:] or 0)
    if hours > 23 or minutes > 59:
        raise TimeError(f"zone offset {zone!r} out of range")
    return (-1 if zone[0] == "-" else 1) * (hours * 3600 + minutes * 60)


def _check_fields(y, mo, d, h, mi, s) -> None:
    if not 1900 <= y <= 9999:
        raise TimeError(f"year {y} outside 1900..9999")
    if not 1 <= mo <= 12 or not 1 <= d <= _days_in_month(y, mo):
        raise TimeError(f"no such date {y:04d}-{mo:02d}-{d:02d}")
    if h > 23 or mi > 59 or s > 59:
        raise TimeError(f"no such time of day {h:02d}:{mi:02d}:{s:02d}")


# ---------------------------------------------------------------------- formatting
def format_time(t: float) -> str:
    """Epoch seconds -> ISO 8601 UTC with 'Z' (milliseconds only when needed). Total: a value
    no parser here could have produced comes back as 'invalid:<value>' instead of raising."""
    try:
        t = float(t)
    except (TypeError, ValueError):
        return f"invalid:{t!r}"
    if not math.isfinite(t) or not MIN_TIME <= t < MAX_TIME:
        return f"invalid:{t!r}"
    frac, whole = math.modf(t)
    whole, us = int(whole), round(frac * 1e6)  # as datetime.fromtimestamp rounds
    if us < 0:
        whole, us = whole - 1, us + 1_000_000
    if us >= 1_000_000:
        whole, us = whole + 1, us - 1_000_000
    days, sec = divmod(whole, 86400)
    y, mo, d = civil_from_days(days)
    stamp = f"{y:04d}-{mo:02d}-{d:02d}T{sec // 3600:02d}:{sec % 3600 // 60:02d}:{sec % 60:02d}"
    return stamp + (f".{us // 1000:03d}Z" if us else "Z")
