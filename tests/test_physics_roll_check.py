"""The roll-build check (rules/woundroll.py RollDiameterCheck) on rolls built wrap by wrap.

The reference roll is built one wrap at a time: each wrap adds two calipers to the diameter and its
mid-line circumference pi (D + t) to the length, so a length counter and a diameter sensor read what the
roll really is, without the code's area formula. The area relation the check calibrates,
L = pi (D^2 - Dc^2) / (4 t) (conservation of annulus area; Roisum, *The Mechanics of Winding*, TAPPI
Press 1994, from memory), must recover the caliper of that roll, follow it while the roll builds as
calibrated, see a caliper change within the roll, and refuse calibrations and predictions outside its
domain.
"""

from __future__ import annotations

import numpy as np
import pytest
from hostile import no_runtime_warning
from spanwatch.rules.base import Block, LineState, Reason, Signal, TagFrames
from spanwatch.rules.woundroll import RollDiameterCheck, local_slope

CORE = 0.0762  # 3 in core
T = 31.7e-6  # 1.2 mil BOPP with a 4 % stack factor
STEP = 0.1  # m of web per frame (5 m/s at 50 Hz)


def wrap_by_wrap(calipers: np.ndarray, start_diameter: float) -> tuple[np.ndarray, np.ndarray]:
    """Cumulative length and diameter after each wrap of a rewind, wrap k of caliper calipers[k]."""
    d_before = start_diameter + 2 * np.concatenate([[0.0], np.cumsum(calipers)])  # diameter before each wrap
    lengths = np.concatenate([[0.0], np.cumsum(np.pi * (d_before[:-1] + calipers))])  # mid-line circumferences
    return lengths, d_before


def rewind_readings(total: float, caliper_at, start_diameter: float = CORE) -> tuple[np.ndarray, np.ndarray]:
    """Length counter and diameter sensor every STEP metres of a rewind; ``caliper_at(wound length)`` gives the
    caliper of the wrap that starts there. Within a wrap the diameter is interpolated (the sensor sees the spiral)."""
    cal, lengths = [], [0.0]
    d = start_diameter
    while lengths[-1] < total + 1.0:
        t = caliper_at(lengths[-1])
        cal.append(t)
        lengths.append(lengths[-1] + np.pi * (d + t))
        d += 2 * t
    cum, dia = wrap_by_wrap(np.array(cal), start_diameter)
    length = np.arange(0.0, total, STEP)
    return length, np.interp(length, cum, dia)


def block_of(length, diameter, *, start=None, frozen_t0=0.0):
    n = length.size
    ok = np.ones(n, dtype=bool)
    tags = TagFrames(("x",), np.zeros((n, 1)), np.zeros((n, 1), dtype=np.int8), np.zeros((n, 1)))
    roll_start = {"w": start} if start is not None else {}
    return Block(t=frozen_t0 + np.arange(n) / 50.0, signals={"diameter/w": Signal(diameter, ok),
                                                            "length/w": Signal(length, ok)},
                 line_state=np.full(n, int(LineState.RUNNING), dtype=np.int8), tags=tags, roll_start=roll_start)


def make_check(rewind=True, stack=1.04, single=T / 1.04, tolerance=0.1):
    return RollDiameterCheck("w", rewind=rewind, core_diameter=CORE, nominal_caliper=single, stack_factor=stack,
                             calibration_length=300.0, caliper_drift=0.02, diameter_acc=(1e-3, 0.0),
                             length_acc=(0.0, 0.002), stack_factor_tolerance=tolerance)


def run(check, length, diameter, size=None, **kw):
    size = size or length.size
    parts = []
    for lo in range(0, length.size, size):
        sl = slice(lo, lo + size)
        start = kw.get("start")
        with no_runtime_warning():
            parts.append(check.update(block_of(length[sl], diameter[sl], start=None if start is None else start[sl],
                                               frozen_t0=lo / 50.0)))
    out = {k: np.concatenate([p.extras[k] for p in parts]) for k in parts[0].extras}
    out["value"] = np.concatenate([p.value for p in parts])
    out["reason"] = np.concatenate([p.reason for p in parts])
    return out


def test_calibration_recovers_the_caliper_of_a_roll_built_wrap_by_wrap():
    length, diameter = rewind_readings(1500.0, lambda _l: T)
    res = run(make_check(), length, diameter)
    ok = res["reason"] == int(Reason.OK)
    assert ok.sum() > 0.7 * length.size  # judged after its 300 m of calibration
    np.testing.assert_allclose(res["caliper_eff"][ok], T, rtol=2e-3)
    assert np.nanmax(np.abs(res["value"])) < 0.5  # the roll builds as calibrated: well inside the band
    full = np.isfinite(res["caliper_ratio"])
    assert full.sum() > 0.5 * length.size
    np.testing.assert_allclose(res["caliper_ratio"][full], 1.0, atol=5e-3)
    # nominal = caliper x stack factor: no departure, no flag
    np.testing.assert_allclose(res["caliper_nominal_dev"][ok], 0.0, atol=3e-3)
    assert np.all(res["caliper_flag"][ok] == 0.0)


