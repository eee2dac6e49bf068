"""Span tension dynamics (pure functions of rules/span.py).

The reference is an independent model: mass conservation of a Hookean web in the span, written
without linearisation and integrated with scipy.integrate.solve_ivp. The code's linearised span
equation (Whitworth & Harrison 1983; Shin, Tension Control, TAPPI Press 2000; Pagilla, Siraskar &
Dwivedula 2007, IEEE Trans. Control Syst. Technol. 15(1)) must agree with it to second order in
strain and draw, in its rate, its transient, its steady state and the draw it asks for. The draw
band is checked against the GUM law of propagation of uncertainty (JCGM 100:2008) evaluated with
numerical sensitivity coefficients.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hostile import ANY_FLOAT, any_array, no_runtime_warning, special_grid
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import solve_ivp
from spanwatch.rules.base import Block, LineState, OneByOne, Reason, Signal, TagFrames
from spanwatch.rules.span import (
    DrawCheck,
    draw_band,
    draw_for_tension,
    mean_ratio_uncertainty,
    span_tension_rate,
    steady_span_tension,
)

# Example web: 1.2 mil BOPP, E = 2.2 GPa -> Et = E * caliper per unit width.
ET = 2.2e9 * 1.2 * 25.4e-6
CASES = [
    # t1 (N/m), v1 (m/s), v2 (m/s), span length (m), initial t2 (N/m)
    (105.0, 5.0, 5.0 * 1.001064, 5.0, 105.0),
    (175.0, 6.6667, 6.6667 * 0.9995, 4.5, 300.0),
    (50.0, 1.0, 1.002, 2.0, 0.0),
    (200.0, 10.0, 10.0, 1.2, 80.0),
]


# Independent model: mass conservation of the web in the span, written without linearisation.
# A web of unstretched cross-section A0 and strain eps moves rho A0 V / (1 + eps) of mass per second past a
# roller it does not slip on; the web arriving on the upstream roller carries the strain eps1 = T1 / Et of
# the span before it. The span (length L, uniform strain eps2) holds rho A0 L / (1 + eps2), so
#     d/dt [L / (1 + eps2)] = V1 / (1 + eps1) - V2 / (1 + eps2),
# i.e. deps2/dt = (1 + eps2)^2 / L * (V2 / (1 + eps2) - V1 / (1 + eps1)), with Hooke's law T = Et eps.
# The span equation of the code (Whitworth & Harrison 1983; Shin, Tension Control, TAPPI Press 2000) is the
# first-order expansion of this balance in strain and draw d = V2 / V1 - 1. Expanding the balance one order
# further, L deps2/dt = V1 (d + eps1 - eps2 + d eps2 - (eps1 - eps2)^2 + ...), while the code's equation is
# V1 (d + eps1 - eps2 - d eps2): the two differ by V1 (2 d eps2 - (eps1 - eps2)^2) plus third-order terms.


def exact_strain_rate(eps2, eps1, v1, v2, length):
    """deps2/dt of the span from the unlinearised mass balance above (1/s)."""
    return (1 + eps2) ** 2 / length * (v2 / (1 + eps2) - v1 / (1 + eps1))


def integrate_exact(t1, v1, v2, length, t2_0, t_eval):
    """Span tension over time from the exact mass balance (scipy solve_ivp), N/m."""
    sol = solve_ivp(lambda _t, y: exact_strain_rate(y, t1 / ET, v1, v2, length), (0.0, t_eval[-1]), [t2_0 / ET],
                    t_eval=t_eval, rtol=1e-12, atol=1e-15, method="LSODA")
    assert sol.success
    return ET * sol.y[0]


def integrate_code(t1, v1, v2, length, t2_0, t_eval):
    """Span tension over time from the code's span_tension_rate (the object under test), N/m."""
    sol = solve_ivp(lambda _t, y: span_tension_rate(y, t1, v1, v2, ET, length), (0.0, t_eval[-1]), [t2_0],
                    t_eval=t_eval, rtol=1e-10, atol=1e-10, method="LSODA")
    assert sol.success
    return sol.y[0]


