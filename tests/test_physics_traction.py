"""Capstan traction (rules/traction.py), air entrainment (rules/airfilm.py) and slip (rules/slip.py).

Every numeric expectation here comes from outside the project: a published check value,
a reference library (CoolProp), or an independent computation written out in the test.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hostile import ANY_FLOAT, N_FUZZ, any_array, check_pure, nan_or, special_grid
from hypothesis import given, settings
from hypothesis import strategies as st
from spanwatch.rules import slip
from spanwatch.rules.airfilm import (
    KNOX_SWEENEY_CONSTANT,
    air_viscosity,
    combined_roughness,
    effective_cof,
    entrainment_speed,
    knox_sweeney_h0,
    traction_derating,
)
from spanwatch.rules.base import Block, LineState, Reason, Signal, TagFrames
from spanwatch.rules.traction import UTILISATION_CAP, TractionCheck, capstan_ratio_limit, traction_utilisation

# --- capstan equation -------------------------------------------------------------------------


def test_capstan_check_value_astm_g143():
    # ASTM G143 / Euler–Eytelwein check value (physics.md §1): mu = 0.3 over 180 deg holds exp(0.3 pi) = 2.566.
    assert float(capstan_ratio_limit(0.3, np.pi)) == pytest.approx(2.566, abs=5e-4)
    assert float(capstan_ratio_limit(0.3, np.pi)) == pytest.approx(math.exp(0.3 * math.pi), rel=1e-12)


@pytest.mark.parametrize(("mu", "wrap_deg", "ratio"), [
    # exp(mu * theta) evaluated independently (Euler–Eytelwein); mu 0.5 over a full turn holds e^pi = 23.1406926
    # (Gelfond's constant, from memory).
    (0.5, 360.0, 23.1406926),
    (0.2, 90.0, math.exp(0.2 * math.pi / 2)),
    (1.0, 180.0, math.exp(math.pi)),
])
def test_capstan_ratio_limit_matches_euler_eytelwein(mu, wrap_deg, ratio):
    assert float(capstan_ratio_limit(mu, math.radians(wrap_deg))) == pytest.approx(ratio, rel=1e-7)


@given(mu=st.floats(0.01, 2.0), wrap=st.floats(0.05, 4 * math.pi), t_low=st.floats(1e-3, 1e5))
def test_utilisation_is_exactly_one_at_the_limit_ratio(mu, wrap, t_low):
    # Definition of the capstan limit (Euler–Eytelwein): T_high / T_low = exp(mu theta) uses all the friction.
    t_high = t_low * math.exp(mu * wrap)
    assert float(traction_utilisation(t_low, t_high, mu, wrap)) == pytest.approx(1.0, rel=1e-9)
    assert float(traction_utilisation(t_high, t_low, mu, wrap)) == pytest.approx(1.0, rel=1e-9)


@given(t_a=st.floats(1e-3, 1e5), t_b=st.floats(1e-3, 1e5), mu=st.floats(0.01, 2.0), wrap=st.floats(0.05, 12.0))
def test_utilisation_symmetric_in_which_side_is_high(t_a, t_b, mu, wrap):
    # The capstan equation only sees T_high / T_low: a roller that raises or lowers tension is the same case.
    assert float(traction_utilisation(t_a, t_b, mu, wrap)) == pytest.approx(
        float(traction_utilisation(t_b, t_a, mu, wrap)), rel=1e-12, abs=1e-15)


def test_utilisation_independent_values():
    # u = ln(T_high / T_low) / (mu theta), computed by hand from the capstan equation.
    t_up = np.array([100.0, 100.0, 175.1268, 50.0])
    t_down = np.array([150.0, 100.0, 105.0761, 200.0])
    mu = np.array([0.3, 0.3, 0.5, 0.8])
    wrap = np.array([np.pi, np.pi, np.pi / 2, np.radians(210.0)])
    expected = np.abs(np.log(t_down / t_up)) / (mu * wrap)
    np.testing.assert_allclose(traction_utilisation(t_up, t_down, mu, wrap), expected, rtol=1e-12)


def test_utilisation_edge_cases_documented():
    # No traction left (air film lifted the web) but a ratio demanded: saturates at the cap.
    assert float(traction_utilisation(100.0, 120.0, 0.0, np.pi)) == UTILISATION_CAP
    # No ratio demanded and no traction: nothing is used.
    assert float(traction_utilisation(100.0, 100.0, 0.0, np.pi)) == 0.0
    # Non-positive or non-finite tensions: no ratio is defined (threading, broken web).
    for a, b in [(0.0, 100.0), (100.0, -5.0), (np.nan, 100.0), (np.inf, 100.0)]:
        assert np.isnan(traction_utilisation(a, b, 0.3, np.pi))


@settings(max_examples=200)
@given(t_low=st.floats(1.0, 1e4), r1=st.floats(1.0, 50.0), r2=st.floats(1.0, 50.0),
       mu1=st.floats(0.05, 2.0), mu2=st.floats(0.05, 2.0), w1=st.floats(0.1, 12.0), w2=st.floats(0.1, 12.0))
def test_utilisation_monotone_in_ratio_mu_and_wrap(t_low, r1, r2, mu1, mu2, w1, w2):
    # Capstan equation: more demanded ratio uses more capacity; more friction or more wrap gives more capacity.
    r_lo, r_hi = sorted((r1, r2))
    mu_lo, mu_hi = sorted((mu1, mu2))
    w_lo, w_hi = sorted((w1, w2))

    def u(r, m, w):
        return float(traction_utilisation(t_low, t_low * r, m, w))

    assert u(r_hi, mu1, w1) >= u(r_lo, mu1, w1)
    assert u(r1, mu_hi, w1) <= u(r1, mu_lo, w1)
    assert u(r1, mu1, w_hi) <= u(r1, mu1, w_lo)


# --- air viscosity against CoolProp ---------------------------------------------------------


@pytest.mark.parametrize("temperature", np.arange(260.0, 361.0, 10.0))
def test_air_viscosity_matches_coolprop(temperature):
    cp = pytest.importorskip("CoolProp.CoolProp")
    # Reference: CoolProp, Lemmon & Jacobsen (2004) air viscosity correlation, at 1 atm.
    reference = cp.PropsSI("V", "T", float(temperature), "P", 101325.0, "Air")
    assert float(air_viscosity(temperature)) == pytest.approx(reference, rel=0.01)


def test_air_viscosity_at_20c_handbook_value():
    # physics.md §2: 1.8206e-5 Pa s at 20 degC, 1 atm (Lemmon & Jacobsen 2004).
    assert float(air_viscosity(293.15)) == pytest.approx(1.8206e-5, rel=0.01)


def test_air_viscosity_not_defined_at_or_below_absolute_zero():
    assert np.all(np.isnan(air_viscosity([0.0, -10.0, np.nan])))


# --- Knox–Sweeney air film ---------------------------------------------------------------


BASE = dict(radius=0.05, tension_per_width=200.0, speed=5.0, viscosity=1.8e-5)


def h0(**kw):
    return float(knox_sweeney_h0(**{**BASE, **kw}))


@pytest.mark.parametrize("k", [0.25, 2.0, 3.7, 10.0])
def test_knox_sweeney_scaling_laws(k):
    # Independent computation of the foil-bearing scaling h0 = c R (eta U / T)^(2/3) (Knox & Sweeney 1971):
    # h ~ R, h ~ U^(2/3), h ~ eta^(2/3), h ~ T^(-2/3).
    base = h0()
    assert h0(radius=k * BASE["radius"]) / base == pytest.approx(k, rel=1e-12)
    assert h0(speed=k * BASE["speed"]) / base == pytest.approx(k ** (2 / 3), rel=1e-12)
    assert h0(viscosity=k * BASE["viscosity"]) / base == pytest.approx(k ** (2 / 3), rel=1e-12)
    assert h0(tension_per_width=k * BASE["tension_per_width"]) / base == pytest.approx(k ** (-2 / 3), rel=1e-12)


def test_knox_sweeney_constant_is_the_published_one():
    # Knox & Sweeney (1971), Ind. Eng. Chem. Process Des. Dev. 10(2):201-205 (physics.md §2): 0.643.
    assert pytest.approx(0.643) == KNOX_SWEENEY_CONSTANT
    r, t, u, eta = 0.1, 150.0, 7.0, 1.8206e-5
    assert float(knox_sweeney_h0(r, t, u, eta)) == pytest.approx(0.643 * r * (12 * eta * u / t) ** (2 / 3), rel=1e-12)


@pytest.mark.parametrize(("v_web", "v_roller"), [(5.0, 5.0), (5.0, 4.5), (10.0, 0.0), (2.0, 2.2)])
def test_mean_convention_equals_eshel_elrod_form(v_web, v_roller):
    # Eshel & Elrod foil-bearing solution written as h0 = 0.643 R (6 eta (V1 + V2) / T)^(2/3)
    # (from memory); with U = (V1 + V2) / 2, 12 eta U = 6 eta (V1 + V2).
    r, t, eta = 0.08, 250.0, 1.8206e-5
    eshel_elrod = 0.643 * r * (6 * eta * (v_web + v_roller) / t) ** (2 / 3)
    u = entrainment_speed(v_web, v_roller, "mean")
    assert float(knox_sweeney_h0(r, t, u, eta)) == pytest.approx(eshel_elrod, rel=1e-12)


def test_sum_convention_is_two_to_the_two_thirds_thicker():
    # physics.md §2: writing 12 eta (V1 + V2) instead of the mean changes h0 by 2^(2/3) = 1.587.
    u_mean = entrainment_speed(6.0, 5.0, "mean")
    u_sum = entrainment_speed(6.0, 5.0, "sum")
    ratio = float(knox_sweeney_h0(0.1, 200.0, u_sum) / knox_sweeney_h0(0.1, 200.0, u_mean))
    assert ratio == pytest.approx(2 ** (2 / 3), rel=1e-12)
    assert ratio == pytest.approx(1.5874, abs=1e-4)


def test_entrainment_speed_rejects_unknown_convention():
    with pytest.raises(ValueError, match="mean"):
        entrainment_speed(1.0, 1.0, "average")


def test_knox_sweeney_zero_speed_and_bad_tension():
    assert float(knox_sweeney_h0(0.1, 200.0, 0.0)) == 0.0
    assert np.all(np.isnan(knox_sweeney_h0(0.1, [0.0, -5.0, np.nan], 5.0)))


# --- traction derating (Ducotey & Good 1999) ----------------------------------------------


@pytest.mark.parametrize("floor", [0.0, 0.2, 0.5])
def test_derating_end_points_ducotey_good(floor):
    # Ducotey & Good (1999): full traction while the film is within the roughness, minimal beyond ~3 sigma.
    sigma = 0.8e-6
    h = np.array([0.0, 0.3, 0.99, 1.0]) * sigma
    np.testing.assert_array_equal(traction_derating(h, sigma, floor=floor), 1.0)
    h = np.array([3.0, 3.01, 5.0, 100.0]) * sigma
    np.testing.assert_allclose(traction_derating(h, sigma, floor=floor), floor, rtol=0, atol=1e-15)
    # Linear interpolation between the two end points (the documented "linear" model, from memory):
    assert float(traction_derating(2 * sigma, sigma, floor=floor)) == pytest.approx((1 + floor) / 2, rel=1e-12)


@settings(max_examples=200)
@given(h1=st.floats(0, 1e-4), h2=st.floats(0, 1e-4), sigma=st.floats(1e-9, 1e-5), floor=st.floats(0, 1))
def test_derating_monotone_non_increasing(h1, h2, sigma, floor):
    lo, hi = sorted((h1, h2))
    d_lo = float(traction_derating(lo, sigma, floor=floor))
    d_hi = float(traction_derating(hi, sigma, floor=floor))
    assert d_hi <= d_lo
    assert floor - 1e-15 <= d_hi <= 1.0  # 1 - (1 - floor) rounds a subnormal floor to 0


def test_derating_none_model_and_unknown_model():
    np.testing.assert_array_equal(traction_derating([0.0, 1e-3], 1e-6, model="none"), 1.0)
    with pytest.raises(ValueError, match="linear"):
        traction_derating(1e-6, 1e-6, model="exponential")


def test_combined_roughness_root_sum_square():
    # Ducotey & Good (1999): sigma = sqrt(Rq_web^2 + Rq_roller^2); 0.3 and 0.4 um give 0.5 um.
    assert float(combined_roughness(0.3e-6, 0.4e-6)) == pytest.approx(0.5e-6, rel=1e-12)


def test_effective_cof_at_standstill_and_fully_lifted():
    # No speed, no film: the dry COF holds (physics.md §1, "no air film at low speed").
    mu_eff, h = effective_cof(0.5, 0.1, 150.0, 0.0, 0.0, 1e-6)
    assert float(h) == 0.0
    assert float(mu_eff) == 0.5
    # A film far beyond 3 sigma leaves only the floor (Ducotey & Good 1999).
    mu_eff, h = effective_cof(0.5, 0.1, 50.0, 20.0, 20.0, 0.1e-6, floor=0.1)
    assert float(h) > 3 * 0.1e-6
    assert float(mu_eff) == pytest.approx(0.05, rel=1e-12)


def test_effective_cof_independent_worked_example():
    # Independent computation: R = 0.1 m, T = 115 N/m, V = 400 m/min on both surfaces, eta from CoolProp at 22 degC,
    # vented 95 %; h = 0.05 * 0.643 R (12 eta U / T)^(2/3); linear derating between sigma and 3 sigma.
    cp = pytest.importorskip("CoolProp.CoolProp")
    eta = cp.PropsSI("V", "T", 295.15, "P", 101325.0, "Air")
    r, t, v, sigma = 0.1, 115.0, 400.0 / 60.0, math.hypot(0.2e-6, 1.0e-6)
    h = 0.05 * 0.643 * r * (12 * eta * v / t) ** (2 / 3)
    expected_mu = 0.5 * (1 - min(max((h - sigma) / (2 * sigma), 0.0), 1.0))
    mu_eff, h_code = effective_cof(0.5, r, t, v, v, sigma, viscosity=float(air_viscosity(295.15)), film_factor=0.05)
    # Sutherland viscosity differs from CoolProp by < 1 %, which moves h by < 0.7 %.
    assert float(h_code) == pytest.approx(h, rel=0.007)
    assert float(mu_eff) == pytest.approx(expected_mu, abs=0.003)


# --- the streaming traction check on a small block ----------------------------------------


def _block(n, signals, state=LineState.RUNNING):
    names = ("x",)
    tags = TagFrames(names, np.zeros((n, 1)), np.zeros((n, 1), dtype=np.int8), np.zeros((n, 1)))
    return Block(t=np.arange(n) / 50.0, signals=signals, line_state=np.full(n, int(state), dtype=np.int8), tags=tags)


def test_traction_check_reports_one_at_the_safe_ratio():
    # Capstan equation with a safety factor: a ratio of exp(mu theta / SF) uses exactly the safe capacity.
    mu, wrap, sf = 0.5, np.pi, 1.5
    n = 5
    ok = np.ones(n, dtype=bool)
    t_up = np.full(n, 100.0)
    t_down = t_up * np.exp(mu * wrap / sf)
    sig = {"tension/a": Signal(t_up, ok), "tension/b": Signal(t_down, ok),
           "speed/web": Signal(np.zeros(n), ok)}
    check = TractionCheck("r", zone_up="a", zone_down="b", mu=mu, wrap=wrap, radius=0.1, sigma=1e-6, film_factor=1.0,
                          safety_factor=sf, min_drive_tension=1.0, viscosity=1.8e-5, air_model="linear",
                          convention="mean", floor=0.0, roller_speed=None)
    res = check.update(_block(n, sig))
    np.testing.assert_array_equal(res.reason, int(Reason.OK))
    np.testing.assert_allclose(res.value, 1.0, rtol=1e-12)
    # Standing still the check is gated by the line state, whatever the tensions say.
    res = check.update(_block(n, sig, LineState.STOPPED))
    np.testing.assert_array_equal(res.reason, int(Reason.LINE_STATE))
    assert np.all(np.isnan(res.value))


# --- slip (rules/slip.py) ----------------------------------------------------------------------


def test_surface_speed_and_slip_ratio_independent():
    # Circumference times revolutions: 120 rpm on a 0.2 m roller is 2 rev/s * 0.2 pi m = 1.2566 m/s.
    assert float(slip.surface_speed(2.0, 0.2)) == pytest.approx(0.4 * math.pi, rel=1e-12)
    # A roller 1 % ahead of web speed times (1 + draw) slips by +1 %.
    assert float(slip.slip_ratio(5.0 * 1.002 * 1.01, 5.0, 0.002)) == pytest.approx(0.01, rel=1e-9)
    assert np.isnan(slip.slip_ratio(1.0, 0.1, 0.0, 0.2))


# --- no exception and no numpy warning on any float input ---------------------------------
# pytest turns RuntimeWarnings raised inside rules/ into errors (pyproject filterwarnings), so an
# overflow, 0/0 or inf - inf that is not explicitly handled fails these tests.


PURE = {
    "air_viscosity": (air_viscosity, 1, lambda o: nan_or(o, o >= 0)),
    "entrainment_speed": (entrainment_speed, 2, lambda o: nan_or(o, o >= 0)),
    "knox_sweeney_h0": (knox_sweeney_h0, 4, lambda o: nan_or(o, o >= 0)),
    "combined_roughness": (combined_roughness, 2, lambda o: nan_or(o, o >= 0)),
    "capstan_ratio_limit": (capstan_ratio_limit, 2, lambda o: nan_or(o, o >= 0)),
    "traction_utilisation": (traction_utilisation, 4, lambda o: nan_or(o, (o >= 0) & (o <= UTILISATION_CAP))),
    "surface_speed": (slip.surface_speed, 2, None),
    "slip_ratio": (lambda a, b, c: slip.slip_ratio(a, b, c), 3, None),
}


@pytest.mark.parametrize("name", sorted(PURE))
def test_pure_functions_special_value_grid(name):
    check_pure(PURE, name, special_grid(PURE[name][1], seed=0))


@pytest.mark.parametrize("name", sorted(PURE))
@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_pure_functions_any_float(name, data):
    check_pure(PURE, name, [data.draw(any_array()) for _ in range(PURE[name][1])])


@settings(max_examples=100, deadline=None)
@given(h=any_array(), s=any_array(), floor=ANY_FLOAT, model=st.sampled_from(["linear", "none"]))
def test_traction_derating_any_float(h, s, floor, model):
    out = traction_derating(h, s, model=model, floor=floor)
    assert out.shape == (N_FUZZ,)
    if 0.0 <= floor <= 1.0:
        assert nan_or(out, (out >= floor - 1e-15) & (out <= 1.0))


def test_traction_derating_special_value_grid():
    h, s, floor = special_grid(3, seed=0)
    for f in np.unique(floor):
        out = traction_derating(h, s, model="linear", floor=float(f))
        assert out.shape == h.shape


@settings(max_examples=100, deadline=None)
@given(args=st.tuples(*[any_array() for _ in range(8)]), floor=ANY_FLOAT,
       model=st.sampled_from(["linear", "none"]), convention=st.sampled_from(["mean", "sum"]))
def test_effective_cof_any_float(args, floor, model, convention):
    mu, r, t, vw, vr, sigma, eta, ff = args
    mu_eff, h = effective_cof(mu, r, t, vw, vr, sigma, viscosity=eta, film_factor=ff, model=model,
                              convention=convention, floor=floor)
    assert mu_eff.shape == h.shape == (N_FUZZ,)


def test_effective_cof_special_value_grid():
    mu, r, t, vw, vr, sigma, eta, ff = special_grid(8, seed=0)
    mu_eff, h = effective_cof(mu, r, t, vw, vr, sigma, viscosity=eta, film_factor=ff)
    assert mu_eff.shape == h.shape == mu.shape
