"""Alarm handling (spanwatch.rules.alarms AlarmEngine) with hand-built alarm points and check results.

The expected behaviour follows the nuisance-alarm tools of ANSI/ISA-18.2-2016 (Management of Alarm Systems
for the Process Industries), IEC 62682:2014 (its international counterpart) and EEMUA 191, 3rd edition
(2013). The standards are not freely readable: the statements below are from memory, and their clause
numbers were not checked.
- deadband: the alarm clears only once the value is back past the limit by the deadband;
- on-delay: the condition must hold for the delay before the alarm is raised;
- off-delay: the condition must stay clear for the delay before the alarm clears;
- suppression by design (designed suppression): logic keyed to process state (line stopped, threading,
  roll change);
- chattering: 3 or more raise/clear cycles within 60 s (the alarm-performance metrics of ISA-18.2 and
  EEMUA 191).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from spanwatch.rules.alarms import AlarmEngine, AlarmPoint, ChatterSettings, Transition, chattering
from spanwatch.rules.base import CheckResult, LineState, Reason

RATE = 10.0  # frames per second
T0_FRAME = 17_724_276_000  # frame index of the first frame (epoch-aligned, as the aligner makes them)
RUNNING = int(LineState.RUNNING)


def point(*, limit: float = 1.0, direction: str = "high", deadband: float = 0.0, on_delay: float = 0.0,
          off_delay: float = 0.0, kind: str = "traction", object_id: str = "pull_1", level: str = "alarm",
          priority: str = "high") -> AlarmPoint:
    return AlarmPoint(kind=kind, object_id=object_id, level=level, limit=limit, direction=direction,
                      deadband=deadband, on_delay=on_delay, off_delay=off_delay, priority=priority, unit="ratio",
                      cause="test cause", consequence="test consequence", action="test action", response_time=60.0)


def times(n: int, start: int = 0) -> np.ndarray:
    """Frame times as the aligner builds them: integer frame index / rate."""
    return (T0_FRAME + start + np.arange(n)) / RATE


def result(values, reasons=None) -> CheckResult:
    """A check result that keeps the CheckResult contract: the value is NaN wherever the reason is not OK."""
    v = np.asarray(values, dtype=float)
    r = np.zeros(v.size, dtype=np.int8) if reasons is None else np.asarray(reasons, dtype=np.int8)
    return CheckResult(value=np.where(r == Reason.OK, v, np.nan), reason=r)


def run(p: AlarmPoint, values, reasons=None, line_state=None, blocks: list[int] | None = None) -> list[Transition]:
    """Evaluate one point over the frames, in one block or in the given block sizes."""
    res = result(values, reasons)
    n = res.value.size
    t = times(n)
    ls = np.full(n, RUNNING, dtype=np.int8) if line_state is None else np.asarray(line_state, dtype=np.int8)
    eng = AlarmEngine([p])
    sizes = itertools.cycle(blocks or [n])  # block sizes repeat until the frames run out
    out: list[Transition] = []
    a = 0
    while a < n:
        b = min(n, a + next(sizes))
        sub = CheckResult(value=res.value[a:b], reason=res.reason[a:b])
        out.extend(eng.evaluate(t[a:b], {(p.kind, p.object_id): sub}, ls[a:b]))
        a = b
    return out


def seconds(tr: Transition) -> float:
    """Transition time relative to the first frame."""
    return round(tr.t - T0_FRAME / RATE, 6)


def events(trs: list[Transition]) -> list[tuple[str, float]]:
    return [(tr.event, seconds(tr)) for tr in trs]


def steps(*parts: tuple[float, float]) -> np.ndarray:
    """Piecewise-constant series: (value, duration in s) at RATE frames per second."""
    return np.concatenate([np.full(round(d * RATE), v, dtype=float) for v, d in parts])


# --- deadband ------------------------------------------------------------------------------------------------------


def test_sets_at_the_limit():
    # "high": alarm when value >= limit (AlarmDefaults.direction); the limit itself is abnormal
    trs = run(point(limit=1.0), steps((0.5, 1), (1.0, 1), (0.5, 1)))
    assert events(trs) == [("raise", 1.0), ("clear", 2.0)]


def test_just_below_the_limit_never_raises():
    assert run(point(limit=1.0), steps((0.5, 1), (np.nextafter(1.0, 0.0), 5), (0.5, 1))) == []


def test_deadband_clears_only_below_limit_minus_deadband():
    # ISA-18.2 / IEC 62682 deadband (from memory): clears only once back past the limit by the deadband.
    # limit 1.0, deadband 0.25: clear threshold 0.75 (exact in binary); at 0.75 itself the alarm stays.
    p = point(limit=1.0, deadband=0.25)
    values = steps((0.5, 1), (1.2, 1), (0.9, 1), (0.76, 1), (0.75, 1), (0.74, 1))
    trs = run(p, values)
    assert events(trs) == [("raise", 1.0), ("clear", 5.0)]
    assert trs[1].value == pytest.approx(0.74)


def test_deadband_dip_inside_band_does_not_clear_then_returns():
    p = point(limit=1.0, deadband=0.25)
    trs = run(p, steps((1.1, 1), (0.8, 2), (1.1, 1), (0.8, 2)))
    assert events(trs) == [("raise", 0.0)]


def test_deadband_low_direction():
    # "low": alarm when value <= limit; clears once the value is above limit + deadband
    p = point(limit=0.5, direction="low", deadband=0.25)
    values = steps((1.0, 1), (0.5, 1), (0.7, 1), (0.75, 1), (0.76, 1))
    trs = run(p, values)
    assert events(trs) == [("raise", 1.0), ("clear", 4.0)]


def test_deadband_abs_direction_both_signs():
    # "abs": alarm when |value| >= limit, either sign
    p = point(limit=1.0, direction="abs", deadband=0.25)
    trs = run(p, steps((0.0, 1), (-1.0, 1), (-0.8, 1), (0.0, 1), (1.5, 1), (0.74, 1), (-0.74, 1)))
    assert events(trs) == [("raise", 1.0), ("clear", 3.0), ("raise", 4.0), ("clear", 5.0)]


# --- on-delay and off-delay ----------------------------------------------------------------------------------------


def test_on_delay_short_condition_raises_nothing():
    # on-delay (ISA-18.2 / IEC 62682, from memory): the condition must hold for the delay before the alarm is raised
    p = point(on_delay=2.0)
    assert run(p, steps((0.0, 1), (2.0, 1.9), (0.0, 3), (2.0, 1.5), (0.0, 3))) == []


def test_on_delay_long_condition_raises_at_start_plus_delay():
    p = point(on_delay=2.0)
    trs = run(p, steps((0.0, 1.3), (2.0, 5), (0.0, 2)))
    assert events(trs) == [("raise", 3.3), ("clear", 6.3)]
    assert trs[0].value == 2.0


def test_off_delay_short_dip_does_not_clear():
    # off-delay (ISA-18.2 / IEC 62682, from memory): the condition must stay clear for the delay before it clears
    p = point(off_delay=3.0)
    trs = run(p, steps((2.0, 1), (0.0, 2.5), (2.0, 1), (0.0, 2.9), (2.0, 1)))
    assert events(trs) == [("raise", 0.0)]


def test_off_delay_long_dip_clears_at_dip_start_plus_delay():
    p = point(off_delay=3.0)
    # a 2 s dip at 1 s (too short), back at 3 s, a long dip from 4 s: clears at 4 + 3 = 7 s
    trs = run(p, steps((2.0, 1), (0.0, 2), (2.0, 1), (0.0, 5)))
    assert events(trs) == [("raise", 0.0), ("clear", 7.0)]


def test_on_delay_restarts_inside_the_deadband():
    # ISA-18.2 / IEC 62682 (from memory): the on-delay counts time beyond the limit; the deadband applies to the
    # return to normal only. 0.9 is inside the band (0.75..1.0) but on the normal side of the limit 1.0: it restarts
    # the on-delay. Beyond the limit: 1.0-1.5 s and 4.5-5.0 s, each 0.5 s < 1 s: no raise.
    # (Before the fix this raised at 2.0 s with the value 0.9, on the normal side of its limit.)
    p = point(limit=1.0, deadband=0.25, on_delay=1.0, off_delay=2.0)
    values = steps((0.0, 1), (1.5, 0.5), (0.9, 2), (0.5, 1), (1.5, 0.5), (0.5, 3))
    assert run(p, values) == []


def test_raise_value_beyond_the_limit_after_a_dip_into_the_band():
    # the reported defect: "RAISE 0.722 (limit >= 0.75)". limit 0.75, deadband 0.05, on-delay 2 s.
    # 0.76 from 1.0 s to 2.5 s (1.5 s), 0.722 (inside the band 0.70..0.75) from 2.5 s to 4.0 s restarts the delay,
    # 0.8 from 4.0 s: raise at 4.0 + 2.0 = 6.0 s with 0.8.
    p = point(limit=0.75, deadband=0.05, on_delay=2.0)
    values = steps((0.5, 1), (0.76, 1.5), (0.722, 1.5), (0.8, 3), (0.5, 1))
    trs = run(p, values)
    assert events(trs) == [("raise", 6.0), ("clear", 7.0)]
    assert trs[0].value == 0.8
    assert trs[1].peak == 0.8


def test_off_delay_counts_beyond_limit_minus_deadband_only():
    # the deadband applies to the return to normal: the off-delay counts time below limit - deadband (0.75) and a
    # value back inside the band (0.9) restarts it (ISA-18.2 / IEC 62682, from memory).
    p = point(limit=1.0, deadband=0.25, on_delay=1.0, off_delay=2.0)
    values = steps((0.0, 1), (1.5, 1.5), (0.9, 2), (0.5, 1), (0.9, 0.5), (0.5, 3))
    trs = run(p, values)
    # beyond 1.0 from 1.0 s -> raise at 2.0 s; 0.9 (2.5-4.5 s) holds; below 0.75 from 4.5 s, back in the band at
    # 5.5 s (off-delay interrupted after 1 s), below again from 6.0 s -> clear at 8.0 s
    assert events(trs) == [("raise", 2.0), ("clear", 8.0)]
    assert trs[0].value == 1.5 and trs[1].peak == 1.5


# --- validity: invalid input holds, line state resets --------------------------------------------------------------


def test_invalid_frames_hold_an_active_alarm():
    # "a lost input neither raises nor clears an alarm" (module docstring of spanwatch.rules.alarms)
    p = point()
    n = 100
    values = np.r_[np.full(10, 2.0), np.full(80, 0.0), np.full(10, 0.0)]
    reasons = np.r_[np.zeros(10), np.full(80, Reason.INPUT_BAD), np.zeros(10)]
    trs = run(p, values, reasons)
    assert len(values) == n
    assert events(trs) == [("raise", 0.0), ("clear", 9.0)]  # cleared only by the first valid normal frame


def test_invalid_frames_raise_nothing():
    p = point()
    reasons = np.r_[np.zeros(10), np.full(50, Reason.INPUT_BAD), np.zeros(10)]
    values = np.r_[np.zeros(10), np.full(50, 5.0), np.zeros(10)]  # 5.0 is blanked to NaN (invalid frames)
    assert run(p, values, reasons) == []


@pytest.mark.parametrize("why", [Reason.INPUT_BAD, Reason.OUT_OF_DOMAIN, Reason.WARMING_UP, Reason.ROLL_CHANGE])
def test_every_non_line_state_reason_holds(why):
    p = point()
    values = steps((2.0, 1), (0.0, 5), (0.0, 1))
    reasons = np.r_[np.zeros(10), np.full(50, int(why)), np.zeros(10)]
    assert events(run(p, values, reasons)) == [("raise", 0.0), ("clear", 6.0)]


def test_raise_waits_for_a_valid_frame():
    # condition set at 0 s; on-delay of 1 s expires while the input is bad; raise on the first valid frame (3 s)
    p = point(on_delay=1.0)
    values = steps((2.0, 0.5), (0.0, 2.5), (2.0, 1))
    reasons = np.r_[np.zeros(5), np.full(25, Reason.INPUT_BAD), np.zeros(10)]
    trs = run(p, values, reasons)
    assert events(trs) == [("raise", 3.0)]
    assert trs[0].value == 2.0 and math.isfinite(trs[0].value)


def test_no_raise_when_first_valid_frame_is_normal():
    p = point(on_delay=1.0)
    values = steps((2.0, 0.5), (0.0, 2.5), (0.0, 1))
    reasons = np.r_[np.zeros(5), np.full(25, Reason.INPUT_BAD), np.zeros(10)]
    assert run(p, values, reasons) == []


def test_line_state_resets_and_clears():
    # designed suppression (ISA-18.2 / IEC 62682, from memory): a LINE_STATE-gated frame resets the condition
    p = point(off_delay=1.0)
    values = steps((2.0, 1), (0.0, 3))
    reasons = np.r_[np.zeros(10), np.full(30, Reason.LINE_STATE)]
    ls = np.r_[np.full(10, RUNNING), np.full(30, int(LineState.STOPPED))]
    trs = run(p, values, reasons, ls)
    assert events(trs) == [("raise", 0.0), ("clear", 2.0)]
    assert trs[1].line_state == int(LineState.STOPPED)
    assert trs[0].line_state == RUNNING


def test_line_state_restarts_the_on_delay_but_bad_input_does_not():
    p = point(on_delay=2.0)
    values = steps((2.0, 1.5), (0.0, 1), (2.0, 1.5))
    gap = np.r_[np.zeros(15), np.ones(10), np.zeros(15)].astype(bool)
    # gated by line state: the condition resets; 1.5 s + 1.5 s of condition never make a 2 s on-delay
    assert run(p, values, np.where(gap, int(Reason.LINE_STATE), 0)) == []
    # bad input: the condition holds through the gap; the delay expired in the gap -> raise at its end (2.5 s)
    assert events(run(p, values, np.where(gap, int(Reason.INPUT_BAD), 0))) == [("raise", 2.5)]


# --- transition contents -------------------------------------------------------------------------------------------


def test_transition_carries_value_point_and_line_state():
    p = point(limit=1.0)
    ls = np.r_[np.full(10, int(LineState.ACCELERATING)), np.full(20, RUNNING)]
    trs = run(p, steps((0.0, 0.5), (1.25, 0.5), (1.5, 1), (0.25, 1)), line_state=ls)
    assert events(trs) == [("raise", 0.5), ("clear", 2.0)]
    raise_, clear = trs
    assert raise_.point is p and raise_.key == "traction:pull_1:alarm"
    assert raise_.value == 1.25 and raise_.line_state == int(LineState.ACCELERATING)
    assert clear.value == 0.25 and clear.line_state == RUNNING


def test_peak_of_each_episode_high():
    p = point(limit=1.0, off_delay=0.5)
    values = steps((0.0, 1), (1.2, 1), (3.5, 0.2), (1.1, 1), (0.0, 1), (2.0, 1), (0.0, 1))
    trs = run(p, values)
    assert events(trs) == [("raise", 1.0), ("clear", 3.7), ("raise", 4.2), ("clear", 5.7)]
    assert math.isnan(trs[0].peak)  # the peak is reported on the clear
    assert trs[1].peak == 3.5
    assert trs[3].peak == 2.0  # a new episode starts its own peak


def test_peak_of_an_episode_low_keeps_the_value_sign():
    p = point(limit=0.5, direction="low")
    trs = run(p, steps((1.0, 1), (0.4, 1), (0.1, 1), (0.3, 1), (1.0, 1)))
    assert [tr.event for tr in trs] == ["raise", "clear"]
    assert trs[1].peak == pytest.approx(0.1)  # the lowest value, in the value's own terms


def test_peak_of_an_episode_abs_keeps_the_value_sign():
    # "peak: most abnormal value of the episode" (Transition); for an |value| check on negative values the
    # most abnormal value is the most negative one, and it should read as such (as "low" does)
    p = point(limit=1.0, direction="abs")
    trs = run(p, steps((0.0, 1), (-1.5, 1), (-2.5, 1), (-1.2, 1), (0.0, 1)))
    assert [tr.event for tr in trs] == ["raise", "clear"]
    assert trs[0].value == -1.5
    assert trs[1].peak == pytest.approx(-2.5)


def test_peak_ignores_values_before_the_raise():
    # the episode starts at the raise: values during the on-delay are not part of it
    p = point(limit=1.0, on_delay=1.0)
    trs = run(p, steps((0.0, 1), (5.0, 0.5), (1.5, 2), (0.0, 1)))
    assert events(trs) == [("raise", 2.0), ("clear", 3.5)]
    assert trs[1].peak == 1.5


# --- chattering ----------------------------------------------------------------------------------------------------


def _chattering(trs: list[Transition]) -> bool:
    """3 or more raise/clear cycles within 60 s (ISA-18.2-2016 and EEMUA 191 performance metrics; from memory)."""
    raises = [tr.t for tr in trs if tr.event == "raise"]
    return any(raises[i + 2] - raises[i] <= 60.0 for i in range(len(raises) - 2))


def test_deadband_reduces_chattering():
    rng = np.random.default_rng(11)
    n = int(120 * RATE)
    # a value hovering at the limit with measurement noise, then back to normal
    values = np.r_[1.0 + rng.normal(0, 0.03, n), np.full(50, 0.5)]
    without = run(point(limit=1.0), values)
    with_db = run(point(limit=1.0, deadband=0.15), values)
    assert _chattering(without)
    assert not _chattering(with_db)
    assert len(with_db) < len(without)
    assert events(with_db)[-1][0] == "clear"


def test_on_delay_reduces_chattering():
    rng = np.random.default_rng(12)
    values = 1.0 + rng.normal(0, 0.03, int(120 * RATE))
    assert len(run(point(limit=1.0, on_delay=3.0), values)) < len(run(point(limit=1.0), values))


# --- several points, ordering --------------------------------------------------------------------------------------


def test_several_points_sorted_by_time_and_independent():
    warn = point(limit=0.8, level="warning", priority="low")
    alarm = point(limit=1.0, level="alarm", priority="high")
    other = point(limit=1.0, kind="slip", object_id="idler_3")
    eng = AlarmEngine([warn, alarm, other])
    t = times(40)
    v = steps((0.0, 1), (0.9, 1), (1.2, 1), (0.0, 1))
    results = {("traction", "pull_1"): result(v)}  # no result for slip: that point is left alone
    trs = eng.evaluate(t, results, np.full(40, RUNNING, np.int8))
    assert [(tr.key, tr.event, seconds(tr)) for tr in trs] == [
        ("traction:pull_1:warning", "raise", 1.0),
        ("traction:pull_1:alarm", "raise", 2.0),
        ("traction:pull_1:warning", "clear", 3.0),
        ("traction:pull_1:alarm", "clear", 3.0),
    ]
    assert [p.key for p in eng.active()] == []
    assert other not in eng.active()


def test_active_lists_raised_points():
    p = point()
    eng = AlarmEngine([p])
    eng.evaluate(times(5), {(p.kind, p.object_id): result(np.full(5, 2.0))}, np.full(5, RUNNING, np.int8))
    assert eng.active() == [p]


def test_unknown_direction_is_an_error():
    with pytest.raises(ValueError, match="direction"):
        run(point(direction="sideways"), [1.0])


# --- block-size invariance -----------------------------------------------------------------------------------------


def _as_tuples(trs: list[Transition]) -> list[tuple]:
    def nan_safe(x: float) -> float | None:
        return None if math.isnan(x) else x

    return [(tr.t, tr.key, tr.event, nan_safe(tr.value), tr.line_state, nan_safe(tr.peak)) for tr in trs]


def _series(seed: int, n: int, gaps: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Values wandering around 1.0 (an AR(1) process, so they keep crossing the limit), with stretches of
    invalid and line-state-gated frames and a random line state per frame."""
    rng = np.random.default_rng(seed)
    e = np.zeros(n)
    noise = rng.normal(0, 0.08, n)
    for i in range(n):
        e[i] = (0.95 * e[i - 1] if i else 0.0) + noise[i]
    values = 1.0 + e
    reasons = np.zeros(n, dtype=np.int8)
    for _ in range(gaps):
        a = int(rng.integers(0, n))
        reasons[a: a + int(rng.integers(1, 40))] = int(rng.choice([Reason.INPUT_BAD, Reason.LINE_STATE,
                                                                   Reason.OUT_OF_DOMAIN]))
    line_state = rng.choice([int(s) for s in LineState], n).astype(np.int8)
    return values, reasons, line_state


