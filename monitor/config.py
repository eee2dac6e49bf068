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
import os
import re
import stat
import tomllib
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BeforeValidator, Field, ValidationError, field_validator, model_validator
from spanwatch.monitor import units as U
from spanwatch.monitor.schema import (
    ID_PATTERN,
    Acceleration,
    AlarmPattern,
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
    between,
    finite_at_least,
    int_between,
)
from spanwatch.monitor.sources import MqttSource, OpcUaSource, SimulatedSource, Source, TopicMap, mqtt_settings

__all__ = ["ConfigError", "MqttSource", "OpcUaSource", "SimulatedSource", "Source", "TopicMap", "mqtt_settings"]
# the schema's generic quantity fields stay importable from here for other config files (scenarios)
__all__ += ["Acceleration", "Frequency", "Modulus", "NonNegLength", "NonNegSpeed", "PosLength", "PosNumber", "PosSpeed",
            "Temperature", "Tension"]


# --- plausible ranges -----------------------------------------------------------------
# Every quantity of the line file has a range; a value outside it is a typo or a unit slip (a width of
# 1e-300 mm, a frame rate of a megahertz) that would switch a check off or allocate gigabytes, and is an
# error. The ranges are wide: each covers the webs and lines the trade runs, with room to spare. Values in SI.

SPEED_MAX = 60.0  # m/s; the fastest paper machines run about 2000 m/min = 33 m/s (from memory)
TENSION_MAX = 1e6  # N/m; steel strip at 100 MPa across 10 mm of gauge (common practice, no source)
DURATION_MAX = 86_400.0  # s; a delay, settling time or stale limit of more than a day is no monitoring
LineSpeed = Annotated[float, between(U.SPEED, 0.0, SPEED_MAX)]
WebTension = Annotated[float, between(U.TENSION, 0.0, TENSION_MAX)]
Delay = Annotated[float, between(U.TIME, 0.0, DURATION_MAX, low_included=True)]
# a surface roughness (Rq) above a millimetre is no roller face or web (common practice, no source)
Roughness = Annotated[float, between(U.LENGTH, 0.0, 1e-3, low_included=True)]
MAX_WINDOW_FRAMES = 100_000  # frames in one window of one signal (800 kB of float64): bounds check memory
# a line that is not said otherwise normally runs at 80 % of its top speed (common practice, no source)
NORMAL_SPEED_SHARE = 0.8


# --- the line -----------------------------------------------------------------------