def dropped_terms(eps1, eps2, draw):
    """Bound on the strain terms the linearised span equation drops (see above), dimensionless."""
    return 2 * abs(draw) * abs(eps2) + (eps1 - eps2) ** 2 + 4 * (abs(eps1) + abs(eps2) + abs(draw)) ** 3


@pytest.mark.parametrize(("t1", "v1", "v2", "length", "t2_0"), CASES)
def test_span_transient_matches_mass_conservation(t1, v1, v2, length, t2_0):
    # Integrate the code's span equation and the exact mass balance from the same start; over the transient
    # (one, two and five L / V) and at the settled state (fifty L / V) the tensions agree to second order.
    tau = length / v2
    times = np.array([tau, 2 * tau, 5 * tau, 50 * tau])
    exact = integrate_exact(t1, v1, v2, length, t2_0, times)
    code = integrate_code(t1, v1, v2, length, t2_0, times)
    # The span tension moves monotonically between its start and its settled value, so the dropped terms are
    # largest at one end; their effect on the tension is at most Et times that (the lag divides by V2 / L).
    draw = v2 / v1 - 1
    scale = 1.5 * ET * max(dropped_terms(t1 / ET, t2 / ET, draw) for t2 in (t2_0, exact[-1])) * v1 / v2
    np.testing.assert_allclose(code, exact, rtol=0, atol=scale)
    # and the code's steady state is where the exact model settles
    assert float(steady_span_tension(t1, v1, v2, ET)) == pytest.approx(exact[-1], abs=scale)


@pytest.mark.parametrize(("t1", "v1", "v2", "length", "t2_0"), CASES)
def test_span_time_constant_is_length_over_speed(t1, v1, v2, length, t2_0):
    # The exact mass balance relaxes as a first-order lag with time constant L / V2 (to first order in strain;
    # Shin, Tension Control, 2000): after one L / V2 about 1/e of the step is left, after five less than 1 %
    # (e^-5 = 0.0067). The code's trajectory must show the same lag towards its own steady state.
    tau = length / v2
    times = np.array([tau, 5 * tau, 200 * tau])
    exact = integrate_exact(t1, v1, v2, length, t2_0, times)
    if abs(t2_0 - exact[-1]) < 1e-9:
        pytest.skip("starts at the steady state")
    code = integrate_code(t1, v1, v2, length, t2_0, times)
    for y in (exact, code):
        step = t2_0 - y[-1]
        assert (y[0] - y[-1]) / step == pytest.approx(np.exp(-1.0), abs=0.01)
        assert abs(y[1] - y[-1]) <= 0.01 * abs(step)


def test_steady_tension_matches_exact_mass_flow_balance():
    # Independent derivation: steady mass flow rho A0 V / (1 + eps) is the same on both rollers and T = Et eps,
    # so eps2 = (V2 / V1) (1 + eps1) - 1 exactly. The linearised span equation agrees to first order in strain:
    # the difference is of order Et * draw^2 + T1 * draw.
    t1, v1 = 105.0, 5.0
    for draw in (-0.002, -0.0005, 0.0005, 0.001064, 0.003):
        v2 = v1 * (1 + draw)
        exact = ET * ((v2 / v1) * (1 + t1 / ET) - 1)
        approx = float(steady_span_tension(t1, v1, v2, ET))
        assert approx == pytest.approx(exact, abs=2 * (ET * draw**2 + t1 * abs(draw)) + 1e-9)


def test_no_draw_passes_tension_through():
    # With V2 = V1 a span passes the upstream tension on unchanged (no stretch added).
    assert float(steady_span_tension(123.4, 5.0, 5.0, ET)) == pytest.approx(123.4, rel=1e-12)


@settings(max_examples=200)
@given(eps1=st.floats(0.0, 0.01), eps2=st.floats(0.0, 0.01), v1=st.floats(0.05, 20.0),
       draw=st.floats(-0.005, 0.005), length=st.floats(0.3, 20.0))
