"""The line configuration: a TOML file, validated by a schema, converted to SI.

The schema is written with pydantic (https://docs.pydantic.dev): every table forbids
unknown keys so a typo fails loudly; every quantity is a string with a unit
(``"180 deg"``, ``"2 pli"``, ``"1000 fpm"``, ``"1.2 mil"``) turned into an SI float
by :mod:`spanwatch.monitor.units`. The building blocks (quantity fields, strict tables, the
error type) are in :mod:`spanwatch.monitor.schema`; the ``[sources.NAME]`` tables are registered in
:mod:`spanwatch.monitor.sources`. Cross-references (a span naming a roller, a tag named by a
roller) are checked by :mod:`spanwatch.monitor.line`, which builds the derived line.

Every error is a :class:`ConfigError` that names the file, the key path, the value
and what was expected; the CLI prints it and exits with status 2.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, Field, ValidationError, model_validator
from spanwatch.monitor import units as U
from spanwatch.monitor.schema import (
    ID_PATTERN,
    Acceleration,
    Angle,
    ConfigError,
    Duration,
    Fraction,
    Frequency,
    Ident,
    Modulus,
    NonNegLength,
    NonNegSpeed,
    PosDuration,
    PosLength,
    PosNumber,
    PosSpeed,
    Priority,
    Ratio,
    Secret,
    Strict,
    TagName,
    Temperature,
    Tension,
    UnitName,
)
from spanwatch.monitor.sources import MqttSource, OpcUaSource, SimulatedSource, Source, TopicMap, mqtt_settings

__all__ = ["ConfigError", "MqttSource", "OpcUaSource", "SimulatedSource", "Source", "TopicMap", "mqtt_settings"]


# --- the line -----------------------------------------------------------------------


class LineSection(Strict):
    """Line-wide settings: identity, speed reference, line-state thresholds, air model."""

    name: str
    plant: str = ""
    max_speed: PosSpeed
    speed_tag: TagName
    web_speed_from: Ident | None = Field(
        default=None, description="idler whose encoder gives the web speed; default: the speed reference")
    frame_rate: Frequency = 50.0
    stop_speed: NonNegSpeed = U.to_si("1 m/min", U.SPEED)
    thread_speed: PosSpeed = U.to_si("20 m/min", U.SPEED)
    accel_threshold: Acceleration = 0.02
    accel_window: PosDuration = 1.0
    settle_time: Duration = 5.0
    min_drive_tension: Tension = U.to_si("0.1 pli", U.TENSION)
    air_temperature: Temperature = 293.15
    air_film_model: Literal["linear", "none"] = "linear"
    air_speed_convention: Literal["mean", "sum"] = "mean"
    air_traction_floor: Fraction = 0.0
    roll_change_jump: PosLength = 0.05
    encoder_ratio_tolerance: Fraction = 1e-4
    check_window: PosDuration = 2.0
    roll_settle_time: Duration = 10.0


class MaterialSection(Strict):
    """The web: nominal single-ply caliper, width, modulus, roughness and how it packs."""

    name: str
    caliper: PosLength
    width: PosLength
    modulus: Modulus
    modulus_tolerance: Fraction = 0.15
    roughness: NonNegLength = U.to_si("0.2 um", U.LENGTH)
    stack_factor: PosNumber = 1.0
    stack_factor_tolerance: Fraction = 0.1
    caliper_drift: Fraction = 0.02
    air_film_factor: Fraction = 1.0


class RollerSection(Strict):
    """A roller on the web path; idle unless ``driven``."""

    id: Ident
    diameter: PosLength
    wrap: Angle
    cof: PosNumber
    roughness: NonNegLength = U.to_si("0.4 um", U.LENGTH)
    driven: bool = False
    covering: str = "steel"
    air_film_factor: Fraction = 1.0
    speed_tag: TagName | None = None
    draw: Ratio = 0.0
    safety_factor: Annotated[float, AfterValidator(lambda v: _at_least_one(v))] = 1.5
    runout_check: bool = False


def _at_least_one(v: float) -> float:
    if not (v >= 1.0 and math.isfinite(v)):
        raise ValueError(f"expected a safety factor of at least 1, got {v!r}")
    return v


class TaperSection(Strict):
    """Winding tension taper; conventions vary, so the model is named.

    linear:     T(D) = T0 * (1 - k * (D - Dc) / (Dmax - Dc))
    hyperbolic: T(D) = T0 * (1 - k * (1 - Dc / D))      (k = 1 is constant torque)
    """

    model: Literal["linear", "hyperbolic"]
    k: Fraction


class WinderSection(Strict):
    """An unwind or rewind stand."""

    id: Ident
    kind: Literal["unwind", "rewind"]
    core_diameter: PosLength
    max_diameter: PosLength
    diameter_tag: TagName | None = None
    rpm_tag: TagName | None = None
    length_tag: TagName | None = None
    core_change_tag: TagName | None = None
    taper: TaperSection | None = None
    runout_check: bool = True
    calibration_length: PosLength = 300.0

    @model_validator(mode="after")
    def _diameters(self) -> WinderSection:
        if self.max_diameter <= self.core_diameter:
            raise ValueError(
                f"expected max_diameter ({self.max_diameter:g} m) larger than core_diameter "
                f"({self.core_diameter:g} m)")
        return self


class SpanSection(Strict):
    """A free span between two rollers (or a winder and a roller)."""

    id: Ident
    from_: Ident = Field(alias="from")
    to: Ident
    length: PosLength
    tension_tag: TagName | None = None
    setpoint: Tension | None = None

    @model_validator(mode="after")
    def _setpoint(self) -> SpanSection:
        if self.tension_tag is not None and self.setpoint is None:
            raise ValueError("expected a setpoint (for example \"2 pli\") on a span with a tension_tag")
        return self


class TagSection(Strict):
    """A measured signal: its unit, plausible range, sample period and where it comes from."""

    unit: UnitName
    range: tuple[float, float] | None = None
    sample_period: PosDuration = 0.02
    stale_after: PosNumber = 5.0
    frozen_after: PosDuration | None = None
    frozen_tolerance: float = 0.0
    accuracy: float | str | None = Field(
        default=None, description="absolute, in the tag's unit, or relative such as \"0.5 %\"")
    source: str | None = Field(default=None, description="the [sources] entry; default: the only source")
    address: str | None = None

    @model_validator(mode="after")
    def _range(self) -> TagSection:
        if self.range is not None and not (self.range[0] < self.range[1]):
            raise ValueError(f"expected range [low, high] with low < high, got {list(self.range)!r}")
        return self


class AlarmOverride(Strict):
    """Per-object changes to a check's alarm settings (any subset of the fields)."""

    enabled: bool | None = None
    warning: Ratio | None = None
    alarm: Ratio | None = None
    deadband: Ratio | None = None
    on_delay: Duration | None = None
    off_delay: Duration | None = None
    priority: Priority | None = None
    warning_priority: Priority | None = None