def test_block_size_does_not_change_the_result():
    length, diameter = rewind_readings(900.0, lambda _l: T)
    whole = run(make_check(), length, diameter)
    parts = run(make_check(), length, diameter, size=137)
    np.testing.assert_array_equal(whole["reason"], parts["reason"])
    np.testing.assert_allclose(whole["value"], parts["value"], rtol=1e-9, atol=1e-12, equal_nan=True)
    np.testing.assert_allclose(whole["caliper_ratio"], parts["caliper_ratio"], rtol=1e-6, equal_nan=True)


def test_a_caliper_change_within_the_roll_shows_in_caliper_ratio():
    # After 800 m the web is 15 % thicker: the local slope of D^2 on length (over the last 300 m) rises by 15 %
    # while the residual against the first metres grows only slowly.
    length, diameter = rewind_readings(1600.0, lambda wound: T if wound < 800.0 else 1.15 * T)
    res = run(make_check(), length, diameter)
    before = (length > 500) & (length < 790)
    after = length > 1150  # the 300 m window holds only the thicker web
    np.testing.assert_allclose(res["caliper_ratio"][before], 1.0, atol=5e-3)
    np.testing.assert_allclose(res["caliper_ratio"][after], 1.15, atol=5e-3)


def test_caliper_far_from_nominal_is_flagged():
    # The line file says caliper x stack factor = T / 1.2: the roll's calibrated caliper is 20 % above nominal,
    # beyond the 10 % stack_factor_tolerance.
    length, diameter = rewind_readings(600.0, lambda _l: T)
    res = run(make_check(stack=1.0, single=T / 1.2), length, diameter)
    ok = res["reason"] == int(Reason.OK)
    np.testing.assert_allclose(res["caliper_nominal_dev"][ok], 0.2, atol=3e-3)
    assert np.all(res["caliper_flag"][ok] == 1.0)


def test_a_roll_unlike_the_earlier_rolls_is_flagged():
    # Three rolls of caliper T, then one 15 % thicker: it departs from the median of the earlier rolls on this
    # winder by more than the 10 % tolerance. The nominal sits half-way (1.075 T), so every roll is within 10 % of
    # it and only the history flags the last one.
    rolls = [rewind_readings(500.0, lambda _l, c=c: c) for c in (T, T, T, 1.15 * T)]
    length = np.concatenate([r[0] for r in rolls])
    diameter = np.concatenate([r[1] for r in rolls])
    start = np.zeros(length.size, dtype=bool)
    start[np.cumsum([0] + [r[0].size for r in rolls[:-1]])] = True
    res = run(make_check(stack=1.075, single=T), length, diameter, size=700, start=start)
    ok = res["reason"] == int(Reason.OK)
    roll = np.cumsum(start) - 1
    assert np.all(np.isnan(res["caliper_history_dev"][ok & (roll == 0)]))  # nothing to compare the first with
    np.testing.assert_allclose(res["caliper_history_dev"][ok & (roll == 2)], 0.0, atol=3e-3)
    assert np.all(res["caliper_flag"][ok & (roll < 3)] == 0.0)
    np.testing.assert_allclose(res["caliper_history_dev"][ok & (roll == 3)], 0.15, atol=5e-3)
    assert np.all(res["caliper_flag"][ok & (roll == 3)] == 1.0)


def test_frozen_diameter_calibration_is_out_of_domain_never_ok():
    # A diameter sensor stuck at one value calibrates a caliper of about zero: no stack of any web, so the roll
    # is not judged on it (OUT_OF_DOMAIN, flag implausible), however long it runs.
    length = np.arange(0.0, 1000.0, STEP)
    diameter = np.full(length.size, 0.3)
    res = run(make_check(), length, diameter)
    assert not np.any(res["reason"] == int(Reason.OK))
    calibrated = length >= 300.0
    assert np.all(res["reason"][calibrated] == int(Reason.OUT_OF_DOMAIN))
    assert np.all(res["implausible"][calibrated] == 1.0)


def test_unwind_counted_past_its_core_is_out_of_domain_not_zero():
    # An unwind from 0.3 m; after its 300 m of calibration the length counter counts three times the web paid
    # out. Its prediction reaches the core while the roll still holds web: from there the area relation has no
    # diameter to offer, so the frames are OUT_OF_DOMAIN with the flag past_empty (not a prediction of 0 m).
    d0 = 0.3
    content = np.pi * (d0**2 - CORE**2) / (4 * T)  # reference: the roll's content from the wrap count below
    cum, dia = wrap_by_wrap(np.full(int((d0 - CORE) / (2 * T)), T), CORE)
    assert content == pytest.approx(cum[-1], rel=1e-3)
    paid = np.arange(0.0, 0.8 * cum[-1], STEP)
    diameter = np.interp(cum[-1] - paid, cum, dia)  # what is left on the roll
    counted = np.where(paid < 320.0, paid, 320.0 + 3.0 * (paid - 320.0))
    res = run(make_check(rewind=False), counted, diameter)
    past = res["past_empty"] == 1.0
    assert past.any()
    first = int(np.argmax(past))
    assert counted[first] > cum[-1] * 0.9  # the counter claims (nearly) the whole roll by then
    assert np.all(res["reason"][first:][past[first:]] == int(Reason.OUT_OF_DOMAIN))
    assert not np.any(res["reason"][first:] == int(Reason.OK))
    assert np.all(np.isnan(res["value"][past]))


