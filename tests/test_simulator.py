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


# --- the fault kinds an evaluation needs: gain, idler drag, glazing, grade change, blame ------------------------


def _readings(batch, tag: str, t0: float, lo: float, hi: float) -> np.ndarray:
    sel = (batch.tag == batch.tags.index(tag)) & (batch.t - t0 >= lo) & (batch.t - t0 < hi)
    return batch.value[sel]


def test_loadcell_gain_ramps_to_its_size_and_holds():
    # A gain error g multiplies the reading: F_read = (1 + g) F_true. The fault asks for g = 5 % at its end,
    # rising linearly from 0 at its start (10 s) to its end (70 s), and staying after it. The true force is
    # the simulated tension times the web width (1300 mm); the noise is 0.4 % per sample, so a mean over
    # ~500 samples is good to about 0.02 %.
    sim = make_sim({"fault": [{"kind": "loadcell_gain", "target": "q2.s5.tension", "start": "10 s", "end": "70 s",
                               "size": "5 %"}]})
    true_force = sim.tension[1] * sim.width  # steady at 400 m/min; the gain fault does not touch the plant
    b = sim.advance(100.0)
    assert sim.tension[1] * sim.width == pytest.approx(true_force, rel=1e-3)
    before = _readings(b, "q2.s5.tension", sim.t0, 0.0, 10.0).mean() / true_force
    middle = _readings(b, "q2.s5.tension", sim.t0, 39.0, 41.0).mean() / true_force
    after = _readings(b, "q2.s5.tension", sim.t0, 80.0, 100.0).mean() / true_force
    assert before == pytest.approx(1.0, abs=1.5e-3)
    assert middle == pytest.approx(1.025, abs=2e-3)  # half way through the ramp
    assert after == pytest.approx(1.05, abs=1.5e-3)  # held after the end: a drift does not heal itself


def test_glazing_roller_slips_once_its_capacity_falls_below_the_demanded_ratio():
    # Euler–Eytelwein: the roller holds while T_high / T_low <= exp(mu theta). Glazing takes mu from 0.6 down by
    # a share g rising linearly to 90 % over 10 s .. 100 s; the roller must start slipping when
    # 0.6 (1 - g) falls to mu* = ln(T2 / T1) / theta, i.e. at g* = 1 - mu* / 0.6, not before, and keep slipping
    # after the end (the glaze stays).
    sim = make_sim({"fault": [{"kind": "glazing", "target": "pull_1", "start": "10 s", "end": "100 s",
                               "size": "90 %"}]})
    sim.advance(9.0)
    demanded = sim.tension[1] / sim.tension[0]
    mu_star = math.log(demanded) / math.pi
    g_star = 1.0 - mu_star / 0.6
    t_star = 10.0 + 90.0 * g_star / 0.9
    sim.advance(t_star - 2.0 - sim.t)
    assert not sim.driven[0].slipping
    sim.advance(4.0)
    assert sim.driven[0].slipping
    sim.advance(110.0 - sim.t)
    assert sim.driven[0].slipping
    # while slipping the ratio sits on the capstan limit of the glazed COF, 0.6 (1 - 0.9)
    assert sim.tension[1] / sim.tension[0] == pytest.approx(float(capstan_ratio_limit(0.06, math.pi)), rel=1e-3)


def test_idler_drag_adds_its_size_to_the_lag_of_the_idler():
    # idler_5 sits in the rewind zone, whose web moves at pull_2's speed V (1 + draw); its encoder reads rpm,
    # so its surface speed is pi D n. Below 500 m/min the model's own lag is 0.05 %; a drag fault of 1 % at its
    # end makes it 1.05 %, held after the end.
    sim = make_sim({"fault": [{"kind": "idler_drag", "target": "idler_5", "start": "5 s", "end": "25 s",
                               "size": "1 %"}]})
    b = sim.advance(40.0)
    d = 4 * 0.0254  # the idler's configured diameter, 4 in
    web = 400.0 / 60.0 * (1.0 + sim.driven[1].draw)
    rpm_before = _readings(b, "q2.idler_5.speed", sim.t0, 0.0, 5.0)
    rpm_after = _readings(b, "q2.idler_5.speed", sim.t0, 30.0, 40.0)
    lag_before = 1.0 - (np.pi * d * rpm_before.mean() / 60.0) / web
    lag_after = 1.0 - (np.pi * d * rpm_after.mean() / 60.0) / web
    assert lag_before == pytest.approx(0.0005, abs=1e-4)
    assert lag_after == pytest.approx(0.0105, abs=1e-4)