class CheckSection(AlarmOverride):
    """Alarm settings of one check kind, with its rationalization (ISA-18.2 master alarm database)."""

    cause: str | None = None
    consequence: str | None = None
    action: str | None = None
    response_time: Duration | None = None
    overrides: dict[Ident, AlarmOverride] = Field(default_factory=dict)






class DaemonSection(Strict):
    """How ``spanwatch run`` runs: history, HTTP endpoint, latency allowance."""

    history: str = "sqlite:///spanwatch.db"
    history_password: Secret | None = Field(
        default=None, description="the database password as \"env:NAME\" or \"file:/path\", kept out of the "
                                  "history URL (spanwatch.connectors.secrets)")
    http: str = "127.0.0.1:9108"
    latency: PosDuration = Field(
        default=0.02, description="how far behind the clock frames are computed, on top of the delivery delay "
                                  "the daemon observes (which follows e.g. an OPC UA publishing interval)")
    max_latency: PosDuration = 10.0
    tick: PosDuration = 0.05
    startup_grace: Duration = 10.0
    log_level: Literal["debug", "info", "warning", "error"] = "info"


class LineConfig(Strict):
    """The whole file."""

    line: LineSection
    material: MaterialSection
    rollers: list[RollerSection] = Field(default_factory=list)
    winders: list[WinderSection]
    spans: list[SpanSection]
    tags: dict[TagName, TagSection]
    checks: dict[str, CheckSection] = Field(default_factory=dict)
    sources: dict[Ident, Source] = Field(default_factory=dict)
    daemon: DaemonSection = Field(default_factory=DaemonSection)


