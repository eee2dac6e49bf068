"""The derived line: web path, tension zones, signals and capacities, built from a validated config.

The config lists rollers, winders and spans; this module checks that the spans form
one web path from the unwind to the rewind, splits the path into *tension zones*
(the spans between two driven elements — winders and driven rollers — share one
tension when the idlers between them have no drag), and says which tag feeds which
signal. Cross-reference errors are :class:`~spanwatch.monitor.config.ConfigError` with the key
path of the offending entry.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
from spanwatch.monitor import units as U
from spanwatch.monitor.config import (
    ConfigError,
    LineConfig,
    RollerSection,
    TagSection,
    WinderSection,
    load_config,
)
from spanwatch.rules.airfilm import air_viscosity, combined_roughness, effective_cof
from spanwatch.rules.linemodel import DriftSettings, LineModel, LineSettings, Material, Roller, Tag, Winder, Zone
from spanwatch.rules.traction import capstan_ratio_limit, traction_utilisation
from spanwatch.rules.woundroll import taper_tension


@dataclass(frozen=True)
class Element:
    """A roller or winder on the web path."""

    id: str
    key: str  # key path in the config, e.g. "rollers[2]"
    section: RollerSection | WinderSection

    @property
    def is_winder(self) -> bool:
        return isinstance(self.section, WinderSection)

    @property
    def driven(self) -> bool:
        return self.is_winder or bool(getattr(self.section, "driven", False))

    @property
    def diameter(self) -> float | None:
        return self.section.diameter if isinstance(self.section, RollerSection) else None



@dataclass(frozen=True)
class SignalSpec:
    """A derived signal that is a tag's SI value times a factor (e.g. rpm -> surface speed)."""

    name: str
    tag: str
    factor: float = 1.0


@dataclass(frozen=True)
class TagInfo:
    """A tag's unit conversion and plausibility settings, in SI."""

    name: str
    unit: str
    kind: U.Kind
    scale: float
    offset: float
    low: float
    high: float
    sample_period: float
    stale_after: float  # seconds
    frozen_after: float | None
    frozen_tolerance: float  # SI
    accuracy: tuple[float, float]  # (absolute SI, relative)


