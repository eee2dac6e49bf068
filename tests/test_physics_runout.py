"""Once-per-revolution detection (rules/runout.py), and every streaming check on hostile blocks.

Goertzel is checked against numpy.fft and a directly evaluated DFT sum; roll angles come from an
independent closed form for an unwinding roll (each turn takes 2 t off the diameter), which also
gives, differentiated numerically, the reference turn rate for rotation_frequency.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hostile import ANY_FLOAT, N_FUZZ, SPECIAL, any_array, no_runtime_warning, special_grid
from hypothesis import given, settings
from spanwatch.monitor.checkset import build_checks
from spanwatch.monitor.line import load_line
from spanwatch.rules.base import QUALITY_GOOD, Block, CheckResult, LineState, Reason, Signal, TagFrames, finalise
from spanwatch.rules.linestate import classify_line_state
from spanwatch.rules.plausibility import out_of_range
from spanwatch.rules.runout import RunoutCheck, goertzel, order_amplitude, rotation_frequency, sinusoid_amplitude

# --- Goertzel against numpy.fft ----------------------------------------------------------


@pytest.mark.parametrize("n", [16, 100, 257, 1000])
@pytest.mark.parametrize("k", [1, 3, 7])
def test_goertzel_equals_fft_bin(n, k):
    # At a bin frequency f = k fs / N the Goertzel output equals the DFT bin X[k] (numpy.fft reference);
    # random data, so every bin is exercised, not only a clean sinusoid.
    rng = np.random.default_rng(n * 31 + k)
    x = rng.normal(size=n) + 3.0
    fs = 50.0
    ref = np.fft.fft(x)[k]
    got = goertzel(x, k * fs / n, fs)
    assert abs(got - ref) <= 1e-9 * max(1.0, np.abs(ref)) * n


def test_goertzel_works_along_last_axis():
    rng = np.random.default_rng(7)
    x = rng.normal(size=(3, 4, 128))
    np.testing.assert_allclose(goertzel(x, 5 * 100.0 / 128, 100.0), np.fft.fft(x, axis=-1)[..., 5], atol=1e-9)


@pytest.mark.parametrize("freq", [1.37, 4.9, 12.01])
def test_goertzel_magnitude_off_bin_equals_direct_dft_sum(freq):
    # Off a bin the output is the DTFT at w up to a unit phase factor: |X| = |sum_n x[n] e^{-j w n}|.
    rng = np.random.default_rng(11)
    x = rng.normal(size=300)
    fs = 50.0
    w = 2 * np.pi * freq / fs
    direct = np.sum(x * np.exp(-1j * w * np.arange(x.size)))
    assert abs(goertzel(x, freq, fs)) == pytest.approx(abs(direct), rel=1e-9)


@pytest.mark.parametrize("n", [64, 200, 999])
@pytest.mark.parametrize("k", [1, 4, 13])
@pytest.mark.parametrize("phase", [0.0, 0.7, -2.2])
def test_sinusoid_amplitude_equals_two_fft_bin_over_n(n, k, phase):
    fs = 50.0
    t = np.arange(n) / fs
    f = k * fs / n
    x = 120.0 + 2.5 * np.cos(2 * np.pi * f * t + phase) + 0.3 * np.sin(2 * np.pi * (k + 2) * fs / n * t)
    amp = float(sinusoid_amplitude(x, f, fs))
    # numpy.fft reference: 2 |X[k]| / N of the mean-removed signal, and the known amplitude 2.5.
    assert amp == pytest.approx(2 * abs(np.fft.fft(x - x.mean())[k]) / n, rel=1e-9)
    assert amp == pytest.approx(2.5, rel=1e-9)


# --- order tracking -------------------------------------------------------------------------


def unwind_angle(t, d0, caliper, speed):
    """Roll angle of an unwind at constant web speed, in closed form (independent of the code).

    D(t)^2 = D0^2 - 4 V t_c t / pi (annulus area), and each turn takes 2 t_c off the diameter, so the angle
    turned is theta = 2 pi (D0 - D) / (2 t_c) = pi (D0 - D) / t_c.
    """
    d = np.sqrt(d0**2 - 4 * speed * caliper * t / np.pi)
    return np.pi * (d0 - d) / caliper, d


def test_order_amplitude_exact_on_uniform_angle_grid():
    theta = 2 * np.pi * 5 * np.arange(400) / 400  # five whole turns, 80 samples each
    x = 80.0 + 1.7 * np.sin(theta + 0.4)
    assert order_amplitude(x, theta) == pytest.approx(1.7, rel=1e-12)


@pytest.mark.parametrize("phase0", [0.0, 1.0, 2.5])
def test_order_amplitude_recovers_once_per_rev_on_slowly_varying_speed(phase0):
    # Unwind of a thick board (2 mm) from 0.4 m at 3 m/s: over eight turns the diameter drops by 32 mm,
    # so the rotation frequency rises by about 9 % within the window.
    fs, speed, caliper, d0 = 50.0, 3.0, 2e-3, 0.4
    t = np.arange(0, 20.0, 1 / fs)
    theta, d = unwind_angle(t, d0, caliper, speed)
    revs = 8
    keep = theta < 2 * np.pi * revs
    assert theta[-1] > 2 * np.pi * revs  # the window really is whole turns
    f1 = speed / (np.pi * d[keep])
    assert f1[-1] / f1[0] > 1.08
    x = 150.0 + 4.0 * np.sin(theta + phase0)
    assert order_amplitude(x[keep], theta[keep]) == pytest.approx(4.0, rel=0.02)


@pytest.mark.parametrize(("speed", "caliper", "d0"), [(5.0, 1e-3, 0.8), (3.0, 2e-3, 0.4), (12.0, 25.4e-6, 1.2)])
def test_rotation_frequency_matches_wrap_counting_angle(speed, caliper, d0):
    # Independent: the roll angle of an unwind from counting wraps (unwind_angle above: annulus area gives D(t),
    # each turn takes 2 t off the diameter), differentiated numerically (numpy.gradient, second order), is the
    # turn rate the code must give from web speed and the diameter at that instant.
    t_half = np.pi * (d0**2 - (d0 / 2) ** 2) / (4 * speed * caliper)  # until the roll is down to half its diameter
    t = np.linspace(0.0, min(t_half, 60.0), 30_001)
    theta, d = unwind_angle(t, d0, caliper, speed)
    turns_per_s = np.gradient(theta, t, edge_order=2) / (2 * np.pi)
    np.testing.assert_allclose(rotation_frequency(speed, d), turns_per_s, rtol=1e-7)
    # Running backwards turns the roll just as fast.
    np.testing.assert_allclose(rotation_frequency(-speed, d), turns_per_s, rtol=1e-7)


def test_rotation_frequency_undefined_without_a_diameter():
    with no_runtime_warning():
        assert np.all(np.isnan(rotation_frequency(5.0, [0.0, -0.5, np.nan])))


# --- the streaming RunoutCheck --------------------------------------------------------------


FS = 50.0


def tagless(n):
    return TagFrames(("x",), np.zeros((n, 1)), np.zeros((n, 1), dtype=np.int8), np.zeros((n, 1)))


def runout_stream(amplitude=0.04, seconds=60.0, noise=0.0):
    """Unwind at 5 m/s from 0.8 m, 1 mm web (rotation rises from 2 to 3.1 rev/s); tension with a once-per-rev term."""
    speed, caliper, d0 = 5.0, 1e-3, 0.8
    t = np.arange(0, seconds, 1 / FS)
    theta, d = unwind_angle(t, d0, caliper, speed)
    rng = np.random.default_rng(5)
    tension = 140.0 * (1 + amplitude * np.sin(theta + 0.3)) + noise * rng.normal(size=t.size)
    return {"t": t, "tension/z": tension, "rotation/u": speed / (np.pi * d), "diameter/u": d,
            "speed/web": np.full(t.size, speed)}


def runout_block(stream, lo, hi):
    n = hi - lo
    ok = np.ones(n, dtype=bool)
    sig = {k: Signal(v[lo:hi], ok) for k, v in stream.items() if k != "t"}
    return Block(t=stream["t"][lo:hi], signals=sig, line_state=np.full(n, int(LineState.RUNNING), dtype=np.int8),
                 tags=tagless(n))


def run_in_blocks(check, stream, sizes):
    parts, lo = [], 0
    for size in sizes:
        parts.append(check.update(runout_block(stream, lo, lo + size)))
        lo += size
    assert lo == stream["t"].size
    return CheckResult(value=np.concatenate([p.value for p in parts]),
                       reason=np.concatenate([p.reason for p in parts]),
                       extras={k: np.concatenate([p.extras[k] for p in parts]) for k in parts[0].extras})


def new_runout(rotation=True):
    return RunoutCheck("u", zone="z", rotation="rotation/u" if rotation else None, diameter="diameter/u",
                       frame_rate=FS, revolutions=4, min_tension=1.0)


@pytest.mark.parametrize("rotation", [True, False], ids=["rpm", "diameter-and-speed"])
def test_runout_check_is_block_size_invariant(rotation):
    stream = runout_stream(noise=0.5)
    n = stream["t"].size
    whole = new_runout(rotation).update(runout_block(stream, 0, n))
    rng = np.random.default_rng(17)
    sizes = [1, 0, 7, 2, 50, 333]
    while sum(sizes) < n:
        sizes.append(int(rng.integers(1, 700)))
    sizes[-1] -= sum(sizes) - n
    split = run_in_blocks(new_runout(rotation), stream, sizes)
    np.testing.assert_array_equal(split.reason, whole.reason)
    np.testing.assert_allclose(split.value, whole.value, rtol=1e-9, atol=1e-12, equal_nan=True)
    np.testing.assert_allclose(split.extras["amplitude"], whole.extras["amplitude"], rtol=1e-9, atol=1e-9)
    assert whole.valid.sum() > 0.9 * n


@pytest.mark.parametrize("amplitude", [0.01, 0.04, 0.12])
@pytest.mark.parametrize("rotation", [True, False], ids=["rpm", "diameter-and-speed"])
def test_runout_check_recovers_known_relative_amplitude(amplitude, rotation):
    stream = runout_stream(amplitude=amplitude)
    n = stream["t"].size
    res = run_in_blocks(new_runout(rotation), stream, [n // 3, n // 3, n - 2 * (n // 3)])
    valid = res.valid
    # Warm-up is four turns (about 2 s at 2 rev/s): after that every frame is valid.
    assert not valid[:50].any()
    assert valid[200:].all()
    np.testing.assert_allclose(res.value[valid], amplitude, rtol=0.03)


def test_runout_check_undersampled_rotation_is_out_of_domain():
    # Fewer than four samples per turn: the window cannot resolve the once-per-rev component.
    n = 400
    ok = np.ones(n, dtype=bool)
    t = np.arange(n) / FS
    sig = {"tension/z": Signal(140.0 + np.sin(2 * np.pi * 15.0 * t), ok), "rotation/u": Signal(np.full(n, 15.0), ok)}
    block = Block(t=t, signals=sig, line_state=np.full(n, int(LineState.RUNNING), dtype=np.int8), tags=tagless(n))
    res = new_runout().update(block)
    np.testing.assert_array_equal(res.reason, int(Reason.OUT_OF_DOMAIN))


# --- every streaming check of the example line on hostile blocks ----------------------------
# Built with spanwatch.monitor.checkset.build_checks(load_line(config/quillmere-q2.toml)). A block of good,
# self-consistent running data (long enough for every window and the roll calibration) is followed by
# a block in which every signal and every tag is hostile, with the line state still RUNNING and every
# signal claiming ok, so the checks themselves must notice.


V_WEB = 5.0
N_GOOD, N_BAD = 3600, 400
HOSTILE = ["nan", "inf", "-inf", "zero", "negative"]


def good_signals(line, t):
    mat = line.config.material
    tc = mat.caliper * mat.stack_factor
    n = t.size
    sig = {"speed/line": np.full(n, V_WEB), "speed/web": np.full(n, V_WEB)}
    for eid in line.path:
        el = line.elements[eid]
        sec = el.section
        if el.is_winder:
            # annulus area: D^2 = D0^2 -+ 4 L t / pi with L = V t
            sign = -1.0 if sec.kind == "unwind" else 1.0
            d = np.sqrt((0.8 if sign < 0 else 0.3) ** 2 + sign * 4 * V_WEB * t * tc / np.pi)
            sig[f"diameter/{eid}"] = d
            sig[f"rotation/{eid}"] = V_WEB / (np.pi * d)
            sig[f"length/{eid}"] = V_WEB * t
            sig[f"core_change/{eid}"] = np.zeros(n)
        else:
            sig[f"speed/{eid}"] = np.full(n, V_WEB * (1 + sec.draw))
    for z in line.zones:
        sp = line.zone_setpoints(z)
        sig[f"tension/{z.id}"] = np.full(n, sp[0] if sp else 100.0)
    return sig


def make_block(line, t, sig):
    n = t.size
    names = tuple(line.tags)
    vals = np.zeros((n, len(names)))
    for spec in line.signals:
        vals[:, names.index(spec.tag)] = sig[spec.name] / spec.factor
    tags = TagFrames(names, vals, np.full((n, len(names)), QUALITY_GOOD, dtype=np.int8), np.zeros((n, len(names))))
    ok = np.ones(n, dtype=bool)
    return Block(t=t, signals={k: Signal(v, ok) for k, v in sig.items()},
                 line_state=np.full(n, int(LineState.RUNNING), dtype=np.int8), tags=tags)


def hostile_values(kind, good):
    return {"nan": np.full_like(good, np.nan), "inf": np.full_like(good, np.inf),
            "-inf": np.full_like(good, -np.inf), "zero": np.zeros_like(good), "negative": -np.abs(good) - 1.0}[kind]


def assert_well_formed(res, n):
    assert res.value.shape == (n,) and res.reason.shape == (n,)
    assert set(np.unique(res.reason).tolist()) <= {int(r) for r in Reason}
    assert np.all(np.isfinite(res.value[res.valid])), "a valid frame carries a non-finite value"
    assert np.all(np.isnan(res.value[~res.valid])), "an invalid frame carries a value"


def check_ids(line):
    """The checks that read signals (the derived kinds, drift and roll_caliper, read other checks' results:
    :func:`test_derived_checks_on_hostile_blocks`)."""
    from spanwatch.rules.catalog import source_checks

    return [f"{c.kind}:{c.object_id}" for c in source_checks(line.model)]


@pytest.fixture(scope="module")
def good_run(example_line):
    """Times and block of good running data of the example line (every check is fed it first)."""
    t = np.arange(N_GOOD) / FS
    return t, make_block(example_line, t, good_signals(example_line, t))


def _check_named(line, cid):
    return next(c for c in build_checks(line) if f"{c.kind}:{c.object_id}" == cid)


CHECK_IDS = check_ids(load_line(Path(__file__).resolve().parents[1] / "config" / "quillmere-q2.toml"))
STANDSTILL_ONLY = {"tension_zero"}  # a load cell's zero, judged with the line stopped and the web slack
SPEED_ONLY = {"slip", "idler_lag"}  # read only speeds: a negative speed is reverse running, not an error


@pytest.mark.parametrize("kind", HOSTILE)
@pytest.mark.parametrize("cid", CHECK_IDS)
def test_check_on_block_full_of_hostile_values(example_line, good_run, cid, kind):
    t_good, good_block = good_run
    check = _check_named(example_line, cid)
    good = check.update(good_block)
    assert_well_formed(good, N_GOOD)
    t = t_good[-1] + (1 + np.arange(N_BAD)) / FS
    sig = {k: hostile_values(kind, v) for k, v in good_signals(example_line, t).items()}
    block = make_block(example_line, t, sig)
    with no_runtime_warning():  # must neither raise nor warn
        res = check.update(block)
    assert_well_formed(res, N_BAD)
    non_finite = kind in ("nan", "inf", "-inf")
    if check.kind.startswith("tag_"):
        # Sensor-health checks exist to flag such values: a non-finite value is a quality flag, not a gap.
        if check.kind == "tag_quality" and non_finite:
            assert res.valid.all() and (res.value == 1.0).all()
        return
    if check.kind in STANDSTILL_ONLY:  # judged only with the line stopped: a running block is gated whatever it holds
        assert not good.valid.any() and not res.valid.any()
        assert (res.reason == int(Reason.LINE_STATE)).all()
        return
    # Not vacuous: on good data the check does produce values (roll_diameter after its 300 m calibration).
    assert good.valid[-500:].any(), f"{cid} never produced a value on good running data"
    if non_finite:
        bad = ~res.valid
    elif check.kind == "no_drive":
        # Zero or negative tensions on a driven roller are exactly what this check flags.
        assert res.valid.all() and (res.value == 1.0).all()
        return
    elif kind == "negative" and check.kind in SPEED_ONLY:
        return
    else:
        # Windowed checks may still average good frames from before the block: judge the second half,
        # when every window (2 s check window, four turns for runout) holds only hostile frames.
        bad = ~res.valid[N_BAD // 2:]
    assert bad.all(), (f"{cid} produced {int((~bad).sum())} valid values from {kind} inputs, e.g. "
                       f"{res.value[res.valid][:3]}")


@pytest.mark.parametrize("kind", ["nan", "inf"])
@pytest.mark.parametrize("cid", [c for c in CHECK_IDS if not c.startswith("tag_")])  # tag checks read tag frames
def test_check_invalid_when_one_declared_input_is_non_finite(example_line, good_run, cid, kind):
    # Each signal a check declares in `inputs`, made non-finite alone, must invalidate its frames.
    t_good, good_block = good_run
    probe = _check_named(example_line, cid)
    failures = []
    for name in probe.inputs:
        check = _check_named(example_line, cid)
        check.update(good_block)
        t = t_good[-1] + (1 + np.arange(N_BAD)) / FS
        sig = good_signals(example_line, t)
        sig[name] = np.full(N_BAD, np.nan if kind == "nan" else np.inf)
        with no_runtime_warning():
            res = check.update(make_block(example_line, t, sig))
        assert_well_formed(res, N_BAD)
        if res.valid.any():
            failures.append(f"{name}: {int(res.valid.sum())} valid frames, e.g. {res.value[res.valid][:2]}")
    assert not failures, f"{cid} computes on a {kind} input: " + "; ".join(failures)


# --- no exception and no numpy warning on any float input ---------------------------------


def test_runout_pure_functions_special_value_grid():
    with no_runtime_warning():
        v, d = special_grid(2, seed=3)
        assert rotation_frequency(v, d).shape == v.shape
        x = special_grid(1, rows=64, seed=3)[0]
        for freq in SPECIAL:
            for fs in SPECIAL:
                assert np.shape(goertzel(x, freq, fs)) == ()
                assert np.shape(goertzel(np.vstack([x, x]), freq, fs)) == (2,)
                assert np.shape(sinusoid_amplitude(x, freq, fs)) == ()
        for _ in range(50):
            xs, ps = special_grid(2, rows=9, seed=_)
            assert isinstance(order_amplitude(xs, ps), float)


@settings(max_examples=80, deadline=None)
@given(v=any_array(), d=any_array(), x=any_array(16), p=any_array(16), freq=ANY_FLOAT, fs=ANY_FLOAT)
def test_runout_pure_functions_any_float(v, d, x, p, freq, fs):
    with no_runtime_warning():
        f = rotation_frequency(v, d)
        g = goertzel(x, freq, fs)
        amp = sinusoid_amplitude(x, freq, fs)
        oa = order_amplitude(x, p)
    assert f.shape == (N_FUZZ,)
    assert np.all(np.isnan(f) | (f >= 0))
    assert np.shape(g) == ()
    assert np.shape(amp) == () and (np.isnan(amp) or amp >= 0)
    assert isinstance(oa, float)


@settings(max_examples=80, deadline=None)
@given(x=any_array(), a=any_array(), lo=ANY_FLOAT, hi=ANY_FLOAT, stop=ANY_FLOAT, thread=ANY_FLOAT, acc=ANY_FLOAT)
def test_other_rules_pure_functions_any_float(x, a, lo, hi, stop, thread, acc):
    # plausibility.out_of_range, linestate.classify_line_state and base.finalise
    with no_runtime_warning():
        oor = out_of_range(x, lo, hi)
        state = classify_line_state(x, a, stop_speed=stop, thread_speed=thread, accel_threshold=acc)
        res = finalise(x, np.zeros(N_FUZZ, dtype=np.int8))
    assert oor.shape == (N_FUZZ,) and oor[~np.isfinite(x)].all()
    assert state.shape == (N_FUZZ,)
    assert (state[~np.isfinite(x)] == int(LineState.UNKNOWN)).all()
    assert np.all(np.isfinite(res.value[res.valid])) and np.all(np.isnan(res.value[~res.valid]))


@pytest.mark.parametrize("kind", HOSTILE)
def test_derived_checks_on_hostile_blocks(example_line, good_run, kind):
    # The checks that read other checks' results (drift detectors, the roll caliper) run after them on the same
    # block; fed hostile signals, their sources are invalid, and so are they: well formed, no value, no warning.
    from spanwatch.rules.catalog import DERIVED_CLASSES

    derived_kinds = {c.kind for c in DERIVED_CLASSES}
    checks = build_checks(example_line)
    assert derived_kinds <= {c.kind for c in checks}
    t_good, good_block = good_run
    t = t_good[-1] + (1 + np.arange(N_BAD)) / FS
    block = make_block(example_line, t, {k: hostile_values(kind, v) for k, v in good_signals(example_line, t).items()})
    for b, n in ((good_block, N_GOOD), (block, N_BAD)):
        b.results = {}
        with no_runtime_warning():
            for c in checks:
                b.results[(c.kind, c.object_id)] = c.update(b)
        for c in checks:
            if c.kind in derived_kinds:
                assert_well_formed(b.results[(c.kind, c.object_id)], n)
    for c in checks:
        if c.kind in derived_kinds:
            assert not block.results[(c.kind, c.object_id)].valid.any(), f"{c.kind}:{c.object_id}"