@st.composite
def scenarios(draw):
    n = draw(st.integers(1, 400))
    values, reasons, line_state = _series(draw(st.integers(0, 2**32 - 1)), n, draw(st.integers(0, 4)))
    direction = draw(st.sampled_from(["high", "low", "abs"]))
    p = point(limit=draw(st.sampled_from([0.9, 1.0, 1.2])), direction=direction,
              deadband=draw(st.sampled_from([0.0, 0.05, 0.2])),
              on_delay=draw(st.sampled_from([0.0, 0.1, 0.5, 2.0])),
              off_delay=draw(st.sampled_from([0.0, 0.1, 0.5, 2.0])))
    blocks = draw(st.lists(st.integers(1, 60), min_size=1, max_size=50))
    return p, values, reasons, line_state, blocks


@settings(max_examples=300, deadline=None)
@given(scenarios())
def test_block_size_invariance(sc):
    p, values, reasons, line_state, blocks = sc
    one = run(p, values, reasons, line_state)
    many = run(p, values, reasons, line_state, blocks=blocks)
    singles = run(p, values, reasons, line_state, blocks=[1])
    assert _as_tuples(many) == _as_tuples(one)
    assert _as_tuples(singles) == _as_tuples(one)


@pytest.mark.parametrize("direction", ["high", "low", "abs"])
def test_block_size_invariance_series_has_transitions(direction):
    # guard for the property test: the generated kind of series raises and clears, also across gaps
    values, reasons, line_state = _series(5, 400, 3)
    p = point(limit=1.0, direction=direction, deadband=0.05, on_delay=0.5, off_delay=0.5)
    trs = run(p, values, reasons, line_state)
    assert [tr.event for tr in trs].count("raise") >= 2
    assert [tr.event for tr in trs].count("clear") >= 1
    assert _as_tuples(trs) == _as_tuples(run(p, values, reasons, line_state, blocks=[7, 13, 1, 50]))