def test_local_slope_against_numpy_polyfit():
    rng = np.random.default_rng(3)
    x = np.cumsum(rng.uniform(0.05, 0.15, 400))
    y = 0.02 + 4e-5 * x + rng.normal(0, 1e-5, x.size)
    start = np.searchsorted(x, x - 10.0)
    got = local_slope(x, y, start)
    for k in (50, 199, 399):
        ref = np.polyfit(x[start[k]:k + 1], y[start[k]:k + 1], 1)[0]
        assert got[k] == pytest.approx(ref, rel=1e-8)


def _rolls_with_grades(calipers, grades):
    rolls = [rewind_readings(500.0, lambda _l, c=c: c) for c in calipers]
    length = np.concatenate([r[0] for r in rolls])
    diameter = np.concatenate([r[1] for r in rolls])
    start = np.zeros(length.size, dtype=bool)
    start[np.cumsum([0] + [r[0].size for r in rolls[:-1]])] = True
    grade = np.concatenate([np.full(r[0].size, float(g)) for r, g in zip(rolls, grades, strict=True)])
    return length, diameter, start, grade


def _run_with_grade(check, length, diameter, start, grade, size=700):
    parts = []
    for lo in range(0, length.size, size):
        sl = slice(lo, lo + size)
        b = block_of(length[sl], diameter[sl], start=start[sl], frozen_t0=lo / 50.0)
        b.signals["grade/line"] = Signal(grade[sl], np.ones(grade[sl].size, dtype=bool))
        with no_runtime_warning():
            parts.append((b, check.update(b)))
    return parts


def test_a_new_grade_is_compared_with_rolls_of_its_own_grade_only():
    # Two rolls of grade 1 (caliper T), then two of grade 2, 6 % thicker (a new lot): the first roll of grade 2 has
    # nothing of its grade to compare with (NaN), the second compares with the first of grade 2 (0), not with
    # grade 1 (+6 %).
    length, diameter, start, grade = _rolls_with_grades((T, T, 1.06 * T, 1.06 * T), (1, 1, 2, 2))
    parts = _run_with_grade(make_check(stack=1.03, single=T), length, diameter, start, grade)
    res = {k: np.concatenate([p.extras[k] for _, p in parts]) for k in ("caliper_history_dev",)}
    reason = np.concatenate([p.reason for _, p in parts])
    ok = reason == int(Reason.OK)
    roll = np.cumsum(start) - 1
    assert np.all(np.isnan(res["caliper_history_dev"][ok & (roll == 2)]))
    np.testing.assert_allclose(res["caliper_history_dev"][ok & (roll == 3)], 0.0, atol=3e-3)
    np.testing.assert_allclose(res["caliper_history_dev"][ok & (roll == 1)], 0.0, atol=3e-3)


def test_roll_caliper_alarm_value_in_units_of_its_tolerances():
    # Three rolls of T, then one 5 % thicker of the same grade: within the 10 % nominal tolerance but beyond twice
    # the 2 % caliper drift from its grade: 0.05 / 0.04 = 1.25 x tolerance. The first roll (no grade history) is
    # judged on the nominal alone: |1 - 1.0 / 1.03| / 0.1 = 0.29.
    from spanwatch.rules.rollcaliper import RollCaliperCheck

    length, diameter, start, grade = _rolls_with_grades((T, T, T, 1.05 * T), (1, 1, 1, 1))
    check = make_check(stack=1.03, single=T)
    rc = RollCaliperCheck(check, nominal_tolerance=0.1, roll_tolerance=0.04)
    values, reasons = [], []
    for b, res in _run_with_grade(check, length, diameter, start, grade):
        b.results = {("roll_diameter", "w"): res}
        out = rc.update(b)
        values.append(out.value)
        reasons.append(out.reason)
    value, reason = np.concatenate(values), np.concatenate(reasons)
    ok = reason == int(Reason.OK)
    roll = np.cumsum(start) - 1
    np.testing.assert_allclose(value[ok & (roll == 0)], abs(1.0 / 1.03 - 1.0) / 0.1, atol=0.03)
    np.testing.assert_allclose(value[ok & (roll == 3)], 0.05 / 0.04, atol=0.08)
    assert (reason[roll == 0][:10] == int(Reason.WARMING_UP)).all()  # before the roll is calibrated
