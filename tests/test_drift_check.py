"""The drift check kind: which residual it reads, when it learns, gates, re-learns and follows the operating point,
and what a raise carries into the alarm engine and the history.

The detectors' statistics themselves are tested against published run lengths in test_drift_charts.py and
test_drift_design.py; here the wrapper's behaviour is checked on hand-made residual streams.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from spanwatch.rules.alarms import AlarmEngine, AlarmPoint
from spanwatch.rules.base import Block, CheckResult, LineState, Reason, Signal, TagFrames
from spanwatch.rules.driftcheck import RESIDUALS, DriftCheck, Residual, residual_of

RATE = 50.0  # Hz
BLOCK = 500  # frames per block (10 s)


class _Source:
    """A stand-in for the check that owns the physics: only what a drift check reads of it."""

    def __init__(self, kind: str = "draw", object_id: str = "s5") -> None:
        self.kind, self.object_id = kind, object_id
        self.inputs = ("tension/s5",)
        self.blames = ("s5", "q2.s5.tension", "pull_1", "pull_2")


def _drift(residual: Residual | None = None, **kw: float) -> DriftCheck:
    r = residual or next(x for x in RESIDUALS if x.name == "draw")
    args = dict(detector="cusum", period=10.0, learn=300.0, shift=1.0, arl0=1e5, sigma_floor=0.0, speed_band=0.1)
    args.update(kw)
    return DriftCheck(_Source(r.source), r, **args)  # type: ignore[arg-type]


def _blocks(x: np.ndarray, *, speed: float | np.ndarray = 5.0, state: int | np.ndarray = LineState.RUNNING,
            valid: np.ndarray | None = None, roll_start_at: int | None = None, t0: float = 1.0e9,
            source: tuple[str, str] = ("draw", "s5"), size: int = BLOCK) -> list[Block]:
    """Blocks of 10 s carrying ``x`` as the ``residual`` extra of a source result."""
    n = x.size
    t = t0 + np.arange(n) / RATE
    sp = np.broadcast_to(np.asarray(speed, dtype=float), (n,))
    st = np.broadcast_to(np.asarray(state, dtype=np.int8), (n,))
    ok = np.ones(n, dtype=bool) if valid is None else valid
    out = []
    for i in range(0, n, size):
        sl = slice(i, min(n, i + size))
        m = sl.stop - sl.start
        reason = np.where(ok[sl], int(Reason.OK), int(Reason.INPUT_BAD)).astype(np.int8)
        val = np.where(ok[sl], x[sl], np.nan)
        res = CheckResult(val, reason, {"residual": val, "caliper_ratio": val, "utilisation": val})
        b = Block(t=t[sl], signals={"speed/web": Signal(sp[sl].copy(), np.ones(m, dtype=bool))},
                  line_state=st[sl].copy(), tags=TagFrames((), np.zeros((m, 0)), np.zeros((m, 0), np.int8),
                                                           np.zeros((m, 0))))
        b.results = {source: res}
        if roll_start_at is not None:
            rs = np.zeros(m, dtype=bool)
            if sl.start <= roll_start_at < sl.stop:
                rs[roll_start_at - sl.start] = True
            b.roll_start = {"rewind": rs}
        out.append(b)
    return out


def _run(check: DriftCheck, blocks: list[Block]) -> CheckResult:
    parts = [check.update(b) for b in blocks]
    return CheckResult(np.concatenate([p.value for p in parts]), np.concatenate([p.reason for p in parts]),
                       {k: np.concatenate([p.extras[k] for p in parts]) for k in parts[0].extras})


def _noise(seconds: float, sigma: float = 1.0, seed: int = 3) -> np.ndarray:
    """A residual whose 10 s batch means are independent N(0, sigma): one level per batch plus small frame noise."""
    rng = np.random.default_rng(seed)
    n = int(seconds * RATE)
    levels = np.repeat(sigma * rng.standard_normal(n // BLOCK + 1), BLOCK)[:n]
    return levels + 0.01 * sigma * rng.standard_normal(n)


def test_learns_then_detects_a_step_and_names_its_size_and_change_time() -> None:
    check = _drift()
    x = _noise(1800.0)
    step_at = 900.0
    x[int(step_at * RATE):] += 3.0  # a 3-sigma step after 15 min
    r = _run(check, _blocks(x))
    t = 1.0e9 + np.arange(x.size) / RATE
    learning = r.reason == int(Reason.WARMING_UP)
    assert learning[: int(290 * RATE)].all()  # the first 300 s of batches are the baseline
    assert (r.reason[int(320 * RATE):] == int(Reason.OK)).all()
    hit = np.flatnonzero(np.nan_to_num(r.value) >= 1.0)
    assert hit.size and t[hit[0]] > 1.0e9 + step_at  # no false alarm before the step (seeded)
    delay = t[hit[0]] - (1.0e9 + step_at)
    assert delay < 300.0  # a 3-sigma step: a few batches (CUSUM ARL with k = 0.5 at a 3 sigma shift is ~3)
    first = hit[0]
    assert abs(r.extras["change_time"][first] - (1.0e9 + step_at)) <= 20.0  # within two batches of the truth
    assert 2.0 < r.extras["shift"][first] < 4.5  # the size in the residual's unit (N/m here)
    assert check.blames == ("s5", "q2.s5.tension", "pull_1", "pull_2")
    assert check.object_id == "draw.s5"


def test_frames_outside_running_or_invalid_never_feed_the_baseline() -> None:
    check = _drift()
    x = _noise(1200.0)
    state = np.full(x.size, int(LineState.RUNNING), dtype=np.int8)
    state[: int(600 * RATE)] = int(LineState.STOPPED)
    x[: int(600 * RATE)] = 500.0  # what a stopped line shows must not become the baseline
    valid = np.ones(x.size, dtype=bool)
    valid[int(700 * RATE): int(760 * RATE)] = False
    r = _run(check, _blocks(x, state=state, valid=valid))
    assert (r.reason[: int(600 * RATE)] == int(Reason.LINE_STATE)).all()
    assert (r.reason[int(700 * RATE): int(760 * RATE)] == int(Reason.INPUT_BAD)).all()
    assert check._monitor.baseline is not None and abs(check._monitor.baseline.mean) < 1.0


def test_hold_keeps_a_fault_out_of_the_baseline() -> None:
    check = _drift()
    check.hold = True  # an alarm stands on a thing it blames
    r = _run(check, _blocks(_noise(600.0)))
    assert check._monitor.baseline is None
    assert not (r.reason == int(Reason.OK)).any()
    check.hold = False
    _run(check, _blocks(_noise(400.0), t0=1.0e9 + 600.0))
    assert check._monitor.baseline is not None


def test_a_speed_change_is_a_new_operating_point_and_a_known_one_is_taken_back() -> None:
    check = _drift()
    x = _noise(1800.0)
    speed = np.full(x.size, 5.0)
    speed[int(600 * RATE): int(1200 * RATE)] = 6.0  # +20 %: a new operating point
    x[int(600 * RATE): int(1200 * RATE)] += 10.0  # the residual's level moves with speed: not a drift
    r = _run(check, _blocks(x, speed=speed))
    at_new = r.reason[int(600 * RATE): int(890 * RATE)]
    assert (at_new == int(Reason.WARMING_UP)).all()  # learnt afresh at 6 m/s
    assert not (np.nan_to_num(r.value) >= 1.0).any()  # the level change raised nothing
    back = r.reason[int(1200 * RATE) + BLOCK: int(1300 * RATE)]
    assert (back == int(Reason.OK)).all()  # back at 5 m/s: its baseline is taken back at once


def test_small_speed_wander_stays_on_one_operating_point() -> None:
    check = _drift()
    x = _noise(900.0)
    speed = 5.0 * (1.0 + 0.03 * np.sin(np.arange(x.size) / RATE / 60.0))
    r = _run(check, _blocks(x, speed=speed))
    assert (r.reason[int(320 * RATE):] == int(Reason.OK)).all()


def test_a_roll_change_relearns_a_wound_roll_residual_of_its_own_winder_only() -> None:
    caliper = next(r for r in RESIDUALS if r.name == "caliper")
    draw = next(r for r in RESIDUALS if r.name == "draw")
    args = dict(detector="cusum", period=10.0, learn=300.0, shift=1.0, arl0=1e5, sigma_floor=0.0, speed_band=0.1)
    cases = ((caliper, ("roll_diameter", "rewind"), "rewind", True),
             (caliper, ("roll_diameter", "unwind"), "rewind", False),  # the other winder's roll change
             (draw, ("draw", "s5"), "rewind", False))
    for residual, key, winder, relearns in cases:
        check = DriftCheck(_Source(*key), residual, **args)  # type: ignore[arg-type]
        blocks = _blocks(_noise(900.0), roll_start_at=int(600 * RATE), source=key)
        for b in blocks:
            b.roll_start = {winder: b.roll_start["rewind"]}
        r = _run(check, blocks)
        after = r.reason[int(610 * RATE): int(880 * RATE)]
        assert (after == int(Reason.WARMING_UP)).all() == relearns, (residual.name, key, winder)


def test_relearn_forgets_every_operating_point() -> None:
    check = _drift()
    _run(check, _blocks(_noise(600.0)))
    assert check._monitor.baseline is not None
    check.relearn()
    r = _run(check, _blocks(_noise(100.0), t0=1.0e9 + 600.0))
    assert (r.reason == int(Reason.WARMING_UP)).all()


def test_reset_after_a_gap_keeps_the_baseline() -> None:
    check = _drift()
    _run(check, _blocks(_noise(600.0)))
    check.reset()
    r = _run(check, _blocks(_noise(100.0, seed=4), t0=1.0e9 + 4000.0))
    assert (r.reason[BLOCK:] == int(Reason.OK)).all()


def test_missing_source_or_field_is_invalid_not_a_guess() -> None:
    check = _drift(next(r for r in RESIDUALS if r.name == "draw.gain"))  # reads the "ratio" extra
    r = _run(check, _blocks(_noise(60.0)))
    assert (r.reason == int(Reason.INPUT_BAD)).all() and np.isnan(r.value).all()
    check = _drift()
    r = _run(check, _blocks(_noise(60.0), source=("draw", "s4")))
    assert (r.reason == int(Reason.INPUT_BAD)).all()


def test_residual_names_resolve_to_their_residual() -> None:
    assert residual_of("draw.gain.s5").name == "draw.gain"  # the longest name wins
    assert residual_of("draw.s5").name == "draw"
    assert residual_of("caliper.rewind").field == "caliper_ratio"
    assert residual_of("nothing.x") is None
    assert len({r.name for r in RESIDUALS}) == len(RESIDUALS)


def test_a_raise_carries_the_change_point_and_size_through_the_alarm_engine() -> None:
    check = _drift()
    x = _noise(1500.0)
    x[int(900 * RATE):] += 4.0
    p = AlarmPoint(kind="drift", object_id=check.object_id, level="alarm", limit=1.0, direction="high",
                   deadband=0.2, on_delay=0.0, off_delay=60.0, priority="advisory", unit="x threshold", cause="",
                   consequence="", action="", response_time=3600.0, blames=check.blames, detail=check.detail)
    engine = AlarmEngine([p])
    raises = []
    for b in _blocks(x):
        res = check.update(b)
        raises += [tr for tr in engine.evaluate(b.t, {("drift", check.object_id): res}, b.line_state)
                   if tr.event == "raise"]
    assert len(raises) == 1
    detail = dict(raises[0].detail)
    assert set(detail) == {"change_time", "shift", "mean", "sigma"}
    assert abs(detail["change_time"] - (1.0e9 + 900.0)) <= 20.0
    assert 3.0 < detail["shift"] < 5.5
    assert raises[0].point.blames == ("s5", "q2.s5.tension", "pull_1", "pull_2")
    assert replace(p, detail=()).detail == ()


@pytest.mark.parametrize("detector", ["ewma", "adwin", "page_hinkley"])
def test_every_detector_runs_behind_the_same_gates(detector: str) -> None:
    check = _drift(detector=detector)
    x = _noise(1200.0)
    state = np.full(x.size, int(LineState.RUNNING), dtype=np.int8)
    state[int(400 * RATE): int(500 * RATE)] = int(LineState.STOPPED)
    r = _run(check, _blocks(x, state=state))
    assert (r.reason[int(400 * RATE): int(500 * RATE)] == int(Reason.LINE_STATE)).all()
    assert (r.reason[: int(290 * RATE)] == int(Reason.WARMING_UP)).all()
    assert (r.reason[int(900 * RATE):] == int(Reason.OK)).all()


def test_a_grade_change_relearns_every_baseline() -> None:
    check = _drift()
    x = _noise(1500.0)
    x[int(700 * RATE):] += 8.0  # the new grade's residual sits elsewhere: not a drift
    grade = np.where(np.arange(x.size) < int(700 * RATE), 1.0, 2.0)
    blocks = _blocks(x)
    for b in blocks:
        i0 = round(float(b.t[0] - 1.0e9) * RATE)
        b.signals["grade/line"] = Signal(grade[i0:i0 + b.n], np.ones(b.n, dtype=bool))
    r = _run(check, blocks)
    assert (r.reason[int(700 * RATE): int(990 * RATE)] == int(Reason.WARMING_UP)).all()
    assert not (np.nan_to_num(r.value) >= 1.0).any()
    assert (r.reason[int(1010 * RATE):] == int(Reason.OK)).all()


def test_the_result_does_not_depend_on_how_frames_are_cut_into_blocks() -> None:
    # A replay computes 60 s blocks, a daemon blocks of a fraction of a second: the same frames must give the same
    # drift output, speed changes and a step included. The speed changes pass through accelerating frames.
    x = _noise(2400.0)
    x[int(1500 * RATE):] += 3.0
    speed = np.full(x.size, 5.0)
    state = np.full(x.size, int(LineState.RUNNING), dtype=np.int8)
    for lo, hi, v in ((707, 1313, 6.0),):
        speed[int(lo * RATE): int(hi * RATE)] = v
        state[int(lo * RATE): int((lo + 20) * RATE)] = int(LineState.ACCELERATING)
        state[int(hi * RATE): int((hi + 20) * RATE)] = int(LineState.DECELERATING)
    results = []
    for size in (37, 500, 2900):
        results.append(_run(_drift(), _blocks(x, speed=speed, state=state, size=size)))
    for r in results[1:]:
        np.testing.assert_array_equal(r.reason, results[0].reason)
        np.testing.assert_allclose(r.value, results[0].value, rtol=1e-12, equal_nan=True)
    assert (np.nan_to_num(results[0].value) >= 1.0).any()  # the step is found either way


def _lines(seconds: float, streams: dict[tuple[str, str], dict[str, np.ndarray]], *, speed: np.ndarray,
           state: np.ndarray, valid: dict[tuple[str, str], np.ndarray], grade: np.ndarray, roll_start_at: int,
           sizes: list[int]) -> list[Block]:
    """Blocks of the given ``sizes`` (frames) carrying several source results, each with its own residual streams
    (``streams``: per source key, its fields), a line speed, line states, a grade and a roll change of the rewind."""
    n = int(seconds * RATE)
    t = 1.0e9 + np.arange(n) / RATE
    out, i, k = [], 0, 0
    while i < n:
        sl = slice(i, min(n, i + sizes[k % len(sizes)]))
        m = sl.stop - sl.start
        b = Block(t=t[sl], signals={"speed/web": Signal(speed[sl].copy(), np.ones(m, dtype=bool)),
                                    "grade/line": Signal(grade[sl].copy(), np.ones(m, dtype=bool))},
                  line_state=state[sl].copy(), tags=TagFrames((), np.zeros((m, 0)), np.zeros((m, 0), np.int8),
                                                              np.zeros((m, 0))))
        for key, fields in streams.items():
            ok = valid.get(key, np.ones(n, dtype=bool))[sl]
            reason = np.where(ok, int(Reason.OK), int(Reason.INPUT_BAD)).astype(np.int8)
            vals = {f: np.where(ok, v[sl], np.nan) for f, v in fields.items()}
            b.results[key] = CheckResult(vals.pop("value"), reason, vals)
        rs = np.zeros(m, dtype=bool)
        if sl.start <= roll_start_at < sl.stop:
            rs[roll_start_at - sl.start] = True
        b.roll_start = {"rewind": rs, "unwind": np.zeros(m, dtype=bool)}
        out.append(b)
        i, k = sl.stop, k + 1
    return out


def test_drift_checks_evaluated_together_answer_as_each_alone() -> None:
    # The pipeline evaluates all drift checks at once (DriftCheck.batch: stacked batch means, standardisation and
    # charts). Against the per-object path (each check's own update), over 50 min of residual streams in which the
    # detectors learn, alarm, are acknowledged (relearn), hold, follow a speed change and back, a grade change, a
    # roll change, a gap (reset), invalid and stopped stretches; with every detector kind, different designs and a
    # check whose source field is missing. Every result, extras included, must be the same to the bit.
    seconds = 3000.0
    n = int(seconds * RATE)
    sec = np.arange(n) / RATE
    speed = np.where((sec >= 1500) & (sec < 2100), 6.0, 5.0)  # a new operating point for 10 min, then back
    state = np.full(n, int(LineState.RUNNING), dtype=np.int8)
    state[(sec >= 600) & (sec < 650)] = int(LineState.STOPPED)
    for at, s in ((1500, LineState.ACCELERATING), (2100, LineState.DECELERATING)):
        state[(sec >= at) & (sec < at + 20)] = int(s)
    grade = np.where(sec < 2400, 1.0, 2.0)
    level = np.where(speed > 5.5, 4.0, 0.0)  # the residuals' level moves with the operating point

    def noise(seed: int, sigma: float = 1.0) -> np.ndarray:
        return _noise(seconds, sigma, seed) + sigma * level

    draw, ratio = noise(11), noise(12, 0.01) + 1.0
    draw[sec >= 900] += 4.0  # a step: the draw detector alarms
    # batch means with a material lag-1 autocorrelation (AR(1), phi 0.7): the standardisation uses the predecessor
    levels = np.zeros(int(seconds / 10) + 1)
    shocks = np.random.default_rng(19).standard_normal(levels.size)
    for i in range(1, levels.size):
        levels[i] = 0.7 * levels[i - 1] + shocks[i]
    slip = 1e-3 * (np.repeat(levels, BLOCK)[:n] + level)
    util = noise(13, 0.02) + 0.5
    util[sec >= 1200] += 0.08
    streams = {("draw", "s5"): {"value": draw, "residual": draw, "ratio": ratio},
               ("traction", "pull_1"): {"value": util, "utilisation": util, "mu_demonstrated": noise(14, 0.01)},
               ("roll_diameter", "rewind"): {"value": noise(15), "caliper_ratio": noise(16, 0.005) + 1.0},
               ("slip", "pull_1"): {"value": slip},
               ("idler_lag", "idler_3"): {"value": noise(18, 1e-3)}}
    invalid = np.ones(n, dtype=bool)
    invalid[((sec >= 1000) & (sec < 1100)) | ((sec >= 1515) & (sec < 1545))] = False  # also across a speed change
    blocks = _lines(seconds, streams, speed=speed, state=state, valid={("slip", "pull_1"): invalid}, grade=grade,
                    roll_start_at=int(2700 * RATE), sizes=[3000, 1234, 3000, 517, 2900])
    by_name = {r.name: r for r in RESIDUALS}
    base = dict(period=10.0, learn=300.0, shift=1.0, arl0=1e4, sigma_floor=0.0, speed_band=0.1)
    specs = [("draw", ("draw", "s5"), dict(detector="cusum")),
             ("draw.gain", ("draw", "s5"), dict(detector="ewma")),
             ("traction", ("traction", "pull_1"), dict(detector="cusum", shift=2.0)),
             ("traction.mu", ("traction", "pull_1"), dict(detector="ewma", shift=0.5, learn=200.0)),
             ("caliper", ("roll_diameter", "rewind"), dict(detector="page_hinkley")),
             ("slip", ("slip", "pull_1"), dict(detector="cusum", sigma_floor=1e-3)),
             ("idler_lag", ("idler_lag", "idler_3"), dict(detector="adwin")),
             ("length_rate", ("length_rate", "rewind"), dict(detector="cusum")),  # no such source result
             ("runout", ("draw", "s5"), dict(detector="cusum"))]  # a source without the field it reads

    def make() -> list[DriftCheck]:
        return [DriftCheck(_Source(*key), by_name[name], **{**base, **kw})  # type: ignore[arg-type]
                for name, key, kw in specs]

    alone, together = make(), make()
    batch = DriftCheck.batch(together)
    assert list(batch.checks) == together
    seen: dict[str, set[str]] = {"alarm": set(), "ok": set(), "kept": set()}
    for k, b in enumerate(blocks):
        t0 = float(b.t[0]) - 1.0e9
        for checks in (alone, together):
            checks[2].hold = t0 < 400.0  # an alarm stands on what the traction detector blames: it learns nothing
            if 1300.0 <= t0 < 1300.0 + 60:
                checks[0].relearn()  # the draw drift is acknowledged: its level is the new normal
        if 1900.0 <= t0 < 1900.0 + 60:  # a gap in the data
            for c in alone:
                c.reset()
            batch.reset()
        one = [c.update(b) for c in alone]
        many = batch.update(b)
        for c, a, g in zip(alone, one, many, strict=True):
            np.testing.assert_array_equal(g.reason, a.reason, err_msg=f"{c.object_id} block {k}")
            np.testing.assert_array_equal(g.value, a.value, err_msg=f"{c.object_id} block {k}")
            assert list(g.extras) == list(a.extras)
            for f in a.extras:
                np.testing.assert_array_equal(g.extras[f], a.extras[f], err_msg=f"{c.object_id} {f} block {k}")
            if (np.nan_to_num(a.value) >= 1.0).any():
                seen["alarm"].add(c.object_id)
            if (a.reason == int(Reason.OK)).any():
                seen["ok"].add(c.object_id)
            if c._baselines:
                seen["kept"].add(c.object_id)
    # the comparison covered detection, not only learning: detectors left learning and some alarmed
    assert {"draw.s5", "traction.pull_1", "slip.pull_1", "caliper.rewind"} <= seen["ok"]
    assert "draw.s5" in seen["alarm"]
    assert {"draw.s5", "slip.pull_1"} <= seen["kept"]  # the speed change kept a baseline per operating point
    assert [c._baselines for c in alone] == [c._baselines for c in together]
