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
from spanwatch.rules.span import draw_band, draw_for_tension, span_tension_rate, steady_span_tension

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
}


def _call_and_check(name, args):
    func, _ = PURE[name]
    with no_runtime_warning():
        out = func(*args)
    assert isinstance(out, np.ndarray)
    assert out.shape == np.broadcast_shapes(*(np.shape(a) for a in args))
    if name == "draw_band":
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
