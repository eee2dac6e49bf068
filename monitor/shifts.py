"""The plant's clock: its time zone, its shift calendar, and local times for people.

Inside spanwatch every time is epoch seconds (UTC). People at a plant read and type local
times and think in shifts, so review commands and reports go through a :class:`PlantClock`
made from the line file's ``[line] timezone`` (an IANA zone name such as ``Europe/Berlin``;
default ``UTC``) and its ``[shifts]`` table::

    [shifts]
    early = "06:00-14:00"
    late = "14:00-22:00"
    night = "22:00-06:00"     # ends the next day: a shift is dated by the day it starts

**Daylight saving.** A shift is defined by its local wall-clock start and end; its window in
epoch seconds is computed through the zone's rules on that very date, so a night shift across
the change to summer time lasts 7 hours and across the change back 9 (in the European Union the
change is at 01:00 UTC on the last Sunday of March and of October: Directive 2000/84/EC). A local
time the change skips (02:30 on the spring day) is read as the same wall time before the change
(so it lands an hour later, at 03:30 summer time); a local time that occurs twice (02:30 on the
autumn day) is read as its first occurrence (Python's ``fold = 0``, PEP 495).

Shifts need not cover the day (two 8-hour shifts and no night is fine) but may not overlap.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, date, datetime, time, timedelta
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

SHIFT_PATTERN = re.compile(r"^\s*(\d{1,2}):(\d{2})\s*-\s*(\d{1,2}):(\d{2})\s*$")
DAY = 1440  # minutes


def zone(name: str) -> ZoneInfo:
    """The IANA zone of this name; ValueError says what was expected.

    >>> zone("UTC").key
    'UTC'
    """
    if not name or name != name.strip() or ".." in name or name.startswith("/"):
        raise ValueError(f"expected an IANA time zone name such as Europe/Berlin or UTC, got {name!r}")
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError(f"expected an IANA time zone name such as Europe/Berlin or UTC, got {name!r}") from None


@dataclass(frozen=True)
class Shift:
    """One shift of the calendar: local wall-clock start and end (an end at or before the start: the next day)."""

    name: str
    start: time
    end: time

    @property
    def minutes(self) -> tuple[int, int]:
        """Start and end in minutes after local midnight of its day; the end may pass 1440 (the next day)."""
        a = self.start.hour * 60 + self.start.minute
        b = self.end.hour * 60 + self.end.minute
        return a, b if b > a else b + DAY


def parse_shift(name: str, text: str) -> Shift:
    """``"06:00-14:00"`` -> a Shift; ValueError says what was expected.

    >>> parse_shift("night", "22:00-06:00").minutes
    (1320, 1800)
    """
    m = SHIFT_PATTERN.match(text) if isinstance(text, str) else None
    if m is None:
        raise ValueError(f"expected a shift as \"HH:MM-HH:MM\" in local time, such as \"06:00-14:00\", got {text!r}")
    h0, m0, h1, m1 = (int(g) for g in m.groups())
    if h0 > 23 or h1 > 24 or m0 > 59 or m1 > 59 or (h1 == 24 and m1 != 0):
        raise ValueError(f"expected hours 00-23 and minutes 00-59 in {text!r}")
    end = time(0, 0) if h1 == 24 else time(h1, m1)
    if (h0, m0) == (end.hour, end.minute):
        raise ValueError(f"expected a shift that ends at another time than it starts, got {text!r}")
    return Shift(name, time(h0, m0), end)


def check_overlaps(shifts: list[Shift]) -> None:
    """ValueError naming two shifts that overlap (on the 24-hour cycle)."""
    spans = []
    for s in shifts:
        a, b = s.minutes
        spans += [(a, b, s.name), (a + DAY, b + DAY, s.name), (a - DAY, b - DAY, s.name)]
    for i, (a, b, n) in enumerate(spans):
        for c, d, m in spans[i + 1:]:
            if n != m and a < d and c < b:
                raise ValueError(f"expected shifts that do not overlap, but {n!r} and {m!r} do")


class PlantClock:
    """Local time and shifts of one plant (or line): a time zone and a shift calendar."""

    def __init__(self, tz: str | ZoneInfo = "UTC", shifts: Mapping[str, str] | list[Shift] | None = None) -> None:
        self.tz = tz if isinstance(tz, ZoneInfo) else zone(tz)
        items = [parse_shift(n, s) for n, s in shifts.items()] if isinstance(shifts, Mapping) else list(shifts or [])
        check_overlaps(items)
        self.shifts = {s.name: s for s in items}

    @classmethod
    def of(cls, config: object) -> PlantClock:
        """The clock of a line config (its ``line.timezone`` and ``shifts``; UTC and no shifts if absent)."""
        line = getattr(config, "line", None)
        return cls(getattr(line, "timezone", "UTC") or "UTC", getattr(config, "shifts", None) or {})

    # --- local times ----------------------------------------------------------------------------

    def local(self, t: float) -> datetime:
        return datetime.fromtimestamp(t, UTC).astimezone(self.tz)

    def fmt(self, t: float | None, *, seconds: bool = False, date_too: bool = True) -> str:
        """A short local time for a table: ``2026-03-02 06:00`` (or ``06:00:12``); ``-`` for None."""
        if t is None:
            return "-"
        d = self.local(t)
        clock = d.strftime("%H:%M:%S" if seconds else "%H:%M")
        return f"{d:%Y-%m-%d} {clock}" if date_too else clock

    def iso(self, t: float | None) -> str:
        """ISO 8601 in the plant's zone with its offset, to the millisecond ('' for None)."""
        if t is None:
            return ""
        return self.local(t).isoformat(timespec="milliseconds")

    def at_local(self, d: date, hm: time) -> float:
        """Epoch seconds of a local wall-clock time on a date (see the module docstring for the DST edges)."""
        # fold = 0: a skipped wall time takes the offset before the change, a repeated one its first occurrence
        return datetime.combine(d, hm, tzinfo=self.tz).replace(fold=0).timestamp()

    def parse(self, text: str) -> float:
        """A time a person typed: ISO 8601 with an offset (any zone), or a local date and time without one
        (``2026-03-02 06:00``, ``2026-03-02T06:00:00``), or a local date alone (its midnight)."""
        text = text.strip()
        try:
            dt = datetime.fromisoformat(text)
        except ValueError:
            raise ValueError(f"expected a time such as \"2026-03-02 06:00\" (plant time, {self.tz.key}) or "
                             f"2026-03-02T06:00:00+01:00, got {text!r}") from None
        if dt.tzinfo is not None:
            return dt.timestamp()
        return self.at_local(dt.date(), dt.time())

    # --- shifts ---------------------------------------------------------------------------------

    def window(self, name: str, day: date) -> tuple[float, float]:
        """The shift ``name`` that starts on the local date ``day``: (start, end) in epoch seconds."""
        s = self._shift(name)
        end_day = day + timedelta(days=s.minutes[1] // DAY)  # the next day for a shift across midnight
        return self.at_local(day, s.start), self.at_local(end_day, s.end)

    def shift_at(self, t: float) -> tuple[str, date] | None:
        """The shift running at ``t`` and the date it started on, or None if no shift covers it."""
        d = self.local(t).date()
        for day in (d, d - timedelta(days=1)):
            for name in self.shifts:
                a, b = self.window(name, day)
                if a <= t < b:
                    return name, day
        return None

    def latest(self, name: str, now: float) -> tuple[float, float, date]:
        """The last shift ``name`` that started at or before ``now``: its window and date."""
        self._shift(name)
        d = self.local(now).date()
        for day in (d, d - timedelta(days=1), d - timedelta(days=2)):
            a, b = self.window(name, day)
            if a <= now:
                return a, b, day
        raise AssertionError("unreachable: a shift starts once a day")

    def resolve(self, shift: str | None, day: str | None, now: float) -> tuple[float, float, str]:
        """``--shift NAME [--date D]`` -> (start, end, a label such as ``early 2026-03-02``)."""
        if shift is None:
            raise ValueError("expected --shift NAME (with --date, or the latest such shift)")
        if day is None:
            a, b, d = self.latest(shift, now)
        else:
            try:
                d = date.fromisoformat(day.strip())
            except ValueError:
                raise ValueError(f"expected --date as YYYY-MM-DD (the day the shift starts), got {day!r}") from None
            a, b = self.window(shift, d)
        return a, b, f"{shift} {d.isoformat()}"

    def _shift(self, name: str) -> Shift:
        s = self.shifts.get(name)
        if s is None:
            known = ", ".join(self.shifts) or "none: add a [shifts] table to the line file"
            raise ValueError(f"expected a shift of the calendar ({known}), got {name!r}")
        return s
