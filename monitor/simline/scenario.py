"""Scenario files for the simulated line: speed profile, roll changes, injected faults.

A scenario is a TOML file of our own design::

    [scenario]
    name = "air-entrainment"
    config = "../quillmere-q2.toml"      # relative to this file
    duration = "8 min"
    start = "2026-03-02T06:00:00+01:00"
    seed = 7

    [[speed]]                             # the line-speed reference moves to `to` from `at`
    at = "0 s"                            # at `rate` (default: scenario.accel)
    to = "400 m/min"

    [[roll_change]]                       # rewind: a new core; unwind: a new parent roll
    at = "15 min"
    winder = "rewind"

    [[fault]]
    kind = "cof_drop"                     # see FAULT_KINDS
    target = "pull_1"
    start = "2 min"
    end = "4 min"
    size = 0.15
    label = "cof_drop"                    # optional: the fault class an evaluation reports it under
    severity = "obvious"                  # optional: "obvious" or "subtle" (for an evaluation)

    [[grade_change]]                      # a new lot within the config's tolerances, from `at` on
    at = "40 min"
    stack_factor = 1.06                   # optional, each: the new true value (Truth below)
    modulus_factor = 1.05
    cof_factor = 0.95

Fault kinds, what ``size`` means, and what an alarm must name to be on the right object
(``blame`` in :meth:`SimulatedLine.truth`; an alarm is on the right object when the measured things
its check names, :func:`spanwatch.rules.base.blames_of`, or its object meet this list):

=================  ====================  ========================================  ================================
kind               target                size                                      blame
=================  ====================  ========================================  ================================
cof_drop           driven roller         the roller's true COF during the fault    the roller and the two tension
                                                                                   zones it bounds
glazing            driven roller         relative loss of COF reached at the end,  the roller and the two tension
                                         e.g. "40 %" (slow: ramps, then holds)     zones it bounds
speed_ramp         (none)                line speed to ramp to, e.g. "650 m/min"   every driven roller (air
                                                                                   entrainment)
loadcell_drift     tension tag           zero drift: offset rate in the tag's      the tag and its zone
                                         unit per second (only inside the window)
loadcell_gain      tension tag           relative gain error reached at the end,   the tag and its zone
                                         e.g. "3 %" (slow: ramps, then holds)
out_of_round       winder                eccentricity of the roll, e.g. "0.5 mm"   the winder
caliper_change     winder                relative change of the effective caliper  the winder
                                         (a step; "between rolls" when it starts
                                         at a roll change, else "within a roll")
idler_drag         idler with a speed    extra lag of the idler surface behind     the idler and its speed tag
                   tag                   the web reached at the end, e.g. "1 %"
                                         (a dragging bearing; slow: ramps, holds)
stuck_sensor       tag                   (unused) the tag holds its value          the tag and what it measures
                                                                                   (winder, roller or zone)
length_undercount  length tag            share of length not counted, e.g. "3 %"   the tag and its winder
tag_dropout        tag                   (unused) the tag stops updating           the tag and what it measures
drive_fault        driven roller         (unused) its drive's fault bit reads 1;   the roller, its fault tag and
                   (fault_tag)           the plant is unchanged (pair it with      the two zones it bounds
                                         cof_drop for a consequence)
=================  ====================  ========================================  ================================

The slow kinds (:data:`SLOW_KINDS`) hold their end value until the scenario ends; the other kinds act
only between ``start`` and ``end``.
"""

from __future__ import annotations

import tomllib
from datetime import datetime
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BeforeValidator, Field, ValidationError
from spanwatch.monitor import units as U
from spanwatch.monitor.config import (
    Acceleration,
    ConfigError,
    Duration,
    PosDuration,
    Strict,
    describe_error,
    key_path,
)

FAULT_KINDS = ("cof_drop", "speed_ramp", "loadcell_drift", "out_of_round", "caliper_change", "stuck_sensor",
               "length_undercount", "tag_dropout", "drive_fault", "loadcell_gain", "idler_drag", "glazing")
SLOW_KINDS = ("loadcell_gain", "idler_drag", "glazing")  # ramp from start to end, then hold

Speed = Annotated[float, BeforeValidator(lambda v: U.to_si(v, U.SPEED))]


