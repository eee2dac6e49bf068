"""DriftMonitor: gating, baseline learning, relearn/reset, block-size invariance, detection against the ARL theory;
river's detectors used as they are."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
from scipy.signal import lfilter
from spanwatch.rules.drift import GATED, LEARNING, OK, DriftMonitor, RiverDetector, cusum_arl
from spanwatch.rules.drift.monitor import DriftOutput

T0 = 1.7e9  # an epoch time on a whole second


def ar1(rng: np.random.Generator, n: int, mu: float, sigma: float, phi: float) -> np.ndarray:
    """A stationary AR(1) series: mean mu, standard deviation sigma, lag-1 autocorrelation phi."""
    e = rng.standard_normal(n) * sigma * np.sqrt(1 - phi**2)
    e[0] = rng.standard_normal() * sigma
    return mu + lfilter([1.0], [1.0, -phi], e)


def frames(batch_values: np.ndarray, per: int = 4, period: float = 1.0, t0: float = T0) -> tuple[np.ndarray, ...]:
    """Frames on a grid, ``per`` to a batch, each batch's frames holding that batch's value."""
    t = t0 + np.arange(batch_values.size * per) * (period / per)
    return t, np.repeat(batch_values, per)


def per_batch(a: np.ndarray, per: int = 4) -> np.ndarray:
    """The value at each batch's first frame: the result of the batch before it (batches close there)."""
    return a[::per]


def first_signal(out: DriftOutput, start: int, per: int = 4) -> int | None:
    """Batches from batch ``start`` on to the first that signals (1: batch ``start`` itself), or None."""
    v = per_batch(out.value, per)[start + 1:]
    hit = np.flatnonzero(v > 1.0)
    return int(hit[0]) + 1 if hit.size else None


def run(m: DriftMonitor, t: np.ndarray, x: np.ndarray, ok: np.ndarray, sizes: list[int] | None = None) -> DriftOutput:
    """Feed in blocks of ``sizes`` (all at once by default) and join the outputs."""
    if sizes is None:
        return m.update(t, x, ok)
    outs, i = [], 0
    for n in sizes:
        outs.append(m.update(t[i:i + n], x[i:i + n], ok[i:i + n]))
        i += n
    assert i == t.size
    return DriftOutput(*(np.concatenate([getattr(o, f) for o in outs]) for f in DriftOutput.__dataclass_fields__))


def assert_same(a: DriftOutput, b: DriftOutput) -> None:
    for f in DriftOutput.__dataclass_fields__:
        np.testing.assert_allclose(getattr(a, f), getattr(b, f), rtol=1e-9, atol=1e-12, equal_nan=True, err_msg=f)


# -- gating and learning -------------------------------------------------------------------------------------------


def test_gated_frames_never_reach_the_baseline_or_the_detector():
    rng = np.random.default_rng(1)
    v = ar1(rng, 300, 2.0, 0.3, 0.4)
    v[200:] += 0.6
    t, x = frames(v, per=10)
    ok = rng.random(t.size) > 0.2
    out = run(DriftMonitor(period=1.0, learn=100.0, arl0=500.0), t, x, ok)
    for junk in (1e6, np.nan, -np.inf):
        y = np.where(ok, x, junk)
        assert_same(run(DriftMonitor(period=1.0, learn=100.0, arl0=500.0), t, y, ok), out)
    assert (out.state[~ok] == GATED).all() and np.isnan(out.value[~ok]).all()
    assert (out.state[ok] != GATED).all()
    assert (out.value[ok & (out.state == OK)] > 1.0).any()  # the step after batch 200 is seen


def test_a_batch_with_fewer_than_half_its_frames_usable_is_dropped():
    rng = np.random.default_rng(2)
    t, x = frames(ar1(rng, 200, 0.0, 1.0, 0.0), per=10)
    ok = np.ones(t.size, dtype=bool)
    ok[1500:1506] = False  # batch 150: 4 of 10 frames usable ...
    y = x.copy()
    y[1506:1510] = 50.0  # ... and those 4 far off
    dropped = ok.copy()
    dropped[1500:1510] = False  # the same batch wholly gated
    a = run(DriftMonitor(period=1.0, learn=100.0, arl0=500.0), t, y, ok)
    b = run(DriftMonitor(period=1.0, learn=100.0, arl0=500.0), t, y, dropped)
    assert_same(DriftOutput(a.value[1510:], a.state[1510:], a.change_time[1510:], a.shift[1510:], a.mean[1510:],
                            a.sigma[1510:]),
                DriftOutput(b.value[1510:], b.state[1510:], b.change_time[1510:], b.shift[1510:], b.mean[1510:],
                            b.sigma[1510:]))
    # with 5 of 10 usable the batch counts, and its 50s make the CUSUM jump
    ok5 = np.ones(t.size, dtype=bool)
    ok5[1500:1505] = False
    y[1505:1510] = 50.0
    c = run(DriftMonitor(period=1.0, learn=100.0, arl0=500.0), t, y, ok5)
    assert c.value[1510] > 1.0