@dataclass(frozen=True)
class Line:
    """Everything the pipeline needs to know about one line, in SI."""

    config: LineConfig
    file: str
    config_hash: str
    path: tuple[str, ...]
    elements: dict[str, Element]
    zones: tuple[Zone, ...]
    tags: dict[str, TagInfo]
    signals: tuple[SignalSpec, ...]
    model: LineModel  # the line as the checks see it (core types, SI)
    warnings: tuple[str, ...] = ()  # what the config exposes (inline secrets, no encryption): monitor/exposure.py

    @property
    def name(self) -> str:
        return self.config.line.name

    def zone_before(self, element_id: str) -> Zone | None:
        return next((z for z in self.zones if z.downstream == element_id), None)

    def zone_after(self, element_id: str) -> Zone | None:
        return next((z for z in self.zones if z.upstream == element_id), None)

    def tags_of_source(self, source: str) -> dict[str, TagSection]:
        """The config tags a source delivers (a tag without ``source`` belongs to the only source)."""
        only = next(iter(self.config.sources)) if len(self.config.sources) == 1 else None
        return {n: t for n, t in self.config.tags.items() if (t.source or only) == source}

    def zone(self, zone_id: str) -> Zone:
        return next(z for z in self.zones if z.id == zone_id)

    @property
    def driven_rollers(self) -> list[Element]:
        return [self.elements[e] for e in self.path if self.elements[e].driven and not self.elements[e].is_winder]

    @property
    def winders(self) -> list[Element]:
        return [self.elements[e] for e in self.path if self.elements[e].is_winder]

    @property
    def viscosity(self) -> float:
        return float(air_viscosity(self.config.line.air_temperature))

    def signal_tag(self, name: str) -> str | None:
        return next((s.tag for s in self.signals if s.name == name), None)

    def has_signal(self, name: str) -> bool:
        return any(s.name == name for s in self.signals) or name in self.computed_signals

    @property
    def computed_signals(self) -> set[str]:
        """Signals computed from others (diameter from speed and rpm where no diameter sensor)."""
        out = set()
        for w in self.winders:
            sec = w.section
            assert isinstance(sec, WinderSection)
            if sec.diameter_tag is None and sec.rpm_tag is not None:
                out.add(f"diameter/{w.id}")
        return out

    def zone_setpoints(self, zone: Zone) -> list[float]:
        """Tension setpoint(s) of a zone, N/m; both ends of the taper for a rewind zone."""
        if zone.setpoint is None:
            return []
        w = self.elements[zone.downstream].section
        if isinstance(w, WinderSection) and w.kind == "rewind" and w.taper is not None:
            ends = taper_tension(np.array([w.core_diameter, w.max_diameter]), zone.setpoint, w.taper.k,
                                 w.core_diameter, w.max_diameter, w.taper.model)
            return [float(x) for x in ends]
        return [zone.setpoint]

    def roller_capacity(self, roller_id: str, speed: float) -> dict[str, float]:
        """Traction capacity of a driven roller at ``speed`` with its zones at setpoint.

        Returns the dry and derated COF, the air-film height, the largest tension ratio it
        can hold (``exp(mu_eff theta)``) and with the safety factor (``exp(mu_eff theta / SF)``),
        the ratio the setpoints demand, and the utilisation times SF at the worst setpoint pair.
        """
        el = self.elements[roller_id]
        sec = el.section
        assert isinstance(sec, RollerSection)
        zb, za = self.zone_before(roller_id), self.zone_after(roller_id)
        mat = self.config.material
        before = self.zone_setpoints(zb) if zb else []
        after = self.zone_setpoints(za) if za else []
        lo_hi = [(a, b) for a in before for b in after]
        sigma = float(combined_roughness(mat.roughness, sec.roughness))
        lw = self.config.line
        worst = {"ratio": 1.0, "u": 0.0, "h": 0.0, "mu_eff": sec.cof}
        for a, b in lo_hi or [(1.0, 1.0)]:
            mu_eff, h = effective_cof(sec.cof, sec.diameter / 2, min(a, b), speed, speed * (1 + sec.draw), sigma,
                                      viscosity=self.viscosity, film_factor=sec.air_film_factor * mat.air_film_factor,
                                      model=lw.air_film_model, convention=lw.air_speed_convention,
                                      floor=lw.air_traction_floor)
            u = float(traction_utilisation(a, b, mu_eff, sec.wrap)) * sec.safety_factor
            if u >= worst["u"]:
                worst = {"ratio": max(a, b) / min(a, b), "u": u, "h": float(h), "mu_eff": float(mu_eff)}
        return {
            "mu": sec.cof,
            "mu_eff": worst["mu_eff"],
            "air_film": worst["h"],
            "roughness": sigma,
            "max_ratio": float(capstan_ratio_limit(worst["mu_eff"], sec.wrap)),
            "safe_ratio": float(capstan_ratio_limit(worst["mu_eff"] / sec.safety_factor, sec.wrap)),
            "demanded_ratio": worst["ratio"],
            "share_of_safe": worst["u"],
        }


# --- building ------------------------------------------------------------------------

_TAG_KINDS = {
    "tension": (U.TENSION, U.FORCE),
    "speed": (U.SPEED, U.ROTATION, U.FREQUENCY),
    "diameter": (U.LENGTH,),
    "length": (U.LENGTH,),
    "rpm": (U.ROTATION, U.FREQUENCY),
    "flag": (U.DIMENSIONLESS,),
}


def load_line(path: str | Path) -> Line:
    """Read, validate and derive a line from a TOML file (raises ConfigError).

    The line's ``config_hash`` is that of the parsed config with its secrets removed, and its
    ``warnings`` say what the config exposes (:mod:`spanwatch.monitor.exposure`).
    """
    from spanwatch.monitor.exposure import config_hash, exposure_warnings

    path = Path(path)
    cfg = load_config(path)
    line = build_line(cfg, str(path), config_hash(cfg))
    return replace(line, warnings=tuple(exposure_warnings(cfg)))


def build_line(cfg: LineConfig, file: str = "<config>", config_hash: str = "") -> Line:
    """Derive the line from a validated config; raise ConfigError on cross-reference problems."""
    err = _Errors(file)
    elements: dict[str, Element] = {}
    for i, r in enumerate(cfg.rollers):
        _add(elements, Element(r.id, f"rollers[{i}]", r), err)
    for i, w in enumerate(cfg.winders):
        _add(elements, Element(w.id, f"winders[{i}]", w), err)
    err.raise_if_any()
    path = _web_path(cfg, elements, err)
    err.raise_if_any()
    tags = _tags(cfg, err)
    _check_tag_refs(cfg, tags, elements, err)
    err.raise_if_any()
    zones = _zones(cfg, elements, path)
    _check_zones(zones, elements, err)
    err.raise_if_any()
    zones = tuple(replace(z, tension_accuracy=_per_width(cfg, tags[z.tension_tag])) if z.tension_tag else z
                  for z in zones)
    zones = tuple(replace(z, setpoint_range=_setpoint_range(elements, z)) for z in zones)
    signals = _signals(cfg, elements, zones, tags)
    model = _model(cfg, path, elements, zones, tags, signals)
    return Line(cfg, file, config_hash, path, elements, zones, tags, signals, model)


