"""Wound-roll geometry and winding tension (pure functions of rules/woundroll.py).

Expectations come from independent computations written out here (a wrap-by-wrap sum of
circumferences, numerical quadrature with scipy, the length and turn counters of a roll built
wrap by wrap) and from physical identities. The taper and wound-on tension tests check named
conventions and an empirical model (their sources are cited at each test).
"""

from __future__ import annotations

import numpy as np
import pytest
from hostile import any_array, check_pure, nan_or, no_runtime_warning, special_grid
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy.integrate import quad
from spanwatch.rules.woundroll import (
    diameter_from_speed,
    effective_caliper,
    taper_tension,
    unwound_diameter,
    wound_diameter,
    wound_length,
    wound_on_tension,
)

# --- wound length against independent computations ------------------------------------------


def wrap_by_wrap_length(core, caliper, wraps):
    """Sum of the mid-line circumferences of N concentric wraps: sum_k pi (Dc + (2k + 1) t)."""
    k = np.arange(wraps, dtype=float)
    return float(np.sum(np.pi * (core + (2 * k + 1) * caliper)))


@pytest.mark.parametrize(("core", "caliper", "wraps"), [
    (0.0762, 25.4e-6, 18185),   # 3 in core, 1 mil film, about a 1 m roll
    (0.1524, 30.48e-6 * 1.04, 9000),  # 6 in core, 1.2 mil BOPP with a 4 % stack factor
    (0.0762, 100e-6, 500),      # board-like caliper, small roll
    (0.3, 12e-6, 1),            # a single wrap
])
def test_wound_length_equals_wrap_by_wrap_sum(core, caliper, wraps):
    # Independent computation: N = (D - Dc) / (2 t) wraps, each adds its mid-line circumference.
    diameter = core + 2 * caliper * wraps
    assert float(wound_length(diameter, core, caliper)) == pytest.approx(
        wrap_by_wrap_length(core, caliper, wraps), rel=1e-9)


@pytest.mark.parametrize(("diameter", "core", "caliper"), [(1.0, 0.0762, 25.4e-6), (0.7, 0.0762, 31.7e-6),
                                                            (1.8, 0.15, 150e-6)])
def test_wound_length_equals_quadrature(diameter, core, caliper):
    # dL = pi D dD / (2 t): each wrap of circumference pi D adds 2 t to the diameter; integrate with scipy.
    length, _ = quad(lambda d: np.pi * d / (2 * caliper), core, diameter)
    assert float(wound_length(diameter, core, caliper)) == pytest.approx(length, rel=1e-9)


def test_wound_length_worked_value():
    # Independent: a 1 m roll of 1 mil (25.4 um, exact) film on a 3 in (76.2 mm) core holds about 30.74 km.
    expected = wrap_by_wrap_length(0.0762, 25.4e-6, round((1.0 - 0.0762) / (2 * 25.4e-6)))
    assert float(wound_length(1.0, 0.0762, 25.4e-6)) == pytest.approx(expected, rel=1e-4)
    assert 30_700 < float(wound_length(1.0, 0.0762, 25.4e-6)) < 30_800


def test_wound_length_nan_without_positive_caliper():
    with no_runtime_warning():
        assert np.all(np.isnan(wound_length(1.0, 0.0762, [0.0, -1e-6, np.nan])))


def test_unwind_consistent_with_quadrature():
    # Unwind from D0: after paying out L the diameter D satisfies L = integral_D^D0 pi D' / (2 t) dD'.
    d0, t = 0.9, 31.7e-6
    for paid_out in (1.0, 500.0, 5000.0, 15000.0):
        d = float(unwound_diameter(paid_out, d0, t))
        length, _ = quad(lambda x: np.pi * x / (2 * t), d, d0)
        assert length == pytest.approx(paid_out, rel=1e-9)
    # Asking for more web than the roll holds has no diameter.
    full = float(wound_length(d0, 0.0, t))
    with no_runtime_warning():
        assert np.isnan(unwound_diameter(full * 1.01, d0, t))


def test_wound_diameter_grows_by_two_calipers_per_wrap():
    # One wrap around diameter D adds pi (D + t) of web (mid-line) and 2 t to the diameter.
    core, t = 0.0762, 50e-6
    d = float(wound_diameter(np.pi * (core + t), core, t))
    assert d == pytest.approx(core + 2 * t, rel=1e-12)