class LineSection(Strict):
    """Line-wide settings: identity, speed reference, line-state thresholds, air model."""

    name: str
    plant: str = ""
    # the plant's time zone (IANA name): review commands and reports show and read local times in it
    timezone: str = "UTC"
    max_speed: LineSpeed
    speed_tag: TagName
    # the grade (recipe, lot) in production, as a number the line's controls publish: when it changes, the drift
    # detectors learn their baselines again and the wound roll's caliper history starts afresh
    grade_tag: TagName | None = None
    web_speed_from: Ident | None = Field(
        default=None, description="idler whose encoder gives the web speed; default: the speed reference")
    # at most 1 kHz: drive feedback on a fieldbus is read at about 1 kHz at best, and a faster grid only
    # allocates frames (1 MHz: gigabytes); at least 1 Hz, or a 2 s check window holds 2 frames (common practice,
    # no source)
    frame_rate: Annotated[float, between(U.FREQUENCY, 1.0, 1000.0, low_included=True)] = 50.0
    stop_speed: Annotated[float, between(U.SPEED, 0.0, SPEED_MAX, low_included=True)] = U.to_si("1 m/min", U.SPEED)
    thread_speed: LineSpeed = U.to_si("20 m/min", U.SPEED)
    # a line ramps at well under 1 m/s^2; 100 m/s^2 is a crash, not a ramp (common practice, no source)
    accel_threshold: Annotated[float, between(U.ACCELERATION, 0.0, 100.0)] = 0.02
    # the ramp detector's window: a few seconds; ten minutes would hide every ramp (common practice, no source)
    accel_window: Annotated[float, between(U.TIME, 0.0, 600.0)] = 1.0
    settle_time: Delay = 5.0
    min_drive_tension: WebTension = U.to_si("0.1 pli", U.TENSION)
    # the air around a web: a cold store (-73 degC) to a drying oven (427 degC) (common practice, no source)
    air_temperature: Annotated[float, between(U.TEMPERATURE, 200.0, 700.0, low_included=True)] = 293.15
    air_film_model: Literal["linear", "none"] = "linear"
    air_speed_convention: Literal["mean", "sum"] = "mean"
    air_traction_floor: Fraction = 0.0
    # a diameter step that marks a roll change: millimetres to metres (common practice, no source)
    roll_change_jump: Annotated[float, between(U.LENGTH, 0.0, 10.0)] = 0.05
    encoder_ratio_tolerance: Fraction = 1e-4
    # the checks' averaging window: seconds; more than ten minutes is no longer a running check
    check_window: Annotated[float, between(U.TIME, 0.0, 600.0)] = 2.0
    # the draw check's averaging window: a slow drift of a few N/m shows only once the encoder-ratio noise of the
    # 2 s window is averaged away; 10 to 30 s is still short against a load-cell drift of minutes (common
    # practice, no source)
    draw_window: Annotated[float, between(U.TIME, 0.0, 600.0)] = 20.0
    # the speed the line normally runs at, for the design margins of check-config; default: NORMAL_SPEED_SHARE
    # of max_speed
    normal_speed: LineSpeed | None = None
    # traction is not judged while tensions build after a start: until both tensions at a driven roller are
    # within startup_band of their setpoints, at most startup_settle after the line leaves STOPPED (common
    # practice, no source)
    startup_settle: Delay = 30.0
    startup_band: Fraction = 0.2
    roll_settle_time: Delay = 10.0
    # a longer stretch without any sample is a gap: frames skip it and the checks start afresh (common practice,
    # no source: longer than any sample period or stale limit, shorter than a roll change)
    max_gap: Annotated[float, between(U.TIME, 0.0, 86400.0)] = 30.0
    # a sample further than this beyond its source's newest time (a recording) or the wall clock (live) is refused
    future_horizon: Annotated[float, between(U.TIME, 0.0, 86400.0)] = 60.0

    @field_validator("timezone")
    @classmethod
    def _zone(cls, v: str) -> str:
        from spanwatch.monitor.shifts import zone

        zone(v)
        return v

    @model_validator(mode="after")
    def _windows(self) -> LineSection:
        if self.normal_speed is not None and self.normal_speed > self.max_speed:
            raise ValueError(f"expected normal_speed at most max_speed ({self.max_speed:g} m/s), got "
                             f"{self.normal_speed:g} m/s")
        for name in ("check_window", "accel_window", "draw_window"):
            frames = getattr(self, name) * self.frame_rate
            if frames > MAX_WINDOW_FRAMES:
                raise ValueError(f"expected {name} times frame_rate at most {MAX_WINDOW_FRAMES} frames, got "
                                 f"{getattr(self, name):g} s x {self.frame_rate:g} Hz = {frames:g}")
        return self


class MaterialSection(Strict):
    """The web: nominal single-ply caliper, width, modulus, roughness and how it packs."""

    name: str
    # capacitor film is about 2 um thick, board about 1 mm; 0.5 um to 20 mm covers every web (from memory)
    caliper: Annotated[float, between(U.LENGTH, 0.5e-6, 0.02, low_included=True)]
    # narrow tape of 1 mm to the widest paper machines, about 11 m (from memory)
    width: Annotated[float, between(U.LENGTH, 1e-3, 20.0, low_included=True)]
    # soft elastomer webs (about 1 MPa) to steel (200 GPa); 0.1 MPa to 1 TPa covers every solid (from memory)
    modulus: Annotated[float, between(U.PRESSURE, 1e5, 1e12, low_included=True)]
    modulus_tolerance: Fraction = 0.15
    roughness: Roughness = U.to_si("0.2 um", U.LENGTH)
    # a wound stack is a little thicker than its plies (air between wraps), never half or three times
    # (common practice, no source)
    stack_factor: Annotated[float, between(U.DIMENSIONLESS, 0.5, 3.0, low_included=True)] = 1.0
    stack_factor_tolerance: Fraction = 0.1
    caliper_drift: Fraction = 0.02
    air_film_factor: Fraction = 1.0