def test_warming_up_until_learn_seconds_of_usable_batches():
    rng = np.random.default_rng(3)
    per, period = 5, 10.0
    t, x = frames(ar1(rng, 200, 1.0, 0.1, 0.0), per=per, period=period)
    ok = np.ones(t.size, dtype=bool)
    out = run(DriftMonitor(period=period, learn=600.0, arl0=500.0), t, x, ok)
    first_ok = t[np.flatnonzero(out.state == OK)[0]]
    # 60 batches learn, the 61st is the first monitored: its result is there from the first frame of the 62nd
    assert first_ok == pytest.approx(T0 + 61 * period)
    assert (out.state[t < first_ok] == LEARNING).all() and np.isnan(out.value[t < first_ok]).all()
    assert (out.state[t >= first_ok] == OK).all()
    # 100 s gated during learning: learning ends 10 batches later
    ok[(t >= T0 + 200) & (t < T0 + 300)] = False
    out = run(DriftMonitor(period=period, learn=600.0, arl0=500.0), t, x, ok)
    assert t[np.flatnonzero(out.state == OK)[0]] == pytest.approx(T0 + 71 * period)
    # at least 20 batches, however short the learning time asked for
    out = run(DriftMonitor(period=period, learn=60.0, arl0=500.0), t, x, np.ones(t.size, dtype=bool))
    assert t[np.flatnonzero(out.state == OK)[0]] == pytest.approx(T0 + 21 * period)


def test_baseline_matches_a_known_ar1_process():
    # Batch means from an AR(1) with mean 5, sigma 2, phi 0.6; 2000 batches learnt. Tolerances: 4 standard errors of
    # the estimators for an AR(1) (Box & Jenkins, Time Series Analysis): mean sigma/sqrt(n) sqrt((1+phi)/(1-phi)),
    # sigma about sigma/sqrt(2n) sqrt((1+phi^2)/(1-phi^2)), lag-1 autocorrelation sqrt((1-phi^2)/n).
    mu, sigma, phi, n = 5.0, 2.0, 0.6, 2000
    t, x = frames(ar1(np.random.default_rng(4), n + 5, mu, sigma, phi), per=2)
    m = DriftMonitor(period=1.0, learn=float(n), arl0=500.0)
    m.update(t, x, np.ones(t.size, dtype=bool))
    b = m.baseline
    assert b is not None and b.n == n
    assert abs(b.mean - mu) <= 4 * sigma / np.sqrt(n) * np.sqrt((1 + phi) / (1 - phi))
    assert abs(b.sigma - sigma) <= 4 * sigma / np.sqrt(2 * n) * np.sqrt((1 + phi**2) / (1 - phi**2))
    assert abs(b.rho - phi) <= 4 * np.sqrt((1 - phi**2) / n)
    assert b.rho_used == b.rho


def test_sigma_floor_holds_a_near_constant_baseline():
    t, x = frames(np.r_[np.full(40, 3.0), np.full(20, 3.001)], per=4)
    m = DriftMonitor(period=1.0, learn=30.0, arl0=500.0, sigma_floor=0.01)
    out = m.update(t, x, np.ones(t.size, dtype=bool))
    assert m.baseline is not None and m.baseline.sigma == 0.01
    assert np.nanmax(out.value) < 1.0  # 0.1 floor-sigmas: no drift


