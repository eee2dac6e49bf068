"""Span tension dynamics (pure functions of rules/span.py).

The span equation is integrated independently with scipy.integrate.solve_ivp; the steady state
is checked against that integration and against the exact mass-flow balance of a Hookean web.
"""

from __future__ import annotations

import numpy as np
import pytest
from hostile import ANY_FLOAT, any_array, special_grid
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


def integrate(t1, v1, v2, length, t2_0, t_end, t_eval):
    sol = solve_ivp(lambda _t, y: span_tension_rate(y, t1, v1, v2, ET, length), (0.0, t_end), [t2_0],
                    t_eval=t_eval, rtol=1e-10, atol=1e-10, method="LSODA")
    assert sol.success
    return sol.y[0]


@pytest.mark.parametrize(("t1", "v1", "v2", "length", "t2_0"), CASES)
def test_span_ode_converges_to_steady_tension(t1, v1, v2, length, t2_0):
    # Integrate L dT2/dt = Et (V2 - V1) + V1 T1 - V2 T2 (Whitworth & Harrison 1983; Shin 2000) with scipy.
    tau = length / v2
    steady = float(steady_span_tension(t1, v1, v2, ET))
    y = integrate(t1, v1, v2, length, t2_0, 50 * tau, [tau, 5 * tau, 50 * tau])
    assert y[2] == pytest.approx(steady, rel=1e-6, abs=1e-6)


@pytest.mark.parametrize(("t1", "v1", "v2", "length", "t2_0"), CASES)
def test_span_time_constant_is_length_over_speed(t1, v1, v2, length, t2_0):
    # First-order lag with time constant L / V (physics.md §4): after one L/V about 1/e of the step is left,
    # after five L/V less than 1 % (e^-5 = 0.0067).
    tau = length / v2
    steady = float(steady_span_tension(t1, v1, v2, ET))
    step = t2_0 - steady
    if abs(step) < 1e-9:
        pytest.skip("starts at the steady state")
    y = integrate(t1, v1, v2, length, t2_0, 5 * tau, [tau, 5 * tau])
    assert (y[0] - steady) / step == pytest.approx(np.exp(-1.0), abs=0.01)
    assert abs(y[1] - steady) <= 0.01 * abs(step)


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


def test_steady_tension_is_a_fixed_point_of_the_rate():
    t1, v1, v2 = 105.0, 5.0, 5.0053
    steady = steady_span_tension(t1, v1, v2, ET)
    assert float(span_tension_rate(steady, t1, v1, v2, ET, 3.0)) == pytest.approx(0.0, abs=1e-9)


def test_steady_tension_undefined_for_stopped_or_reversed_downstream_roller():
    assert np.all(np.isnan(steady_span_tension(100.0, 5.0, [0.0, -1.0, np.nan], ET)))


@settings(max_examples=200)
@given(t1=st.floats(0.0, 2000.0), t2=st.floats(0.0, 2000.0), v1=st.floats(0.05, 20.0),
       et=st.floats(1e4, 1e6))
def test_draw_for_tension_inverts_steady_tension(t1, t2, v1, et):
    ratio = float(draw_for_tension(t1, t2, et))
    assert float(steady_span_tension(t1, v1, v1 * ratio, et)) == pytest.approx(t2, rel=1e-7, abs=1e-7)


def test_draw_band_root_sum_square():
    # Independent: root sum of squares of the four documented error terms.
    t1, v1, v2, et = 105.0, 5.0, 5.0053, ET
    mod_tol, ratio_tol, a1, a2 = 0.15, 1e-4, 3.0, 3.0
    terms = [mod_tol * et * (v2 - v1) / v2, et * ratio_tol, a1 * v1 / v2, a2]
    expected = np.sqrt(sum(x * x for x in terms))
    got = draw_band(t1, v1, v2, et, modulus_tol=mod_tol, ratio_tol=ratio_tol, t1_acc=a1, t2_acc=a2)
    assert float(got) == pytest.approx(expected, rel=1e-12)


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