class RollerSection(Strict):
    """A roller on the web path; idle unless ``driven``."""

    id: Ident
    # spreader bars and small idlers (5 mm) to the largest drying cylinders (about 6.5 m) (from memory)
    diameter: Annotated[float, between(U.LENGTH, 5e-3, 8.0, low_included=True)]
    wrap: Angle
    # rubber on film is rarely above 1.5; 5 leaves room (common practice, no source)
    cof: Annotated[float, between(U.DIMENSIONLESS, 0.0, 5.0)]
    roughness: Roughness = U.to_si("0.4 um", U.LENGTH)
    driven: bool = False
    covering: str = "steel"
    air_film_factor: Fraction = 1.0
    speed_tag: TagName | None = None
    # the drive's fault bit or fault word (dimensionless; non-zero: the drive reports a fault); driven rollers only
    fault_tag: TagName | None = None
    # speed above the web, as a fraction: a slow-down of 90 % to a machine-direction orienter's stretch of
    # about 7x (draw 6) (from memory)
    draw: Annotated[float, between(U.DIMENSIONLESS, -0.9, 10.0, low_included=True)] = 0.0
    safety_factor: Annotated[float, AfterValidator(lambda v: _at_least_one(v))] = 1.5
    runout_check: bool = False


def _at_most(v: float, high: float) -> float:
    if v > high:
        raise ValueError(f"expected at most {high:g}, got {v!r}")
    return v


def _not_empty(v: Any, what: str) -> Any:
    if not v:
        raise ValueError(f"expected {what}, got {v!r}")
    return v


def _at_least_one(v: float) -> float:
    # at least 1 (capacity is divided by it); above 10 the check would never warn (common practice, no source)
    if not (1.0 <= v <= 10.0 and math.isfinite(v)):
        raise ValueError(f"expected a safety factor from 1 to 10, got {v!r}")
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
    # cores of 5 mm (tape) to 3 m; rolls up to about 4 m (paper reels), 8 m with room (from memory)
    core_diameter: Annotated[float, between(U.LENGTH, 5e-3, 3.0, low_included=True)]
    max_diameter: Annotated[float, between(U.LENGTH, 5e-3, 8.0, low_included=True)]
    diameter_tag: TagName | None = None
    rpm_tag: TagName | None = None
    length_tag: TagName | None = None
    core_change_tag: TagName | None = None
    taper: TaperSection | None = None
    runout_check: bool = True
    # web length over which a length counter is compared: a metre to a thousand kilometres (a whole roll)
    calibration_length: Annotated[float, between(U.LENGTH, 1.0, 1e6, low_included=True)] = 300.0

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
    # a millimetre (two rollers touching) to a kilometre (through an oven) (common practice, no source)
    length: Annotated[float, between(U.LENGTH, 1e-3, 1000.0, low_included=True)]
    tension_tag: TagName | None = None
    setpoint: WebTension | None = None

    @model_validator(mode="after")
    def _setpoint(self) -> SpanSection:
        if self.tension_tag is not None and self.setpoint is None:
            raise ValueError("expected a setpoint (for example \"2 pli\") on a span with a tension_tag")
        return self


