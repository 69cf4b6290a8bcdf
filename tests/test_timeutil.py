"""parse_ts: RFC 3339 times to aware UTC datetimes, whichever path parses them."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone

import pytest

from belated.timeutil import parse_ts


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        # The examples of Klyne & Newman (2002), RFC 3339 "Date and Time on the Internet:
        # Timestamps", section 5.8 (the leap second 23:59:60 left out: Python has none).
        ("1985-04-12T23:20:50.52Z", datetime(1985, 4, 12, 23, 20, 50, 520000, tzinfo=UTC)),
        ("1996-12-19T16:39:57-08:00", datetime(1996, 12, 20, 0, 39, 57, tzinfo=UTC)),
        ("1937-01-01T12:00:27.87+00:20", datetime(1937, 1, 1, 11, 40, 27, 870000, tzinfo=UTC)),
        # the forms a live system sends (common practice): Z, lower-case z, +00:00, padding
        ("2026-03-01T10:00:00.123456Z", datetime(2026, 3, 1, 10, 0, 0, 123456, tzinfo=UTC)),
        ("2026-03-01T10:00:00z", datetime(2026, 3, 1, 10, tzinfo=UTC)),
        ("2026-03-01T10:00:00+00:00", datetime(2026, 3, 1, 10, tzinfo=UTC)),
        (" 2026-03-01T10:00:00Z ", datetime(2026, 3, 1, 10, tzinfo=UTC)),
        ("2026-03-01T10:00:00", datetime(2026, 3, 1, 10, tzinfo=UTC)),  # no offset: UTC
        (1772359200, datetime(2026, 3, 1, 10, tzinfo=UTC)),  # Unix seconds
    ],
)
def test_parsed_to_the_same_instant_in_utc(text: object, expected: datetime) -> None:
    got = parse_ts(text)
    assert got == expected
    assert got.utcoffset() == timedelta(0)
    assert got.tzinfo is UTC


def test_an_aware_datetime_is_converted_to_utc() -> None:
    local = datetime(2026, 3, 1, 12, tzinfo=timezone(timedelta(hours=2)))
    assert parse_ts(local).tzinfo is UTC
    assert parse_ts(local) == datetime(2026, 3, 1, 10, tzinfo=UTC)


@pytest.mark.parametrize("bad", ["", "yesterday", "2026-13-01T00:00:00Z", True, None, [1]])
def test_not_a_time_is_refused(bad: object) -> None:
    with pytest.raises((ValueError, TypeError)):
        parse_ts(bad)
