"""Units at the boundary (monitor/units.py) against the exact conversion factors of NIST SP 811.

NIST SP 811 (2008), Appendix B: 1 in = 0.0254 m exactly, 1 ft = 0.3048 m exactly, 1 lb = 0.45359237 kg
exactly; standard gravity 9.80665 m/s^2 exactly (CGPM 1901), so 1 lbf = 4.4482216152605 N exactly.
"Exactly" below means equal up to floating-point rounding (relative 1e-15).
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from spanwatch.monitor import units as U

INCH = 0.0254
FOOT = 0.3048
LBF = 0.45359237 * 9.80665
EXACT = 1e-15


def test_pli_in_newtons_per_metre():
    # NIST SP 811 (2008), Appendix B: 1 pli = 1 lbf / 1 in = 4.4482216152605 N / 0.0254 m = 175.1268 N/m.
    assert U.to_si("1 pli", U.TENSION) == pytest.approx(LBF / INCH, rel=EXACT)
    assert U.to_si("1 pli", U.TENSION) == pytest.approx(175.1268, abs=5e-5)
    assert U.to_si("2 lbf/in", U.TENSION) == pytest.approx(2 * LBF / INCH, rel=EXACT)


def test_fpm_is_exactly_0_3048_m_per_min():
    # NIST SP 811 (2008), Appendix B: 1 ft = 0.3048 m exactly, so 1 fpm = 0.3048 m/min.
    assert U.to_si("1 fpm", U.SPEED) == pytest.approx(FOOT / 60.0, rel=EXACT)
    assert U.from_si(U.to_si("1 fpm", U.SPEED), "m/min") == pytest.approx(0.3048, rel=EXACT)
    assert U.to_si("1000 fpm", U.SPEED) == pytest.approx(5.08, rel=EXACT)


@pytest.mark.parametrize(("text", "metres"), [
    ("1 mil", 25.4e-6), ("1.2 mil", 1.2 * 25.4e-6), ("2 mils", 50.8e-6), ("1 thou", 25.4e-6),
    ("3 in", 3 * INCH), ("6 in", 6 * INCH), ("76 mm", 0.076), ("0.2 um", 0.2e-6),
])
def test_lengths_including_mil_as_thousandth_of_an_inch(text, metres):
    # NIST SP 811 (2008), Appendix B: 1 mil = 0.001 in = 25.4 um exactly. (pint's own "mil" is an angle;
    # spanwatch reads "mil" and "thou" as the length.)
    assert U.to_si(text, U.LENGTH) == pytest.approx(metres, rel=EXACT)


@pytest.mark.parametrize(("text", "kind", "si"), [
    ("180 deg", U.ANGLE, math.pi),
    ("90 lbf", U.FORCE, 90 * LBF),
    ("1 psi", U.PRESSURE, LBF / INCH**2),
    ("2.2 GPa", U.PRESSURE, 2.2e9),
    ("300 m/min", U.SPEED, 5.0),
    ("120 rpm", U.ROTATION, 2.0),        # revolutions per second
    ("120 rpm", U.FREQUENCY, 2.0),       # a rotation as a frequency: turns per second, not rad/s
    ("50 Hz", U.FREQUENCY, 50.0),
    ("50 Hz", U.ROTATION, 50.0),
    ("500 ms", U.TIME, 0.5),
    ("20 degC", U.TEMPERATURE, 293.15),  # ITS-90 / SI definition: T/K = t/degC + 273.15
    ("68 degF", U.TEMPERATURE, 293.15),  # (68 - 32) * 5/9 = 20 degC
    ("5 %", U.DIMENSIONLESS, 0.05),
    ("0.05 m/s^2", U.ACCELERATION, 0.05),
])
def test_to_si_independent_values(text, kind, si):
    assert U.to_si(text, kind) == pytest.approx(si, rel=1e-12)


@pytest.mark.parametrize("kind", [k for k in U.KINDS.values() if k is not U.DIMENSIONLESS], ids=lambda k: k.name)
@pytest.mark.parametrize("value", [180, 0.5, 3])
def test_bare_numbers_refused_for_dimensional_kinds(kind, value):
    with pytest.raises(U.UnitError, match="bare number"):
        U.to_si(value, kind)


@pytest.mark.parametrize("kind", [k for k in U.KINDS.values() if k is not U.DIMENSIONLESS], ids=lambda k: k.name)
def test_bare_number_in_a_string_refused_for_dimensional_kinds(kind):
    # "3" written as a string is still a number without a unit; for an angle it must not become 3 rad.
    with pytest.raises(U.UnitError):
        U.to_si("3", kind)


def test_bare_number_with_default_unit_and_dimensionless():
    assert U.to_si(180, U.ANGLE, default_unit="deg") == pytest.approx(math.pi, rel=EXACT)
    assert U.to_si(0.3, U.DIMENSIONLESS) == 0.3


@pytest.mark.parametrize("bad", [True, None, [1, "m"], "abc", "1 kg", "inf m", "nan m", "180 kg"])
def test_not_a_quantity_of_the_kind(bad):
    with pytest.raises(U.UnitError) as info:
        U.to_si(bad, U.LENGTH)
    assert "length" in str(info.value)
    assert isinstance(info.value, ValueError)


@pytest.mark.parametrize(("unit", "kind"), [
    ("N", U.FORCE), ("lbf", U.FORCE), ("pli", U.TENSION), ("N/m", U.TENSION), ("m/min", U.SPEED),
    ("fpm", U.SPEED), ("mpm", U.SPEED), ("rpm", U.ROTATION), ("Hz", U.FREQUENCY), ("mm", U.LENGTH),
    ("mil", U.LENGTH), ("degC", U.TEMPERATURE), ("", U.DIMENSIONLESS), ("kg", None),
])
def test_unit_kind(unit, kind):
    assert U.unit_kind(unit) is kind


CONVERTED = [
    ("pli", U.TENSION), ("N/m", U.TENSION), ("N", U.FORCE), ("lbf", U.FORCE), ("m/min", U.SPEED),
    ("fpm", U.SPEED), ("mm", U.LENGTH), ("in", U.LENGTH), ("mil", U.LENGTH), ("rpm", U.ROTATION),
    ("Hz", U.FREQUENCY), ("degC", U.TEMPERATURE), ("degF", U.TEMPERATURE), ("kPa", U.PRESSURE),
    ("psi", U.PRESSURE), ("ms", U.TIME), ("deg", U.ANGLE),
]


@pytest.mark.parametrize(("unit", "kind"), CONVERTED, ids=[u or "none" for u, _ in CONVERTED])
@settings(max_examples=30, deadline=None)
@given(raw=st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False))
def test_converter_matches_to_si(unit, kind, raw):
    scale, offset = U.converter(unit, kind)
    expected = U.to_si(f"{raw!r} {unit}", kind)
    assert raw * scale + offset == pytest.approx(expected, rel=1e-12, abs=1e-9)


@pytest.mark.parametrize(("unit", "scale", "offset"), [
    ("pli", LBF / INCH, 0.0), ("fpm", FOOT / 60, 0.0), ("mil", 25.4e-6, 0.0), ("rpm", 1 / 60, 0.0),
    ("degC", 1.0, 273.15), ("degF", 5 / 9, 273.15 - 32 * 5 / 9),
])
def test_converter_independent_factors(unit, scale, offset):
    kind = U.unit_kind(unit)
    got_scale, got_offset = U.converter(unit, kind)
    assert got_scale == pytest.approx(scale, rel=1e-12)
    assert got_offset == pytest.approx(offset, rel=1e-12, abs=1e-12)


@pytest.mark.parametrize(("unit", "kind"), [("pli", U.TENSION), ("fpm", U.SPEED), ("mil", U.LENGTH),
                                            ("rpm", U.ROTATION), ("degC", U.TEMPERATURE), ("in", U.LENGTH)])
@settings(max_examples=30, deadline=None)
@given(value=st.floats(-1e5, 1e5, allow_nan=False))
def test_from_si_inverts_to_si(unit, kind, value):
    assert U.from_si(U.to_si(f"{value!r} {unit}", kind), unit) == pytest.approx(value, rel=1e-9, abs=1e-9)


def test_fmt_in_display_units():
    assert U.fmt(350.25, "pli") == "2 pli"
    assert U.fmt(U.to_si("400 m/min", U.SPEED), "m/min") == "400 m/min"


def test_parse_unit_errors_are_unit_errors():
    with pytest.raises(U.UnitError, match="unit"):
        U.parse_unit("xyzzy")