class TagSection(Strict):
    """A measured signal: its unit, plausible range, sample period and where it comes from."""

    unit: UnitName
    range: tuple[float, float] | None = None
    # 0.1 ms (10 kHz, faster than any drive feedback a line PC reads) to an hour (a lab value entered by hand);
    # a picosecond would make every tag stale at once (common practice, no source)
    sample_period: Annotated[float, between(U.TIME, 1e-4, 3600.0, low_included=True)] = 0.02
    # in sample periods: at least one (stale before the next sample is due is a false alarm), at most a million
    stale_after: Annotated[float, finite_at_least(1.0, "a number of sample periods"),
                           AfterValidator(lambda v: _at_most(v, 1e6))] = 5.0
    frozen_after: Annotated[float, between(U.TIME, 0.0, DURATION_MAX)] | None = None
    frozen_tolerance: Annotated[float, finite_at_least(0.0, "a tolerance in the tag's unit")] = 0.0
    accuracy: float | str | None = Field(
        default=None, description="absolute, in the tag's unit, or relative such as \"0.5 %\"")
    source: str | None = Field(default=None, description="the [sources] entry; default: the only source")
    address: str | None = None

    @model_validator(mode="after")
    def _range(self) -> TagSection:  # NaN fails low < high
        if self.range is not None and not (self.range[0] < self.range[1]):
            raise ValueError(f"expected range [low, high] with low < high, got {list(self.range)!r}")
        return self


class AlarmOverride(Strict):
    """Per-object changes to a check's alarm settings (any subset of the fields)."""

    enabled: bool | None = None
    warning: Ratio | None = None  # finite (a NaN limit never trips); its order against alarm: monitor/checkset.py
    alarm: Ratio | None = None
    deadband: Annotated[float, between(U.DIMENSIONLESS, 0.0, math.inf, low_included=True)] | None = None
    on_delay: Delay | None = None
    off_delay: Delay | None = None
    priority: Priority | None = None
    warning_priority: Priority | None = None
    latched: bool | None = None


class CheckSection(AlarmOverride):
    """Alarm settings of one check kind, with its rationalization (ISA-18.2 master alarm database)."""

    cause: str | None = None
    consequence: str | None = None
    action: str | None = None
    response_time: Delay | None = None
    overrides: dict[Ident, AlarmOverride] = Field(default_factory=dict)


class SuppressRule(Strict):
    """Suppression by design: while an alarm matching ``while`` is active, the alarms matching ``suppress`` are
    suppressed (still tracked and recorded; the lifecycle hides them) for ``reason``."""

    while_: AlarmPattern = Field(alias="while")
    suppress: Annotated[list[AlarmPattern], AfterValidator(lambda v: _not_empty(v, "at least one alarm pattern"))]
    reason: Annotated[str, AfterValidator(lambda v: _not_empty(v.strip(), "a reason an operator reads"))]


class AlarmsSection(Strict):
    """Alarm-system settings beyond one check: operators, shelving, chattering, first-out groups, suppression.

    Patterns are fnmatch patterns on an alarm's "kind:object" or "kind:object:level" (``traction:R1*``,
    ``slip:*``); each must match an alarm of the line (checked in :mod:`spanwatch.monitor.checkset`).
    """

    operators: Annotated[int, int_between(1, 1000, "a number of operator positions")] = Field(
        default=1, description="operator positions (consoles) sharing the alarms, for the alarm-rate KPIs")
    # the longest an operator may shelve an alarm: one shift (common practice, no source)
    shelve_max: Annotated[float, between(U.TIME, 0.0, DURATION_MAX)] = 8 * 3600.0
    # chattering: 3 or more raises within 60 s (ISA-18.2 TR / EEMUA 191; from memory)
    chatter_count: Annotated[int, int_between(2, 1000, "a number of raises")] = 3
    chatter_window: Annotated[float, between(U.TIME, 0.0, DURATION_MAX)] = 60.0
    # the remedy: while an alarm chatters its off-delay is at least this, for chatter_hold after its last
    # chattering raise; 0 disables the remedy, chattering is reported either way (common practice, no source)
    chatter_off_delay: Delay = 30.0
    chatter_hold: Delay = 600.0
    first_out: dict[Ident, list[AlarmPattern]] = Field(
        default_factory=dict, description="first-out groups: name -> alarm patterns of its members")
    suppress: list[SuppressRule] = Field(default_factory=list)
    # how often the daemon reads the operators' requests from the history (spanwatch ack, shelve, ...)
    actions_poll: Annotated[float, between(U.TIME, 0.05, 10.0, low_included=True)] = 0.25
    # alarm context windows (the signals around each raise) kept this long and at most this many; the
    # transitions, episodes and actions are never pruned
    context_keep: Annotated[float, between(U.TIME, 0.0, 100 * 365 * 86400.0)] = 365 * 86400.0
    context_max_rows: Annotated[int, int_between(1000, 10**9, "a number of context windows")] = 1_000_000