@settings(max_examples=200)
@given(core=st.floats(0.02, 0.5), caliper=st.floats(1e-6, 1e-3), build=st.floats(1e-4, 1.5))
def test_wound_length_and_diameter_are_inverses(core, caliper, build):
    diameter = core + build
    length = float(wound_length(diameter, core, caliper))
    assert float(wound_diameter(length, core, caliper)) == pytest.approx(diameter, rel=1e-9)
    # unwinding the same length from the full roll returns to the core
    assert float(unwound_diameter(length, diameter, caliper)) == pytest.approx(core, rel=1e-6, abs=1e-9)
    # and the secant caliper of the two diameters recovers t
    assert float(effective_caliper(diameter, core, length)) == pytest.approx(caliper, rel=1e-9)
    assert float(effective_caliper(core, diameter, length)) == pytest.approx(caliper, rel=1e-9)


@settings(max_examples=200)
@given(core=st.floats(0.02, 0.5), caliper=st.floats(1e-6, 1e-3), length=st.floats(0.0, 1e5))
def test_wound_diameter_then_length_roundtrip(core, caliper, length):
    d = float(wound_diameter(length, core, caliper))
    assume(d > core * (1 + 1e-6))  # below this the difference of squares loses the digits
    assert float(wound_length(d, core, caliper)) == pytest.approx(length, rel=1e-6)


def test_effective_caliper_from_wrap_sum():
    # Independent: length from the wrap-by-wrap sum; the caliper recovered from the two diameters.
    core, t, wraps = 0.0762, 28e-6, 4000
    d = core + 2 * t * wraps
    assert float(effective_caliper(d, core, wrap_by_wrap_length(core, t, wraps))) == pytest.approx(t, rel=1e-9)
    with no_runtime_warning():
        assert np.all(np.isnan(effective_caliper(d, core, [0.0, -1.0, np.nan])))


# --- diameter from speed -------------------------------------------------------------------


def counters_over_whole_wraps(core, caliper, first_wrap, wraps, speed):
    """Length-counter and turn-counter rates of a rewind while it winds wraps first_wrap .. first_wrap + wraps - 1.

    The roll is built wrap by wrap (each wrap of mid-line circumference pi (Dc + (2k + 1) t), see
    wrap_by_wrap_length); at constant web speed the time taken is the web wound divided by the speed, and the
    roll turns once per wrap. Returns (web speed from the length counter, rev/s from the turn counter,
    the roll diameter half-way through the interval from counting wraps: Dc + 2 t (first_wrap + wraps / 2)).
    """
    web = wrap_by_wrap_length(core, caliper, first_wrap + wraps) - wrap_by_wrap_length(core, caliper, first_wrap)
    seconds = web / speed
    return web / seconds, wraps / seconds, core + 2 * caliper * (first_wrap + wraps / 2)


@pytest.mark.parametrize(("core", "caliper", "first_wrap", "wraps", "speed"), [
    (0.0762, 25.4e-6, 0, 1, 5.0),          # the very first wrap on a 3 in core
    (0.0762, 25.4e-6, 9000, 20, 5.0),      # mid-roll, 20 turns of 1 mil film at 300 m/min
    (0.1524, 150e-6, 2500, 3, 5.08),       # board on a 6 in core at 1000 fpm
    (0.3, 12e-6, 40000, 400, 12.0),
])
def test_diameter_from_speed_matches_counted_wraps(core, caliper, first_wrap, wraps, speed):
    # Independent: what a line measures (length counter and turn counter over whole wraps) against the
    # diameter known from counting wraps, each adding two calipers.
    v, n, diameter = counters_over_whole_wraps(core, caliper, first_wrap, wraps, speed)
    assert float(diameter_from_speed(v, n)) == pytest.approx(diameter, rel=1e-9)
    # Reverse running (an unwind turning the other way) gives the same diameter.
    assert float(diameter_from_speed(-v, -n)) == pytest.approx(diameter, rel=1e-9)


def test_diameter_from_speed_nan_when_roll_stands_still():
    with no_runtime_warning():
        assert np.all(np.isnan(diameter_from_speed([5.0, 5.0, 5.0], [0.0, np.nan, np.inf])))


# --- taper ----------------------------------------------------------------------------------


@given(d=st.floats(0.0762, 2.0), t0=st.floats(1.0, 2000.0), core=st.floats(0.02, 0.3))
def test_hyperbolic_taper_k1_is_constant_torque(d, t0, core):
    # Physical identity: torque per width = T * D / 2; constant torque means T(D) * D = T0 * Dc.
    assert float(taper_tension(d, t0, 1.0, core)) * d == pytest.approx(t0 * core, rel=1e-12)