def _setpoint_range(elements: dict[str, Element], zone: Zone) -> tuple[float, float] | None:
    """Lowest and highest tension setpoint of a zone over a roll, N/m (a winder's taper moves it)."""
    if zone.setpoint is None:
        return None
    for eid, kind in ((zone.downstream, "rewind"), (zone.upstream, "unwind")):
        w = elements[eid].section
        if isinstance(w, WinderSection) and w.kind == kind and w.taper is not None:
            ends = taper_tension(np.array([w.core_diameter, w.max_diameter]), zone.setpoint, w.taper.k,
                                 w.core_diameter, w.max_diameter, w.taper.model)
            return float(np.min(ends)), float(np.max(ends))
    return zone.setpoint, zone.setpoint


def _per_width(cfg: LineConfig, info: TagInfo) -> tuple[float, float]:
    """A tension tag's accuracy per unit width (a load cell reading force: divided by the web width)."""
    absolute, rel = info.accuracy
    return (absolute / cfg.material.width if info.kind is U.FORCE else absolute), rel


def _model(cfg: LineConfig, path: tuple[str, ...], elements: dict[str, Element], zones: tuple[Zone, ...],
           tags: dict[str, TagInfo], signals: tuple[SignalSpec, ...]) -> LineModel:
    """The core's view of the line: plain SI values, no config objects."""
    lw, mat = cfg.line, cfg.material
    settings = LineSettings(
        frame_rate=lw.frame_rate, thread_speed=lw.thread_speed, min_drive_tension=lw.min_drive_tension,
        check_window=lw.check_window, encoder_ratio_tolerance=lw.encoder_ratio_tolerance,
        air_film_model=lw.air_film_model, air_speed_convention=lw.air_speed_convention,
        air_traction_floor=lw.air_traction_floor, air_viscosity=float(air_viscosity(lw.air_temperature)),
        web_speed_from=lw.web_speed_from, draw_window=lw.draw_window, startup_settle=lw.startup_settle,
        startup_band=lw.startup_band)
    material = Material(caliper=mat.caliper, width=mat.width, modulus=mat.modulus,
                        modulus_tolerance=mat.modulus_tolerance, roughness=mat.roughness,
                        air_film_factor=mat.air_film_factor, stack_factor=mat.stack_factor,
                        caliper_drift=mat.caliper_drift, stack_factor_tolerance=mat.stack_factor_tolerance)
    rollers: dict[str, Roller] = {}
    winders: dict[str, Winder] = {}
    for e in elements.values():
        sec = e.section
        if isinstance(sec, RollerSection):
            rollers[e.id] = Roller(
                id=e.id, diameter=sec.diameter, wrap=sec.wrap, cof=sec.cof, roughness=sec.roughness,
                driven=sec.driven, draw=sec.draw, safety_factor=sec.safety_factor,
                air_film_factor=sec.air_film_factor, has_encoder=sec.speed_tag is not None,
                runout_check=sec.runout_check, has_fault_tag=sec.fault_tag is not None, speed_tag=sec.speed_tag,
                draw_configured="draw" in sec.model_fields_set)
        else:
            none = (0.0, 0.0)
            winders[e.id] = Winder(
                id=e.id, rewind=sec.kind == "rewind", core_diameter=sec.core_diameter,
                max_diameter=sec.max_diameter, calibration_length=sec.calibration_length,
                has_diameter_sensor=sec.diameter_tag is not None, has_rpm=sec.rpm_tag is not None,
                has_length=sec.length_tag is not None,
                diameter_accuracy=tags[sec.diameter_tag].accuracy if sec.diameter_tag else none,
                length_accuracy=tags[sec.length_tag].accuracy if sec.length_tag else none,
                runout_check=sec.runout_check, diameter_tag=sec.diameter_tag, rpm_tag=sec.rpm_tag,
                length_tag=sec.length_tag)
    computed = {f"diameter/{w.id}" for w in winders.values() if not w.has_diameter_sensor and w.has_rpm}
    only = next(iter(cfg.sources)) if len(cfg.sources) == 1 else None
    source_of = {n: (t.source or only) for n, t in cfg.tags.items()}
    return LineModel(
        name=lw.name, settings=settings, material=material, path=path, rollers=rollers, winders=winders,
        zones=zones, tags={n: Tag(name=n, low=t.low, high=t.high, sample_period=t.sample_period,
                                  stale_after=t.stale_after, frozen_after=t.frozen_after,
                                  frozen_tolerance=t.frozen_tolerance, source=source_of.get(n))
              for n, t in tags.items()},
        signals=frozenset({s.name for s in signals} | computed), sources=tuple(cfg.sources),
        drift=_drift(cfg))