_BYTES = {"b": 1, "kb": 10**3, "kib": 2**10, "mb": 10**6, "mib": 2**20, "gb": 10**9, "gib": 2**30}
_SIZE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([A-Za-z]*)\s*$")


def _size(value: Any) -> int:
    """A size in bytes: an integer, or a string such as ``"16 MiB"`` (B, kB, KiB, MB, MiB, GB, GiB); at least 64 KiB.

    >>> _size("16 MiB"), _size("1 MB"), _size(65536)
    (16777216, 1000000, 65536)
    """
    if isinstance(value, bool):
        raise ValueError(f"expected a size such as \"16 MiB\", got {value!r}")
    if isinstance(value, int):
        n = value
    else:
        m = _SIZE.match(value) if isinstance(value, str) else None
        unit = (m.group(2).lower() or "b") if m else ""
        if m is None or unit not in _BYTES:
            raise ValueError(f"expected a size such as \"16 MiB\" (B, kB, KiB, MB, MiB, GB, GiB), got {value!r}")
        n = int(float(m.group(1)) * _BYTES[unit])
    if not 64 * 2**10 <= n <= 2**40:
        raise ValueError(f"expected a size from 64 KiB to 1 TiB, got {value!r}")
    return n


Size = Annotated[int, BeforeValidator(_size)]


class DaemonSection(Strict):
    """How ``spanwatch run`` runs: history (and its spool and writer lock), HTTP endpoint, latency allowance."""

    history: str = "sqlite:///spanwatch.db"
    spool: str = Field(
        default="", description="folder of the history spool, where alarms wait while the database is unavailable; "
                                "empty: beside a SQLite database file, else .spanwatch-spool in the config file's "
                                "folder")
    spool_max: Size = Field(default=16 * 2**20, description="size of the spool, reserved on disk at start")
    history_timeout: PosDuration = Field(
        default=5.0, description="how long a history write waits for a locked or slow database before its "
                                 "records go to the spool")
    lock_timeout: PosDuration = Field(
        default=60.0, description="a writer lock whose heartbeat is older than this belongs to a daemon that "
                                  "died, and is taken over (SQLite; PostgreSQL releases it with the connection)")
    history_password: Secret | None = Field(
        default=None, description="the database password as \"env:NAME\" or \"file:/path\", kept out of the "
                                  "history URL (spanwatch.connectors.secrets)")
    http: str = "127.0.0.1:9108"
    latency: PosDuration = Field(
        default=0.1, description="how far behind the newest source time frames are computed: a sample arriving "
                                 "up to this much out of step with the others is folded into its frame")
    lost_after: PosDuration = Field(
        default=5.0, description="a source that delivers nothing for this long is lost: frames go on without it")
    delay_limit: PosDuration = Field(
        default=30.0, description="a source whose newest time is further behind the wall clock is delayed")
    degraded_rate: Fraction = Field(
        default=0.01, description="share of samples refused, late or lost over the last minute that makes the "
                                  "status degraded")
    tick: PosDuration = 0.05
    startup_grace: Duration = 10.0
    log_level: Literal["debug", "info", "warning", "error"] = "info"