@pytest.mark.parametrize("k", [0.0, 0.2, 0.5, 1.0])
def test_taper_end_points(k):
    core, dmax, t0 = 0.0762, 0.7, 140.0
    # Linear taper: T0 at the core, T0 (1 - k) at the full diameter, halfway in between.
    lin = taper_tension(np.array([core, (core + dmax) / 2, dmax]), t0, k, core, dmax, model="linear")
    np.testing.assert_allclose(lin, [t0, t0 * (1 - k / 2), t0 * (1 - k)], rtol=1e-12)
    # Hyperbolic: T0 at the core; T0 (1 - k (1 - Dc / Dmax)) at the full diameter. Both taper forms are the
    # conventions the code names (they vary between texts and drive vendors; from memory), so this checks the
    # implementation of a definition, not physics.
    hyp = taper_tension(np.array([core, dmax]), t0, k, core, model="hyperbolic")
    np.testing.assert_allclose(hyp, [t0, t0 * (1 - k * (1 - core / dmax))], rtol=1e-12)


def test_taper_argument_errors():
    with pytest.raises(ValueError, match="max_diameter"):
        taper_tension(0.5, 100.0, 0.2, 0.0762, model="linear")
    with pytest.raises(ValueError, match="hyperbolic"):
        taper_tension(0.5, 100.0, 0.2, 0.0762, 0.7, model="exponential")


def test_wound_on_tension_pfeiffer():
    # Nip-induced tension (J. D. Pfeiffer, "Mechanics of a rolling nip on paper webs", Tappi 51(8), 1968; J. K. Good,
    # Z. Wu and M. W. R. Fikes, "The internal stresses in wound rolls with the presence of a nip roller", ASME
    # J. Appl. Mech. 61(1):182-185, 1994; titles and volumes from memory): WOT = T_w + mu_k N. Hand-worked case:
    # 1 pli web tension, 10 pli nip, mu_k = 0.3 winds on at 4 pli (NIST SP 811: 1 lbf = 4.4482216152605 N,
    # 1 in = 0.0254 m). No independent value is available for this empirical model; the laws below are what
    # it states: no nip adds nothing, and the nip adds mu_k N whatever the web tension.
    pli = 4.4482216152605 / 0.0254  # N/m per pli
    assert float(wound_on_tension(1 * pli, 10 * pli, 0.3)) == pytest.approx(4 * pli, rel=1e-12)


@given(t_w=st.floats(0.0, 2000.0), t_w2=st.floats(0.0, 2000.0), nip=st.floats(0.0, 1e4), mu_k=st.floats(0.0, 1.0))
def test_wound_on_tension_laws(t_w, t_w2, nip, mu_k):
    assert float(wound_on_tension(t_w, 0.0, mu_k)) == t_w
    added = float(wound_on_tension(t_w, nip, mu_k)) - t_w
    assert float(wound_on_tension(t_w2, nip, mu_k)) - t_w2 == pytest.approx(added, rel=1e-9, abs=1e-9)
    assert float(wound_on_tension(t_w, 2 * nip, mu_k)) - t_w == pytest.approx(2 * added, rel=1e-9, abs=1e-9)


# --- no exception and no numpy warning on any float input ---------------------------------


PURE = {
    "wound_length": (wound_length, 3, None),
    "wound_diameter": (wound_diameter, 3, lambda o: nan_or(o, o >= 0)),
    "unwound_diameter": (unwound_diameter, 3, lambda o: nan_or(o, o >= 0)),
    "diameter_from_speed": (diameter_from_speed, 2, lambda o: nan_or(o, o >= 0)),
    "effective_caliper": (effective_caliper, 3, lambda o: nan_or(o, o >= 0)),
    "taper_hyperbolic": (lambda d, t0, k, dc: taper_tension(d, t0, k, dc, model="hyperbolic"), 4, None),
    "taper_linear": (lambda d, t0, k, dc, dm: taper_tension(d, t0, k, dc, dm, model="linear"), 5, None),
    "wound_on_tension": (wound_on_tension, 3, None),
}


@pytest.mark.parametrize("name", sorted(PURE))
def test_pure_functions_special_value_grid(name):
    check_pure(PURE, name, special_grid(PURE[name][1], seed=1))


@pytest.mark.parametrize("name", sorted(PURE))
@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_pure_functions_any_float(name, data):
    check_pure(PURE, name, [data.draw(any_array()) for _ in range(PURE[name][1])])