def test_span_tension_rate_matches_exact_mass_balance(eps1, eps2, v1, draw, length):
    # At any state, the code's dT2/dt is Et times the strain rate of the exact mass balance, up to the
    # terms the linearisation drops (see above).
    v2 = v1 * (1 + draw)
    t1, t2 = ET * eps1, ET * eps2
    exact = ET * exact_strain_rate(eps2, eps1, v1, v2, length)
    code = float(span_tension_rate(t2, t1, v1, v2, ET, length))
    bound = 1.1 * ET * v1 * dropped_terms(eps1, eps2, draw) / length
    rounding = 1e-14 * ET * max(v1, v2) / length  # the exact form subtracts two speeds of size V
    assert abs(code - exact) <= bound + rounding


def test_steady_tension_undefined_for_stopped_or_reversed_downstream_roller():
    with no_runtime_warning():
        assert np.all(np.isnan(steady_span_tension(100.0, 5.0, [0.0, -1.0, np.nan], ET)))


@settings(max_examples=200)
@given(eps1=st.floats(0.0, 0.02), eps2=st.floats(0.0, 0.02), et=st.floats(1e4, 1e6))
def test_draw_for_tension_matches_exact_mass_flow_balance(eps1, eps2, et):
    # Steady mass flow (above): V2 / V1 = (1 + eps2) / (1 + eps1) = (Et + T2) / (Et + T1) exactly. The draw the
    # code asks for is the linearised one; the two differ by (eps2^2 - eps1^2) / ((1 - eps2)(1 + eps1)) at most.
    t1, t2 = et * eps1, et * eps2
    exact = (et + t2) / (et + t1)
    assert float(draw_for_tension(t1, t2, et)) == pytest.approx(exact, abs=1.05 * max(eps1, eps2) ** 2 + 1e-15)


def gum_band(t1, v1, v2, et, *, modulus_tol, ratio_tol, t1_acc, t2_acc):
    """Uncertainty of the residual T2 - T2_pred by the GUM law of propagation (JCGM 100:2008, eq. 10).

    Inputs taken as uncorrelated: Et (relative modulus_tol), the speed ratio V2 / V1 (ratio_tol), the measured
    T1 (t1_acc) and the measured T2 (t2_acc). The sensitivity coefficients are central differences of the
    prediction, so nothing of the code's own error terms enters.
    """
    def pred(et_, ratio_, t1_):
        return float(steady_span_tension(t1_, 1.0, ratio_, et_))

    ratio = v2 / v1
    terms = []
    for i, (x, u_x) in enumerate([(et, modulus_tol * et), (ratio, ratio_tol), (t1, t1_acc)]):
        h = 1e-4 * u_x
        lo, hi = [et, ratio, t1], [et, ratio, t1]
        lo[i], hi[i] = x - h, x + h
        terms.append((pred(*hi) - pred(*lo)) / (2 * h) * u_x)
    terms.append(t2_acc)  # the residual's sensitivity to the measured T2 is 1
    return math.sqrt(sum(c * c for c in terms))


@pytest.mark.parametrize(("t1", "v1", "v2"), [(105.0, 5.0, 5.0053), (175.0, 6.6667, 6.6667 * 0.9995),
                                              (50.0, 1.0, 1.002), (300.0, 10.0, 10.0 * 1.0002)])
def test_draw_band_is_the_gum_combined_uncertainty(t1, v1, v2):
    # The band combines the modulus tolerance, the speed-ratio (encoder) tolerance and the two load-cell
    # accuracies as the GUM does; the code drops terms of relative size T1 / Et and draw in the ratio term.
    kw = dict(modulus_tol=0.15, ratio_tol=1e-4, t1_acc=3.0, t2_acc=3.0)
    got = float(draw_band(t1, v1, v2, ET, **kw))
    assert got == pytest.approx(gum_band(t1, v1, v2, ET, **kw), rel=5e-3)


# --- no exception and no numpy warning on any float input ---------------------------------


