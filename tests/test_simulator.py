"""The simulated line obeys the physics it claims: span equation, capstan limit, roll geometry."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from spanwatch.monitor.line import load_line
from spanwatch.monitor.simline import SimulatedLine
from spanwatch.monitor.simline.scenario import parse_scenario
from spanwatch.rules.span import steady_span_tension
from spanwatch.rules.traction import capstan_ratio_limit

ROOT = Path(__file__).resolve().parent.parent
CONFIG = ROOT / "config" / "quillmere-q2.toml"


def make_sim(extra: dict | None = None, speed: str = "400 m/min", duration: str = "5 min") -> SimulatedLine:
    data = {"scenario": {"name": "t", "config": str(CONFIG), "duration": duration, "seed": 1},
            "speed": [{"at": "0 s", "to": speed}]}
    data.update(extra or {})
    sc, cfg = parse_scenario(data, ROOT / "config" / "scenarios" / "t.toml")
    return SimulatedLine(load_line(cfg), sc)


def test_steady_middle_zone_matches_span_equation():
    # Whitworth & Harrison (1983) steady state: T2 = (Et (V2 - V1) + V1 T1) / V2, computed by rules.span,
    # compared with what the simulated plant settles to after many span time constants (L/V = 0.75 s).
    sim = make_sim()
    sim.advance(30.0)
    t1, t2 = sim.tension[0], sim.tension[1]
    v1, v2 = sim.driven[0].speed, sim.driven[1].speed
    expected = float(steady_span_tension(t1, v1, v2, sim.et))
    assert t2 == pytest.approx(expected, rel=1e-3)
    # and the draw in the config was chosen to give the middle-zone setpoint
    assert t2 == pytest.approx(sim.setpoints[1], rel=0.01)


def test_winder_loops_hold_setpoints_and_taper():
    sim = make_sim()
    sim.advance(60.0)
    assert sim.tension[0] == pytest.approx(sim.setpoints[0], rel=0.01)
    # rewind zone follows the hyperbolic taper T0 (1 - k (1 - Dc / D)) at the current diameter
    d = math.sqrt(sim.d_r2)
    rs = sim.rs
    want = sim.setpoints[-1] * (1 - rs.taper.k * (1 - rs.core_diameter / d))
    assert sim.tension[-1] == pytest.approx(want, rel=0.01)


@pytest.mark.parametrize(("cof", "slips"), [(0.175, False), (0.155, True)])
def test_slip_starts_at_the_capstan_limit(cof, slips):
    # Euler–Eytelwein: the roller holds while T_high / T_low <= exp(mu theta). pull_1 carries the ratio
    # T2 / T1 = 175 / 105 = 1.667, so it must hold with mu = 0.175 (limit 1.733) and slip with mu = 0.155
    # (limit 1.628). At 400 m/min the grooved roller has no air-film derating (h < sigma).
    sim = make_sim({"fault": [{"kind": "cof_drop", "target": "pull_1", "start": "20 s", "end": "5 min",
                               "size": cof}]})
    sim.advance(19.0)
    ratio = sim.tension[1] / sim.tension[0]
    limit = float(capstan_ratio_limit(cof, math.pi))
    assert (ratio > limit) == slips
    sim.advance(20.0)
    assert sim.driven[0].slipping == slips
    if slips:
        # the ratio is held on the capstan limit while slipping
        assert sim.tension[1] / sim.tension[0] == pytest.approx(limit, rel=1e-3)


def test_roll_geometry_conserves_area():
    # L = pi (D^2 - D0^2) / (4 t) for the rewind, and the unwind loses the same annulus area.
    sim = make_sim()
    d_r0, d_u0 = sim.d_r2, sim.d_u2
    sim.advance(120.0)
    t = sim.caliper
    assert sim.len_r == pytest.approx(math.pi * (sim.d_r2 - d_r0) / (4 * t), rel=1e-6)
    assert sim.len_u == pytest.approx(math.pi * (d_u0 - sim.d_u2) / (4 * t), rel=1e-6)
    # the web that left the unwind arrived at the rewind (up to the strain difference, < 0.2 %)
    assert sim.len_r == pytest.approx(sim.len_u, rel=2e-3)


def test_samples_have_configured_rates_and_units():
    sim = make_sim()
    batch = sim.advance(10.0)
    for k, name in enumerate(batch.tags):
        sel = batch.tag == k
        period = sim.line.tags[name].sample_period
        assert sel.sum() == pytest.approx(10.0 / period, abs=1)
        assert np.all(np.diff(batch.t[sel]) > 0)
    speed = batch.value[batch.tag == batch.tags.index("q2.line.speed_ref")]
    assert np.median(speed) == pytest.approx(400.0, rel=1e-3)  # m/min, the tag's unit


def test_faults_on_sensors():
    sim = make_sim({"fault": [
        {"kind": "tag_dropout", "target": "q2.unwind.rpm", "start": "2 s", "end": "4 s"},
        {"kind": "stuck_sensor", "target": "q2.rewind.diameter", "start": "2 s", "end": "6 s"},
    ]})
    b = sim.advance(6.0)
    t = b.t - sim.t0
    rpm = b.tag == b.tags.index("q2.unwind.rpm")
    assert not np.any(rpm & (t >= 2) & (t < 4))
    assert np.any(rpm & (t >= 4))
    dia = b.tag == b.tags.index("q2.rewind.diameter")
    stuck = b.value[dia & (t >= 2.1) & (t < 6)]
    assert stuck.size > 100 and np.ptp(stuck) == 0.0
