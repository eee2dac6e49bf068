"""The line as the checks see it: rollers, winders, tension zones and tags, in SI, with no config objects.

The application derives it from a validated line file (:mod:`spanwatch.monitor.line`); each
check kind reads it in its ``for_line`` to decide which objects it runs on and with which
parameters. Every quantity is SI (m, s, N/m, rad, Pa); accuracies are ``(absolute SI,
relative)`` pairs; tension is per unit width (a load cell reading force has its absolute
accuracy divided by the web width already).
"""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(frozen=True)
class LineSettings:
    """Line-wide settings the checks need."""

    frame_rate: float  # Hz
    thread_speed: float  # m/s: below it a speed ratio means nothing
    min_drive_tension: float  # N/m
    check_window: float  # s: averaging window of the draw, speed-diameter and length-rate checks
    encoder_ratio_tolerance: float  # relative
    air_film_model: str
    air_speed_convention: str
    air_traction_floor: float
    air_viscosity: float  # Pa s at the configured air temperature
    web_speed_from: str | None  # roller whose encoder gives the web speed (None: the line-speed tag)
    draw_window: float = 20.0  # s: averaging window of the draw check
    startup_settle: float = 30.0  # s: longest wait after the line leaves STOPPED for tensions to reach setpoint
    startup_band: float = 0.2  # relative: tensions within this share of their setpoints end the start-up wait

    def frames(self, seconds: float) -> int:
        """A duration as a whole number of frames (at least one)."""
        return max(1, round(seconds * self.frame_rate))


@dataclass(frozen=True)
class Material:
    """The web."""

    caliper: float  # m, nominal single ply
    width: float  # m
    modulus: float  # Pa
    modulus_tolerance: float  # relative
    roughness: float  # m, rms
    air_film_factor: float  # multiplier on the air-film height (venting of a permeable web)
    stack_factor: float  # effective stack caliper / single-ply caliper (a prior)
    caliper_drift: float  # relative
    stack_factor_tolerance: float = 0.1  # relative: a roll's calibrated caliper may depart this far from nominal


@dataclass(frozen=True)
class Roller:
    """A roller on the web path."""

    id: str
    diameter: float  # m
    wrap: float  # rad
    cof: float  # web on this roller, dry
    roughness: float  # m, rms
    driven: bool
    draw: float  # commanded draw (relative speed over the web speed)
    safety_factor: float
    air_film_factor: float  # venting by grooves or covering
    has_encoder: bool  # a speed tag of its own
    runout_check: bool
    has_fault_tag: bool = False  # a fault bit or word of its drive (signal ``drive_fault/<id>``)
    speed_tag: str | None = None  # the tag of its encoder (what a user can go and look at)
    draw_configured: bool = False  # ``draw`` was set in the line file (a commanded speed ratio), not defaulted


@dataclass(frozen=True)
class Winder:
    """An unwind or a rewind."""

    id: str
    rewind: bool
    core_diameter: float  # m
    max_diameter: float  # m
    calibration_length: float  # m of each roll used to calibrate its effective caliper
    has_diameter_sensor: bool
    has_rpm: bool
    has_length: bool
    diameter_accuracy: tuple[float, float]  # (m, relative)
    length_accuracy: tuple[float, float]  # (m, relative)
    runout_check: bool
    diameter_tag: str | None = None
    rpm_tag: str | None = None
    length_tag: str | None = None


@dataclass(frozen=True)
class Zone:
    """Spans between two driven elements; one tension when idlers are drag-free."""

    id: str
    upstream: str
    downstream: str
    spans: tuple[str, ...]
    length: float
    tension_tag: str | None
    tension_span: str | None
    setpoint: float | None
    tension_accuracy: tuple[float, float] = (0.0, 0.0)  # (N/m, relative) of its load cell, per width
    setpoint_range: tuple[float, float] | None = None  # N/m: lowest and highest setpoint over a roll (taper)


@dataclass(frozen=True)
class Tag:
    """A tag's plausibility settings, in SI."""

    name: str
    low: float
    high: float
    sample_period: float  # s
    stale_after: float  # s
    frozen_after: float | None  # s
    frozen_tolerance: float  # SI
    source: str | None = None  # the live source that delivers it (None: a recording)


@dataclass(frozen=True)
class DriftSettings:
    """The ``[drift]`` section in SI: which detector, how residuals are decimated and learnt, and the design
    terms (the shift to detect in sigmas; the line's acceptable false-alarm interval, shared over every drift
    detector of the line). ``residuals``: per residual name, overrides (``enabled``, ``detector``, ``shift``,
    ``sigma_floor``)."""

    enabled: bool = True
    detector: str = "cusum"
    period: float = 10.0  # s, batch-mean length
    learn: float = 600.0  # s of valid batches to learn a baseline
    shift: float = 1.0  # sigmas
    false_alarm_interval: float = 90 * 86400.0  # s of running for the whole line
    speed_band: float = 0.1  # relative width of an operating-point band of line speed
    residuals: dict[str, dict[str, object]] = field(default_factory=dict)


@dataclass(frozen=True)
class LineModel:
    """Everything a check kind may ask of the line, in SI."""

    name: str
    settings: LineSettings
    material: Material
    path: tuple[str, ...]  # element ids from the unwind to the rewind
    rollers: dict[str, Roller]
    winders: dict[str, Winder]
    zones: tuple[Zone, ...]
    tags: dict[str, Tag]
    signals: frozenset[str]  # derived signal names available (``tension/<zone>``, ``speed/<roller>`` ...)
    sources: tuple[str, ...] = ()  # live sources (none for a recording)
    drift: DriftSettings = field(default_factory=DriftSettings)  # the drift detectors' settings

    def zone_before(self, element_id: str) -> Zone | None:
        return next((z for z in self.zones if z.downstream == element_id), None)

    def zone_after(self, element_id: str) -> Zone | None:
        return next((z for z in self.zones if z.upstream == element_id), None)

    def has_signal(self, name: str) -> bool:
        return name in self.signals

    def is_winder(self, element_id: str) -> bool:
        return element_id in self.winders

    def tension_tag_of(self, zone_id: str) -> str | None:
        """The tag of the load cell that measures a zone's tension (None: the zone has none)."""
        return next((z.tension_tag for z in self.zones if z.id == zone_id), None)

    def zone_blames(self, zone: Zone) -> tuple[str, ...]:
        """What a user can look at for a zone's tension: the zone, its load cell's tag and the span it is on."""
        return tuple(x for x in (zone.id, zone.tension_tag, zone.tension_span) if x)

    @property
    def driven_rollers(self) -> list[Roller]:
        """Driven rollers in web-path order."""
        return [self.rollers[e] for e in self.path if e in self.rollers and self.rollers[e].driven]

    @property
    def rollers_in_path(self) -> list[Roller]:
        return [self.rollers[e] for e in self.path if e in self.rollers]

    @property
    def winders_in_path(self) -> list[Winder]:
        return [self.winders[e] for e in self.path if e in self.winders]