def _draw_band(t1, v1, v2, et, mt, rt, a1, a2):
    return draw_band(t1, v1, v2, et, modulus_tol=mt, ratio_tol=rt, t1_acc=a1, t2_acc=a2)


PURE = {
    "span_tension_rate": (span_tension_rate, 6),
    "steady_span_tension": (steady_span_tension, 4),
    "draw_for_tension": (draw_for_tension, 3),
    "draw_band": (_draw_band, 8),
    "mean_ratio_uncertainty": (lambda v, r, n: mean_ratio_uncertainty(v, r, n), 3),
}


def _call_and_check(name, args):
    func, _ = PURE[name]
    with no_runtime_warning():
        out = func(*args)
    assert isinstance(out, np.ndarray)
    assert out.shape == np.broadcast_shapes(*(np.shape(a) for a in args))
    if name in ("draw_band", "mean_ratio_uncertainty"):
        assert np.all(np.isnan(out) | (out >= 0))


@pytest.mark.parametrize("name", sorted(PURE))
def test_pure_functions_special_value_grid(name):
    args = special_grid(PURE[name][1], seed=2)
    if name == "draw_band":  # modulus_tol and ratio_tol are plain floats in the signature
        for mt in (np.nan, np.inf, -1.0, 0.0, 0.15, 1e308):
            _call_and_check(name, [*args[:4], mt, -mt, *args[6:]])
    else:
        _call_and_check(name, args)


@pytest.mark.parametrize("name", sorted(PURE))
@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_pure_functions_any_float(name, data):
    args = [data.draw(any_array()) for _ in range(PURE[name][1])]
    if name == "draw_band":
        args[4], args[5] = data.draw(ANY_FLOAT), data.draw(ANY_FLOAT)
    _call_and_check(name, args)


# --- the draw check's averaging and its speed ratio (rules/span.py DrawCheck) ---------------------------------


@pytest.mark.parametrize("rho", [0.0, 0.5, 0.9])
def test_mean_uncertainty_of_an_autocorrelated_series_matches_monte_carlo(rho):
    # Independent: the spread of the means of 4000 simulated AR(1) series of 1000 samples (numpy random
    # generator), against k s / sqrt(n_eff) with n_eff = n (1 - r1) / (1 + r1) (Bayley & Hammersley 1946, from
    # memory) fed the series' own variance and lag-one autocorrelation. k = 2 (coverage ~95 %, JCGM 100 6.2).
    rng = np.random.default_rng(7)
    n, m, sigma = 1000, 4000, 1.0
    e = rng.standard_normal((m, n)) * sigma * math.sqrt(1 - rho**2)
    x = np.empty((m, n))
    x[:, 0] = rng.standard_normal(m) * sigma
    for k in range(1, n):
        x[:, k] = rho * x[:, k - 1] + e[:, k]
    spread = x.mean(axis=1).std()
    var = x.var(axis=1, ddof=1)
    xc = x - x.mean(axis=1, keepdims=True)
    r1 = (xc[:, 1:] * xc[:, :-1]).mean(axis=1) / xc.var(axis=1)
    got = mean_ratio_uncertainty(var, r1, n) / 2.0
    # the AR(1) form is asymptotic in n; the Monte Carlo spread is known to about 1.1 % (4000 series)
    assert float(np.median(got)) == pytest.approx(spread, rel=0.06)


def _draw_block(n, t1, t2, v1, v2, state=LineState.RUNNING):
    ok = np.ones(n, dtype=bool)
    tags = TagFrames(("x",), np.zeros((n, 1)), np.zeros((n, 1), dtype=np.int8), np.zeros((n, 1)))
    sig = {"tension/a": Signal(np.broadcast_to(t1, n).astype(float), ok),
           "tension/b": Signal(np.broadcast_to(t2, n).astype(float), ok),
           "speed/r1": Signal(np.broadcast_to(v1, n).astype(float), ok),
           "speed/r2": Signal(np.broadcast_to(v2, n).astype(float), ok)}
    return Block(t=np.arange(n) / 50.0, signals=sig, line_state=np.full(n, int(state), dtype=np.int8), tags=tags)


