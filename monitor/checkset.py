"""Which checks a line gets, and the alarm points (limits, delays, priority) of each.

Every registered check kind (:mod:`spanwatch.rules.catalog`) builds its checks from the core's
view of the line; the alarm settings of each (kind, object) are the check's built-in
defaults, overridden by the config's ``[checks.<kind>]`` table, overridden by
``[checks.<kind>.overrides.<object>]``.
"""

from __future__ import annotations

from dataclasses import replace

from spanwatch.monitor.config import AlarmOverride, ConfigError
from spanwatch.monitor.line import Line
from spanwatch.rules.alarms import LEVELS, AlarmPoint
from spanwatch.rules.base import AlarmSettings, Check
from spanwatch.rules.catalog import CHECK_KINDS, checks_for


def build_checks(line: Line) -> list[Check]:
    """Every check the line's configuration supports (disabled kinds are still built; alarms skip them)."""
    return checks_for(line.model)


def _override(settings: AlarmSettings, over: AlarmOverride | None) -> AlarmSettings:
    """The settings with every field the override gives replaced (the override's own table aside)."""
    if over is None:
        return settings
    return replace(settings, **over.model_dump(exclude_none=True, exclude={"overrides"}))


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
        d = c.defaults
        sec = cfg_checks.get(c.kind)
        s = _override(d.settings(), sec)
        if sec is not None:
            s = _override(s, sec.overrides.get(c.object_id))
        if not s.enabled:
            continue
        for level in LEVELS:
            limit = s.limit(level)
            if limit is None:
                continue
            points.append(AlarmPoint(
                kind=c.kind, object_id=c.object_id, level=level, limit=float(limit), direction=d.direction,
                deadband=s.deadband, on_delay=s.on_delay, off_delay=s.off_delay,
                priority=s.level_priority(level), unit=d.unit, cause=s.cause, consequence=s.consequence,
                action=s.action, response_time=s.response_time))
    return points
