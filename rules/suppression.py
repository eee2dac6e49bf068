"""Suppression by design: which alarms an active alarm makes redundant, and why.

ANSI/ISA-18.2-2016 and IEC 62682 (designed suppression, from memory) suppress an alarm by
logic when another condition explains it: the operator sees the cause once, not a flood of
its consequences. A suppressed alarm's condition is still evaluated and recorded by the
:class:`~spanwatch.rules.alarms.AlarmEngine`; the lifecycle hides it while suppressed.

Rules are (while, suppress, reason): while an alarm matching the ``while`` pattern is active,
the alarms matching any ``suppress`` pattern are suppressed. Patterns are fnmatch patterns
(case-sensitive) matched against an alarm's "kind:object" and its "kind:object:level".
:func:`derived_rules` builds the rules that follow from the line itself:

1. a live source lost (``source_lost``, :mod:`spanwatch.rules.sourcehealth`) suppresses every
   plausibility alarm (:data:`PLAUSIBILITY_KINDS`) of that source's tags: one "source lost"
   alarm instead of one per tag;
2. a stale tag suppresses the other plausibility alarms of that tag (frozen, quality, range):
   one dropped tag raises one alarm, not both stale and frozen;
3. any plausibility alarm of a tag suppresses the physics alarms whose check reads that tag
   (a check's ``inputs`` are signal names; ``signal_tags`` says which tags each signal reads);
4. a drive fault of a roller (``drive_fault``, :mod:`spanwatch.rules.drivefault`) suppresses the
   alarms of every check that assumes that drive holds its speed or torque: the checks whose
   ``drives`` attribute (a tuple of roller ids, optional on a check) names the roller, i.e. its
   traction, no-drive and slip checks and the draw checks of the zones it bounds (ANSI/ISA-18.2-2016,
   designed suppression based on the state of other equipment; from memory).

Rules are tried in order (the derived ones first, then the configured ones); an alarm
suppressed by several active alarms is reported with the first rule's reason.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from fnmatch import fnmatchcase

from spanwatch.rules.alarms import AlarmPoint
from spanwatch.rules.base import Check
from spanwatch.rules.drivefault import DriveFaultCheck
from spanwatch.rules.plausibility import TagFrozenCheck, TagQualityCheck, TagRangeCheck, TagStaleCheck
from spanwatch.rules.sourcehealth import SourceLostCheck

PLAUSIBILITY_KINDS = (TagStaleCheck.kind, TagFrozenCheck.kind, TagQualityCheck.kind, TagRangeCheck.kind)
STALE_KIND = TagStaleCheck.kind
SOURCE_LOST_KIND = SourceLostCheck.kind
DRIVE_FAULT_KIND = DriveFaultCheck.kind


@dataclass(frozen=True)
class SuppressionRule:
    """While an alarm matching ``while_`` is active, the alarms matching ``suppress`` are suppressed."""

    while_: str
    suppress: tuple[str, ...]
    reason: str


def matches(pattern: str, point: AlarmPoint) -> bool:
    """True when ``pattern`` matches the point's "kind:object" or its "kind:object:level" (fnmatch, case-sensitive).

    >>> p = AlarmPoint("traction", "R1a", "alarm", 1.0, "high", 0.0, 0.0, 0.0, "high", "", "", "", "", 60.0)
    >>> matches("traction:R1*", p), matches("traction:*:warning", p), matches("slip:*", p)
    (True, False, False)
    """
    return fnmatchcase(f"{point.kind}:{point.object_id}", pattern) or fnmatchcase(point.key, pattern)


def derived_rules(checks: Iterable[Check], tag_sources: Mapping[str, str | None],
                  signal_tags: Mapping[str, tuple[str, ...]]) -> list[SuppressionRule]:
    """The suppression rules that follow from the line: source lost > tag plausibility > physics, then a
    drive fault over the checks that assume its drive (``drives``).

    ``tag_sources``: tag name -> its live source (None: a recording). ``signal_tags``: signal
    name -> the tags it is computed from (``tag/<name>`` reads tag ``name`` and needs no entry).
    Tag names hold no fnmatch wildcards (config tag names are letters, digits, ``_ . - / :``),
    so the derived patterns are exact "kind:object" names.
    """
    checks = list(checks)
    kinds_of: dict[str, list[str]] = {}
    for c in checks:
        if c.kind in PLAUSIBILITY_KINDS:
            kinds_of.setdefault(c.object_id, []).append(c.kind)
    out: list[SuppressionRule] = []
    for c in checks:
        if c.kind == SOURCE_LOST_KIND:
            tags = [t for t, s in tag_sources.items() if s == c.object_id and t in kinds_of]
            targets = tuple(f"{k}:{t}" for t in tags for k in kinds_of[t])
            if targets:
                out.append(SuppressionRule(f"{c.kind}:{c.object_id}", targets, f"source {c.object_id} lost"))
    for tag, kinds in kinds_of.items():
        if STALE_KIND in kinds:
            others = tuple(f"{k}:{tag}" for k in kinds if k != STALE_KIND)
            if others:
                out.append(SuppressionRule(f"{STALE_KIND}:{tag}", others, f"tag {tag} stale"))
    readers: dict[str, list[str]] = {}
    for c in checks:
        if c.kind in PLAUSIBILITY_KINDS or c.kind == SOURCE_LOST_KIND:
            continue
        for tag in dict.fromkeys(t for name in c.inputs for t in _tags_of(name, signal_tags)):
            readers.setdefault(tag, []).append(f"{c.kind}:{c.object_id}")
    for tag, kinds in kinds_of.items():
        if tag in readers:
            targets = tuple(readers[tag])
            for k in kinds:
                out.append(SuppressionRule(f"{k}:{tag}", targets, f"tag {tag} implausible ({k})"))
    for c in checks:
        if c.kind == DRIVE_FAULT_KIND:
            targets = tuple(f"{o.kind}:{o.object_id}" for o in checks
                            if o.kind != DRIVE_FAULT_KIND and c.object_id in getattr(o, "drives", ()))
            if targets:
                out.append(SuppressionRule(f"{c.kind}:{c.object_id}", targets, f"drive of {c.object_id} faulted"))
    return out


def _tags_of(signal: str, signal_tags: Mapping[str, tuple[str, ...]]) -> tuple[str, ...]:
    if signal.startswith("tag/"):
        return (signal[4:],)
    return signal_tags.get(signal, ())


class SuppressionRules:
    """Rules resolved against the line's alarm points: which active alarm suppresses which other."""

    def __init__(self, rules: Iterable[SuppressionRule], points: Iterable[AlarmPoint]) -> None:
        points = list(points)
        self.rules = list(rules)
        # an exact pattern (every derived one) is looked up, not matched against every point: a line of a thousand
        # alarm points has thousands of derived rules
        by_name: dict[str, list[int]] = {}
        by_key: dict[str, list[int]] = {}
        for i, p in enumerate(points):
            by_name.setdefault(f"{p.kind}:{p.object_id}", []).append(i)
            by_key.setdefault(p.key, []).append(i)

        def hits(pattern: str) -> set[int]:
            if any(ch in pattern for ch in "*?["):
                return {i for i, p in enumerate(points) if matches(pattern, p)}
            return {*by_name.get(pattern, ()), *by_key.get(pattern, ())}

        # suppressor key -> [(rule index, suppressed key, reason)], in rule order
        self._by_key: dict[str, list[tuple[int, str, str]]] = {}
        for i, r in enumerate(self.rules):
            whiles = [points[j].key for j in sorted(hits(r.while_))]
            targets = [points[j].key for j in sorted(set().union(*(hits(x) for x in r.suppress)))]
            for w in whiles:
                self._by_key.setdefault(w, []).extend((i, k, f"{r.reason} ({w} active)") for k in targets if k != w)

    def targets(self, key: str) -> list[str]:
        """The alarm keys an active ``key`` suppresses."""
        return [k for _, k, _ in self._by_key.get(key, [])]

    def suppressed(self, active_keys: set[str]) -> dict[str, str]:
        """Each alarm suppressed while ``active_keys`` are active -> the reason, naming the active alarm.

        An active alarm may itself be suppressed (a stale tag while its source is lost); its own
        targets stay suppressed. An alarm suppressed by several gets the reason of the earliest rule.
        """
        hits = sorted(e for k in active_keys for e in self._by_key.get(k, ()))
        out: dict[str, str] = {}
        for _, target, reason in hits:
            out.setdefault(target, reason)
        return out
