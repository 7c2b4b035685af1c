"""Times: GPS seconds, file-name stamps and the user's many ways of writing a date.

Everything inside scanshelf is timezone-aware UTC.
"""

from __future__ import annotations

import re
from datetime import datetime, timedelta, timezone, tzinfo

GPS_EPOCH = datetime(1980, 1, 6, tzinfo=timezone.utc)
ADJUSTED_GPS_OFFSET = 1e9  # LAS "adjusted standard GPS time" = GPS seconds - 1e9 (ASPRS LAS 1.4)

# GPS - UTC in seconds, from the date the leap second took effect (IERS Bulletin C; from memory).
_LEAP_SECONDS = [
    (datetime(1981, 7, 1, tzinfo=timezone.utc), 1), (datetime(1982, 7, 1, tzinfo=timezone.utc), 2),
    (datetime(1983, 7, 1, tzinfo=timezone.utc), 3), (datetime(1985, 7, 1, tzinfo=timezone.utc), 4),
    (datetime(1988, 1, 1, tzinfo=timezone.utc), 5), (datetime(1990, 1, 1, tzinfo=timezone.utc), 6),
    (datetime(1991, 1, 1, tzinfo=timezone.utc), 7), (datetime(1992, 7, 1, tzinfo=timezone.utc), 8),
    (datetime(1993, 7, 1, tzinfo=timezone.utc), 9), (datetime(1994, 7, 1, tzinfo=timezone.utc), 10),
    (datetime(1996, 1, 1, tzinfo=timezone.utc), 11), (datetime(1997, 7, 1, tzinfo=timezone.utc), 12),
    (datetime(1999, 1, 1, tzinfo=timezone.utc), 13), (datetime(2006, 1, 1, tzinfo=timezone.utc), 14),
    (datetime(2009, 1, 1, tzinfo=timezone.utc), 15), (datetime(2012, 7, 1, tzinfo=timezone.utc), 16),
    (datetime(2015, 7, 1, tzinfo=timezone.utc), 17), (datetime(2017, 1, 1, tzinfo=timezone.utc), 18),
]


def gps_minus_utc(when_utc: datetime) -> int:
    offset = 0
    for start, value in _LEAP_SECONDS:
        if when_utc >= start:
            offset = value
    return offset


def adjusted_gps_to_utc(seconds: float) -> datetime:
    """LAS adjusted standard GPS time → UTC datetime (leap seconds applied)."""
    gps = GPS_EPOCH + timedelta(seconds=float(seconds) + ADJUSTED_GPS_OFFSET)
    return gps - timedelta(seconds=gps_minus_utc(gps - timedelta(seconds=18)))


def utc_to_adjusted_gps(when: datetime) -> float:
    """UTC datetime → LAS adjusted standard GPS time (the inverse of ``adjusted_gps_to_utc``)."""
    when = to_utc(when)
    return (when - GPS_EPOCH).total_seconds() + gps_minus_utc(when) - ADJUSTED_GPS_OFFSET


def to_utc(value: datetime, zone: tzinfo = timezone.utc) -> datetime:
    """Naive datetimes are taken to be in ``zone`` (UTC unless a site file says otherwise)."""
    if value.tzinfo is None:
        value = value.replace(tzinfo=zone)
    return value.astimezone(timezone.utc)


_STAMP = re.compile(r"(\d{4})(\d{2})(\d{2})[_T](\d{2})(\d{2})(\d{2})")


def parse_stamp(text: str, zone: tzinfo = timezone.utc) -> datetime | None:
    """``YYYYMMDD_HHMMSS`` or ``YYYYMMDDTHHMMSS`` → UTC datetime, None when absent or impossible."""
    m = _STAMP.search(text)
    if not m:
        return None
    try:
        return to_utc(datetime(*map(int, m.groups())), zone)
    except ValueError:
        return None
