"""Units at the boundary: parse quantities written by people, hand SI floats inward.

Everything inside spanwatch is SI (m, s, N, Pa, rad); tension is carried per unit
width (N/m) because that is what the capstan ratio, the Knox–Sweeney air film and
the per-width span equation use. This module is the only place that knows about
the trade's units. It relies on pint (https://pint.readthedocs.io) for the
conversion tables; spanwatch adds three names the trade uses:

* ``pli`` — pound-force per linear inch of width (1 pli = 175.1268 N/m),
* ``fpm`` — feet per minute (exactly 0.00508 m/s), and ``mpm`` — metres per minute,
* ``mil`` — a thousandth of an inch (25.4 um). pint defines ``mil`` as an angle;
  spanwatch never takes an angle in mils, so the word is read as ``thou``.

The registry is built on first use (:func:`ureg`), not at import: building it takes
about a fifth of a second, which a command that never converts a unit (``--help``,
``--version``) should not pay. ``UREG`` is still available as a module attribute.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import lru_cache
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import pint


@lru_cache(maxsize=1)
def ureg() -> pint.UnitRegistry:
    """spanwatch's unit registry: pint's defaults plus ``pli``, ``fpm`` and ``mpm``, built once on first use."""
    import pint

    reg = pint.UnitRegistry(autoconvert_offset_to_baseunit=True)
    reg.define("pli = lbf / inch")
    reg.define("fpm = foot / minute")
    reg.define("mpm = meter / minute")
    return reg


def __getattr__(name: str) -> Any:  # module attribute hook (PEP 562): UREG, built on first use
    if name == "UREG":
        return ureg()
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


_MIL = re.compile(r"\bmils?\b")


@dataclass(frozen=True)
class Kind:
    """A physical kind of quantity: its SI unit, how to write one, and its pint dimension."""

    name: str
    si_unit: str
    example: str

    @property
    def dimensionality(self) -> pint.util.UnitsContainer:
        return ureg().parse_units(self.si_unit).dimensionality


LENGTH = Kind("length", "m", '"76 mm", "3 in" or "1.2 mil"')
SPEED = Kind("speed", "m/s", '"300 m/min" or "1000 fpm"')
ANGLE = Kind("angle", "rad", '"180 deg"')
PRESSURE = Kind("modulus or pressure", "Pa", '"2.2 GPa" or "320 kpsi"')
TENSION = Kind("tension per width", "N/m", '"350 N/m" or "2 pli"')
FORCE = Kind("force", "N", '"400 N" or "90 lbf"')
TIME = Kind("duration", "s", '"2 s" or "500 ms"')
FREQUENCY = Kind("frequency", "1/s", '"50 Hz"')
ACCELERATION = Kind("acceleration", "m/s^2", '"0.05 m/s^2"')
TEMPERATURE = Kind("temperature", "K", '"20 degC" or "293 K"')
ROTATION = Kind("rotational speed", "turn/s", '"120 rpm"')
DIMENSIONLESS = Kind("plain number", "", '"0.3" or "5 %"')

KINDS = {
    k.name: k
    for k in (
        LENGTH,
        SPEED,
        ANGLE,
        PRESSURE,
        TENSION,
        FORCE,
        TIME,
        FREQUENCY,
        ACCELERATION,
        TEMPERATURE,
        ROTATION,
        DIMENSIONLESS,
    )
}


class UnitError(ValueError):
    """A value that is not a quantity of the expected kind; the message says what was expected."""


def _normalise(text: str) -> str:
    return _MIL.sub("thou", text.strip())


@lru_cache(maxsize=512)
def parse_unit(text: str) -> pint.Unit:
    """Parse a unit name such as ``"N"``, ``"pli"`` or ``"m/min"`` (spanwatch's registry)."""
    try:
        return ureg().parse_units(_normalise(text))
    except Exception as exc:  # pint raises several exception types for bad input
        raise UnitError(f"expected a unit such as 'N', 'pli', 'm/min' or 'rpm', got {text!r}") from exc


def unit_kind(unit: str) -> Kind | None:
    """The kind a unit measures (length, speed, ...), or None if spanwatch has no use for it."""
    u = parse_unit(unit)
    dim = u.dimensionality
    if _is_hertz(unit):
        return FREQUENCY
    if str(u) in {"", "dimensionless", "percent", "permille", "ppm"}:
        return DIMENSIONLESS
    for kind in KINDS.values():
        if kind is FREQUENCY:
            continue
        if dim == kind.dimensionality:
            return kind
    return None


def _is_hertz(unit: str) -> bool:
    return str(parse_unit(unit)) in {"hertz", "kilohertz", "megahertz"}


def to_si(value: object, kind: Kind, *, default_unit: str | None = None) -> float:
    """Convert ``"180 deg"``, ``"2 pli"`` or a bare number to an SI float of ``kind``.

    A bare number is taken in ``default_unit`` when one is given (for dimensionless
    kinds it is taken as is); otherwise it is an error, because a bare number for a
    dimensional quantity is how unit mistakes slip in.
    """
    if isinstance(value, bool):
        raise UnitError(f"expected {kind.name} such as {kind.example}, got {value!r}")
    if isinstance(value, int | float):
        if kind is DIMENSIONLESS:
            return float(value)
        if default_unit is None:
            raise UnitError(
                f"expected {kind.name} with a unit such as {kind.example}, got the bare number {value!r}"
            )
        value = f"{value} {default_unit}"
    if not isinstance(value, str):
        raise UnitError(f"expected {kind.name} such as {kind.example}, got {value!r}")
    import pint

    reg = ureg()
    text = _normalise(value)
    try:
        q = reg.Quantity(text)
    except Exception as exc:
        raise UnitError(f"expected {kind.name} such as {kind.example}, got {value!r}") from exc
    if not isinstance(q, pint.Quantity):
        q = reg.Quantity(float(q), "")
    if str(q.units) == "dimensionless" and kind is not DIMENSIONLESS:  # a bare number inside a string
        raise UnitError(f"expected {kind.name} with a unit such as {kind.example}, got the bare number {value!r}")
    try:
        if kind is ROTATION and _is_hertz(str(q.units)):
            si = float(q.magnitude) * _hertz_scale(q)
        elif kind is FREQUENCY:
            si = float(q.to("1/s").magnitude) if not _unit_is_rotation(q) else float(q.to("turn/s").magnitude)
        else:
            si = float(q.to(kind.si_unit).magnitude)
    except pint.DimensionalityError as exc:
        raise UnitError(f"expected {kind.name} such as {kind.example}, got {value!r}") from exc
    if not math.isfinite(si):
        raise UnitError(f"expected a finite {kind.name} such as {kind.example}, got {value!r}")
    return si


def _hertz_scale(q: pint.Quantity) -> float:
    return float(ureg().Quantity(1.0, q.units).to("Hz").magnitude)


def _unit_is_rotation(q: pint.Quantity) -> bool:
    return "revolutions_per_minute" in str(q.units) or "turn" in str(q.units)


def converter(unit: str, kind: Kind) -> tuple[float, float]:
    """Return ``(scale, offset)`` so that ``si = raw * scale + offset`` for a tag in ``unit``.

    Used once per tag when a recording or a live source is opened, so the per-sample
    path is a multiply-add on a numpy array, not a pint call.
    """
    zero = to_si(f"0 {unit}", kind)
    one = to_si(f"1 {unit}", kind)
    return one - zero, zero


def from_si(value: float, unit: str) -> float:
    """Convert an SI float to ``unit`` for display (``unit`` in spanwatch's registry)."""
    u = parse_unit(unit)
    if _is_hertz(unit):
        return float(value)
    reg = ureg()
    base = reg.Quantity(1.0, u).to_base_units()
    kind = unit_kind(unit)
    if kind is ROTATION:
        return float(reg.Quantity(value, "turn/s").to(u).magnitude)
    if kind is not None and kind.si_unit:
        return float(reg.Quantity(value, kind.si_unit).to(u).magnitude)
    return float(value / base.magnitude)


def fmt(value: float, unit: str, digits: int = 3) -> str:
    """Format an SI value in a display unit, e.g. ``fmt(350.25, "pli") -> "2 pli"``."""
    if value is None or not math.isfinite(value):
        return f"{value} {unit}"
    return f"{from_si(value, unit):.{digits}g} {unit}"
