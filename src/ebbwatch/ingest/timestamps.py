"""Event timestamps → UTC instants in integer microseconds since the Unix epoch.

Accepted: RFC 3339 date-times (``Z`` or a numeric offset, optional fraction; ``T``/``t`` or a
space between date and time, per RFC 3339 §5.6's note) and epoch seconds or milliseconds given as
JSON numbers.  ``auto`` tells seconds from milliseconds by magnitude: below 1e11 is seconds (that
is any instant before the year 5138), otherwise milliseconds.

The same rules are written once more in SQL for the store's fast path (``store.FAST_TS_PATTERN``);
a line the fast path is unsure of goes through this module, which is the reference.
"""

from __future__ import annotations

import math
import re
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

RFC3339_PATTERN = (
    r"(\d{4})-(\d{2})-(\d{2})[Tt ](\d{2}):(\d{2}):(\d{2})(\.\d{1,9})?"
    r"([Zz]|[+-]\d{2}:\d{2})"
)
_RFC3339 = re.compile(RFC3339_PATTERN)
# The same date-time with no offset: a local time, read in ``naive_timezone`` when one is set.
_LOCAL = re.compile(RFC3339_PATTERN.removesuffix(r"([Zz]|[+-]\d{2}:\d{2})") + "()")
EPOCH_SECONDS_LIMIT = 1e11
EPOCH_MS_LIMIT = 1e14
_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)
TS_FORMATS = ("auto", "rfc3339", "epoch_s", "epoch_ms")


class TimestampError(ValueError):
    """The value is not a timestamp in an accepted form."""


def parse_rfc3339(text: str, naive_timezone: str | None = None) -> int:
    """Microseconds since the epoch for an RFC 3339 date-time string.

    A leap second (``:60``) is read as the first instant of the next minute, as POSIX time does.
    A date-time without an offset is a local time in ``naive_timezone`` (an IANA name) when one
    is given; a local time that occurs twice (when clocks go back) is read as the first.

    >>> parse_rfc3339("1985-04-12T23:20:50.52Z")
    482196050520000
    >>> parse_rfc3339("2026-07-01 12:00:00", "Europe/Paris") == parse_rfc3339("2026-07-01T10:00:00Z")
    True
    """
    match = _RFC3339.fullmatch(text)
    if match is None:
        match = _LOCAL.fullmatch(text)
        if match is None:
            raise TimestampError(f"not an RFC 3339 date-time: {text[:40]!r}")
        if naive_timezone is None:
            raise TimestampError(f"no UTC offset: {text[:40]!r} (set [ingest] naive_timezone for local times)")
    year, month, day, hour, minute, second = (int(g) for g in match.groups()[:6])
    fraction, offset = match.group(7), match.group(8)
    leap = second == 60
    if second > 60:
        raise TimestampError(f"seconds out of range: {text[:40]!r}")
    try:
        base = datetime(year, month, day, hour, minute, 59 if leap else second, tzinfo=timezone.utc)
    except ValueError as exc:
        raise TimestampError(f"invalid date or time: {text[:40]!r}") from exc
    micros = int((fraction[1:] + "000000")[:6]) if fraction else 0
    if not offset:
        local = base.replace(tzinfo=ZoneInfo(naive_timezone), fold=0)
        base = local.astimezone(timezone.utc)
    elif offset not in ("Z", "z"):
        sign = 1 if offset[0] == "+" else -1
        off_h, off_m = int(offset[1:3]), int(offset[4:6])
        if off_h > 23 or off_m > 59:
            raise TimestampError(f"offset out of range: {text[:40]!r}")
        base -= sign * timedelta(hours=off_h, minutes=off_m)
    delta = base - _EPOCH
    total = (delta.days * 86_400 + delta.seconds) * 1_000_000 + micros
    return total + (1_000_000 if leap else 0)


def parse_epoch(value: float | int, unit: str = "auto") -> int:
    """Microseconds since the epoch for epoch seconds or milliseconds (``unit`` auto|s|ms)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise TimestampError(f"not a number: {value!r}")
    if isinstance(value, float) and not math.isfinite(value):
        raise TimestampError(f"not a finite number: {value!r}")
    if unit == "auto":
        magnitude = abs(value)
        if magnitude < EPOCH_SECONDS_LIMIT:
            unit = "s"
        elif magnitude < EPOCH_MS_LIMIT:
            unit = "ms"
        else:
            raise TimestampError(f"epoch value too large for seconds or milliseconds: {value!r}")
    scale = 1_000_000 if unit == "s" else 1_000
    if isinstance(value, int):
        return value * scale
    return round(value * scale)


def parse_timestamp(value, ts_format: str = "auto", naive_timezone: str | None = None) -> int:
    """Microseconds since the epoch from a JSON value (string or number) under ``ts_format``;
    ``naive_timezone`` as in :func:`parse_rfc3339`."""
    if isinstance(value, str):
        if ts_format in ("auto", "rfc3339"):
            return parse_rfc3339(value, naive_timezone)
        raise TimestampError(f"expected an epoch number ({ts_format}), got a string")
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        if ts_format == "rfc3339":
            raise TimestampError("expected an RFC 3339 string, got a number")
        unit = {"auto": "auto", "epoch_s": "s", "epoch_ms": "ms"}[ts_format]
        return parse_epoch(value, unit)
    raise TimestampError(f"expected a string or a number, got {type(value).__name__}")


def micros_to_datetime(micros: int) -> datetime:
    return _EPOCH + timedelta(microseconds=micros)