# --- carried on after a restart ------------------------------------------------------------------------------------


def _restored_run(values, reasons) -> list[Transition]:
    p = point(limit=1.0)
    eng = AlarmEngine([p])
    assert eng.restore(p.key, since=float(times(1, start=-100)[0]))
    n = len(values)
    res = result(values, reasons)
    return eng.evaluate(times(n), {(p.kind, p.object_id): res}, np.full(n, RUNNING, dtype=np.int8))


def test_carried_on_alarm_is_not_cleared_by_the_restart_line_state_gate():
    # After a restart the line state is not known yet and the check is gated; that is no evaluation, so the alarm
    # the previous run left active stays active (ISA-18.2 / IEC 62682: an alarm returns to normal when its
    # condition is found clear, from memory). It clears only where the check is valid and below its limit.
    gated, ok = int(Reason.LINE_STATE), int(Reason.OK)
    trs = _restored_run([0, 0, 0, 2.0, 2.0, 0.2, 0.2], [gated, gated, gated, ok, ok, ok, ok])
    assert [(tr.event, round(tr.t * RATE) - T0_FRAME) for tr in trs] == [("clear", 5)]


def test_carried_on_alarm_found_clear_on_its_first_valid_frame_clears_there():
    gated, ok = int(Reason.LINE_STATE), int(Reason.OK)
    trs = _restored_run([0, 0, 0.2, 0.2], [gated, gated, ok, ok])
    assert [(tr.event, round(tr.t * RATE) - T0_FRAME) for tr in trs] == [("clear", 2)]