def _drift(cfg: LineConfig) -> DriftSettings:
    """The ``[drift]`` section as the core's settings (SI; per-residual overrides without unset keys)."""
    d = cfg.drift
    return DriftSettings(enabled=d.enabled, detector=d.detector, period=d.period, learn=d.learn, shift=d.shift,
                         false_alarm_interval=d.false_alarm_interval, speed_band=d.speed_band,
                         residuals={k: r.model_dump(exclude_none=True) for k, r in d.residuals.items()})


class _Errors:
    def __init__(self, file: str) -> None:
        self.file = file
        self.items: list[tuple[str, str]] = []

    def add(self, key: str, message: str) -> None:
        self.items.append((key, message))

    def raise_if_any(self) -> None:
        if self.items:
            raise ConfigError(self.file, *self.items[0], more=self.items[1:])


def _add(elements: dict[str, Element], el: Element, err: _Errors) -> None:
    if el.id in elements:
        err.add(f"{el.key}.id", f"expected a name not used by another roller or winder, got {el.id!r} "
                                f"(also at {elements[el.id].key})")
    elements[el.id] = el


def _web_path(cfg: LineConfig, elements: dict[str, Element], err: _Errors) -> tuple[str, ...]:
    nxt: dict[str, str] = {}
    prv: dict[str, str] = {}
    ids = set()
    for i, s in enumerate(cfg.spans):
        key = f"spans[{i}]"
        if s.id in ids:
            err.add(f"{key}.id", f"expected a span name used once, got {s.id!r} again")
        ids.add(s.id)
        for end, name in (("from", s.from_), ("to", s.to)):
            if name not in elements:
                err.add(f"{key}.{end}", f"expected the id of a roller or winder, got {name!r} "
                                        f"(known: {', '.join(sorted(elements))})")
        if s.from_ == s.to:
            err.add(f"{key}.to", f"expected a different element from 'from', got {s.to!r}")
        if s.from_ in nxt:
            err.add(f"{key}.from", f"expected each element to feed one span, but {s.from_!r} already feeds "
                                   f"span {nxt[s.from_]!r}")
        if s.to in prv:
            err.add(f"{key}.to", f"expected each element to receive one span, but {s.to!r} already receives "
                                 f"span {prv[s.to]!r}")
        nxt.setdefault(s.from_, s.id)
        prv.setdefault(s.to, s.id)
    if err.items:
        return ()
    unwinds = [w for w in cfg.winders if w.kind == "unwind"]
    rewinds = [w for w in cfg.winders if w.kind == "rewind"]
    if len(unwinds) != 1 or len(rewinds) != 1:
        err.add("winders", f"expected exactly one unwind and one rewind, got {len(unwinds)} unwind(s) and "
                           f"{len(rewinds)} rewind(s)")
        return ()
    span_by_from = {s.from_: s for s in cfg.spans}
    path = [unwinds[0].id]
    while path[-1] in span_by_from and len(path) <= len(elements):
        path.append(span_by_from[path[-1]].to)
    if path[-1] != rewinds[0].id:
        err.add("spans", f"expected the spans to lead from unwind {unwinds[0].id!r} to rewind "
                         f"{rewinds[0].id!r}, but the path stops at {path[-1]!r}: {' -> '.join(path)}")
    missing = [e for e in elements if e not in path]
    for e in missing:
        err.add(f"{elements[e].key}.id", f"expected every roller on the web path, but no span reaches {e!r}")
    return tuple(path)