DRIFT_DETECTORS = ("cusum", "ewma", "adwin", "page_hinkley")
DriftDetector = Literal["cusum", "ewma", "adwin", "page_hinkley"]


class DriftResidualSection(Strict):
    """Overrides for one residual stream (``[drift.residuals.<name>]``, names as ``spanwatch check-config`` lists)."""

    enabled: bool | None = None
    detector: DriftDetector | None = None
    # the shift to detect, in sigmas of the residual's batch means in good running
    shift: Annotated[float, between(U.DIMENSIONLESS, 0.1, 10.0, low_included=True)] | None = None
    sigma_floor: Annotated[float, between(U.DIMENSIONLESS, 0.0, 1e6, low_included=True)] | None = None


class DriftSection(Strict):
    """Drift detection on the physics checks' residuals (see :mod:`spanwatch.rules.driftcheck`).

    Configured in the engineer's terms: the ``shift`` to detect (sigmas) and the acceptable
    ``false_alarm_interval`` of the whole line (spread over its drift detectors); the detector
    parameters follow from published design rules (:mod:`spanwatch.rules.drift.design`).
    """

    enabled: bool = True
    detector: DriftDetector = "cusum"
    # batch means of this length: the 20-50 Hz residuals are strongly autocorrelated
    period: Annotated[float, between(U.TIME, 1.0, 600.0, low_included=True)] = 10.0
    # good running learnt as each baseline (at least 20 batches)
    learn: Annotated[float, between(U.TIME, 60.0, 86400.0, low_included=True)] = 600.0
    shift: Annotated[float, between(U.DIMENSIONLESS, 0.1, 10.0, low_included=True)] = 1.0
    false_alarm_interval: Annotated[float, between(U.TIME, 3600.0, 100 * 365 * 86400.0, low_included=True)] = (
        90 * 86400.0)
    # a line speed more than this share away from the current operating point is a new one (its own baseline)
    speed_band: Annotated[float, between(U.DIMENSIONLESS, 0.01, 1.0, low_included=True)] = 0.1
    residuals: dict[str, DriftResidualSection] = Field(default_factory=dict)

    @field_validator("residuals")
    @classmethod
    def _known_residuals(cls, v: dict[str, DriftResidualSection]) -> dict[str, DriftResidualSection]:
        from spanwatch.rules.driftcheck import RESIDUALS

        known = [r.name for r in RESIDUALS]
        for name in v:
            if name not in known:
                raise ValueError(f"expected residual names among {', '.join(known)}, got {name!r}")
        return v

    @model_validator(mode="after")
    def _enough_batches(self) -> DriftSection:
        if self.learn < 20 * self.period:
            raise ValueError(f"expected learn at least 20 periods ({20 * self.period:g} s) so a baseline has 20 "
                             f"batch means, got learn {self.learn:g} s with period {self.period:g} s")
        return self


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
    alarms: AlarmsSection = Field(default_factory=AlarmsSection)
    drift: DriftSection = Field(default_factory=DriftSection)
    # the shift calendar: name -> "HH:MM-HH:MM" in the plant's local time (spanwatch.monitor.shifts)
    shifts: dict[Ident, str] = Field(default_factory=dict)

    @field_validator("shifts")
    @classmethod
    def _shifts(cls, v: dict[str, str]) -> dict[str, str]:
        from spanwatch.monitor.shifts import check_overlaps, parse_shift

        check_overlaps([parse_shift(n, t) for n, t in v.items()])
        return v


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


MAX_FILE_BYTES = 1 << 20  # a line file is about 10 kB; a megabyte is no line description (a log, an image, a device)
MAX_EXTENDS = 4  # levels of extends: a base, a site variant, a source variant and one more
MAX_NESTING = 32  # tables and arrays within each other; the schema's deepest is 4