def test_relearn_forgets_and_learns_the_new_level():
    rng = np.random.default_rng(5)
    t, x = frames(ar1(rng, 100, 0.0, 1.0, 0.0), per=4)
    m = DriftMonitor(period=1.0, learn=40.0, arl0=500.0)
    m.update(t, x, np.ones(t.size, dtype=bool))
    assert not m.learning and abs(m.baseline.mean) < 1.0
    m.relearn()
    assert m.learning and m.baseline is None
    t2, x2 = frames(ar1(rng, 100, 10.0, 1.0, 0.0), per=4, t0=T0 + 100)
    out = m.update(t2, x2, np.ones(t2.size, dtype=bool))
    assert (out.state[: 41 * 4] == LEARNING).all() and (out.state[41 * 4:] == OK).all()
    assert abs(m.baseline.mean - 10.0) < 1.0


def test_use_baseline_skips_learning():
    rng = np.random.default_rng(6)
    t, x = frames(ar1(rng, 100, 0.0, 1.0, 0.0), per=4)
    first = DriftMonitor(period=1.0, learn=40.0, arl0=500.0)
    first.update(t, x, np.ones(t.size, dtype=bool))
    again = DriftMonitor(period=1.0, learn=40.0, arl0=500.0)
    again.use_baseline(first.baseline)
    t2, x2 = frames(ar1(rng, 20, 0.0, 1.0, 0.0), per=4, t0=T0 + 100)
    out = again.update(t2, x2, np.ones(t2.size, dtype=bool))
    assert (out.state[4:] == OK).all()


# -- blocks, gaps --------------------------------------------------------------------------------------------------


def test_output_does_not_depend_on_the_block_sizes_and_reset_at_a_gap():
    rng = np.random.default_rng(7)
    v = ar1(rng, 260, 1.0, 0.2, 0.5)
    v[180:] += 0.3
    t, x = frames(v, per=5)
    ok = rng.random(t.size) > 0.1
    gap = (t >= T0 + 120) & (t < T0 + 127.3)  # frames missing altogether: the caller resets after the gap
    t, x, ok = t[~gap], x[~gap], ok[~gap]
    cut = int(np.searchsorted(t, T0 + 127.3))
    outs = []
    for split in ([cut, t.size - cut], "random", "ones"):
        for detector in ("cusum", "ewma"):
            m = DriftMonitor(detector, period=1.0, learn=60.0, arl0=500.0)
            parts = []
            for a, b in ((0, cut), (cut, t.size)):
                n = b - a
                if split == "ones" and a == 0:
                    sizes = [1] * n
                elif split in ("random", "ones"):
                    sizes = np.diff(np.r_[0, np.sort(rng.choice(np.arange(1, n), 25, replace=False)), n]).tolist()
                else:
                    sizes = [n]
                parts.append(run(m, t[a:b], x[a:b], ok[a:b], sizes))
                m.reset()
            outs.append((detector, DriftOutput(*(np.concatenate([getattr(p, f) for p in parts])
                                                 for f in DriftOutput.__dataclass_fields__))))
    for detector in ("cusum", "ewma"):
        same = [o for d, o in outs if d == detector]
        for o in same[1:]:
            assert_same(o, same[0])
        assert np.nanmax(same[0].value) > 1.0


def test_reset_forgets_the_open_batch():
    rng = np.random.default_rng(8)
    t, x = frames(ar1(rng, 120, 0.0, 1.0, 0.0), per=10)
    y = x.copy()
    y[1000:1003] = 100.0  # the first 3 frames of batch 100, then a gap: reset
    m = DriftMonitor(period=1.0, learn=50.0, arl0=500.0)
    ok = np.ones(t.size, dtype=bool)
    m.update(t[:1003], y[:1003], ok[:1003])
    m.reset()
    a = m.update(t[1003:], y[1003:], ok[1003:])  # batch 100 keeps its 7 later frames (at least half): counted
    m2 = DriftMonitor(period=1.0, learn=50.0, arl0=500.0)
    gated = ok.copy()
    gated[1000:1003] = False
    b = m2.update(t, y, gated)
    assert_same(a, DriftOutput(*(getattr(b, f)[1003:] for f in DriftOutput.__dataclass_fields__)))


# -- detection against the theory ------------------------------------------------------------------------------------


