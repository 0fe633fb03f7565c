from datetime import datetime, timedelta, timezone

import pytest
from hypothesis import given
from hypothesis import strategies as st

from ebbwatch.ingest.timestamps import TimestampError, parse_epoch, parse_rfc3339, parse_timestamp

EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


def micros(dt: datetime) -> int:
    delta = dt - EPOCH
    return (delta.days * 86400 + delta.seconds) * 1_000_000 + delta.microseconds


# RFC 3339 §5.8 examples, with the instants the RFC's prose gives for each.
@pytest.mark.parametrize(
    "text, instant",
    [
        # "This represents 20 minutes and 50.52 seconds after the 23rd hour of April 12th, 1985 in UTC."
        ("1985-04-12T23:20:50.52Z", datetime(1985, 4, 12, 23, 20, 50, 520000, tzinfo=timezone.utc)),
        # "39 minutes and 57 seconds after the 16th hour of December 19th, 1996 with an offset of
        # -08:00 from UTC ... equivalent to 1996-12-20T00:39:57Z in UTC."
        ("1996-12-19T16:39:57-08:00", datetime(1996, 12, 20, 0, 39, 57, tzinfo=timezone.utc)),
        # The leap second 1990-12-31T23:59:60Z, and the same instant at -08:00.  POSIX time has no
        # leap seconds; we read it as the following instant, 1991-01-01T00:00:00Z (our choice).
        ("1990-12-31T23:59:60Z", datetime(1991, 1, 1, tzinfo=timezone.utc)),
        ("1990-12-31T15:59:60-08:00", datetime(1991, 1, 1, tzinfo=timezone.utc)),
        # "noon in the Netherlands in 1937, 20 minutes and 27.87 seconds ahead of UTC".
        ("1937-01-01T12:00:27.87+00:20", datetime(1937, 1, 1, 11, 40, 27, 870000, tzinfo=timezone.utc)),
    ],
)
def test_rfc3339_section_5_8_examples(text, instant):
    assert parse_rfc3339(text) == micros(instant)


def test_rfc3339_lowercase_and_space_separator():
    # RFC 3339 §5.6 NOTE: "T" and "Z" may be lower case; a space may separate date and time.
    assert parse_rfc3339("2026-03-02t14:05:11z") == parse_rfc3339("2026-03-02 14:05:11Z")


@pytest.mark.parametrize("bad", ["2026-03-02", "2026-03-02T14:05:11", "2026-02-30T00:00:00Z",
                                 "2026-03-02T24:00:00Z", "2026-03-02T14:05:11+25:00", "yesterday", ""])
def test_rfc3339_rejects(bad):
    with pytest.raises(TimestampError):
        parse_rfc3339(bad)


def test_epoch_auto_by_magnitude():
    seconds = 1_772_500_000
    assert parse_epoch(seconds) == seconds * 1_000_000
    assert parse_epoch(seconds * 1000) == seconds * 1_000_000
    assert parse_epoch(1_772_500_000.25) == 1_772_500_000_250_000
    with pytest.raises(TimestampError):
        parse_epoch(1e17)
    with pytest.raises(TimestampError):
        parse_epoch(float("nan"))


def test_format_setting_is_enforced():
    with pytest.raises(TimestampError):
        parse_timestamp("2026-03-02T14:05:11Z", "epoch_s")
    with pytest.raises(TimestampError):
        parse_timestamp(1_772_500_000, "rfc3339")
    assert parse_timestamp(1_772_500_000, "epoch_ms") == 1_772_500_000_000


@given(st.datetimes(min_value=datetime(1900, 1, 1), max_value=datetime(2200, 1, 1)),
       st.integers(min_value=-23 * 60 - 59, max_value=23 * 60 + 59))
def test_rfc3339_round_trip_with_any_offset(naive, offset_minutes):
    """Property: an instant written with any offset parses back to the same instant
    (reference: Python's datetime.isoformat)."""
    zone = timezone(timedelta(minutes=offset_minutes))
    aware = naive.replace(tzinfo=zone)
    assert parse_rfc3339(aware.isoformat()) == micros(aware.astimezone(timezone.utc))


# -- local times (issue 22, item 3) --------------------------------------------------------------

def test_a_time_without_offset_is_refused_saying_so():
    from ebbwatch.ingest.timestamps import TimestampError, parse_rfc3339

    with pytest.raises(TimestampError, match="no UTC offset"):
        parse_rfc3339("2026-03-02T10:00:00")


@pytest.mark.parametrize("local, utc", [
    # Offsets of America/New_York from the IANA tz database: EST -05:00, EDT -04:00; clocks went
    # forward at 02:00 on 2026-03-08 and back at 02:00 on 2026-11-01 (US rule since 2007).
    ("2026-07-01T12:00:00", "2026-07-01T16:00:00Z"),
    ("2026-01-15 08:30:00.250", "2026-01-15T13:30:00.250Z"),
    ("2026-11-01T01:30:00", "2026-11-01T05:30:00Z"),  # occurs twice: the first (EDT)
    ("2026-11-01T02:30:00", "2026-11-01T07:30:00Z"),
    ("2026-03-08T02:30:00", "2026-03-08T07:30:00Z"),  # does not exist: read with the offset before
])
def test_local_times_are_read_in_the_configured_zone(local, utc):
    from ebbwatch.ingest.timestamps import parse_rfc3339

    assert parse_rfc3339(local, "America/New_York") == parse_rfc3339(utc)