def _read_file(path: Path) -> bytes:
    """The bytes of a line file; ValueError (the reason) for what is no regular file of a sensible size.

    Opened without blocking, so that a FIFO cannot hang the reader; checked on the open file (a
    device such as /dev/zero or /dev/urandom would be read forever); read at most one byte past
    the limit, so that a file that grows cannot exhaust memory.
    """
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_CLOEXEC", 0)
    try:
        fd = os.open(path, flags)
    except OSError as exc:
        raise ValueError(f"cannot read the file ({exc.strerror})") from None
    mode = os.fstat(fd).st_mode
    if not stat.S_ISREG(mode):
        os.close(fd)
        what = ("a directory" if stat.S_ISDIR(mode) else "a FIFO" if stat.S_ISFIFO(mode)
                else "a device" if stat.S_ISCHR(mode) or stat.S_ISBLK(mode) else "a socket")
        raise ValueError(f"expected a line file (a regular file), got {what}")
    with os.fdopen(fd, "rb") as fh:
        try:
            raw = fh.read(MAX_FILE_BYTES + 1)
        except OSError as exc:
            raise ValueError(f"cannot read the file ({exc.strerror})") from None
    if len(raw) > MAX_FILE_BYTES:
        raise ValueError(f"expected a line file of at most {MAX_FILE_BYTES // 1024} kB, got a larger file")
    return raw


def _nesting(doc: Any) -> int:
    """How deep tables and arrays sit within each other (iterative: a deep document must not recurse)."""
    deepest = 0
    stack: list[tuple[Any, int]] = [(doc, 1)]
    while stack:
        node, depth = stack.pop()
        deepest = max(deepest, depth)
        if depth > MAX_NESTING:
            break
        children = node.values() if isinstance(node, dict) else node
        stack.extend((c, depth + 1) for c in children if isinstance(c, dict | list))
    return deepest


def read_toml(path: Path, _chain: tuple[Path, ...] = ()) -> tuple[dict[str, Any], list[Path]]:
    """Read a TOML file, following ``extends = "base.toml"`` (relative to the file).

    The file's tables are merged into its base's, key by key (arrays and values replace);
    so a live-source variant of a line lists only its ``[sources]``, ``[daemon]`` and the tag
    addresses. Returns the merged document and the files it came from, base first. What cannot
    be a line file (a device, a FIFO, a directory, more than :data:`MAX_FILE_BYTES`, tables
    nested deeper than :data:`MAX_NESTING`, more than :data:`MAX_EXTENDS` levels of extends, a
    cycle) is a :class:`ConfigError`; one in a base names the file that extends it.
    """
    try:
        raw = _read_file(path)
    except ValueError as exc:
        raise ConfigError(path, "", str(exc)) from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise ConfigError(path, "", "expected a UTF-8 text file") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, "", f"expected valid TOML: {exc}") from None
    except RecursionError:
        raise ConfigError(path, "", f"expected tables and arrays nested at most {MAX_NESTING} deep") from None
    if _nesting(data) > MAX_NESTING:
        raise ConfigError(path, "", f"expected tables and arrays nested at most {MAX_NESTING} deep")
    base = data.pop("extends", None)
    if base is None:
        return data, [path]
    if not isinstance(base, str):
        raise ConfigError(path, "extends", f"expected the path of a base line file, got {base!r}")
    base_path = Path(base) if Path(base).is_absolute() else path.parent / base
    chain = (*_chain, path.resolve())
    if base_path.resolve() in chain:
        cycle = " -> ".join(str(p) for p in (*chain[chain.index(base_path.resolve()):], base_path.resolve()))
        raise ConfigError(path, "extends", f"expected a base that does not extend this file again (a cycle: {cycle})")
    if len(chain) > MAX_EXTENDS:
        raise ConfigError(path, "extends", f"expected at most {MAX_EXTENDS} levels of extends")
    try:
        merged, files = read_toml(base_path, chain)
    except ConfigError as exc:  # named from this file down: "a.toml: extends: b.toml: <what is wrong with b>"
        if len(exc.problems) > 1:
            raise
        raise ConfigError(path, "extends", f"{exc.file}: {exc.key + ': ' if exc.key else ''}{exc.message}") from None
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
