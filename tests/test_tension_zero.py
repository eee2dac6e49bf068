"""A load cell's zero judged at standstill with the web slack (rules/tensionzero.py), worked by hand."""

from __future__ import annotations

import numpy as np
from spanwatch.monitor.line import load_line
from spanwatch.rules.base import Block, LineState, Reason, Signal, TagFrames
from spanwatch.rules.catalog import checks_for
from spanwatch.rules.tensionzero import TensionZeroCheck

SETPOINT = 175.1268  # N/m: 1 pli (1 lbf/in = 175.1268 N/m, NIST SP 811 conversion factors)


def _block(reading: list[float], states: list[int], ok: list[bool] | None = None) -> Block:
    n = len(reading)
    good = np.ones(n, dtype=bool) if ok is None else np.array(ok)
    return Block(t=np.arange(n) / 50.0, signals={"tension/s5": Signal(np.array(reading), good)},
                 line_state=np.array(states, dtype=np.int8),
                 tags=TagFrames((), np.zeros((n, 0)), np.zeros((n, 0), np.int8), np.zeros((n, 0))))


def test_the_reading_of_a_slack_web_at_standstill_is_the_zero():
    c = TensionZeroCheck("s5", setpoint=SETPOINT, tag="q2.s5.tension", span="s5")
    stopped, running = int(LineState.STOPPED), int(LineState.RUNNING)
    # 7 N/m at standstill with the web slack: 4 % of a 1-pli setpoint; -3.5 N/m: -2 %
    r = c.update(_block([7.0, -3.5, 170.0, 7.0, 7.0], [stopped, stopped, stopped, running, stopped],
                        ok=[True, True, True, True, False]))
    np.testing.assert_allclose(r.value[:2], [7.0 / SETPOINT, -3.5 / SETPOINT])
    assert r.reason.tolist() == [int(Reason.OK), int(Reason.OK), int(Reason.OUT_OF_DOMAIN), int(Reason.LINE_STATE),
                                 int(Reason.INPUT_BAD)]
    assert np.isnan(r.value[2:]).all()  # under tension, running, or a bad reading: nothing judged
    assert c.blames == ("s5", "q2.s5.tension", "s5")


def test_its_alarm_fires_beyond_six_per_cent_either_way():
    d = TensionZeroCheck.defaults
    assert (d.direction, d.warning, d.alarm) == ("abs", 0.03, 0.06)
    # 12 N/m on a 1-pli zone is 6.85 %: beyond the alarm limit; 4 N/m (2.3 %) is within the warning
    assert abs(12.0 / SETPOINT) >= d.alarm and abs(4.0 / SETPOINT) < d.warning


def test_every_zone_with_a_load_cell_and_a_setpoint_gets_one():
    from pathlib import Path

    line = load_line(Path(__file__).resolve().parent.parent / "config" / "quillmere-q2.toml")
    zones = {z.id for z in line.model.zones if z.tension_tag and z.setpoint}
    assert {c.object_id for c in checks_for(line.model) if c.kind == "tension_zero"} == zones and zones
