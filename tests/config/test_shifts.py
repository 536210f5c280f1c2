"""The floor's shift calendar (station/config/shifts.py): windows in local wall-clock hours.

UTC offsets of Europe/Vienna (CET = UTC+1 in winter, CEST = UTC+2 in summer, summer time ending
on the last Sunday of October at 01:00 UTC: EU Directive 2000/84/EC) as the IANA time zone
database gives them through Python's zoneinfo."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

import pytest

from station.config.files import ConfigError
from station.config.shifts import calendar_path, load_shift_calendar, parse_shift_calendar

CALENDAR = """\
time_zone: Europe/Vienna
shifts:
  early: {start: "06:00", end: "14:00"}
  late: {start: "14:00", end: "22:00"}
  night: {start: "22:00", end: "06:00"}
"""


def utc(text: str) -> float:
    return datetime.fromisoformat(text).replace(tzinfo=UTC).timestamp()


def test_an_overnight_shift_ends_the_next_morning() -> None:
    night = parse_shift_calendar(CALENDAR).window("night@2026-12-01", now=utc("2026-12-05 00:00"))
    assert (night.start_t, night.end_t) == (utc("2026-12-01 21:00"), utc("2026-12-02 05:00"))
    assert "2026-12-01 21:00 to 2026-12-02 05:00 UTC" in night.describe


@pytest.mark.parametrize(("now", "day"), [
    ("2026-12-02 02:00", "2026-12-01"),    # 03:00 local: inside the night that began yesterday
    ("2026-12-02 21:30", "2026-12-02"),    # 22:30 local: tonight's has begun
    ("2026-12-02 12:00", "2026-12-01"),    # 13:00 local: the last night shift is over, it is still the latest
])
def test_a_name_alone_is_the_latest_occurrence_that_has_begun(now: str, day: str) -> None:
    night = parse_shift_calendar(CALENDAR).window("night", now=utc(now))
    assert night.day.isoformat() == day
    assert night.start_t <= utc(now)


def test_a_night_over_the_end_of_summer_time_lasts_nine_hours() -> None:
    calendar = parse_shift_calendar(CALENDAR)
    night = calendar.window("night@2026-10-24", now=utc("2026-11-01 00:00"))
    assert night.start_t == utc("2026-10-24 20:00")      # 22:00 CEST
    assert night.end_t == utc("2026-10-25 05:00")        # 06:00 CET
    assert night.end_t - night.start_t == 9 * 3600
    early = calendar.window("early@2026-07-01", now=utc("2026-08-01 00:00"))
    assert early.start_t == utc("2026-07-01 04:00")      # 06:00 CEST


@pytest.mark.parametrize(("text", "line", "words"), [
    # YAML 1.1 reads an unquoted 22:00 as the base-60 number 1320 (PyYAML's resolver)
    (CALENDAR.replace('end: "22:00"', 'end: 22:00'), 4, "not a time of day"),
    (CALENDAR.replace("Europe/Vienna", "Europe/Wien"), 1, "not a known time zone"),
    (CALENDAR.replace('end: "22:00"', 'end: "14:00"'), 4, "same time"),
    (CALENDAR.replace("  late:", "  lat:").replace('"14:00", end: "22:00"}', '"14:00", ende: "22:00"}'), 4,
     "unknown key"),
    ("time_zone: UTC\nshifts: {}\n", 2, "no shift"),
])
def test_a_bad_calendar_is_refused_at_its_line(text: str, line: int, words: str) -> None:
    with pytest.raises(ConfigError) as caught:
        parse_shift_calendar(text, "shifts.yaml")
    assert caught.value.line == line and words in str(caught.value)
    assert str(caught.value).startswith(f"shifts.yaml:{line}: ")


def test_an_unknown_shift_or_date_says_what_there_is() -> None:
    calendar = parse_shift_calendar(CALENDAR, "floor.yaml")
    with pytest.raises(ValueError, match=r"no shift 'nights' in floor.yaml \(its shifts: early, late, night\)"):
        calendar.window("nights", now=0.0)
    with pytest.raises(ValueError, match="YYYY-MM-DD"):
        calendar.window("night@1.12.2026", now=0.0)


def test_the_calendar_file_comes_from_the_option_or_the_environment(tmp_path: Path) -> None:
    path = tmp_path / "shifts.yaml"
    path.write_text(CALENDAR, encoding="utf-8")
    assert calendar_path(path, {}) == path
    assert load_shift_calendar(calendar_path(None, {"STATION_SHIFTS": str(path)})).shifts.keys() == \
        {"early", "late", "night"}
    with pytest.raises(ConfigError, match="STATION_SHIFTS"):
        calendar_path(None, {})


def test_overlapping_shifts_are_refused() -> None:
    text = CALENDAR.replace('night: {start: "22:00"', 'night: {start: "21:00"')
    with pytest.raises(ConfigError, match=r"shifts.yaml:5: shifts.night: overlaps shift 'late'"):
        parse_shift_calendar(text, "shifts.yaml")
    # Touching is not overlapping: late ends where night begins.
    assert len(parse_shift_calendar(CALENDAR).shifts) == 3


def test_each_end_time_gets_the_label_of_its_shift() -> None:
    import numpy as np

    calendar = parse_shift_calendar('time_zone: UTC\nshifts:\n  day: {start: "08:00", end: "16:00"}\n'
                                    '  night: {start: "22:00", end: "06:00"}\n')
    times = np.array([utc("2026-12-01 07:59"), utc("2026-12-01 08:00"), utc("2026-12-01 15:59"),
                      utc("2026-12-01 16:00"), utc("2026-12-01 23:00"), utc("2026-12-02 05:59"), np.nan])
    assert calendar.labels(times).tolist() == [
        "(no shift)", "2026-12-01 08:00 day", "2026-12-01 08:00 day", "(no shift)",
        "2026-12-01 22:00 night", "2026-12-01 22:00 night", "(no shift)"]
