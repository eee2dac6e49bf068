"""What each physics check blames: the measured things a user can go and look at (rules.base.blames_of).

Expected sets are read from the example line file itself with tomllib (which tag a span's load cell has, which
spans a zone is made of, which tags a winder and a roller have), not from the line model the checks use.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest
from spanwatch.monitor.line import load_line
from spanwatch.rules.base import blames_of
from spanwatch.rules.catalog import checks_for

EXAMPLE = Path(__file__).resolve().parents[1] / "config" / "quillmere-q2.toml"
RAW = tomllib.loads(EXAMPLE.read_text(encoding="utf-8"))
SPAN = {s["id"]: s for s in RAW["spans"]}
ROLLER = {r["id"]: r for r in RAW["rollers"]}
WINDER = {w["id"]: w for w in RAW["winders"]}


@pytest.fixture(scope="module")
def checks():
    return {(c.kind, c.object_id): c for c in checks_for(load_line(EXAMPLE).model)}


def test_draw_blames_the_zone_its_load_cell_its_span_and_both_rollers(checks):
    # zone pull_1-pull_2: spans s4, s5, s6; the load cell is on s5 (q2.s5.tension)
    assert blames_of(checks[("draw", "pull_1-pull_2")]) == (
        "pull_1-pull_2", SPAN["s5"]["tension_tag"], "s5", "pull_1", "pull_2")


def test_traction_and_no_drive_blame_the_roller_and_the_load_cells_either_side(checks):
    for kind in ("traction", "no_drive"):
        assert blames_of(checks[(kind, "pull_1")]) == ("pull_1", SPAN["s2"]["tension_tag"], SPAN["s5"]["tension_tag"])
        assert blames_of(checks[(kind, "pull_2")]) == ("pull_2", SPAN["s5"]["tension_tag"], SPAN["s8"]["tension_tag"])


def test_roll_checks_blame_the_winder_and_its_tags(checks):
    for w in ("unwind", "rewind"):
        raw = WINDER[w]
        assert blames_of(checks[("roll_diameter", w)]) == (w, raw["diameter_tag"], raw["length_tag"])
        assert blames_of(checks[("speed_diameter", w)]) == (w, raw["diameter_tag"], raw["rpm_tag"])
        assert blames_of(checks[("length_rate", w)]) == (w, raw["length_tag"])


def test_slip_and_idler_lag_blame_the_roller_and_its_encoder(checks):
    for kind, r in (("slip", "pull_1"), ("slip", "pull_2"), ("idler_lag", "idler_3"), ("idler_lag", "idler_5")):
        assert blames_of(checks[(kind, r)]) == (r, ROLLER[r]["speed_tag"])


def test_a_load_cell_fault_is_findable_from_the_alarm_text(checks):
    # The rationalization (ISA-18.2 master alarm database: cause) of every check that reads a load cell names it.
    for kind in ("draw", "traction"):
        c = next(c for (k, _), c in checks.items() if k == kind)
        assert "load cell" in c.defaults.cause
        assert "load cell" in type(c).rests_on
