"""Which checks a line gets, and the alarm points (limits, delays, priority) of each.

One builder per check kind turns the derived line into check objects; the alarm
settings of each (kind, object) are the check's built-in defaults, overridden by the
config's ``[checks.<kind>]`` table, overridden by ``[checks.<kind>.overrides.<object>]``.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import numpy as np
from spanwatch.monitor.config import AlarmOverride, CheckSection, ConfigError, RollerSection, WinderSection
from spanwatch.monitor.line import Line
from spanwatch.rules.airfilm import combined_roughness
from spanwatch.rules.alarms import LEVELS, AlarmPoint
from spanwatch.rules.base import Block, Check
from spanwatch.rules.catalog import CHECK_KINDS
from spanwatch.rules.plausibility import TagFrozenCheck, TagQualityCheck, TagRangeCheck, TagStaleCheck
from spanwatch.rules.runout import RunoutCheck
from spanwatch.rules.slip import IdlerLagCheck, SlipCheck
from spanwatch.rules.span import DrawCheck
from spanwatch.rules.traction import NoDriveCheck, TractionCheck
from spanwatch.rules.woundroll import LengthRateCheck, RollDiameterCheck, SpeedDiameterCheck


def _frames(line: Line, seconds: float) -> int:
    return max(1, round(seconds * line.config.line.frame_rate))


def _traction(line: Line) -> Iterator[Check]:
    lw, mat = line.config.line, line.config.material
    for el in line.driven_rollers:
        sec = el.section
        assert isinstance(sec, RollerSection)
        zb, za = line.zone_before(el.id), line.zone_after(el.id)
        assert zb is not None and za is not None
        speed = f"speed/{el.id}" if line.has_signal(f"speed/{el.id}") else None
        yield TractionCheck(
            el.id, zone_up=zb.id, zone_down=za.id, mu=sec.cof, wrap=sec.wrap, radius=sec.diameter / 2,
            sigma=float(combined_roughness(mat.roughness, sec.roughness)),
            film_factor=sec.air_film_factor * mat.air_film_factor, safety_factor=sec.safety_factor,
            min_drive_tension=lw.min_drive_tension, viscosity=line.viscosity, air_model=lw.air_film_model,
            convention=lw.air_speed_convention, floor=lw.air_traction_floor, roller_speed=speed)
        yield NoDriveCheck(el.id, zone_up=zb.id, zone_down=za.id, min_drive_tension=lw.min_drive_tension)


def _slip(line: Line) -> Iterator[Check]:
    lw = line.config.line
    for eid in line.path:
        el = line.elements[eid]
        sec = el.section
        if not isinstance(sec, RollerSection) or sec.speed_tag is None or eid == lw.web_speed_from:
            continue
        if sec.driven:
            yield SlipCheck(eid, draw=sec.draw, min_speed=lw.thread_speed)
        else:
            yield IdlerLagCheck(eid, min_speed=lw.thread_speed)


def _draw(line: Line) -> Iterator[Check]:
    lw, mat = line.config.line, line.config.material
    for z in line.zones:
        up, down = line.elements[z.upstream], line.elements[z.downstream]
        if up.is_winder or down.is_winder or z.tension_tag is None:
            continue
        zb = line.zone_before(up.id)
        if zb is None or zb.tension_tag is None:
            continue
        if not (line.has_signal(f"speed/{up.id}") and line.has_signal(f"speed/{down.id}")):
            continue
        yield DrawCheck(
            z.id, zone_up=zb.id, roller_up=up.id, roller_down=down.id, et=mat.modulus * mat.caliper,
            modulus_tol=mat.modulus_tolerance, ratio_tol=lw.encoder_ratio_tolerance,
            t1_acc=_per_width(line, zb.tension_tag), t2_acc=_per_width(line, z.tension_tag),
            window_frames=_frames(line, lw.check_window), min_speed=lw.thread_speed)


def _per_width(line: Line, tag: str) -> tuple[float, float]:
    info = line.tags[tag]
    absolute, rel = info.accuracy
    if info.kind.name == "force":
        absolute /= line.config.material.width
    return absolute, rel


def _winders(line: Line) -> Iterator[Check]:
    lw, mat = line.config.line, line.config.material
    for el in line.winders:
        sec = el.section
        assert isinstance(sec, WinderSection)
        has_d = line.has_signal(f"diameter/{el.id}")
        has_l = line.has_signal(f"length/{el.id}")
        if has_d and has_l:
            d_acc = line.tags[sec.diameter_tag].accuracy if sec.diameter_tag else (0.0, 0.0)
            l_acc = line.tags[sec.length_tag].accuracy if sec.length_tag else (0.0, 0.0)
            yield RollDiameterCheck(
                el.id, rewind=sec.kind == "rewind", core_diameter=sec.core_diameter, nominal_caliper=mat.caliper,
                stack_factor=mat.stack_factor, calibration_length=sec.calibration_length,
                caliper_drift=mat.caliper_drift, diameter_acc=d_acc, length_acc=l_acc)
        if sec.diameter_tag and sec.rpm_tag:
            yield SpeedDiameterCheck(el.id, window_frames=_frames(line, lw.check_window),
                                     min_rev_per_s=lw.thread_speed / (3.14159 * sec.max_diameter))
        if has_l:
            yield LengthRateCheck(el.id, window_frames=_frames(line, lw.check_window), min_speed=lw.thread_speed)
        if sec.runout_check and (sec.rpm_tag or has_d):
            zone = line.zone_after(el.id) if sec.kind == "unwind" else line.zone_before(el.id)
            if zone is not None and zone.tension_tag is not None:
                yield RunoutCheck(el.id, zone=zone.id, rotation=f"rotation/{el.id}" if sec.rpm_tag else None,
                                  diameter=f"diameter/{el.id}", frame_rate=lw.frame_rate,
                                  min_tension=lw.min_drive_tension)


def _runout_rollers(line: Line) -> Iterator[Check]:
    lw = line.config.line
    for el in line.driven_rollers:
        sec = el.section
        assert isinstance(sec, RollerSection)
        zone = line.zone_after(el.id)
        if sec.runout_check and zone is not None and zone.tension_tag is not None:
            yield _RollerRunout(el.id, zone=zone.id, diameter=sec.diameter, frame_rate=lw.frame_rate,
                                min_tension=lw.min_drive_tension)


class _RollerRunout(RunoutCheck):
    """Runout of a driven roller: rotation from its surface speed and fixed diameter."""

    def __init__(self, object_id: str, *, zone: str, diameter: float, frame_rate: float, min_tension: float) -> None:
        super().__init__(object_id, zone=zone, rotation=None, diameter=None, frame_rate=frame_rate,
                         min_tension=min_tension)
        self.roller_diameter = diameter
        self.inputs = (f"tension/{zone}", f"speed/{object_id}")

    def _rev_per_s(self, block: Block) -> tuple[np.ndarray, np.ndarray]:
        s = block.signal(f"speed/{self.object_id}")
        return np.abs(s.value) / (np.pi * self.roller_diameter), s.ok


def _tags(line: Line) -> Iterator[Check]:
    for name, info in line.tags.items():
        yield TagStaleCheck(name, stale_after=info.stale_after)
        yield TagQualityCheck(name)
        if info.low > float("-inf") or info.high < float("inf"):
            yield TagRangeCheck(name, low=info.low, high=info.high)
        if info.frozen_after is not None:
            yield TagFrozenCheck(name, frozen_after=info.frozen_after, tolerance=info.frozen_tolerance)


BUILDERS: tuple[Callable[[Line], Iterator[Check]], ...] = (_traction, _slip, _draw, _winders, _runout_rollers, _tags)


def build_checks(line: Line) -> list[Check]:
    """Every check the line's configuration supports (disabled kinds are still built; alarms skip them)."""
    return [c for b in BUILDERS for c in b(line)]