def test_after_its_first_valid_frame_a_carried_on_alarm_is_gated_as_any_other():
    gated, ok = int(Reason.LINE_STATE), int(Reason.OK)
    trs = _restored_run([2.0, 0, 0], [ok, gated, gated])
    assert [(tr.event, round(tr.t * RATE) - T0_FRAME) for tr in trs] == [("clear", 1)]


# --- the value at a raise is beyond its limit; a clear follows off_delay back past the deadband ----------------------


def _beyond(values: np.ndarray, p: AlarmPoint, threshold: float) -> np.ndarray:
    """True where the value is at or beyond ``threshold`` on the abnormal side of the point's direction."""
    if p.direction == "high":
        return values >= threshold
    if p.direction == "low":
        return values <= threshold
    return np.abs(values) >= threshold


@settings(max_examples=300, deadline=None)
@given(scenarios())
def test_raise_beyond_limit_and_clear_after_off_delay_back_past_the_band(sc):
    # ANSI/ISA-18.2-2016 / IEC 62682 nuisance-alarm tools (from memory): the on-delay counts time beyond the limit,
    # the deadband and off-delay apply to the return to normal. Invalid frames hold; gated frames count as normal.
    p, values, reasons, line_state, blocks = sc
    trs = run(p, values, reasons, line_state, blocks=blocks)
    t = times(len(values))
    valid = reasons == int(Reason.OK)
    gated = reasons == int(Reason.LINE_STATE)
    v = np.where(valid, values, np.nan)
    with np.errstate(invalid="ignore"):
        beyond = valid & _beyond(v, p, p.limit)  # "low": limit itself is the threshold
        back = p.limit + p.deadband if p.direction == "low" else p.limit - p.deadband
        still = valid & _beyond(v, p, back)  # not yet back past the band
    tol = 1e-6
    assert [tr.event for tr in trs] == ["raise", "clear"] * (len(trs) // 2) + ["raise"] * (len(trs) % 2)
    for tr in trs:
        k = int(np.flatnonzero(np.isclose(t, tr.t, rtol=0, atol=tol))[0])
        if tr.event == "raise":
            assert valid[k] and beyond[k], (tr, values[k])
            assert tr.t - t[0] >= p.on_delay - tol
            window = (t >= tr.t - p.on_delay + tol) & (t <= tr.t)
            assert not (window & valid & ~beyond).any() and not (window & gated).any()
        else:
            window = (t >= tr.t - p.off_delay + tol) & (t <= tr.t)
            assert not (window & still).any()
            assert math.isfinite(tr.peak) and _beyond(np.array([tr.peak]), p, p.limit)[0]


# --- first-out groups ----------------------------------------------------------------------------------------------


def _run_many(points: list[AlarmPoint], series: dict[tuple[str, str], np.ndarray]) -> list[Transition]:
    n = len(next(iter(series.values())))
    eng = AlarmEngine(points)
    return eng.evaluate(times(n), {k: result(v) for k, v in series.items()}, np.full(n, RUNNING, np.int8))


def test_first_out_marks_the_first_raise_of_a_quiet_group():
    # ISA-18.2 first-out alarming (from memory): of a group of related alarms, the first to sound is marked.
    a = AlarmPoint(**{**point(kind="traction", object_id="R1a").__dict__, "groups": ("unwind",)})
    b = AlarmPoint(**{**point(kind="slip", object_id="R1b").__dict__, "groups": ("unwind",)})
    c = point(kind="draw", object_id="S3")  # in no group
    va = steps((0.0, 1), (2.0, 3), (0.0, 4))  # raise 1.0, clear 4.0
    vb = steps((0.0, 2), (2.0, 2), (0.0, 1), (2.0, 1), (0.0, 2))  # raise 2.0, clear 4.0, raise 5.0, clear 6.0
    vc = steps((2.0, 1), (0.0, 7))
    trs = _run_many([a, b, c], {("traction", "R1a"): va, ("slip", "R1b"): vb, ("draw", "S3"): vc})
    got = [(tr.key, tr.event, seconds(tr), tr.first_out) for tr in trs]
    assert got == [
        ("draw:S3:alarm", "raise", 0.0, False),
        ("traction:R1a:alarm", "raise", 1.0, True),  # the group is quiet: first out
        ("draw:S3:alarm", "clear", 1.0, False),
        ("slip:R1b:alarm", "raise", 2.0, False),  # R1a still active: not first
        ("traction:R1a:alarm", "clear", 4.0, False),
        ("slip:R1b:alarm", "clear", 4.0, False),
        ("slip:R1b:alarm", "raise", 5.0, True),  # all clear since 4.0: first out again
        ("slip:R1b:alarm", "clear", 6.0, False),
    ]


def test_first_out_raises_on_the_same_frame_are_all_first():
    a = AlarmPoint(**{**point(object_id="R1a").__dict__, "groups": ("unwind", "all")})
    b = AlarmPoint(**{**point(object_id="R1b").__dict__, "groups": ("unwind",)})
    v = steps((0.0, 1), (2.0, 1))
    trs = _run_many([a, b], {("traction", "R1a"): v, ("traction", "R1b"): v})
    assert [(tr.key, seconds(tr), tr.first_out) for tr in trs] == [
        ("traction:R1a:alarm", 1.0, True), ("traction:R1b:alarm", 1.0, True)]


def test_first_out_across_blocks_remembers_the_active_group():
    a = AlarmPoint(**{**point(object_id="R1a").__dict__, "groups": ("unwind",)})
    b = AlarmPoint(**{**point(object_id="R1b").__dict__, "groups": ("unwind",)})
    eng = AlarmEngine([a, b])
    ls = np.full(10, RUNNING, np.int8)
    first = eng.evaluate(times(10), {("traction", "R1a"): result(np.full(10, 2.0)),
                                     ("traction", "R1b"): result(np.zeros(10))}, ls)
    second = eng.evaluate(times(10, start=10), {("traction", "R1a"): result(np.full(10, 2.0)),
                                                ("traction", "R1b"): result(np.full(10, 2.0))}, ls)
    assert [(tr.key, tr.first_out) for tr in first] == [("traction:R1a:alarm", True)]
    assert [(tr.key, tr.first_out) for tr in second] == [("traction:R1b:alarm", False)]


# --- chattering ----------------------------------------------------------------------------------------------------


def test_chattering_helper_counts_raises_in_the_trailing_window():
    # 3 or more raises within 60 s (ISA-18.2 TR / EEMUA 191; from memory)
    assert chattering((), 0.0, 3, 60.0) == ((0.0,), False)
    assert chattering((0.0, 20.0), 60.0, 3, 60.0) == ((0.0, 20.0, 60.0), True)  # 60 s apart: within
    assert chattering((0.0, 20.0), 60.1, 3, 60.0) == ((20.0, 60.1), False)
    assert chattering((10.0, 20.0, 30.0), 31.0, 3, 60.0)[1] is True


def _spikes(*at: float, width: float = 0.5, total: float = 32.0) -> np.ndarray:
    """2.0 for ``width`` seconds from each of ``at``, 0 elsewhere."""
    v = np.zeros(round(total * RATE))
    for a in at:
        v[round(a * RATE): round((a + width) * RATE)] = 2.0
    return v


def test_chattering_raises_the_off_delay_for_the_hold():
    # remedy (common practice, no source): while it chatters, the alarm's off-delay is at least chatter off_delay.
    # count 3 in 10 s, off-delay 3 s for 20 s. Spikes of 0.5 s at 0, 2, 4, 20, 30 s; limit 1, no delays.
    # raise 4 s is the third within 10 s: chattering, hold until 24 s -> returns starting at 4.5 and 20.5 s need 3 s;
    # the return at 30.5 s is past the hold.
    p = point()
    eng = AlarmEngine([p], ChatterSettings(count=3, window=10.0, off_delay=3.0, hold=20.0))
    v = _spikes(0, 2, 4, 20, 30)
    trs = eng.evaluate(times(v.size), {(p.kind, p.object_id): result(v)}, np.full(v.size, RUNNING, np.int8))
    assert [(tr.event, seconds(tr), tr.chattering) for tr in trs] == [
        ("raise", 0.0, False), ("clear", 0.5, False), ("raise", 2.0, False), ("clear", 2.5, False),
        ("raise", 4.0, True), ("clear", 7.5, False), ("raise", 20.0, False), ("clear", 23.5, False),
        ("raise", 30.0, False), ("clear", 30.5, False)]


def test_chattering_reported_without_the_remedy():
    p = point()
    eng = AlarmEngine([p], ChatterSettings(count=3, window=10.0, off_delay=0.0, hold=20.0))
    v = _spikes(0, 2, 4)
    trs = eng.evaluate(times(v.size), {(p.kind, p.object_id): result(v)}, np.full(v.size, RUNNING, np.int8))
    assert [(tr.event, seconds(tr), tr.chattering) for tr in trs] == [
        ("raise", 0.0, False), ("clear", 0.5, False), ("raise", 2.0, False), ("clear", 2.5, False),
        ("raise", 4.0, True), ("clear", 4.5, False)]


def test_latched_and_groups_default_off():
    p = point()
    assert p.latched is False and p.groups == ()


class _EveryPoint(AlarmEngine):
    """The engine without its quiet pre-check: every point evaluated frame by frame in every block."""

    def _engaged(self, p, worst):
        return True


@settings(max_examples=150, deadline=None)
@given(data=st.data())
def test_the_quiet_pre_check_over_all_points_changes_no_transition(data):
    # The engine skips, per block, every point that is neither pending nor standing and has no valid value beyond
    # its limit (one matrix reduction over all points). Over random values, invalid frames (NaN too), directions,
    # deadbands and delays, it gives exactly the transitions of an engine that evaluates every point.
    k = data.draw(st.integers(1, 4))
    n = data.draw(st.integers(5, 80))
    points, results = [], {}
    for i in range(k):
        direction = data.draw(st.sampled_from(["high", "low", "abs"]))
        limit = data.draw(st.sampled_from([-1.0, 0.5, 1.0, 2.0]))
        deadband = data.draw(st.sampled_from([0.0, 0.2]))
        for level, lim in (("warning", limit - 0.3 if direction != "low" else limit + 0.3), ("alarm", limit)):
            points.append(point(kind="traction", object_id=f"r{i}", level=level, limit=lim, direction=direction,
                                deadband=deadband, on_delay=data.draw(st.sampled_from([0.0, 0.3])),
                                off_delay=data.draw(st.sampled_from([0.0, 0.5]))))
        values = data.draw(st.lists(st.sampled_from([-3.0, -1.5, -1.0, -0.2, 0.0, 0.5, 0.9, 1.0, 1.2, 2.5, np.nan]),
                                    min_size=n, max_size=n))
        reasons = data.draw(st.lists(st.sampled_from([0, 0, 0, 1, 2]), min_size=n, max_size=n))
        v = np.asarray(values, dtype=float)
        results[("traction", f"r{i}")] = CheckResult(value=v, reason=np.asarray(reasons, dtype=np.int8))
    t = times(n)
    ls = np.full(n, RUNNING, dtype=np.int8)
    fast, every = AlarmEngine(points), _EveryPoint(points)
    cuts = sorted(set(data.draw(st.lists(st.integers(1, n - 1), max_size=4))))
    for a, b in itertools.pairwise([0, *cuts, n]):
        part = {key: CheckResult(value=r.value[a:b], reason=r.reason[a:b]) for key, r in results.items()}
        got, want = fast.evaluate(t[a:b], part, ls[a:b]), every.evaluate(t[a:b], part, ls[a:b])
        assert [(tr.key, tr.event, tr.t) for tr in got] == [(tr.key, tr.event, tr.t) for tr in want]
