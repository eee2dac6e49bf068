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

Fault kinds and what ``size`` means:

========================  ==========================  ===============================================
kind                      target                      size
========================  ==========================  ===============================================
cof_drop                  driven roller               the roller's true COF during the fault
speed_ramp                (none)                      line speed to ramp to, e.g. "650 m/min"
loadcell_drift            tension tag                 drift rate in the tag's unit per second
out_of_round              winder                      eccentricity of the roll, e.g. "0.5 mm"
caliper_change            winder                      relative change of the effective caliper
stuck_sensor              tag                         (unused) the tag holds its value
length_undercount         length tag                  share of length not counted, e.g. "3 %"
tag_dropout               tag                         (unused) the tag stops updating
drive_fault               driven roller (fault_tag)   (unused) its drive's fault bit reads 1; the plant
                                                      is unchanged (pair it with cof_drop for a consequence)
========================  ==========================  ===============================================
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
               "length_undercount", "tag_dropout", "drive_fault")

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
                  "length_undercount", "tag_dropout", "drive_fault"]
    target: str = ""
    start: Duration
    end: Duration
    size: float | str = 0.0

    def size_si(self, kind: U.Kind) -> float:
        return U.to_si(self.size, kind)


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