def _merge(base: dict[str, object], over: AlarmOverride | None) -> dict[str, object]:
    if over is None:
        return base
    out = dict(base)
    for k, v in over.model_dump(exclude_none=True).items():
        if k in out:
            out[k] = v
    return out


def alarm_points(line: Line, checks: list[Check]) -> list[AlarmPoint]:
    """Resolve every (check, level) into an AlarmPoint; validate the ``[checks]`` table against the checks."""
    cfg_checks = line.config.checks
    problems: list[tuple[str, str]] = []
    objects: dict[str, set[str]] = {}
    for c in checks:
        objects.setdefault(c.kind, set()).add(c.object_id)
    for kind, sec in cfg_checks.items():
        if kind not in CHECK_KINDS:
            problems.append((f"checks.{kind}", f"expected one of {', '.join(sorted(CHECK_KINDS))}, got {kind!r}"))
            continue
        for obj in sec.overrides:
            if obj not in objects.get(kind, set()):
                known = ", ".join(sorted(objects.get(kind, set()))) or "none on this line"
                problems.append((f"checks.{kind}.overrides.{obj}", f"expected an object this check runs on "
                                                                   f"({known}), got {obj!r}"))
    if problems:
        raise ConfigError(line.file, *problems[0], more=problems[1:])
    points = []
    for c in checks:
        d = type(c).defaults  # type: ignore[attr-defined]
        base: dict[str, object] = {
            "enabled": True, "warning": d.warning, "alarm": d.alarm, "deadband": d.deadband,
            "on_delay": d.on_delay, "off_delay": d.off_delay, "priority": d.priority,
            "warning_priority": d.warning_priority, "cause": d.cause, "consequence": d.consequence,
            "action": d.action, "response_time": d.response_time,
        }
        sec: CheckSection | None = cfg_checks.get(c.kind)
        s = _merge(base, sec)
        if sec is not None:
            s = _merge(s, sec.overrides.get(c.object_id))
        if not s["enabled"]:
            continue
        for level in LEVELS:
            limit = s[level]
            if limit is None:
                continue
            points.append(AlarmPoint(
                kind=c.kind, object_id=c.object_id, level=level, limit=float(limit),  # type: ignore[arg-type]
                direction=d.direction, deadband=float(s["deadband"]),  # type: ignore[arg-type]
                on_delay=float(s["on_delay"]), off_delay=float(s["off_delay"]),  # type: ignore[arg-type]
                priority=str(s["priority"] if level == "alarm" else s["warning_priority"]), unit=d.unit,
                cause=str(s["cause"]), consequence=str(s["consequence"]), action=str(s["action"]),
                response_time=float(s["response_time"])))  # type: ignore[arg-type]
    return points
