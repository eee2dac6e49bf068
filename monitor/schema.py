"""Building blocks of the config schema: the error type, quantity fields with units, names, strict tables.

Every quantity is a string with a unit (``"180 deg"``, ``"2 pli"``, ``"1000 fpm"``,
``"1.2 mil"``) turned into an SI float by :mod:`spanwatch.monitor.units`; every table forbids
unknown keys so a typo fails loudly (pydantic, https://docs.pydantic.dev).
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BaseModel, BeforeValidator, ConfigDict, Field
from spanwatch.monitor import units as U


class ConfigError(Exception):
    """Configuration problems, one per line: ``file: key.path: expected X, got Y``."""

    def __init__(self, file: str | Path, key: str, message: str,
                 more: list[tuple[str, str]] | None = None) -> None:
        self.file = str(file)
        self.problems = [(key, message), *(more or [])]
        super().__init__("\n".join(self._line(k, m) for k, m in self.problems))

    @property
    def key(self) -> str:
        return self.problems[0][0]

    @property
    def message(self) -> str:
        return self.problems[0][1]

    def _line(self, key: str, message: str) -> str:
        return f"{self.file}: {key}: {message}" if key else f"{self.file}: {message}"


# --- quantity fields ----------------------------------------------------------------


def _quantity(kind: U.Kind, *, minimum: float | None = None, exclusive: bool = True,
              maximum: float | None = None) -> Callable[[Any], float]:
    def parse(value: Any) -> float:
        si = U.to_si(value, kind)
        if not math.isfinite(si):  # a bare NaN or inf (TOML has both): every comparison with a limit would be false
            raise ValueError(f"expected a finite {kind.name}, got {value!r}")
        if minimum is not None and (si <= minimum if exclusive else si < minimum):
            word = "greater than" if exclusive else "at least"
            raise ValueError(f"expected {kind.name} {word} {minimum:g} (SI), got {value!r}")
        if maximum is not None and si > maximum:
            raise ValueError(f"expected {kind.name} at most {maximum:g} (SI), got {value!r}")
        return si

    return parse


def _positive_number(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value) or value <= 0:
        raise ValueError(f"expected a positive number, got {value!r}")
    return float(value)


def between(kind: U.Kind, low: float, high: float, *, low_included: bool = False) -> BeforeValidator:
    """A quantity of ``kind`` within a plausible range, in SI: above ``low`` (or from it) and at most ``high``.

    Used as ``Annotated[float, between(U.LENGTH, 1e-3, 20.0)]``; each field states why its range
    is plausible. A value outside is an error naming the range, so that an absurd value (a width
    of 1e-300 mm, a frame rate of a megahertz) never reaches a check or an allocation.
    """
    unit = " Hz" if kind is U.FREQUENCY else f" {kind.si_unit}" if kind.si_unit else ""
    if math.isinf(high):
        span = f"{'at least' if low_included else 'above'} {low:g}{unit}"
    else:
        span = f"{'from' if low_included else 'above'} {low:g} {'to' if low_included else 'and at most'} {high:g}{unit}"
    parse = _quantity(kind)

    def check(value: Any) -> float:
        si = parse(value)
        if (si < low if low_included else si <= low) or si > high:
            raise ValueError(f"expected {kind.name} {span}, got {value!r}")
        return si

    return BeforeValidator(check)


def finite_at_least(low: float, what: str = "a number") -> AfterValidator:
    """A plain number that is finite and at least ``low`` (NaN and inf would switch a comparison off)."""

    def check(value: float) -> float:
        if not (math.isfinite(value) and value >= low):
            raise ValueError(f"expected {what} of at least {low:g} (finite), got {value!r}")
        return value

    return AfterValidator(check)


PosLength = Annotated[float, BeforeValidator(_quantity(U.LENGTH, minimum=0.0))]
NonNegLength = Annotated[float, BeforeValidator(_quantity(U.LENGTH, minimum=0.0, exclusive=False))]
PosSpeed = Annotated[float, BeforeValidator(_quantity(U.SPEED, minimum=0.0))]
NonNegSpeed = Annotated[float, BeforeValidator(_quantity(U.SPEED, minimum=0.0, exclusive=False))]
Angle = Annotated[float, BeforeValidator(_quantity(U.ANGLE, minimum=0.0, maximum=4 * math.pi))]
Modulus = Annotated[float, BeforeValidator(_quantity(U.PRESSURE, minimum=0.0))]
Tension = Annotated[float, BeforeValidator(_quantity(U.TENSION, minimum=0.0))]
Duration = Annotated[float, BeforeValidator(_quantity(U.TIME, minimum=0.0, exclusive=False))]
PosDuration = Annotated[float, BeforeValidator(_quantity(U.TIME, minimum=0.0))]
Frequency = Annotated[float, BeforeValidator(_quantity(U.FREQUENCY, minimum=0.0))]
Acceleration = Annotated[float, BeforeValidator(_quantity(U.ACCELERATION, minimum=0.0))]
Temperature = Annotated[float, BeforeValidator(_quantity(U.TEMPERATURE, minimum=0.0))]
Fraction = Annotated[float, BeforeValidator(_quantity(U.DIMENSIONLESS, minimum=0.0, exclusive=False,
                                                      maximum=1.0))]
Ratio = Annotated[float, BeforeValidator(_quantity(U.DIMENSIONLESS))]
PosNumber = Annotated[float, BeforeValidator(_positive_number)]

ID_PATTERN = re.compile(r"^[A-Za-z][A-Za-z0-9_\-]*$")
_TAG = re.compile(r"^[A-Za-z0-9_][A-Za-z0-9_.\-/:]*$")


def _ident(value: str) -> str:
    if not ID_PATTERN.match(value):
        raise ValueError(f"expected a name of letters, digits, '_' or '-' starting with a letter, got {value!r}")
    return value


def _unit_name(value: str) -> str:
    U.parse_unit(value)  # raises UnitError (a ValueError) with the expectation
    if U.unit_kind(value) is None:
        raise ValueError(f"expected a unit of force, tension, speed, length, rotation or time, got {value!r}")
    return value


Ident = Annotated[str, AfterValidator(_ident)]
TagName = Annotated[str, Field(pattern=_TAG.pattern)]
UnitName = Annotated[str, AfterValidator(_unit_name)]
# ISA-18.2 priorities (ANSI/ISA-18.2-2016 recommends three or four annunciated priorities; from memory): "advisory"
# is journal only, never annunciated; "low" to "urgent" are annunciated, most urgent last.
PRIORITIES = ("advisory", "low", "medium", "high", "urgent")
Priority = Literal["advisory", "low", "medium", "high", "urgent"]


_PATTERN = re.compile(r"^[A-Za-z0-9_.\-/:*?\[\]!]+$")


def _alarm_pattern(value: str) -> str:
    """An alarm-key pattern: fnmatch (``*``, ``?``, ``[...]``) on "kind:object" or "kind:object:level"."""
    closed = True
    for ch in value:
        if ch == "[":
            closed = False
        elif ch == "]":
            closed = True
    if not _PATTERN.match(value) or ":" not in value or not closed:
        raise ValueError(f"expected an alarm pattern such as \"traction:R1*\" or \"slip:*:alarm\" (kind:object or "
                         f"kind:object:level; letters, digits, _ . - / and the wildcards * ? [...]), got {value!r}")
    return value


AlarmPattern = Annotated[str, AfterValidator(_alarm_pattern)]


def int_between(low: int, high: int, what: str) -> BeforeValidator:
    """A whole number from ``low`` to ``high`` (a bool or a fraction is an error, not a number)."""

    def check(value: Any) -> int:
        if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
            raise ValueError(f"expected {what}: a whole number from {low} to {high}, got {value!r}")
        return value

    return BeforeValidator(check)


class Strict(BaseModel):
    """Base of every table: unknown keys are errors, values are not coerced silently."""

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


def _secret(value: Any) -> str:
    """A secret given as ``env:NAME``, ``file:/path`` or (discouraged) inline; resolved at connect time."""
    if not isinstance(value, str) or not value:
        raise ValueError("expected a secret such as \"env:SPANWATCH_PASSWORD\" or \"file:/etc/spanwatch/pw\"")
    return value


Secret = Annotated[str, AfterValidator(_secret)]