# --- loading --------------------------------------------------------------------------


def key_path(loc: tuple[int | str, ...]) -> str:
    """('rollers', 2, 'wrap') -> 'rollers[2].wrap'."""
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            text = str(part)
            if not ID_PATTERN.match(text):
                text = f'"{text}"'
            out += f".{text}" if out else text
    return out


def describe_error(err: dict[str, Any]) -> str:
    kind = err["type"]
    value = err.get("input")
    if kind == "extra_forbidden":
        return "unknown key (check the spelling; unknown keys are not allowed)"
    if kind == "missing":
        return "required key is missing"
    msg = str(err["msg"])
    msg = msg.removeprefix("Value error, ").removeprefix("Assertion failed, ")
    if msg.startswith("expected"):
        return msg
    if kind == "string_pattern_mismatch":
        return f"expected a tag name of letters, digits and . _ - / :, got {value!r}"
    return f"expected {msg[0].lower() + msg[1:]}, got {value!r}"


def parse_config(data: dict[str, Any], file: str | Path = "<config>") -> LineConfig:
    """Validate a parsed TOML document; raise :class:`ConfigError` on the first problem."""
    try:
        return LineConfig.model_validate(data)
    except ValidationError as exc:
        problems = []
        for err in exc.errors():
            loc = tuple(p for p in err["loc"] if not (isinstance(p, str) and p.startswith("function-")))
            problems.append((key_path(loc), describe_error(err)))
        raise ConfigError(file, *problems[0], more=problems[1:]) from None


def read_toml(path: Path, _depth: int = 0) -> tuple[dict[str, Any], list[Path]]:
    """Read a TOML file, following ``extends = "base.toml"`` (relative to the file).

    The file's tables are merged into its base's, key by key (arrays and values replace);
    so a live-source variant of a line lists only its ``[sources]``, ``[daemon]`` and the tag
    addresses. Returns the merged document and the files it came from, base first.
    """
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise ConfigError(path, "", f"cannot read the file ({exc.strerror})") from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise ConfigError(path, "", "expected a UTF-8 text file") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, "", f"expected valid TOML: {exc}") from None
    base = data.pop("extends", None)
    if base is None:
        return data, [path]
    if not isinstance(base, str):
        raise ConfigError(path, "extends", f"expected the path of a base line file, got {base!r}")
    if _depth >= 4:
        raise ConfigError(path, "extends", "expected at most 4 levels of extends")
    base_path = Path(base) if Path(base).is_absolute() else path.parent / base
    merged, files = read_toml(base_path, _depth + 1)
    return _merge(merged, data), [*files, path]


def _merge(base: dict[str, Any], over: dict[str, Any]) -> dict[str, Any]:
    out = dict(base)
    for k, v in over.items():
        out[k] = _merge(out[k], v) if isinstance(v, dict) and isinstance(out.get(k), dict) else v
    return out


def config_files(path: str | Path) -> list[Path]:
    """The files a line config is made of (itself and what it extends), base first."""
    return read_toml(Path(path))[1]


def load_config(path: str | Path) -> LineConfig:
    """Read and validate a line file (see :func:`spanwatch.monitor.line.load_line` for the derived line)."""
    path = Path(path)
    data, files = read_toml(path)
    name = str(path) if len(files) == 1 else f"{path} (extends {', '.join(str(f) for f in files[:-1])})"
    return parse_config(data, name)