def _draw_check(commanded=None, window=500):
    return DrawCheck("b", zone_up="a", roller_up="r1", roller_down="r2", et=ET, modulus_tol=0.15, ratio_tol=1e-4,
                     t1_acc=(3.0, 0.0), t2_acc=(3.0, 0.0), window_frames=window, min_speed=0.3,
                     commanded_ratio=commanded)


def exact_steady(t1, ratio):
    """Steady T2 from the exact mass-flow balance above: eps2 = (V2 / V1)(1 + eps1) - 1, T = Et eps."""
    return ET * (ratio * (1 + t1 / ET) - 1)


def test_draw_check_uses_the_commanded_ratio_while_encoders_agree():
    # Encoders with 2e-5 relative noise around a commanded draw of 0.1064 %: the averaged ratio agrees with the
    # command within the encoder tolerance, so the command replaces it and the encoder noise leaves the prediction.
    rng = np.random.default_rng(1)
    n, r = 2000, 1.001064
    t1 = 105.0
    t2 = exact_steady(t1, r)
    v1 = 5.0 * (1 + 2e-5 * rng.standard_normal(n))
    v2 = 5.0 * r * (1 + 2e-5 * rng.standard_normal(n))
    res = _draw_check(commanded=r).update(_draw_block(n, t1, t2, v1, v2))
    ok = res.reason == int(Reason.OK)
    assert ok.sum() == n - 499  # valid once the 500-frame window has filled
    np.testing.assert_array_equal(res.extras["commanded"][ok], 1.0)
    np.testing.assert_array_equal(res.extras["speed_ratio"][ok], r)
    # the linearised prediction against the exact balance: second order in strain and draw (Et d^2 + T1 d)
    assert np.all(np.abs(res.extras["residual"][ok]) < 2 * (ET * (r - 1) ** 2 + t1 * (r - 1)) + 1e-9)
    # the same without a command: the measured ratio, with its random uncertainty in the band
    free = _draw_check().update(_draw_block(n, t1, t2, v1, v2))
    assert np.all(free.extras["commanded"][ok] == 0.0)
    # white noise of 2e-5 on each encoder: the ratio's noise is sqrt(2) 2e-5 per frame, its mean over 500
    # independent frames sqrt(2) 2e-5 / sqrt(500), times the coverage factor 2 (JCGM 100 4.2.3, 6.2)
    expected = 2 * math.sqrt(2) * 2e-5 / math.sqrt(500)
    # (the window's own variance and lag-one autocorrelation estimate it, each with a sampling spread)
    got = free.extras["ratio_random"][ok]
    assert float(np.median(got)) == pytest.approx(expected, rel=0.1)
    assert got.min() > expected / 1.5 and got.max() < expected * 1.5, (got.min(), got.max())


def test_draw_check_falls_back_to_the_encoders_when_they_disagree_with_the_command():
    # pull roll 2 runs 0.5 % away from its command (a drive not holding speed): beyond the 1e-4 tolerance, so the
    # encoder ratio is used and the prediction follows what the rollers really do.
    n, r_cmd = 1000, 1.001064
    r_true = r_cmd * 1.005
    t1 = 105.0
    res = _draw_check(commanded=r_cmd).update(_draw_block(n, t1, exact_steady(t1, r_true), 5.0, 5.0 * r_true))
    ok = res.reason == int(Reason.OK)
    assert ok.any()
    assert np.all(res.extras["commanded"][ok] == 0.0)
    np.testing.assert_allclose(res.extras["speed_ratio"][ok], r_true, rtol=1e-12)


def test_draw_check_ratio_shows_a_load_cell_gain_drift():
    # The zone's load cell reads 8 % high: measured over predicted tension is 1.08 (up to the linearisation).
    n, r, t1 = 800, 1.001064, 105.0
    res = _draw_check(commanded=r).update(_draw_block(n, t1, 1.08 * exact_steady(t1, r), 5.0, 5.0 * r))
    ok = res.reason == int(Reason.OK)
    np.testing.assert_allclose(res.extras["ratio"][ok], 1.08, rtol=3e-3)


