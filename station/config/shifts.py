"""The floor's shift calendar: named shifts by local wall-clock hours in one time zone.

`station summary --shift NAME` selects the parts that ended inside one occurrence of a shift
(docs/fleet-store.md). A shift may run past midnight (an end at or before its start means the
next day). Hours are local to the calendar's time zone, so a night shift over a change to or
from daylight saving time is one hour shorter or longer, as the floor works it (the time
zone rules are the IANA database's, through Python's zoneinfo).

    time_zone: Europe/Vienna
    shifts:
      early: {start: "06:00", end: "14:00"}
      night: {start: "22:00", end: "06:00"}
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import date, datetime, time, timedelta
from pathlib import Path
from typing import Annotated
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
from pydantic import BeforeValidator

from station.config.fields import Strict, refuse
from station.config.files import (
    ConfigError,
    YamlDocument,
    load_yaml_file,
    parse_yaml_text,
    validate_model,
)

SHIFTS_ENV = "STATION_SHIFTS"      # the calendar file when --shifts is not given
NO_SHIFT = "(no shift)"            # the --by shift group of parts that ended outside every shift
DAY_MINUTES = 24 * 60
_CLOCK = re.compile(r"^([01]?\d|2[0-3]):([0-5]\d)$")


def _clock(value: object) -> time:
    text = str(value).strip()
    match = _CLOCK.match(text)
    if isinstance(value, bool) or match is None:
        # YAML reads an unquoted 06:00 as a base-60 number (360): ask for quotes.
        refuse(f"{value!r} is not a time of day", 'write it as "HH:MM" in quotes, e.g. "22:00"')
    return time(int(match.group(1)), int(match.group(2)))


def _zone(value: object) -> str:
    name = str(value).strip()
    try:
        ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        refuse(f"{value!r} is not a known time zone", "write an IANA name such as Europe/Vienna or UTC")
    return name


Clock = Annotated[time, BeforeValidator(_clock)]


class ShiftEntry(Strict):
    start: Clock
    end: Clock


class ShiftFile(Strict):
    time_zone: Annotated[str, BeforeValidator(_zone)]
    shifts: dict[str, ShiftEntry]


@dataclass(frozen=True)
class ShiftWindow:
    """One occurrence of a shift, as Unix times [start_t, end_t)."""

    name: str
    day: date               # the local date the shift starts on
    start_t: float
    end_t: float
    describe: str
    label: str              # "2026-12-01 22:00 night": sorts in time order, for --by shift


@dataclass(frozen=True)
class ShiftCalendar:
    file: str
    zone: ZoneInfo
    shifts: dict[str, ShiftEntry]

    def window(self, request: str, now: float) -> ShiftWindow:
        """`NAME` (its latest occurrence that has started by `now`) or `NAME@YYYY-MM-DD`
        (the one that starts on that local date); ValueError says what is wrong."""
        name, _, day_text = request.partition("@")
        name = name.strip()
        if name not in self.shifts:
            known = ", ".join(sorted(self.shifts)) or "none"
            raise ValueError(f"no shift {name!r} in {self.file} (its shifts: {known})")
        entry = self.shifts[name]
        if day_text:
            try:
                day = date.fromisoformat(day_text.strip())
            except ValueError:
                raise ValueError(f"{request!r}: the date after @ must be YYYY-MM-DD") from None
        else:
            day = datetime.fromtimestamp(now, self.zone).date()
            if self._start(entry, day).timestamp() > now:
                day -= timedelta(days=1)
        start = self._start(entry, day)
        end_day = day + timedelta(days=1) if entry.end <= entry.start else day
        end = datetime.combine(end_day, entry.end, tzinfo=self.zone)
        text = (f"shift {name} of {day.isoformat()} ({entry.start:%H:%M}-{entry.end:%H:%M} {self.zone.key}: "
                f"{_utc(start)} to {_utc(end)} UTC)")
        return ShiftWindow(name, day, start.timestamp(), end.timestamp(), text,
                           f"{day.isoformat()} {entry.start:%H:%M} {name}")

    def windows_between(self, first_t: float, last_t: float) -> list[ShiftWindow]:
        """Every occurrence of every shift that overlaps [first_t, last_t], in time order."""
        day = datetime.fromtimestamp(first_t, self.zone).date() - timedelta(days=1)
        last_day = datetime.fromtimestamp(last_t, self.zone).date()
        found = []
        while day <= last_day:
            for name in self.shifts:
                window = self.window(f"{name}@{day.isoformat()}", now=last_t)
                if window.end_t > first_t and window.start_t <= last_t:
                    found.append(window)
            day += timedelta(days=1)
        return sorted(found, key=lambda w: w.start_t)

    def labels(self, end_t: np.ndarray) -> np.ndarray:
        """The shift label of each end time (NO_SHIFT outside every shift or without a time)."""
        out = np.full(len(end_t), NO_SHIFT, dtype=object)
        finite = np.isfinite(end_t)
        if not finite.any():
            return out
        windows = self.windows_between(float(end_t[finite].min()), float(end_t[finite].max()))
        starts = np.array([w.start_t for w in windows])
        ends = np.array([w.end_t for w in windows])
        names = np.array([w.label for w in windows], dtype=object)
        index = np.searchsorted(starts, np.where(finite, end_t, -np.inf), side="right") - 1
        inside = finite & (index >= 0) & (end_t < ends[np.clip(index, 0, None)])
        out[inside] = names[index[inside]]
        return out

    def _start(self, entry: ShiftEntry, day: date) -> datetime:
        return datetime.combine(day, entry.start, tzinfo=self.zone)


def _utc(moment: datetime) -> str:
    return datetime.fromtimestamp(moment.timestamp(), ZoneInfo("UTC")).strftime("%Y-%m-%d %H:%M")


def load_shift_calendar(path: str | Path) -> ShiftCalendar:
    return _build(load_yaml_file(path))


def parse_shift_calendar(text: str, file: str = "<text>") -> ShiftCalendar:
    return _build(parse_yaml_text(text, file))


def _build(doc: YamlDocument) -> ShiftCalendar:
    model = validate_model(doc, ShiftFile)
    if not model.shifts:
        raise doc.error(["shifts"], "no shift defined", 'add one, e.g. early: {start: "06:00", end: "14:00"}')
    for name, entry in model.shifts.items():
        if entry.start == entry.end:
            raise doc.error(["shifts", name], "starts and ends at the same time",
                            "give a shift its hours (an end before the start runs past midnight)")
        if "@" in name or not name.strip():
            raise doc.error(["shifts", name], "a shift name may not be empty or hold '@'", "rename it")
    _refuse_overlaps(doc, model.shifts)
    return ShiftCalendar(doc.file, ZoneInfo(model.time_zone), dict(model.shifts))


def _minutes(entry: ShiftEntry) -> tuple[int, int]:
    start = entry.start.hour * 60 + entry.start.minute
    end = entry.end.hour * 60 + entry.end.minute
    return start, end + DAY_MINUTES if end <= start else end


def _refuse_overlaps(doc: YamlDocument, shifts: dict[str, ShiftEntry]) -> None:
    """Shifts may not overlap: a part belongs to one shift (a handover is one shift's end)."""
    names = list(shifts)
    for i, first in enumerate(names):
        a0, a1 = _minutes(shifts[first])
        for second in names[i + 1:]:
            b0, b1 = _minutes(shifts[second])
            if any(a0 < b1 + k and b0 + k < a1 for k in (-DAY_MINUTES, 0, DAY_MINUTES)):
                raise doc.error(["shifts", second], f"overlaps shift {first!r}",
                                "let one shift end where the next begins")


def calendar_path(option: Path | None, environ: dict[str, str]) -> Path:
    """--shifts FILE, else the file $STATION_SHIFTS names; ConfigError if neither."""
    if option is not None:
        return option
    named = environ.get(SHIFTS_ENV, "").strip()
    if named:
        return Path(named)
    raise ConfigError("--shift", "needs the floor's shift calendar",
                      hint=f"give --shifts FILE or set {SHIFTS_ENV}=FILE (see docs/fleet-store.md)")
