"""Capstan traction (rules/traction.py), air entrainment (rules/airfilm.py) and slip (rules/slip.py).

Every numeric expectation here comes from outside the project: a check value of the Euler–Eytelwein
equation (the relation ASTM G143 measures COF with), a reference library (CoolProp for air viscosity), or
an independent numerical method written out in the test: the wrap as many short segments in force balance
(capstan), and the foil-bearing inlet problem (Reynolds equation with membrane equilibrium) integrated with
scipy (air film).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hostile import ANY_FLOAT, N_FUZZ, any_array, check_pure, nan_or, no_runtime_warning, special_grid
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import solve_ivp
from scipy.optimize import brentq
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
from spanwatch.rules.traction import (
    UTILISATION_CAP,
    TractionCheck,
    capstan_ratio_limit,
    demonstrated_cof,
    traction_utilisation,
)

# --- capstan equation -------------------------------------------------------------------------
# Independent reference: the web wrapped around the roller as n short straight segments, each in force
# equilibrium at the friction limit (Coulomb friction, massless flexible web). For a segment spanning an
# angle d: normal force N = (T_k + T_k+1) sin(d/2), friction (T_k+1 - T_k) cos(d/2) = mu N, so
# T_k+1 / T_k = (1 + mu tan(d/2)) / (1 - mu tan(d/2)). The product over the wrap tends to the
# Euler–Eytelwein limit as n grows: ln of the product exceeds mu theta by about (mu + mu^3) theta^3 / (12 n^2),
# below 5e-8 for every case here. No exponential appears in the reference.

SEGMENTS = 200_000


def segmented_capstan_ratio(mu: float, wrap: float, n: int = SEGMENTS) -> float:
    """Tension ratio a wrap of ``n`` equal segments holds at the friction limit (force balance per segment)."""
    x = mu * math.tan(wrap / (2 * n))
    assert x < 1, "segments too long for this COF"
    return float(np.prod(np.full(n, (1 + x) / (1 - x))))


def required_cof(ratio: float, wrap: float) -> float:
    """Smallest COF whose segmented wrap holds ``ratio`` (root of the segment force balance, scipy brentq)."""
    if ratio == 1.0:
        return 0.0
    return brentq(lambda mu: segmented_capstan_ratio(mu, wrap) - ratio, 1e-9, 50.0, xtol=1e-14, rtol=1e-13)


def test_capstan_check_value_astm_g143():
    # Euler–Eytelwein belt-friction equation, the relation from which ASTM G143 (Standard Test Method for
    # Measurement of Web/Roller Friction Characteristics) derives the COF: mu = 0.3 over 180 deg holds
    # exp(0.3 pi) = 2.566 (evaluated by hand to 4 significant digits; the example is not quoted from G143).
    assert float(capstan_ratio_limit(0.3, np.pi)) == pytest.approx(2.566, abs=5e-4)
    # The same case by segment-wise force balance, to 1e-7.
    assert float(capstan_ratio_limit(0.3, np.pi)) == pytest.approx(segmented_capstan_ratio(0.3, np.pi), rel=1e-7)


@pytest.mark.parametrize(("mu", "wrap_deg"), [(0.5, 360.0), (0.2, 90.0), (1.0, 180.0), (0.35, 210.0), (2.0, 720.0)])
def test_capstan_ratio_limit_matches_segment_force_balance(mu, wrap_deg):
    wrap = math.radians(wrap_deg)
    assert float(capstan_ratio_limit(mu, wrap)) == pytest.approx(segmented_capstan_ratio(mu, wrap), rel=1e-6)


def test_capstan_full_turn_at_half_cof_is_gelfonds_constant():
    # mu = 0.5 over a full turn: exp(pi) = 23.1406926... (Gelfond's constant; value from memory).
    assert float(capstan_ratio_limit(0.5, 2 * math.pi)) == pytest.approx(23.1406926, rel=1e-8)


@settings(max_examples=60, deadline=None)
@given(mu=st.floats(0.01, 2.0), wrap=st.floats(0.05, 4 * math.pi), t_low=st.floats(1e-3, 1e5))
def test_utilisation_is_one_at_the_segmented_friction_limit(mu, wrap, t_low):
    # A tension ratio that the segmented wrap holds exactly at the friction limit uses all of the friction,
    # whichever side is the high one.
    t_high = t_low * segmented_capstan_ratio(mu, wrap)
    assert float(traction_utilisation(t_low, t_high, mu, wrap)) == pytest.approx(1.0, rel=1e-6)
    assert float(traction_utilisation(t_high, t_low, mu, wrap)) == pytest.approx(1.0, rel=1e-6)


@given(t_a=st.floats(1e-3, 1e5), t_b=st.floats(1e-3, 1e5), mu=st.floats(0.01, 2.0), wrap=st.floats(0.05, 12.0))
def test_utilisation_symmetric_in_which_side_is_high(t_a, t_b, mu, wrap):
    # The capstan equation only sees T_high / T_low: a roller that raises or lowers tension is the same case.
    assert float(traction_utilisation(t_a, t_b, mu, wrap)) == pytest.approx(
        float(traction_utilisation(t_b, t_a, mu, wrap)), rel=1e-12, abs=1e-15)


@pytest.mark.parametrize(("t_up", "t_down", "mu", "wrap_deg"), [
    (100.0, 150.0, 0.3, 180.0),
    (175.1268, 105.0761, 0.5, 90.0),
    (50.0, 200.0, 0.8, 210.0),
    (120.0, 121.0, 0.25, 30.0),
])
def test_utilisation_is_required_over_available_cof(t_up, t_down, mu, wrap_deg):
    # Independent meaning of the utilisation: the COF the segmented wrap needs to hold the measured ratio
    # (found by root finding on the segment force balance), divided by the COF available.
    wrap = math.radians(wrap_deg)
    ratio = max(t_up, t_down) / min(t_up, t_down)
    expected = required_cof(ratio, wrap) / mu
    assert float(traction_utilisation(t_up, t_down, mu, wrap)) == pytest.approx(expected, rel=1e-6)
    assert float(traction_utilisation(t_up, t_up, mu, wrap)) == 0.0


def test_utilisation_edge_cases_documented():
    with no_runtime_warning():
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
    # Reference: CoolProp's implementation of the Lemmon & Jacobsen (2004) air viscosity correlation
    # (Int. J. Thermophys. 25(1):21-69), at 1 atm.
    reference = cp.PropsSI("V", "T", float(temperature), "P", 101325.0, "Air")
    assert float(air_viscosity(temperature)) == pytest.approx(reference, rel=0.01)


def test_air_viscosity_at_20c_handbook_value():
    # Lemmon & Jacobsen (2004), Int. J. Thermophys. 25(1):21-69, correlation for air: 1.8206e-5 Pa s at
    # 20 degC and 1 atm (the value as CoolProp evaluates it, rounded to five digits).
    assert float(air_viscosity(293.15)) == pytest.approx(1.8206e-5, rel=0.01)


def test_air_viscosity_not_defined_at_or_below_absolute_zero():
    with no_runtime_warning():
        assert np.all(np.isnan(air_viscosity([0.0, -10.0, np.nan])))


# --- Knox–Sweeney air film ---------------------------------------------------------------
# Independent reference: the foil-bearing inlet problem solved numerically. The web (tension T per width)
# approaches the roller (radius R) and entrains air; downstream of the inlet the gap is uniform, h0.
#   Reynolds equation, flow per width with the surfaces moving at mean speed U: q = U h - h^3 p' / (12 eta),
#   equal to U h0 where the gap is uniform, so p' = 12 eta U (h - h0) / h^3;
#   membrane equilibrium of the web: p = T (1/R - h'') (gap measured from the roller, small slope).
# Eliminating p: h''' = -(12 eta U / T) (h - h0) / h^3 along the web's travel. Upstream of the uniform gap
# the web must straighten into its free tangent, where the gap curvature h'' is 1/R. The shooting below
# starts on the one mode of the equation linearised about h0 that grows upstream and integrates upstream
# (scipy solve_ivp) until the gap is 10^4 h0; the curvature reached there is that of the roller this gap
# belongs to. This is the model Knox & Sweeney (1971) solved (Ind. Eng. Chem. Process Des. Dev.
# 10(2):201-205); the reference never uses their closed form or its constant.


def foil_inlet_curvature(gap: float, tension: float, speed: float, viscosity: float) -> float:
    """Far-upstream curvature h'' (1/m) of the gap profile whose uniform part is ``gap``; ``speed`` is the mean."""
    a = 12.0 * viscosity * speed / tension
    k = (a / gap**3) ** (1 / 3)  # growth rate of the linearised mode: delta''' = (a / gap^3) delta
    d0 = 1e-7 * gap

    def rhs(_s, y):
        return [y[1], y[2], a * (y[0] - gap) / y[0] ** 3]

    def far(_s, y):
        return y[0] - 1e4 * gap

    far.terminal = True
    sol = solve_ivp(rhs, (0.0, 1e3 / k), [gap + d0, k * d0, k * k * d0], method="LSODA", rtol=1e-11,
                    atol=[1e-9 * d0, 1e-9 * d0 * k, 1e-9 * d0 * k * k], events=far)
    assert sol.status == 1, "the integration did not reach the straight web"
    return float(sol.y[2, -1])


def foil_bearing_gap(radius: float, tension: float, speed: float, viscosity: float) -> float:
    """Uniform gap over a roller of ``radius``: the gap whose inlet curvature is 1/R (brentq on the shooting)."""
    return brentq(lambda g: foil_inlet_curvature(g, tension, speed, viscosity) * radius - 1.0, 1e-9, 1e-2,
                  rtol=1e-9)


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
    # Knox & Sweeney (1971), Ind. Eng. Chem. Process Des. Dev. 10(2):201-205: h0 = 0.643 R (12 eta U / T)^(2/3).
    assert pytest.approx(0.643) == KNOX_SWEENEY_CONSTANT


@pytest.mark.parametrize(("radius", "tension", "v_web", "v_roller", "eta"), [
    (0.1, 150.0, 7.0, 7.0, 1.8206e-5),
    (0.05, 200.0, 5.0, 4.5, 1.8e-5),
    (0.3, 50.0, 20.0, 20.0, 1.8e-5),
    (0.0381, 700.0, 10.0, 0.0, 1.9e-5),  # 3 in roller standing still under a fast web
])
def test_knox_sweeney_h0_solves_the_foil_bearing_inlet(radius, tension, v_web, v_roller, eta):
    # The gap the code predicts, fed to the numerically integrated inlet problem with the mean surface speed
    # (the Couette term of the Reynolds equation), bends the web to exactly the roller radius. A 1 % error in
    # h0 moves the curvature by 1.5 %; the published constant 0.643 is rounded to three digits.
    h0 = float(knox_sweeney_h0(radius, tension, entrainment_speed(v_web, v_roller, "mean"), eta))
    assert foil_inlet_curvature(h0, tension, (v_web + v_roller) / 2, eta) * radius == pytest.approx(1.0, rel=1e-3)


@pytest.mark.parametrize(("v_web", "v_roller"), [(5.0, 5.0), (5.0, 4.5), (10.0, 0.0), (2.0, 2.2)])
def test_mean_convention_equals_eshel_elrod_form(v_web, v_roller):
    # Eshel & Elrod foil-bearing solution written as h0 = 0.643 R (6 eta (V1 + V2) / T)^(2/3)
    # (from memory); with U = (V1 + V2) / 2, 12 eta U = 6 eta (V1 + V2).
    r, t, eta = 0.08, 250.0, 1.8206e-5
    eshel_elrod = 0.643 * r * (6 * eta * (v_web + v_roller) / t) ** (2 / 3)
    u = entrainment_speed(v_web, v_roller, "mean")
    assert float(knox_sweeney_h0(r, t, u, eta)) == pytest.approx(eshel_elrod, rel=1e-12)


def test_sum_convention_is_the_film_of_the_summed_speed():
    # Authors who write 12 eta (V1 + V2) model a Couette speed of V1 + V2: the "sum" convention must give the
    # foil-bearing gap of that speed (numerical inlet problem above), 2^(2/3) = 1.5874 times the gap of the
    # mean speed; here the ratio also comes from the numerical solution, at both speeds.
    r, t, v_web, v_roller, eta = 0.1, 200.0, 6.0, 5.0, 1.8206e-5
    h_sum = float(knox_sweeney_h0(r, t, entrainment_speed(v_web, v_roller, "sum"), eta))
    h_mean = float(knox_sweeney_h0(r, t, entrainment_speed(v_web, v_roller, "mean"), eta))
    assert foil_inlet_curvature(h_sum, t, v_web + v_roller, eta) * r == pytest.approx(1.0, rel=1e-3)
    numerical = foil_bearing_gap(r, t, v_web + v_roller, eta) / foil_bearing_gap(r, t, (v_web + v_roller) / 2, eta)
    assert h_sum / h_mean == pytest.approx(numerical, rel=1e-6)
    assert h_sum / h_mean == pytest.approx(1.5874, abs=1e-4)


def test_entrainment_speed_rejects_unknown_convention():
    with pytest.raises(ValueError, match="mean"):
        entrainment_speed(1.0, 1.0, "average")


def test_knox_sweeney_zero_speed_and_bad_tension():
    with no_runtime_warning():
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
    # No speed, no film (the Knox & Sweeney film grows from zero as U^(2/3)): the dry COF holds.
    with no_runtime_warning():
        mu_eff, h = effective_cof(0.5, 0.1, 150.0, 0.0, 0.0, 1e-6)
    assert float(h) == 0.0
    assert float(mu_eff) == 0.5
    # A film far beyond 3 sigma leaves only the floor (Ducotey & Good 1999).
    mu_eff, h = effective_cof(0.5, 0.1, 50.0, 20.0, 20.0, 0.1e-6, floor=0.1)
    assert float(h) > 3 * 0.1e-6
    assert float(mu_eff) == pytest.approx(0.05, rel=1e-12)


def test_effective_cof_independent_worked_example():
    # R = 0.1 m, T = 115 N/m, V = 400 m/min on both surfaces, 95 % vented (film factor 0.05), Rq 0.2 um web and
    # 1.0 um roller. Reference: air viscosity from CoolProp (Lemmon & Jacobsen 2004 correlation) at 22 degC and
    # 1 atm; the film from the numerical foil-bearing inlet problem above; the derating by straight-line
    # interpolation (numpy.interp) between the end points of Ducotey & Good (1999, ASME J. Tribology
    # 121:618-624): full COF while h <= sigma, the floor (0 here) from about 3 sigma on.
    cp = pytest.importorskip("CoolProp.CoolProp")
    eta = cp.PropsSI("V", "T", 295.15, "P", 101325.0, "Air")
    r, t, v, sigma = 0.1, 115.0, 400.0 / 60.0, math.hypot(0.2e-6, 1.0e-6)
    h = 0.05 * foil_bearing_gap(r, t, v, eta)
    expected_mu = float(np.interp(h, [sigma, 3 * sigma], [0.5, 0.0]))
    assert 0.05 < expected_mu < 0.45  # on the sloped part, so the slope is checked as well as the end points
    mu_eff, h_code = effective_cof(0.5, r, t, v, v, sigma, viscosity=float(air_viscosity(295.15)), film_factor=0.05)
    # Sutherland viscosity (the code) differs from CoolProp by < 1 %, which moves h by < 0.7 %.
    assert float(h_code) == pytest.approx(h, rel=0.007)
    assert float(mu_eff) == pytest.approx(expected_mu, abs=0.003)


# --- the streaming traction check on a small block ----------------------------------------


def _block(n, signals, state=LineState.RUNNING):
    names = ("x",)
    tags = TagFrames(names, np.zeros((n, 1)), np.zeros((n, 1), dtype=np.int8), np.zeros((n, 1)))
    return Block(t=np.arange(n) / 50.0, signals=signals, line_state=np.full(n, int(state), dtype=np.int8), tags=tags)


def _traction_check(mu, wrap, sf, **kw):
    return TractionCheck("r", zone_up="a", zone_down="b", mu=mu, wrap=wrap, radius=0.1, sigma=1e-6, film_factor=1.0,
                         safety_factor=sf, min_drive_tension=1.0, viscosity=1.8e-5,
                         air_model=kw.pop("air_model", "linear"), convention="mean", floor=0.0,
                         roller_speed=kw.pop("roller_speed", None), **kw)


def test_traction_check_reports_share_of_real_capacity():
    # Capstan equation: the ratio the segmented wrap holds at the friction limit uses the whole capacity (value 1);
    # the ratio it holds at a COF of mu / SF uses 1 / SF of it, which is exactly the safe share (extra
    # share_of_safe = 1; safety factor on the COF: common practice, no source).
    mu, wrap, sf = 0.5, np.pi, 1.5
    n = 5
    ok = np.ones(n, dtype=bool)
    t_up = np.full(n, 100.0)
    check = _traction_check(mu, wrap, sf)
    for ratio, value, safe in ((segmented_capstan_ratio(mu, wrap), 1.0, sf),
                               (segmented_capstan_ratio(mu / sf, wrap), 1 / sf, 1.0)):
        sig = {"tension/a": Signal(t_up, ok), "tension/b": Signal(t_up * ratio, ok),
               "speed/web": Signal(np.zeros(n), ok)}
        with no_runtime_warning():  # zero web speed: no film, and no 0/0 on the way
            res = check.update(_block(n, sig))
        np.testing.assert_array_equal(res.reason, int(Reason.OK))
        np.testing.assert_allclose(res.value, value, rtol=1e-6)
        np.testing.assert_allclose(res.extras["share_of_safe"], safe, rtol=1e-6)
        # the COF the held ratio proves: mu at the limit, mu / SF at the safe ratio (a lower bound on mu)
        np.testing.assert_allclose(res.extras["mu_demonstrated"], mu * value, rtol=1e-6)
    # Standing still the check is gated by the line state, whatever the tensions say; so is threading.
    for state in (LineState.STOPPED, LineState.THREADING):
        with no_runtime_warning():
            res = check.update(_block(n, sig, state))
        np.testing.assert_array_equal(res.reason, int(Reason.LINE_STATE))
        assert np.all(np.isnan(res.value))


def test_traction_defaults_alarm_near_slip_not_at_the_design_share():
    # A roller running at its design share 1 / SF of the capacity (SF 1.5: 67 %) is a line running normally; the
    # live alarm is about being close to slipping (warning 0.85, alarm 0.95 of the capacity: common practice,
    # no source). The safety factor enters only the design margin (monitor/design.py).
    d = TractionCheck.defaults
    assert d.unit == "share of capacity"
    assert 1 / 1.5 < d.warning < d.alarm < 1.0


def test_traction_lifted_web_is_out_of_domain_not_a_number():
    # No traction left (the air film lifts the web far beyond 3 sigma; Ducotey & Good 1999) with a ratio demanded:
    # the capstan equation has no capacity to compare with, so the frame is out of domain and flagged lifted.
    n = 4
    ok = np.ones(n, dtype=bool)
    sig = {"tension/a": Signal(np.full(n, 20.0), ok), "tension/b": Signal(np.full(n, 30.0), ok),
           "speed/web": Signal(np.full(n, 20.0), ok)}
    check = TractionCheck("r", zone_up="a", zone_down="b", mu=0.5, wrap=np.pi, radius=0.3, sigma=0.05e-6,
                          film_factor=1.0, safety_factor=1.5, min_drive_tension=1.0, viscosity=1.8e-5,
                          air_model="linear", convention="mean", floor=0.0, roller_speed=None)
    with no_runtime_warning():
        res = check.update(_block(n, sig))
    np.testing.assert_array_equal(res.reason, int(Reason.OUT_OF_DOMAIN))
    np.testing.assert_array_equal(res.extras["lifted"], 1.0)
    assert np.all(np.isnan(res.value))


def test_traction_waits_for_tensions_after_a_start():
    # After the line leaves STOPPED the tensions build: no judgement until both are within 20 % of their setpoints,
    # or the settle time has passed (common practice, no source). Frames at 50 Hz: 1 s stopped, then running with
    # the downstream tension at half its setpoint for 1 s, then at setpoint.
    n = 150
    ok = np.ones(n, dtype=bool)
    up = np.full(n, 100.0)
    down = np.where(np.arange(n) < 100, 75.0, 150.0)
    sig = {"tension/a": Signal(up, ok), "tension/b": Signal(down, ok), "speed/web": Signal(np.zeros(n), ok)}
    state = np.full(n, int(LineState.RUNNING), dtype=np.int8)
    state[:50] = int(LineState.STOPPED)
    names = ("x",)
    tags = TagFrames(names, np.zeros((n, 1)), np.zeros((n, 1), dtype=np.int8), np.zeros((n, 1)))
    block = Block(t=np.arange(n) / 50.0, signals=sig, line_state=state, tags=tags)
    # settle time counted from the last stopped frame (0.98 s): 0.5 s later is frame 74
    for settle, first_ok in ((30.0, 100), (0.5, 74)):
        check = _traction_check(0.5, np.pi, 1.5, setpoints=((100.0, 100.0), (150.0, 150.0)), startup_settle=settle,
                                startup_band=0.2)
        with no_runtime_warning():
            res = check.update(block)
        assert int(np.argmax(res.reason == int(Reason.OK))) == first_ok
        assert np.all(res.reason[:first_ok] == int(Reason.LINE_STATE))
        # the same frames fed in small blocks give the same answer (the start-up state carries across blocks)
        check.reset()
        parts = []
        for lo in range(0, n, 7):
            sl = slice(lo, min(n, lo + 7))
            b = Block(t=block.t[sl], signals={k: Signal(v.value[sl], v.ok[sl]) for k, v in sig.items()},
                      line_state=state[sl], tags=TagFrames(names, tags.value[sl], tags.quality[sl], tags.age[sl]))
            with no_runtime_warning():
                parts.append(check.update(b).reason)
        np.testing.assert_array_equal(np.concatenate(parts), res.reason)


def test_traction_mu_at_slip_from_the_roller_encoder():
    # A roller whose surface runs 3 % ahead of the web slips (beyond the slip check's warning of 0.5 %): the ratio
    # it holds at that moment is the capstan limit, so ln(ratio) / theta estimates the actual COF (ASTM G143 derives
    # the COF from the same relation). The lower bound mu_demonstrated is not reported while it slips.
    n = 6
    ok = np.ones(n, dtype=bool)
    ratio = segmented_capstan_ratio(0.2, np.pi)
    v_web = np.full(n, 5.0)
    v_roll = np.where(np.arange(n) < 3, 5.0, 5.0 * 1.03)
    sig = {"tension/a": Signal(np.full(n, 100.0), ok), "tension/b": Signal(np.full(n, 100.0 * ratio), ok),
           "speed/web": Signal(v_web, ok), "speed/r": Signal(v_roll, ok)}
    check = _traction_check(0.5, np.pi, 1.5, roller_speed="speed/r", air_model="none")  # no air film here
    with no_runtime_warning():
        res = check.update(_block(n, sig))
    np.testing.assert_allclose(res.extras["mu_demonstrated"][:3], 0.2, rtol=1e-6)
    assert np.all(np.isnan(res.extras["mu_demonstrated"][3:]))
    np.testing.assert_allclose(res.extras["mu_at_slip"][3:], 0.2, rtol=1e-6)
    assert np.all(np.isnan(res.extras["mu_at_slip"][:3]))


# --- slip (rules/slip.py) ----------------------------------------------------------------------


def test_surface_speed_and_slip_ratio_independent():
    # Circumference times revolutions: 120 rpm on a 0.2 m roller is 2 rev/s * 0.2 pi m = 1.2566 m/s.
    assert float(slip.surface_speed(2.0, 0.2)) == pytest.approx(0.4 * math.pi, rel=1e-12)
    # A roller 1 % ahead of web speed times (1 + draw) slips by +1 %.
    assert float(slip.slip_ratio(5.0 * 1.002 * 1.01, 5.0, 0.002)) == pytest.approx(0.01, rel=1e-9)
    with no_runtime_warning():
        assert np.isnan(slip.slip_ratio(1.0, 0.1, 0.0, 0.2))
        assert np.isnan(slip.slip_ratio(1.0, 0.0, 0.0))  # web standing still: no slip defined


# --- no exception and no numpy warning on any float input ---------------------------------
# Each call runs under hostile.no_runtime_warning (check_pure does it for the table), so an overflow,
# 0/0 or inf - inf that a function does not handle on purpose fails these tests.


PURE = {
    "air_viscosity": (air_viscosity, 1, lambda o: nan_or(o, o >= 0)),
    "entrainment_speed": (entrainment_speed, 2, lambda o: nan_or(o, o >= 0)),
    "knox_sweeney_h0": (knox_sweeney_h0, 4, lambda o: nan_or(o, o >= 0)),
    "combined_roughness": (combined_roughness, 2, lambda o: nan_or(o, o >= 0)),
    "capstan_ratio_limit": (capstan_ratio_limit, 2, lambda o: nan_or(o, o >= 0)),
    "traction_utilisation": (traction_utilisation, 4, lambda o: nan_or(o, (o >= 0) & (o <= UTILISATION_CAP))),
    "demonstrated_cof": (demonstrated_cof, 3, lambda o: nan_or(o, o >= 0)),
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
    with no_runtime_warning():
        out = traction_derating(h, s, model=model, floor=floor)
    assert out.shape == (N_FUZZ,)
    if 0.0 <= floor <= 1.0:
        assert nan_or(out, (out >= floor - 1e-15) & (out <= 1.0))


def test_traction_derating_special_value_grid():
    h, s, floor = special_grid(3, seed=0)
    for f in np.unique(floor):
        with no_runtime_warning():
            out = traction_derating(h, s, model="linear", floor=float(f))
        assert out.shape == h.shape


@settings(max_examples=100, deadline=None)
@given(args=st.tuples(*[any_array() for _ in range(8)]), floor=ANY_FLOAT,
       model=st.sampled_from(["linear", "none"]), convention=st.sampled_from(["mean", "sum"]))
def test_effective_cof_any_float(args, floor, model, convention):
    mu, r, t, vw, vr, sigma, eta, ff = args
    with no_runtime_warning():
        mu_eff, h = effective_cof(mu, r, t, vw, vr, sigma, viscosity=eta, film_factor=ff, model=model,
                                  convention=convention, floor=floor)
    assert mu_eff.shape == h.shape == (N_FUZZ,)


def test_effective_cof_special_value_grid():
    mu, r, t, vw, vr, sigma, eta, ff = special_grid(8, seed=0)
    with no_runtime_warning():
        mu_eff, h = effective_cof(mu, r, t, vw, vr, sigma, viscosity=eta, film_factor=ff)
    assert mu_eff.shape == h.shape == mu.shape