def test_draw_check_slack_span_is_out_of_domain():
    # V2 1 % below V1 at T1 = 100 N/m: the span equation predicts Et (-0.01) + 100 < 0, a slack span, where the
    # linear elastic web model does not hold: OUT_OF_DOMAIN, no residual.
    n = 700
    res = _draw_check().update(_draw_block(n, 100.0, 0.0, 5.0, 4.95))
    assert np.all(res.reason[499:] == int(Reason.OUT_OF_DOMAIN))
    assert np.all(np.isnan(res.value))


def test_draw_checks_of_several_zones_evaluated_together_answer_as_each_alone():
    # Three zones in a row (a commanded draw the encoders follow, a free one, a commanded one the drive does not
    # hold), noisy encoders, an unusable load cell and a stop, blocks shorter and longer than the window, a reset:
    # the zones evaluated together (DrawCheck.batch) answer exactly as each check alone.
    rng = np.random.default_rng(5)
    r = (1.001064, 1.0008, 1.0012)
    t = [105.0]
    for x in r:
        t.append(exact_steady(t[-1], x))

    def checks():
        cmd = (r[0], None, r[2] / 1.005)
        return [DrawCheck(z, zone_up=u, roller_up=f"r{i + 1}", roller_down=f"r{i + 2}", et=ET, modulus_tol=0.15,
                          ratio_tol=1e-4, t1_acc=(3.0, 0.01 * i), t2_acc=(3.0, 0.0), window_frames=250, min_speed=0.3,
                          commanded_ratio=cmd[i])
                for i, (u, z) in enumerate((("a", "b"), ("b", "c"), ("c", "d")))]

    def block(n, t0, stop=False, bad=False):
        ok = np.ones(n, dtype=bool)
        v = 5.0 * np.cumprod((1.0, *r))
        sig = {f"tension/{z}": Signal(t[i] * (1 + 1e-3 * rng.standard_normal(n)), ok)
               for i, z in enumerate("abcd")}
        sig |= {f"speed/r{i + 1}": Signal(v[i] * (1 + 2e-5 * rng.standard_normal(n)), ok) for i in range(4)}
        state = np.full(n, int(LineState.RUNNING), dtype=np.int8)
        if stop:
            state[n // 3: n // 2] = int(LineState.STOPPED)
        if bad:
            nok = ok.copy()
            nok[n // 4: n // 3] = False
            sig["tension/c"] = Signal(np.where(nok, sig["tension/c"].value, np.nan), nok)
        tags = TagFrames(("x",), np.zeros((n, 1)), np.zeros((n, 1), dtype=np.int8), np.zeros((n, 1)))
        return Block(t=t0 + np.arange(n) / 50.0, signals=sig, line_state=state, tags=tags)

    alone, together = checks(), checks()
    batch = DrawCheck.batch(together)
    assert not isinstance(batch, OneByOne)
    t0, valid = 0.0, 0
    for i, (n, stop, bad) in enumerate(((300, False, False), (120, False, True), (700, True, False), (40, False, False),
                                        (600, False, False), (400, False, True))):
        if i == 4:
            batch.reset()
            for c in alone:
                c.reset()
        b = block(n, t0, stop, bad)
        t0 += n / 50.0
        for c, got in zip(alone, batch.update(b), strict=True):
            want = c.update(b)
            np.testing.assert_array_equal(got.reason, want.reason)
            np.testing.assert_array_equal(got.value, want.value)
            assert set(got.extras) == set(want.extras)
            for name in want.extras:
                np.testing.assert_array_equal(got.extras[name], want.extras[name], err_msg=name)
            valid += int(want.valid.sum())
            if c.object_id == "b" and want.valid.any():  # the encoders follow the command: it is used
                assert np.all(want.extras["commanded"][want.valid] == 1.0)
            if c.object_id == "d" and want.valid.any():  # the drive does not hold the command: the encoders are
                assert np.all(want.extras["commanded"][want.valid] == 0.0)
    assert valid > 1000