def _accuracy(raw: object, key: str, scale: float, span: float, err: _Errors) -> tuple[float, float]:
    """(absolute SI, relative) from a number in the tag's unit or a percentage.

    NaN, infinite and negative values are errors (a NaN band never holds a residual, so the
    check would never fire; a negative one is a sign slip); so is a relative accuracy above
    100 % or an absolute one wider than the tag's whole range (``span``, in the tag's unit).
    """
    if raw is None:
        return (0.0, 0.0)
    try:
        if isinstance(raw, str) and raw.strip().endswith("%"):
            rel = U.to_si(raw, U.DIMENSIONLESS)
            if not 0.0 <= rel <= 1.0:
                err.add(key, f"expected a relative accuracy from 0 to 100 %, got {raw!r}")
            return (0.0, rel)
        value = float(raw)  # type: ignore[arg-type]
    except (ValueError, TypeError):
        err.add(key, f"expected an accuracy in the tag's unit (a number) or a percentage such as \"0.5 %\", "
                     f"got {raw!r}")
        return (0.0, 0.0)
    if not (math.isfinite(value) and value >= 0.0):
        err.add(key, f"expected an accuracy of at least 0 in the tag's unit (finite), got {raw!r}")
        return (0.0, 0.0)
    if value > span:
        err.add(key, f"expected an accuracy within the tag's range (at most {span:g} in its unit), got {raw!r}")
    return (value * abs(scale), 0.0)


def _tags(cfg: LineConfig, err: _Errors) -> dict[str, TagInfo]:
    out = {}
    for name, t in cfg.tags.items():
        kind = U.unit_kind(t.unit)
        assert kind is not None  # the schema checked it
        scale, offset = U.converter(t.unit, kind) if kind is not U.DIMENSIONLESS else (1.0, 0.0)
        low, high = (t.range if t.range is not None else (-np.inf, np.inf))
        span = (high - low) if math.isfinite(high - low) else math.inf
        acc = _accuracy(t.accuracy, f'tags."{name}".accuracy', scale, span, err)
        out[name] = TagInfo(
            name=name, unit=t.unit, kind=kind, scale=scale, offset=offset,
            low=low * scale + offset, high=high * scale + offset,
            sample_period=t.sample_period, stale_after=t.stale_after * t.sample_period,
            frozen_after=t.frozen_after, frozen_tolerance=t.frozen_tolerance * scale, accuracy=acc)
    return out


def _check_tag_refs(cfg: LineConfig, tags: dict[str, TagInfo], elements: dict[str, Element], err: _Errors) -> None:
    refs: list[tuple[str, str | None, str]] = [("line.speed_tag", cfg.line.speed_tag, "speed"),
                                                ("line.grade_tag", cfg.line.grade_tag, "flag")]
    for i, r in enumerate(cfg.rollers):
        refs.append((f"rollers[{i}].speed_tag", r.speed_tag, "speed"))
        refs.append((f"rollers[{i}].fault_tag", r.fault_tag, "flag"))
        if r.fault_tag is not None and not r.driven:
            err.add(f"rollers[{i}].fault_tag", f"expected a fault tag only on a driven roller (driven = true): "
                                               f"{r.id!r} is an idler, got {r.fault_tag!r}")
    for i, w in enumerate(cfg.winders):
        refs += [(f"winders[{i}].diameter_tag", w.diameter_tag, "diameter"),
                 (f"winders[{i}].rpm_tag", w.rpm_tag, "rpm"),
                 (f"winders[{i}].length_tag", w.length_tag, "length"),
                 (f"winders[{i}].core_change_tag", w.core_change_tag, "flag")]
    for i, s in enumerate(cfg.spans):
        refs.append((f"spans[{i}].tension_tag", s.tension_tag, "tension"))
    for key, tag, role in refs:
        if tag is None:
            continue
        if tag not in tags:
            err.add(key, f"expected a tag defined under [tags], got {tag!r}")
            continue
        kinds = _TAG_KINDS[role]
        if tags[tag].kind not in kinds:
            err.add(key, f"expected a {role} tag with a unit of {' or '.join(k.name for k in kinds)}, got "
                         f"{tag!r} in {tags[tag].unit!r}")
    if cfg.sources:
        for name, t in cfg.tags.items():
            if t.source is None and len(cfg.sources) > 1:
                err.add(f'tags."{name}".source', f"expected one of the sources {', '.join(sorted(cfg.sources))} "
                                                 f"(there is more than one), got nothing")
                continue
            src = t.source if t.source is not None else next(iter(cfg.sources))
            if src not in cfg.sources:
                err.add(f'tags."{name}".source', f"expected one of the sources {', '.join(sorted(cfg.sources))}, "
                                                 f"got {t.source!r}")
            else:
                spec = cfg.sources[src]
                mapped = spec.kind == "mqtt" and bool(spec.topic_map)  # type: ignore[union-attr]
                if spec.kind in ("opcua", "mqtt") and not t.address and not mapped:
                    err.add(f'tags."{name}".address', f"expected the node id or topic of this tag on source {src!r}")
    wsf = cfg.line.web_speed_from
    if wsf is not None:
        el = elements.get(wsf)
        if el is None or el.is_winder or getattr(el.section, "speed_tag", None) is None:
            err.add("line.web_speed_from", f"expected the id of a roller with a speed_tag, got {wsf!r}")