def test_one_sigma_step_detected_with_the_cusum_arl_and_change_time_near_the_step():
    # 200 series: 500 batches learnt, 50 in control, then a step of 1 sigma. The mean delay is compared with the
    # zero-state ARL of the designed chart (Brook-Evans): tolerance 4 standard errors plus 10 % (the chart is not at
    # zero when the step comes, which shortens the delay a little, and the baseline is estimated). The change time:
    # median error within 3 batches.
    rng = np.random.default_rng(9)
    delays, errors = [], []
    for _ in range(200):
        v = ar1(rng, 650, 3.0, 0.5, 0.0)
        v[550:] += 0.5
        t, x = frames(v)
        m = DriftMonitor(period=1.0, learn=500.0, shift=1.0, arl0=200.0)
        out = m.update(t, x, np.ones(t.size, dtype=bool))
        d = first_signal(out, 550)
        if d is not None:
            delays.append(d)
            errors.append(per_batch(out.change_time)[550 + d] - (T0 + 550))
    assert len(delays) >= 195
    arl = cusum_arl(m.design["k"], m.design["h"], 1.0)
    se = np.std(delays, ddof=1) / np.sqrt(len(delays))
    assert abs(np.mean(delays) - arl) <= 4 * se + 0.1 * arl
    assert np.median(np.abs(errors)) <= 3.0


def test_in_control_ar1_false_alarms_match_arl0():
    # 200 in-control AR(1) series (phi = 0.5): 400 batches learnt, then up to 3000 watched. ARL0 estimated as batches
    # watched / false alarms (the first per series; censored exponential). Tolerance: 4/sqrt(alarms) (Poisson) plus
    # 10 % for the estimated baseline. Without the AR(1) whitening the same series would alarm far more often.
    rng = np.random.default_rng(10)
    arl0, watched, alarms = 200.0, 0, 0
    for _ in range(200):
        t, x = frames(ar1(rng, 3401, 3.0, 0.5, 0.5))
        out = DriftMonitor(period=1.0, learn=400.0, arl0=arl0).update(t, x, np.ones(t.size, dtype=bool))
        d = first_signal(out, 400)
        watched += d if d is not None else 3000
        alarms += d is not None
    estimate = watched / alarms
    assert abs(estimate / arl0 - 1) <= 4 / np.sqrt(alarms) + 0.1


def test_cusum_shift_estimate_in_the_streams_unit():
    # A step of D in an AR(1) stream (phi = 0.5, sigma = 0.5), D the design shift (2 sigma of the prediction error,
    # sustained: D = 2 sigma sqrt(1 - phi^2) / (1 - phi)): at the signal, the estimated change size (Montgomery's
    # k + C/N, turned back into the stream's unit through the AR(1) residual) has a median within 25 % of D over 100
    # series. (For steps well below the design shift the estimate at the signal runs high: the signal selects runs
    # that happened to rise fast.)
    rng = np.random.default_rng(11)
    ratios = []
    for _ in range(100):
        v = ar1(rng, 650, 3.0, 0.5, 0.5)
        big = 2 * 0.5 * np.sqrt(1 - 0.5**2) / (1 - 0.5)
        v[500:] += big
        t, x = frames(v)
        out = DriftMonitor(period=1.0, learn=400.0, shift=2.0, arl0=500.0).update(t, x, np.ones(t.size, dtype=bool))
        d = first_signal(out, 500)
        if d is not None:
            ratios.append(per_batch(out.shift)[500 + d] / big)
    assert len(ratios) >= 95
    assert abs(np.median(ratios) - 1) <= 0.25


def test_slow_drift_fixed_reference_cusum_before_page_hinkley():
    # A linear drift of 0.01 sigma per batch from the end of learning. The fixed-reference CUSUM (ARL0 1e5 batches)
    # signals first in most series; river's Page-Hinkley (its defaults) compares each sample with the running mean of
    # the stream, which follows the drift, and signals later, although in control it false-alarms far more often (on
    # N(0,1) about every 1.6e3 samples with its defaults, observed). Asserted: the CUSUM first in at least 8 of 10
    # series and Page-Hinkley's median delay at least 1.2 times the CUSUM's (observed: about 1.5 times).
    learn, n = 200, 3000
    cus, ph = [], []
    for seed in range(10):
        rng = np.random.default_rng(100 + seed)
        v = rng.standard_normal(learn + n)
        v[learn:] += 0.01 * np.arange(n)
        t, x = frames(v)
        ok = np.ones(t.size, dtype=bool)
        a = first_signal(DriftMonitor("cusum", period=1.0, learn=learn, arl0=1e5).update(t, x, ok), learn)
        b = first_signal(DriftMonitor("page_hinkley", period=1.0, learn=learn).update(t, x, ok), learn)
        cus.append(a if a is not None else np.inf)
        ph.append(b if b is not None else np.inf)
    cus, ph = np.array(cus), np.array(ph)
    assert np.isfinite(cus).all()
    assert (cus < ph).sum() >= 8
    assert np.median(ph) >= 1.2 * np.median(cus)