def _start(value: Any) -> float:
    if isinstance(value, datetime):
        if value.tzinfo is None:
            raise ValueError(f"expected a start time with a UTC offset, got {value!r}")
        return value.timestamp()
    if isinstance(value, str):
        try:
            dt = datetime.fromisoformat(value)
        except ValueError:
            raise ValueError(f"expected an ISO 8601 time with offset such as "
                             f"\"2026-03-02T06:00:00+01:00\", got {value!r}") from None
        if dt.tzinfo is None:
            raise ValueError(f"expected a start time with a UTC offset, got {value!r}")
        return dt.timestamp()
    raise ValueError(f"expected an ISO 8601 time with offset, got {value!r}")


class ScenarioSection(Strict):
    name: str
    config: str
    duration: PosDuration
    start: Annotated[float, BeforeValidator(_start)] = _start("2026-03-02T06:00:00+01:00")
    seed: int = 1
    accel: Acceleration = 0.5
    substeps: int = Field(default=2, ge=1, le=20)


class SpeedStep(Strict):
    at: Duration
    to: Speed
    rate: Acceleration | None = None


class RollChange(Strict):
    at: Duration
    winder: str
    diameter: Annotated[float, BeforeValidator(lambda v: U.to_si(v, U.LENGTH))] | None = None


class Fault(Strict):
    kind: Literal["cof_drop", "speed_ramp", "loadcell_drift", "out_of_round", "caliper_change", "stuck_sensor",
                  "length_undercount", "tag_dropout", "drive_fault", "loadcell_gain", "idler_drag", "glazing"]
    target: str = ""
    start: Duration
    end: Duration
    size: float | str = 0.0
    label: str | None = None
    severity: Literal["obvious", "subtle"] | None = None

    def size_si(self, kind: U.Kind) -> float:
        return U.to_si(self.size, kind)


class GradeChange(Strict):
    """A new lot from ``at`` on: the true stack factor, modulus factor and COF factor it brings (None: unchanged)."""

    at: Duration
    stack_factor: float | None = Field(default=None, gt=0)
    modulus_factor: float | None = Field(default=None, gt=0)
    cof_factor: float | None = Field(default=None, gt=0)


class Initial(Strict):
    unwind_diameter: Annotated[float, BeforeValidator(lambda v: U.to_si(v, U.LENGTH))] | None = None
    rewind_diameter: Annotated[float, BeforeValidator(lambda v: U.to_si(v, U.LENGTH))] | None = None
    unwind_eccentricity: Annotated[float, BeforeValidator(lambda v: U.to_si(v, U.LENGTH))] = 0.0


class Noise(Strict):
    """Sensor noise (1 sigma): relative for tension/speed/rpm, absolute for diameter and length."""

    tension: float = 0.004
    speed: float = 2e-5
    rpm: float = 5e-4
    diameter: Annotated[float, BeforeValidator(lambda v: U.to_si(v, U.LENGTH))] = 0.0003
    length_step: Annotated[float, BeforeValidator(lambda v: U.to_si(v, U.LENGTH))] = 0.01


class Truth(Strict):
    """Where the simulated plant differs from the configuration (the monitor only knows the config)."""

    cof_factor: float = 1.0
    stack_factor: float | None = None
    modulus_factor: float = 1.0
    unwind_wound_in_tension: float = 0.3  # share of the unwind zone setpoint still in the roll


class Scenario(Strict):
    scenario: ScenarioSection
    speed: list[SpeedStep] = Field(default_factory=list)
    roll_change: list[RollChange] = Field(default_factory=list)
    fault: list[Fault] = Field(default_factory=list)
    grade_change: list[GradeChange] = Field(default_factory=list)
    initial: Initial = Field(default_factory=Initial)
    noise: Noise = Field(default_factory=Noise)
    truth: Truth = Field(default_factory=Truth)


def load_scenario(path: str | Path) -> tuple[Scenario, Path]:
    """Read a scenario; return it with the resolved path of its line config. Raises ConfigError."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ConfigError(path, "", f"cannot read the file ({exc.strerror})") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, "", f"expected valid TOML: {exc}") from None
    return parse_scenario(data, path)


def parse_scenario(data: dict[str, Any], path: Path) -> tuple[Scenario, Path]:
    try:
        sc = Scenario.model_validate(data)
    except ValidationError as exc:
        probs = [(key_path(tuple(e["loc"])), describe_error(e)) for e in exc.errors()]
        raise ConfigError(path, *probs[0], more=probs[1:]) from None
    cfg = Path(sc.scenario.config)
    if not cfg.is_absolute():
        cfg = (path.parent / cfg).resolve()
    return sc, cfg
