"""The tuning sweep (spanwatch.monitor.sweep): check values once, the alarm engine per limit.

Checked against a plain replay (spanwatch.monitor.replay) of the same recording: at the configured limits a
sweep must raise what the replay raises. The recording is the air-entrainment scenario of the example line
(config/scenarios/air-entrainment.toml): a speed ramp to 780 m/min takes pull roll 2 past its traction warning
and alarm, and the middle zone's draw past its warning.
"""

from __future__ import annotations

import itertools
from pathlib import Path

import pytest
from spanwatch.monitor.line import load_line
from spanwatch.monitor.replay import replay
from spanwatch.monitor.simline import SimulatedLine
from spanwatch.monitor.simline.scenario import load_scenario
from spanwatch.monitor.simulate import simulate_to_file
from spanwatch.monitor.sweep import evaluate_setting, keep_results, sweep

ROOT = Path(__file__).resolve().parents[1]
SCENARIO = ROOT / "config" / "scenarios" / "air-entrainment.toml"


@pytest.fixture(scope="module")
def recorded(tmp_path_factory):
    sc, cfg = load_scenario(SCENARIO)
    line = load_line(cfg)
    out = tmp_path_factory.mktemp("sweep") / "air.csv.gz"
    simulate_to_file(SimulatedLine(line, sc), out, progress=False)
    return line, out, replay(line, out, None)


@pytest.mark.parametrize("kind", ["traction", "draw", "idler_lag"])
def test_configured_limits_raise_what_a_replay_raises(recorded, kind):
    line, rec, summary = recorded
    assert summary.raised.get(kind, 0) > 0  # the scenario raises this check: the comparison means something
    for level in ("warning", "alarm"):
        (at_config,) = sweep(line, rec, kind, [1.0], level=level, relative=True)
        assert at_config.raises == summary.raised[kind]


def test_absolute_limit_equal_to_the_configured_one_changes_nothing(recorded):
    line, rec, summary = recorded
    kept = keep_results(line, rec, "traction", "pull_2")
    assert kept.frames > 0
    # the example line's override: pull_2 warns at 0.8 of its capacity
    s = evaluate_setting(kept, line, 0.8, level="warning")
    assert s.raises_by_key["traction:pull_2:warning"] == 1
    assert s.raises == summary.raised["traction"]


def test_lower_high_limit_never_less_time_in_alarm(recorded):
    """A lower limit on a high-direction check makes every frame beyond the old limit beyond the new one, and the
    return band moves down with it, so an alarm is active at least wherever it was (on-delay and off-delay
    hysteresis is monotone in the limit; common practice, no source): time in alarm never falls as the limit
    falls, and a limit that raises at all still raises when lowered. (The number of raises need not grow: two
    episodes may merge into one at a lower limit.)"""
    line, rec, _ = recorded
    kept = keep_results(line, rec, "traction")
    limits = [0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.85, 0.9, 0.95, 1.0]
    res = [evaluate_setting(kept, line, x, level="warning") for x in limits]
    times = [r.time_in_alarm for r in res]
    assert all(a >= b - 1e-9 for a, b in itertools.pairwise(times)), times
    raised = [r.raises_by_key["traction:pull_2:warning"] > 0 for r in res]
    assert all(a or not b for a, b in itertools.pairwise(raised)), raised
    assert raised[0]  # at 0.3 of its capacity pull_2 (about 0.4 at 400 m/min) warns


def test_unknown_check_is_named(recorded):
    line, rec, _ = recorded
    with pytest.raises(ValueError, match="no alarm point of nosuch"):
        keep_results(line, rec, "nosuch")