def _zones(cfg: LineConfig, elements: dict[str, Element], path: tuple[str, ...]) -> tuple[Zone, ...]:
    span_by_from = {s.from_: s for s in cfg.spans}
    zones = []
    start = 0
    for i in range(1, len(path)):
        if elements[path[i]].driven:
            spans = [span_by_from[path[j]] for j in range(start, i)]
            tagged = next((s for s in spans if s.tension_tag is not None), None)
            zones.append(Zone(
                id=f"{path[start]}-{path[i]}", upstream=path[start], downstream=path[i],
                spans=tuple(s.id for s in spans), length=sum(s.length for s in spans),
                tension_tag=tagged.tension_tag if tagged else None,
                tension_span=tagged.id if tagged else None,
                setpoint=tagged.setpoint if tagged else None))
            start = i
    return tuple(zones)


def _check_zones(zones: tuple[Zone, ...], elements: dict[str, Element], err: _Errors) -> None:
    for z in zones:
        if z.tension_tag is not None:
            continue
        for eid, side in ((z.downstream, "upstream"), (z.upstream, "downstream")):
            el = elements[eid]
            if el.driven and not el.is_winder:
                err.add(f"{el.key}.driven", f"expected a tension measurement on the {side} side of driven roller "
                                            f"{eid!r}: add tension_tag to one of the spans {', '.join(z.spans)}")


def _signals(cfg: LineConfig, elements: dict[str, Element], zones: tuple[Zone, ...],
             tags: dict[str, TagInfo]) -> tuple[SignalSpec, ...]:
    width = cfg.material.width
    out: list[SignalSpec] = []

    def speed_spec(name: str, tag: str, diameter: float | None) -> SignalSpec:
        if tags[tag].kind is U.SPEED:
            return SignalSpec(name, tag)
        return SignalSpec(name, tag, np.pi * (diameter or 0.0))

    out.append(SignalSpec("speed/line", cfg.line.speed_tag))
    if cfg.line.grade_tag is not None:
        out.append(SignalSpec("grade/line", cfg.line.grade_tag))
    for e in elements.values():
        sec = e.section
        if isinstance(sec, RollerSection) and sec.speed_tag is not None:
            out.append(speed_spec(f"speed/{e.id}", sec.speed_tag, sec.diameter))
        if isinstance(sec, RollerSection) and sec.fault_tag is not None:
            out.append(SignalSpec(f"drive_fault/{e.id}", sec.fault_tag))
    wsf = cfg.line.web_speed_from
    if wsf is not None:
        sec = elements[wsf].section
        assert isinstance(sec, RollerSection) and sec.speed_tag is not None
        out.append(speed_spec("speed/web", sec.speed_tag, sec.diameter))
    else:
        out.append(SignalSpec("speed/web", cfg.line.speed_tag))
    for z in zones:
        if z.tension_tag is not None:
            factor = 1.0 / width if tags[z.tension_tag].kind is U.FORCE else 1.0
            out.append(SignalSpec(f"tension/{z.id}", z.tension_tag, factor))
    for e in elements.values():
        sec = e.section
        if isinstance(sec, WinderSection):
            if sec.diameter_tag:
                out.append(SignalSpec(f"diameter/{e.id}", sec.diameter_tag))
            if sec.rpm_tag:
                out.append(SignalSpec(f"rotation/{e.id}", sec.rpm_tag))
            if sec.length_tag:
                out.append(SignalSpec(f"length/{e.id}", sec.length_tag))
            if sec.core_change_tag:
                out.append(SignalSpec(f"core_change/{e.id}", sec.core_change_tag))
    return tuple(out)