def test_page_hinkley_defaults_false_alarm_more_than_the_designed_cusum_in_control():
    rng = np.random.default_rng(12)
    t, x = frames(rng.standard_normal(20_000))
    ok = np.ones(t.size, dtype=bool)
    cusum = DriftMonitor("cusum", period=1.0, learn=200.0, arl0=1e5).update(t, x, ok)
    ph = DriftMonitor("page_hinkley", period=1.0, learn=200.0).update(t, x, ok)
    assert np.nansum(per_batch(ph.value) >= 1.0) > np.nansum(per_batch(cusum.value) > 1.0)


def test_ewma_monitor_detects_a_step():
    rng = np.random.default_rng(13)
    v = ar1(rng, 400, 0.0, 1.0, 0.0)
    v[300:] += 2.0
    t, x = frames(v)
    m = DriftMonitor("ewma", period=1.0, learn=200.0, shift=2.0, arl0=500.0)
    out = m.update(t, x, np.ones(t.size, dtype=bool))
    assert m.design["lam"] == 0.2
    d = first_signal(out, 300)
    assert d is not None and d <= 30
    assert per_batch(out.shift)[300 + d] > 0
    assert first_signal(out, 200) == d + 100  # nothing before the step


# -- river's detectors -------------------------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["adwin", "page_hinkley"])
def test_river_detector_flags_an_abrupt_shift_and_resets(name):
    rng = np.random.default_rng(14)
    z = np.r_[rng.standard_normal(1000), rng.standard_normal(500) + 3.0]
    d = RiverDetector(name)
    hits = np.flatnonzero(d.update(z))
    assert ((hits >= 1000) & (hits < 1100)).any()
    if name == "adwin":  # Page-Hinkley with river's defaults false-alarms now and then in control; ADWIN rarely
        assert hits.min() >= 1000
    d.reset()
    np.testing.assert_array_equal(np.flatnonzero(d.update(z)), hits)  # a fresh detector: the same answer
    with pytest.raises(ValueError):
        RiverDetector("kswin")


def test_river_detector_takes_river_parameters():
    rng = np.random.default_rng(15)
    z = np.r_[rng.standard_normal(500), rng.standard_normal(500) + 1.0]
    loose = RiverDetector("page_hinkley", threshold=5.0).update(z).sum()
    strict = RiverDetector("page_hinkley", threshold=200.0).update(z).sum()
    assert loose > strict


def test_drift_monitor_with_adwin_gates_and_flags():
    rng = np.random.default_rng(16)
    v = rng.standard_normal(700)
    v[500:] += 3.0
    t, x = frames(v, per=5)
    ok = rng.random(t.size) > 0.2
    m = DriftMonitor("adwin", period=1.0, learn=100.0)
    out = m.update(t, x, ok)
    junk = DriftMonitor("adwin", period=1.0, learn=100.0).update(t, np.where(ok, x, 1e9), ok)
    assert_same(out, junk)
    flagged = np.flatnonzero(out.value == 1.0) // 5  # batches whose frames carry a detection
    assert flagged.size and 500 < flagged[0] <= 600
    assert set(np.unique(out.value[~np.isnan(out.value)])) == {0.0, 1.0}
    assert (out.state[~ok] == GATED).all() and (out.state[: 101 * 5][ok[: 101 * 5]] == LEARNING).all()


def test_river_is_imported_only_for_its_detectors():
    code = ("import sys; import spanwatch.rules.drift as d; d.DriftMonitor('cusum', arl0=500.0); "
            "d.DriftMonitor('ewma', arl0=500.0); a = 'river' in sys.modules; d.DriftMonitor('adwin'); "
            "print(a, 'river' in sys.modules)")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert res.stdout.split() == ["False", "True"]


def test_bad_detector_or_parameters_are_refused():
    with pytest.raises(ValueError, match="detector"):
        DriftMonitor("shewhart")
    with pytest.raises(ValueError):
        DriftMonitor(period=0.0)
    m = DriftMonitor(params={"k": 0.25, "h": 8.0})
    assert m.design == {"k": 0.25, "h": 8.0}