def test_grade_change_sets_the_new_lot_from_its_time():
    # A new lot with stack factor 1.07: the rewind then grows by d(D^2) = 4 t dL / pi with t = 1.2 mil x 1.07
    # (area conservation), and the truth lists the change.
    sim = make_sim({"grade_change": [{"at": "20 s", "stack_factor": 1.07, "modulus_factor": 1.05,
                                      "cof_factor": 0.9}]})
    sim.advance(30.0)
    t_new = 1.2 * 25.4e-6 * 1.07
    assert sim.caliper == pytest.approx(t_new, rel=1e-9)
    assert sim.driven[0].mu == pytest.approx(0.6 * 0.9)
    d2, length = sim.d_r2, sim.len_r
    sim.advance(60.0)
    assert sim.d_r2 - d2 == pytest.approx(4 * t_new * (sim.len_r - length) / math.pi, rel=1e-6)
    g = sim.truth()["grade_changes"]
    assert len(g) == 1 and g[0]["stack_factor"] == 1.07 and g[0]["at_epoch"] == pytest.approx(sim.t0 + 20.0)


def test_truth_names_what_an_alarm_may_blame():
    faults = [{"kind": "cof_drop", "target": "pull_1", "start": "1 s", "end": "2 s", "size": 0.1},
              {"kind": "speed_ramp", "start": "1 s", "end": "2 s", "size": "500 m/min"},
              {"kind": "loadcell_gain", "target": "q2.s5.tension", "start": "1 s", "end": "2 s", "size": "3 %"},
              {"kind": "length_undercount", "target": "q2.rewind.length", "start": "1 s", "end": "2 s",
               "size": "1 %"},
              {"kind": "idler_drag", "target": "idler_3", "start": "1 s", "end": "2 s", "size": "1 %"},
              {"kind": "caliper_change", "target": "rewind", "start": "1 s", "end": "2 s", "size": "5 %",
               "label": "caliper_change_within_roll", "severity": "subtle"}]
    sim = make_sim({"fault": faults})
    got = {f["kind"]: set(f["blame"]) for f in sim.truth()["faults"]}
    zones = {z.id for z in sim.zones if "pull_1" in (z.upstream, z.downstream)}
    assert len(zones) == 2
    assert got["cof_drop"] == {"pull_1", *zones}
    assert got["speed_ramp"] == {"pull_1", "pull_2"}
    assert got["loadcell_gain"] == {"q2.s5.tension", sim.zones[1].id}
    assert got["length_undercount"] == {"q2.rewind.length", "rewind"}
    assert got["idler_drag"] == {"idler_3", "q2.idler_3.speed"}
    assert got["caliper_change"] == {"rewind"}
    cal = sim.truth()["faults"][-1]
    assert cal["label"] == "caliper_change_within_roll" and cal["severity"] == "subtle"


def test_scalar_air_film_matches_the_vectorised_one():
    # The plant's scalar copy of rules.airfilm.effective_cof against the vectorised function over a grid
    # that spans no film, the derating ramp and full lift-off, for both models and speed conventions.
    from spanwatch.monitor.simline.model import scalar_effective_cof
    from spanwatch.rules.airfilm import effective_cof

    for model in ("linear", "none"):
        for conv in ("mean", "sum"):
            for speed in (0.0, 2.0, 6.67, 12.0, 30.0):
                for tension in (1e-3, 50.0, 175.0, 600.0):
                    for sigma in (0.0, 2e-7, 1e-6, 2e-6):
                        want, _ = effective_cof(0.5, 0.1, tension, speed, speed * 1.001, sigma, viscosity=1.8e-5,
                                                film_factor=0.05, model=model, convention=conv, floor=0.1)
                        got = scalar_effective_cof(0.5, 0.1, tension, speed, speed * 1.001, sigma, viscosity=1.8e-5,
                                                   film_factor=0.05, model=model, convention=conv, floor=0.1)
                        assert got == pytest.approx(float(want), rel=1e-12, abs=1e-15)
