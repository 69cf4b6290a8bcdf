"""Model time zones: names checked, whole-hour offsets only, local midnights as instants.

The facts checked: in the EU summer time runs from 01:00 UTC on the last Sunday of March
to 01:00 UTC on the last Sunday of October (Directive 2000/84/EC, art. 2 and 3); in the US
from 02:00 local on the second Sunday of March to 02:00 local on the first Sunday of
November (Energy Policy Act of 2005, sec. 110). India keeps UTC+05:30 and South Australia
UTC+09:30 (the IANA tz database, files `asia` and `australasia`). Every instant is checked
against `zoneinfo`, the standard library's reading of that database.
"""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta
from zoneinfo import ZoneInfo

import pytest

from belated.metrics.params import Range, parse_range
from belated.zones import floor_local, local_iso, shift, zone, zone_problem

CHANGES = {
    # zone: (the 23-hour day, the 25-hour day) of 2026
    "Europe/Berlin": (date(2026, 3, 29), date(2026, 10, 25)),
    "America/Chicago": (date(2026, 3, 8), date(2026, 11, 1)),
}


@pytest.mark.parametrize("name", ["UTC", "Europe/Berlin", "America/Chicago", "Europe/London"])
def test_whole_hour_zones_are_accepted(name: str) -> None:
    assert zone_problem(name) is None


@pytest.mark.parametrize(
    ("name", "offset"),
    [("Asia/Kolkata", "+05:30"), ("Australia/Adelaide", "+09:30"), ("Asia/Kathmandu", "+05:")],
)
def test_zones_off_the_hour_are_refused_saying_why(name: str, offset: str) -> None:
    problem = zone_problem(name)
    assert problem is not None
    assert offset in problem and "whole number of hours" in problem


def test_an_unknown_name_is_refused_with_the_closest_ones() -> None:
    problem = zone_problem("Europe/Berln")
    assert problem is not None and "Europe/Berlin" in problem
    assert zone_problem("Mars/Olympus") is not None
    assert zone_problem("") is not None


@pytest.mark.parametrize("name", sorted(CHANGES))
def test_local_days_start_at_local_midnight_with_23_and_25_hours(name: str) -> None:
    tz, ref = zone(name), ZoneInfo(name)
    short, long_ = CHANGES[name]
    for day in [short + timedelta(days=k) for k in range(-3, 4)] + [
        long_ + timedelta(days=k) for k in range(-3, 4)
    ]:
        start = datetime(day.year, day.month, day.day, tzinfo=ref).astimezone(UTC)
        end = datetime.combine(day + timedelta(days=1), datetime.min.time(), ref).astimezone(UTC)
        # any instant of the local day floors to its midnight
        for minutes in (0, 59, 60 * 5 + 7, int((end - start).total_seconds() // 60) - 1):
            assert floor_local(start + timedelta(minutes=minutes), "day", tz) == start
        assert shift(start, "day", 1, tz) == end
        hours = (end - start) / timedelta(hours=1)
        assert hours == (23 if day == short else 25 if day == long_ else 24)
        assert (
            local_iso(start, tz) == datetime(day.year, day.month, day.day, tzinfo=ref).isoformat()
        )


@pytest.mark.parametrize("name", sorted(CHANGES))
def test_weeks_start_on_monday_local_midnight(name: str) -> None:
    tz, ref = zone(name), ZoneInfo(name)
    for day in CHANGES[name]:
        monday = day - timedelta(days=day.weekday())
        start = datetime(monday.year, monday.month, monday.day, tzinfo=ref).astimezone(UTC)
        noon = datetime(day.year, day.month, day.day, 12, tzinfo=ref)
        assert floor_local(noon, "week", tz) == start
        nxt = shift(start, "week", 1, tz)
        assert nxt.astimezone(ref).weekday() == 0 and nxt.astimezone(ref).hour == 0
        assert (nxt - start) / timedelta(hours=1) in (7 * 24 - 1, 7 * 24 + 1)


def test_a_range_reads_offsets_as_instants_and_bare_times_as_local() -> None:
    now = datetime(2026, 12, 1, tzinfo=UTC)
    berlin = ZoneInfo("Europe/Berlin")
    # 23:30 UTC on the 28th is 00:30 on the 29th in Berlin: the 29th's window
    rng = parse_range("day", "2026-03-28T23:30:00Z", "2026-03-31", now, time_zone="Europe/Berlin")
    assert rng.start == datetime(2026, 3, 29, tzinfo=berlin)
    assert rng.end == datetime(2026, 3, 31, tzinfo=berlin)
    assert [
        (b - a) / timedelta(hours=1) for a, b in zip(rng.starts(), rng.bounds()[1:], strict=True)
    ] == [
        23,
        24,
    ]
    # the same text in UTC is the UTC day
    utc = parse_range("day", "2026-03-28T23:30:00Z", "2026-03-31", now)
    assert utc.start == datetime(2026, 3, 28, tzinfo=UTC)


def test_a_utc_range_aligned_again_in_a_zone_covers_its_local_days() -> None:
    rng = Range("day", datetime(2026, 10, 24, tzinfo=UTC), datetime(2026, 10, 27, tzinfo=UTC))
    chicago = ZoneInfo("America/Chicago")
    local = rng.in_zone("America/Chicago")
    assert local.start == datetime(2026, 10, 23, tzinfo=chicago)
    assert local.end == datetime(2026, 10, 27, tzinfo=chicago)
    assert rng.in_zone("UTC") == rng


def test_a_day_whose_midnight_falls_in_the_gap_starts_after_it() -> None:
    # Chile springs forward at 24:00 on the first Saturday of September (IANA tz database,
    # file `southamerica`): 6 September 2026 has no 00:00 in Santiago; its day starts at
    # 01:00 (-03:00), lasts 23 hours, and every instant of it floors there
    tz, ref = zone("America/Santiago"), ZoneInfo("America/Santiago")
    start = floor_local(datetime(2026, 9, 6, 12, tzinfo=ref), "day", tz)
    assert local_iso(start, tz) == "2026-09-06T01:00:00-03:00"
    assert start == datetime(2026, 9, 6, 4, tzinfo=UTC)
    assert (shift(start, "day", 1, tz) - start) == timedelta(hours=23)
    assert shift(start, "day", -1, tz) == datetime(2026, 9, 5, tzinfo=ref)
    # the zone is whole hours throughout: accepted
    assert zone_problem("America/Santiago") is None
