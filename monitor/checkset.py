"""Which checks a line gets, and the alarm points (limits, delays, priority) of each.

Every registered check kind (:mod:`spanwatch.rules.catalog`) builds its checks from the core's
view of the line; the alarm settings of each (kind, object) are the check's built-in
defaults, overridden by the config's ``[checks.<kind>]`` table, overridden by
``[checks.<kind>.overrides.<object>]``. The ``[alarms]`` table adds what spans alarms: first-out
groups (on each point), the chattering remedy (:func:`chatter_settings`) and suppression by
design (:func:`suppression_rules`).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import replace

from spanwatch.monitor.config import AlarmOverride, ConfigError
from spanwatch.monitor.line import Line
from spanwatch.rules.alarms import LEVELS, AlarmPoint, ChatterSettings
from spanwatch.rules.base import AlarmSettings, Check, blames_of
from spanwatch.rules.catalog import CHECK_KINDS, checks_for
from spanwatch.rules.suppression import SuppressionRule, SuppressionRules, derived_rules, matches


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
    order: dict[str, str] = {}  # key path -> problem, once per table however many objects it covers
    for c in checks:
        d = c.defaults
        sec = cfg_checks.get(c.kind)
        s = _override(d.settings(), sec)
        over = sec.overrides.get(c.object_id) if sec is not None else None
        s = _override(s, over)
        if not s.enabled:
            continue
        problem = limit_order_problem(d.direction, s.warning, s.alarm)
        if problem is not None:
            order.setdefault(_limit_key(c.kind, c.object_id, sec, over), problem)
            continue
        for level in LEVELS:
            limit = s.limit(level)
            if limit is None:
                continue
            points.append(AlarmPoint(
                kind=c.kind, object_id=c.object_id, level=level, limit=float(limit), direction=d.direction,
                deadband=s.deadband, on_delay=s.on_delay, off_delay=s.off_delay,
                priority=s.level_priority(level), unit=d.unit, cause=s.cause, consequence=s.consequence,
                action=s.action, response_time=s.response_time, latched=s.latched, blames=blames_of(c),
                detail=tuple(getattr(c, "detail", ()))))
    if order:
        items = list(order.items())
        raise ConfigError(line.file, *items[0], more=items[1:])
    groups = line.config.alarms.first_out
    _check_patterns(line, points, ((f"alarms.first_out.{g}[{i}]", pat) for g, pats in groups.items()
                                   for i, pat in enumerate(pats)))
    return [replace(p, groups=tuple(g for g, pats in groups.items() if any(matches(x, p) for x in pats)))
            if groups else p for p in points]


def chatter_settings(line: Line) -> ChatterSettings:
    """The chattering threshold and remedy of the ``[alarms]`` table."""
    a = line.config.alarms
    return ChatterSettings(count=a.chatter_count, window=a.chatter_window, off_delay=a.chatter_off_delay,
                           hold=a.chatter_hold)


def signal_tags(line: Line) -> dict[str, tuple[str, ...]]:
    """Signal name -> the tags it is computed from: a tag's signal reads that tag; a winder's diameter computed
    from speed and rpm (:attr:`Line.computed_signals`) reads the tags of ``rotation/<winder>`` and ``speed/web``."""
    out = {s.name: (s.tag,) for s in line.signals}
    for name in line.computed_signals:
        winder = name.split("/", 1)[1]
        out[name] = tuple(dict.fromkeys((*out.get(f"rotation/{winder}", ()), *out.get("speed/web", ()))))
    return out


def suppression_rules(line: Line, points: list[AlarmPoint], checks: list[Check]) -> SuppressionRules:
    """Suppression by design for the line: the rules derived from its sources, tags and checks
    (:func:`spanwatch.rules.suppression.derived_rules`), then the ``[[alarms.suppress]]`` rules of the config.

    Every configured pattern must match an alarm of the line (else :class:`ConfigError` naming its key path).
    """
    cfg = line.config.alarms.suppress
    pats: list[tuple[str, str]] = []
    for i, r in enumerate(cfg):
        pats.append((f"alarms.suppress[{i}].while", r.while_))
        pats.extend((f"alarms.suppress[{i}].suppress[{j}]", s) for j, s in enumerate(r.suppress))
    _check_patterns(line, points, pats)
    tag_sources = {name: tag.source for name, tag in line.model.tags.items()}
    rules = derived_rules(checks, tag_sources, signal_tags(line))
    rules += [SuppressionRule(r.while_, tuple(r.suppress), r.reason) for r in cfg]
    return SuppressionRules(rules, points)


def _check_patterns(line: Line, points: list[AlarmPoint], patterns: Iterable[tuple[str, str]]) -> None:
    """Every (key path, pattern) must match at least one alarm point of the line."""
    problems = []
    for key, pat in patterns:
        if not any(matches(pat, p) for p in points):
            kinds = ", ".join(sorted({p.kind for p in points})) or "none"
            problems.append((key, f"expected a pattern matching an alarm of this line (kind:object or "
                                  f"kind:object:level; kinds here: {kinds}), got {pat!r}"))
    if problems:
        raise ConfigError(line.file, *problems[0], more=problems[1:])


def limit_order_problem(direction: str, warning: float | None, alarm: float) -> str | None:
    """What is wrong with a warning limit beyond its alarm limit on the abnormal side, or None.

    The warning comes first on the way to the alarm: for direction ``high`` (alarm when the
    value rises to the limit) warning <= alarm; ``low``: warning >= alarm; ``abs``:
    |warning| <= |alarm|. Otherwise the alarm would sound before (or without) its warning.
    """
    if warning is None:
        return None
    ok = {"high": warning <= alarm, "low": warning >= alarm, "abs": abs(warning) <= abs(alarm)}.get(direction, True)
    if ok:
        return None
    side = {"high": "at most", "low": "at least", "abs": "in magnitude at most"}[direction]
    return (f"expected the warning limit {side} the alarm limit {alarm:g} (direction {direction}: the warning comes "
            f"first), got warning {warning:g}")


def _limit_key(kind: str, object_id: str, sec: AlarmOverride | None, over: AlarmOverride | None) -> str:
    """The key path of the most specific table that set the warning or the alarm limit."""
    for table, prefix in ((over, f"checks.{kind}.overrides.{object_id}"), (sec, f"checks.{kind}")):
        if table is not None:
            for name in ("warning", "alarm"):
                if getattr(table, name) is not None:
                    return f"{prefix}.{name}"
    return f"checks.{kind}.warning"
