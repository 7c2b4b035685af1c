"""Times: GPS seconds, file-name stamps and the user's many ways of writing a date.

Everything inside scanshelf is timezone-aware UTC.
"""

from __future__ import annotations

import re
from datetime import date, datetime, timedelta, timezone, tzinfo

import numpy as np

GPS_EPOCH = datetime(1980, 1, 6, tzinfo=timezone.utc)
ADJUSTED_GPS_OFFSET = 1e9  # LAS "adjusted standard GPS time" = GPS seconds - 1e9 (ASPRS LAS 1.4)
WEEK = 7 * 86400.0

# Every leap second since the GPS epoch: (first UTC day with the new offset, GPS - UTC in seconds).
# Source: IERS Bulletin C (Paris Observatory), as listed in the IERS file Leap_Second.dat; no leap
# second has been announced after 2017-01-01 (Bulletin C 70, July 2025). The table is compared
# with astropy's time scales in tests/test_legacy_las.py.
_LEAP_SECONDS = [
    (datetime(y, m, 1, tzinfo=timezone.utc), n)
    for n, (y, m) in enumerate([
        (1981, 7), (1982, 7), (1983, 7), (1985, 7), (1988, 1), (1990, 1), (1991, 1), (1992, 7), (1993, 7),
        (1994, 7), (1996, 1), (1997, 7), (1999, 1), (2006, 1), (2009, 1), (2012, 7), (2015, 7), (2017, 1),
    ], start=1)
]


def gps_minus_utc(when_utc: datetime) -> int:
    """GPS - UTC in whole seconds at a UTC instant."""
    offset = 0
    for start, value in _LEAP_SECONDS:
        if when_utc >= start:
            offset = value
    return offset


def gps_to_utc(gps_seconds: float) -> datetime:
    """Seconds since the GPS epoch (1980-01-06T00:00:00 UTC, no leap seconds) → UTC datetime.

    A GPS instant lies after a leap second once it passes that second's UTC start plus the new
    offset; the instants of an inserted second itself map onto the first second after it.
    """
    gps = GPS_EPOCH + timedelta(seconds=float(gps_seconds))
    offset = 0
    for start, value in _LEAP_SECONDS:
        if gps >= start + timedelta(seconds=value):
            offset = value
    return gps - timedelta(seconds=offset)


def adjusted_gps_to_utc(seconds: float) -> datetime:
    """LAS adjusted standard GPS time → UTC datetime (leap seconds of the date applied)."""
    return gps_to_utc(float(seconds) + ADJUSTED_GPS_OFFSET)


def utc_to_adjusted_gps(when: datetime) -> float:
    """UTC datetime → LAS adjusted standard GPS time (the inverse of ``adjusted_gps_to_utc``)."""
    when = to_utc(when)
    return (when - GPS_EPOCH).total_seconds() + gps_minus_utc(when) - ADJUSTED_GPS_OFFSET


def gps_week_to_utc(seconds_of_week: float, near: datetime) -> datetime:
    """LAS GPS week time (seconds since the week's start, Sunday 00:00 GPS) → UTC, taking the GPS
    week whose instant lies nearest ``near`` (a date known from the path or header)."""
    near = to_utc(near)
    since = (near - GPS_EPOCH).total_seconds() + gps_minus_utc(near)
    week = since // WEEK
    candidates = [(week + k) * WEEK + float(seconds_of_week) for k in (-1, 0, 1)]
    best = min(candidates, key=lambda g: abs(g - since))
    return gps_to_utc(best)


def to_utc(value: datetime, zone: tzinfo = timezone.utc) -> datetime:
    """Naive datetimes are taken to be in ``zone`` (UTC unless a site file says otherwise)."""
    if value.tzinfo is None:
        value = value.replace(tzinfo=zone)
    return value.astimezone(timezone.utc)


def parse_time(value: str | datetime | np.datetime64, zone: tzinfo = timezone.utc) -> datetime:
    """Accept datetimes, ISO 8601 strings and numpy datetime64; naive means ``zone``."""
    if isinstance(value, np.datetime64):
        value = datetime.fromtimestamp(value.astype("datetime64[us]").astype(np.int64) / 1e6, timezone.utc)
    elif isinstance(value, str):
        text = value.strip()
        if text.endswith("Z"):
            text = text[:-1] + "+00:00"
        try:
            value = datetime.fromisoformat(text)
        except ValueError:
            raise ValueError(f"{value!r} is not an ISO 8601 time such as 2026-09-01T06:00:00Z") from None
    elif not isinstance(value, datetime):
        raise TypeError(f"expected a datetime, ISO string or numpy datetime64, got {type(value).__name__}")
    return to_utc(value, zone)


_STAMP = re.compile(r"(?<!\d)(\d{4})(\d{2})(\d{2})[_T-]?(\d{2})(\d{2})(\d{2})(?!\d)")
_STAMP_DASHED = re.compile(r"(?<!\d)(\d{4})-(\d{2})-(\d{2})[_T ](\d{2})[:\-.]?(\d{2})[:\-.]?(\d{2})(?!\d)")
_DATE = re.compile(r"(?<!\d)(\d{4})([-_]?)(\d{2})\2(\d{2})(?!\d)")  # 20160501, 2016-05-01, 2016_05_01
_DATE_FOLDERS = re.compile(r"(?:^|/)(\d{4})/(\d{2})/(\d{2})(?:/|$)")  # 2016/05/01/


def _valid(*parts: str | int) -> datetime | None:
    try:
        value = datetime(*map(int, parts))
    except ValueError:
        return None
    return value if 1980 <= value.year <= 2100 else None


def parse_stamp(text: str, zone: tzinfo = timezone.utc) -> datetime | None:
    """A date and time (``YYYYMMDD_HHMMSS``, ``YYYYMMDDTHHMMSS``, ``YYYY-MM-DD_HH-MM-SS``, ...) → UTC,
    None when absent or impossible."""
    for pattern in (_STAMP_DASHED, _STAMP):
        for m in pattern.finditer(text):
            if (value := _valid(*m.groups())) is not None:
                return to_utc(value, zone)
    return None


def parse_date(text: str) -> date | None:
    """A date alone (``20160501``, ``2016-05-01``, ``2016_05_01``) → date, None when absent or impossible."""
    for m in _DATE.finditer(text):
        if (value := _valid(m.group(1), m.group(3), m.group(4))) is not None:
            return value.date()
    return None


def path_time(relpath: str, zone: tzinfo = timezone.utc) -> tuple[datetime, bool] | None:
    """Scan time from a stamp anywhere in the path: (UTC time, True) for a date and time, (midnight of
    the date in ``zone`` as UTC, False) for a date alone. The file name is read first, then the
    folders from the deepest up, then ``YYYY/MM/DD`` folder runs."""
    parts = relpath.split("/")
    for part in reversed(parts):
        if (stamp := parse_stamp(part, zone)) is not None:
            return stamp, True
    for part in reversed(parts):
        if (day := parse_date(part)) is not None:
            return to_utc(datetime(day.year, day.month, day.day), zone), False
    for m in _DATE_FOLDERS.finditer(relpath):
        if (value := _valid(*m.groups())) is not None:
            return to_utc(value, zone), False
    return None
