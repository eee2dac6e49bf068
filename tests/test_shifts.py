"""The plant's clock: local times, shift windows across daylight-saving changes, the config keys.

Expected instants are computed with calendar.timegm from UTC fields worked out by hand from the
published rules, never with the zone database the code uses:
- European Union: summer time starts and ends at 01:00 UTC on the last Sunday of March and of October
  (Directive 2000/84/EC, articles 2 and 3); Central European Time is UTC+1, summer time UTC+2.
- United States: daylight saving time starts at 2:00 local standard time on the second Sunday of March and
  ends at 2:00 local daylight time on the first Sunday of November (Energy Policy Act of 2005, section 110,
  amending 15 U.S.C. 260a); US Central time is UTC-6, daylight time UTC-5.
"""

from __future__ import annotations

import calendar
import subprocess
import sys
from datetime import date
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from spanwatch.monitor.shifts import PlantClock, parse_shift

ROOT = Path(__file__).resolve().parent.parent
THREE = {"early": "06:00-14:00", "late": "14:00-22:00", "night": "22:00-06:00"}


def utc(*fields: int) -> float:
    return float(calendar.timegm((*fields, 0, 0, 0)[:6]))


def test_a_night_shift_across_the_eu_summer_time_changes_lasts_7_and_9_hours():
    clock = PlantClock("Europe/Berlin", THREE)
    # 2026: the last Sunday of March is the 29th, of October the 25th
    assert clock.window("night", date(2026, 3, 28)) == (utc(2026, 3, 28, 21, 0), utc(2026, 3, 29, 4, 0))
    assert clock.window("night", date(2026, 10, 24)) == (utc(2026, 10, 24, 20, 0), utc(2026, 10, 25, 5, 0))
    assert clock.window("night", date(2026, 6, 1)) == (utc(2026, 6, 1, 20, 0), utc(2026, 6, 2, 4, 0))
    assert clock.window("early", date(2026, 3, 29)) == (utc(2026, 3, 29, 4, 0), utc(2026, 3, 29, 12, 0))


def test_twelve_hour_shifts_across_the_us_daylight_time_changes():
    clock = PlantClock("America/Chicago", {"days": "06:00-18:00", "nights": "18:00-06:00"})
    # 2026: the second Sunday of March is the 8th, the first Sunday of November the 1st
    a, b = clock.window("nights", date(2026, 3, 7))
    assert (a, b) == (utc(2026, 3, 8, 0, 0), utc(2026, 3, 8, 11, 0)) and b - a == 11 * 3600
    a, b = clock.window("nights", date(2026, 10, 31))
    assert (a, b) == (utc(2026, 10, 31, 23, 0), utc(2026, 11, 1, 12, 0)) and b - a == 13 * 3600


def test_local_times_typed_by_a_person_and_shown_back():
    clock = PlantClock("Europe/Berlin", THREE)
    assert clock.parse("2026-03-02 06:00") == utc(2026, 3, 2, 5, 0)
    assert clock.parse("2026-07-02T06:00:00") == utc(2026, 7, 2, 4, 0)
    assert clock.parse("2026-03-02") == utc(2026, 3, 1, 23, 0)
    assert clock.parse("2026-03-02T06:00:00-05:00") == utc(2026, 3, 2, 11, 0), "an offset given wins"
    # 02:30 does not exist on 29 March 2026 in Berlin: read with the offset before the change (PEP 495, fold 0)
    assert clock.parse("2026-03-29 02:30") == utc(2026, 3, 29, 1, 30)
    # 02:30 occurs twice on 25 October 2026: the first, still in summer time
    assert clock.parse("2026-10-25 02:30") == utc(2026, 10, 25, 0, 30)
    assert clock.iso(utc(2026, 3, 2, 5, 0)) == "2026-03-02T06:00:00.000+01:00"
    assert clock.fmt(utc(2026, 7, 2, 4, 0)) == "2026-07-02 06:00"
    with pytest.raises(ValueError, match="plant time, Europe/Berlin"):
        clock.parse("yesterday")


@settings(max_examples=300, deadline=None)
@given(t=st.floats(min_value=utc(2020, 1, 1, 0, 0), max_value=utc(2035, 1, 1, 0, 0)),
       tz=st.sampled_from(["Europe/Berlin", "America/Chicago", "Australia/Sydney", "UTC", "Asia/Kolkata"]))
def test_three_eight_hour_shifts_cover_every_instant_once(t, tz):
    clock = PlantClock(tz, THREE)
    found = clock.shift_at(t)
    assert found is not None
    name, day = found
    a, b = clock.window(name, day)
    assert a <= t < b
    others = [(n, d) for n in THREE for d in (day, date.fromordinal(day.toordinal() - 1),
                                              date.fromordinal(day.toordinal() + 1))
              if (n, d) != (name, day) and clock.window(n, d)[0] <= t < clock.window(n, d)[1]]
    assert others == []
    la, lb, ld = clock.latest(name, t)
    assert (la, lb, ld) == (a, b, day)


def test_shifts_that_overlap_or_do_not_parse_are_refused():
    with pytest.raises(ValueError, match="'a' and 'b'"):
        PlantClock("UTC", {"a": "06:00-14:30", "b": "14:00-22:00"})
    with pytest.raises(ValueError, match="'a' and 'b'"):
        PlantClock("UTC", {"a": "22:00-06:00", "b": "05:00-13:00"})
    for bad in ("6-14", "06:00-06:00", "25:00-06:00", "06:60-07:00"):
        with pytest.raises(ValueError, match="expected"):
            parse_shift("x", bad)
    assert parse_shift("x", "18:00-24:00").minutes == (1080, 1440)
    with pytest.raises(ValueError, match="IANA time zone"):
        PlantClock("Mars/Olympus")
    with pytest.raises(ValueError, match="early, late, night"):
        PlantClock("UTC", THREE).window("noon", date(2026, 3, 2))


@pytest.mark.parametrize(("extra", "key", "expected"), [
    ('[line]\ntimezone = "Berlin"\n', "line.timezone", "IANA time zone"),
    ('[shifts]\nearly = "06:00-14:00"\nlate = "13:00-22:00"\n', "shifts", "do not overlap"),
    ('[shifts]\nearly = "6 to 2"\n', "shifts", "HH:MM-HH:MM")])
def test_check_config_names_the_file_the_key_and_what_was_expected(tmp_path, extra, key, expected):
    cfg = tmp_path / "line.toml"
    cfg.write_text(f'extends = "{ROOT / "config" / "quillmere-q2.toml"}"\n{extra}', encoding="utf-8")
    proc = subprocess.run([sys.executable, "-m", "spanwatch", "check-config", str(cfg)], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert str(cfg) in proc.stderr and key in proc.stderr and expected in proc.stderr, proc.stderr


def test_the_example_line_has_a_zone_and_three_shifts():
    from spanwatch.monitor.line import load_line

    clock = PlantClock.of(load_line(ROOT / "config" / "quillmere-q2.toml").config)
    assert clock.tz.key == "Europe/Berlin" and list(clock.shifts) == ["early", "late", "night"]
