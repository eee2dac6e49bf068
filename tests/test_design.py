"""Design margins (monitor/design.py) and check-config's design table against hand-worked capstan values.

Reference: the Euler–Eytelwein capstan equation, the relation ASTM G143 ("Standard Test Method for
Measurement of Web/Roller Friction Characteristics") derives the COF with: mu = 0.3 over 180 deg holds
exp(0.3 pi) = 2.566 (evaluated by hand to 4 digits). Tension ratios are taken from the setpoints in pli, so
they are exact fractions (1.0 pli / 0.6 pli = 5/3). The hyperbolic taper is the convention the line file
names (T0 (1 - k (1 - Dc/D)); conventions vary, from memory).
"""

from __future__ import annotations

from pathlib import Path

import pytest
from spanwatch.monitor.cli import app
from spanwatch.monitor.design import POINTS, design_findings, design_margins, normal_speed, roller_margin
from spanwatch.monitor.line import load_line
from typer.testing import CliRunner

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "config" / "quillmere-q2.toml"
CAPSTAN_03_PI = 2.566  # exp(0.3 pi), by hand


def variant(tmp_path: Path, *edits: tuple[str, str]) -> Path:
    text = EXAMPLE.read_text(encoding="utf-8")
    for old, new in edits:
        assert text.count(old) == 1, f"the example config changed: {old!r}"
        text = text.replace(old, new)
    path = tmp_path / "line.toml"
    path.write_text(text, encoding="utf-8")
    return path


NO_AIR = ('air_film_model = "linear"', 'air_film_model = "none"')
PULL_1_COF_03 = ('wrap = "180 deg"\ncof = 0.6', 'wrap = "180 deg"\ncof = 0.3')


def test_margin_is_the_hand_worked_capstan_share(tmp_path):
    # pull_1: mu 0.3 over 180 deg holds 2.566; its zones are set at 0.6 and 1.0 pli, a ratio of 5/3, which uses
    # ln(5/3) / ln(2.566) = 0.5108 / 0.9425 = 0.542 of the capacity (margin 1.85); SF 1.5 allows 0.667.
    line = load_line(variant(tmp_path, NO_AIR, PULL_1_COF_03))
    for point in POINTS:
        m = roller_margin(line, "pull_1", point)
        assert m is not None
        assert m.capacity_ratio == pytest.approx(CAPSTAN_03_PI, abs=5e-4)
        assert m.demanded_ratio == pytest.approx(5 / 3, rel=1e-9)
        assert m.utilisation == pytest.approx(0.5108 / 0.9425, abs=2e-4)
        assert m.margin == pytest.approx(0.9425 / 0.5108, abs=1e-3)
        assert m.safe_share == pytest.approx(2 / 3)
        assert m.within_design and not m.slips
    assert not [f for f in design_findings(design_margins(line)) if "pull_1" in f]


def test_ordinary_running_beyond_the_safe_share_is_said_plainly(tmp_path):
    # Middle zone at 1.5 pli: pull_1 holds a ratio of 2.5 against 2.566 -> ln 2.5 / ln 2.566 = 0.9163 / 0.9425
    # = 0.972 of its capacity: within it, but far beyond the safe share 1/1.5.
    line = load_line(variant(tmp_path, NO_AIR, PULL_1_COF_03, ('setpoint = "1.0 pli"', 'setpoint = "1.5 pli"')))
    m = roller_margin(line, "pull_1", "normal speed")
    assert m.utilisation == pytest.approx(0.9163 / 0.9425, abs=3e-4)
    assert not m.slips and not m.within_design
    found = [f for f in design_findings(design_margins(line)) if f.startswith("pull_1 at normal speed")]
    assert found and "ordinary running" in found[0] and "1/SF = 67%" in found[0]


def test_a_ratio_beyond_the_capacity_would_slip(tmp_path):
    # 2.0 pli against 0.6 pli: a ratio of 3.33 > 2.566, ln 3.333 / ln 2.566 = 1.2040 / 0.9425 = 1.277.
    line = load_line(variant(tmp_path, NO_AIR, PULL_1_COF_03, ('setpoint = "1.0 pli"', 'setpoint = "2.0 pli"')))
    m = roller_margin(line, "pull_1", "standstill")
    assert m.utilisation == pytest.approx(1.2040 / 0.9425, abs=3e-4)
    assert m.slips
    assert any(f.startswith("pull_1 at standstill") and "would slip" in f for f in design_findings([m]))


def test_end_of_roll_uses_the_taper_end():
    # Rewind taper hyperbolic, k = 0.2, core 3 in, full 700 mm: the s8 setpoint 0.8 pli falls to
    # 0.8 (1 - 0.2 (1 - 76.2 / 700)) = 0.8 x 0.821771 = 0.657417 pli at the full roll. pull_2 sits between
    # 1.0 pli and that: a ratio of 1 / 0.657417 = 1.52111 at the end of the roll, 1.25 at its start.
    line = load_line(EXAMPLE)
    start = roller_margin(line, "pull_2", "normal speed")
    end = roller_margin(line, "pull_2", "end of roll")
    assert start.demanded_ratio == pytest.approx(1.25, rel=1e-9)
    assert end.demanded_ratio == pytest.approx(1 / 0.657417, rel=1e-5)
    assert end.speed == start.speed == normal_speed(line.config)
    worst = roller_margin(line, "pull_2", "end of roll at top speed")
    assert worst.demanded_ratio == end.demanded_ratio and worst.speed == line.config.line.max_speed


def test_normal_speed_default_and_configured(tmp_path):
    line = load_line(EXAMPLE)
    # 80 % of the 400 m/min top speed (the stated default share; common practice, no source)
    assert normal_speed(line.config) * 60 == pytest.approx(320.0)
    slower = ('max_speed = "400 m/min"', 'max_speed = "400 m/min"\nnormal_speed = "250 m/min"')
    line = load_line(variant(tmp_path, slower))
    assert normal_speed(line.config) * 60 == pytest.approx(250.0)
    assert roller_margin(line, "pull_2", "normal speed").speed * 60 == pytest.approx(250.0)


def test_air_film_only_lowers_the_capacity_with_speed():
    # Knox & Sweeney (1971): the film grows with speed as U^(2/3) and the derating never gives traction back
    # (Ducotey & Good 1999), so the capacity at top speed <= at normal speed <= at standstill (the dry COF).
    line = load_line(EXAMPLE)
    for el in line.driven_rollers:
        rest, normal, top = (roller_margin(line, el.id, p) for p in ("standstill", "normal speed", "top speed"))
        assert rest.mu_eff == rest.mu
        assert top.capacity_ratio <= normal.capacity_ratio <= rest.capacity_ratio
        assert rest.air_film == 0.0 < normal.air_film < top.air_film


def test_check_config_prints_the_design_table(tmp_path):
    path = variant(tmp_path, NO_AIR, PULL_1_COF_03, ('setpoint = "1.0 pli"', 'setpoint = "1.5 pli"'))
    out = " ".join(CliRunner().invoke(app, ["check-config", str(path)]).stdout.split())
    assert "Design margin" in out
    assert "DESIGN: pull_1 at normal speed (320 m/min) already uses 97% of its capacity" in out
    plain = " ".join(CliRunner().invoke(app, ["check-config", str(EXAMPLE)]).stdout.split())
    assert "within its safe share 1/SF in ordinary running" in plain
