"""``spanwatch tune``: a check's limit (and on-delay) swept over a recording, and the setting to paste.

The check values are computed once (:func:`spanwatch.monitor.sweep.keep_results`); the alarm engine runs once
per setting over them (:func:`spanwatch.monitor.sweep.run_points`), with the chosen level's limit (and, when
given, the on-delay of both levels) replaced on every chosen alarm point. Per setting:

* **raises** of the chosen points and their **time in alarm** (a raise to its clear, or to the recording's end);
* with labelled events (:mod:`spanwatch.monitor.marks`): **detections** (a raise on the right object within
  ``[start, end + grace]``, scored by :func:`spanwatch.monitor.evalscore.score_fault`), their **delay** (first
  right raise minus the event's start), and the **false raises** (outside every event's window:
  :func:`spanwatch.monitor.evalscore.outside_windows`); without labels every raise counts as false;
* **standing** alarms: raised within an event's window but still active after it (its end plus the grace): they
  count as false raises too (an alarm that outlives its cause stands in normal running);
* the **false-alarm rate**: false raises per hour of the time outside the events' windows.

**The suggestion** for a target rate R (false raises per hour): among the settings whose observed rate is at
most R and whose warning stays on the near side of its alarm (:func:`spanwatch.monitor.checkset.limit_order_problem`),
the one that detects the most labelled events, then the most sensitive limit, then the shortest on-delay; then
``guard`` steps of the limit grid further from normal, as long as no detection is lost (a limit at the very edge
of what one recording showed is crossed by the next, a little noisier, hour; common practice, no source).
Its **margin to the nearest labelled event** is the event's peak (the most abnormal valid value on its objects
within its window) minus the limit: positive, found with that much to spare (subject to the on-delay);
negative, missed by that much.

A short recording cannot show a low rate: with k false raises in T hours the 95 % upper confidence bound of the
rate is chi2(0.95; 2k + 2) / (2 T) (the exact Poisson bound: Garwood (1936), Biometrika 28, 437-442); the
report says when that bound is above the target.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace

import numpy as np
from spanwatch.monitor.checkset import limit_order_problem
from spanwatch.monitor.checkstats import round_sig
from spanwatch.monitor.evalscore import Raise, covered_seconds, outside_windows, score_fault
from spanwatch.monitor.line import Line
from spanwatch.monitor.marks import Label
from spanwatch.monitor.sweep import Kept, run_points
from spanwatch.rules.alarms import severity
from spanwatch.rules.base import Reason

DEFAULT_GRACE = 60.0  # s after an event's end in which a raise still counts as its detection
DEFAULT_STEPS = 16  # limits in a sweep when none are given


@dataclass(frozen=True)
class EventPeak:
    """A labelled event as the chosen points saw it: its most abnormal valid value on its objects (NaN: none)."""

    label: Label
    objects: tuple[str, ...]  # the chosen objects the event concerns
    peak: float  # severity: larger is more abnormal (|v| for abs, -v for low)


@dataclass
class TuneSetting:
    """One setting of the sweep and what it gave."""

    limit: float
    on_delay: float
    raises: int
    time_in_alarm: float
    false_raises: int
    false_rate: float  # per hour outside the events' windows (NaN without such time)
    detected: int
    delays: list[float]  # s, per detected event
    order_ok: bool  # the warning stays on the near side of the alarm

    @property
    def mean_delay(self) -> float:
        return float(np.mean(self.delays)) if self.delays else math.nan


@dataclass
class TuneResult:
    kind: str
    object_id: str | None
    level: str
    unit: str
    direction: str
    configured: dict[str, float]  # object -> its configured limit of the level
    configured_on_delay: float
    settings: list[TuneSetting]
    events: list[EventPeak]
    seconds: float  # recording span with frames
    clean_seconds: float  # outside every event window
    target_per_hour: float
    grace: float
    suggestion: TuneSetting | None = None
    nearest: EventPeak | None = None
    normal_max: float = math.nan  # most abnormal valid value outside the events' windows (severity)
    normal_p999: float = math.nan
    notes: list[str] = field(default_factory=list)

    @property
    def relevant(self) -> list[EventPeak]:
        return [e for e in self.events if e.objects]


def sev_limit(limit: float, direction: str) -> float:
    """A limit on the severity scale (larger is more abnormal)."""
    return float(severity(np.array([limit]), direction)[0])


def from_sev(s: float, direction: str) -> float:
    return -s if direction == "low" else s


def upper_rate(k: int, hours: float, confidence: float = 0.95) -> float:
    """The exact Poisson upper confidence bound of a rate, per hour, from ``k`` events in ``hours`` (Garwood 1936).

    >>> round(upper_rate(0, 1.0), 3)  # "the rule of three": about 3 / T
    2.996
    """
    from scipy.stats import chi2

    if hours <= 0:
        return math.inf
    return float(chi2.ppf(confidence, 2 * k + 2)) / (2 * hours)


def _valid_severity(kept: Kept, key: tuple[str, str], direction: str) -> tuple[np.ndarray, np.ndarray]:
    """Times and severities of the valid frames of one kept check."""
    ts, vs = [], []
    for b in kept.blocks:
        r = b.results.get(key)
        if r is None:
            continue
        ok = r.reason == int(Reason.OK)
        ts.append(b.t[ok])
        vs.append(severity(r.value[ok], direction))
    if not ts:
        return np.empty(0), np.empty(0)
    return np.concatenate(ts), np.concatenate(vs)


def default_limits(kept: Kept, level: str, labels: Sequence[Label], grace: float, steps: int = DEFAULT_STEPS
                   ) -> list[float]:
    """A grid from the median of the values outside the events (below it the check alarms most of the time; for the
    alarm level, from the warning limit) to a little beyond their most abnormal value over the whole recording,
    with the configured limit; three
    significant digits. Falls back to 0.5 to 1.5 times the configured limit without valid frames."""
    pts = [p for p in kept.points if p.level == level]
    direction = pts[0].direction
    configured = sorted({p.limit for p in pts})
    normal, every = [], []
    for key in dict.fromkeys((p.kind, p.object_id) for p in pts):
        t, s = _valid_severity(kept, key, direction)
        every.append(s)
        inside = np.zeros(t.shape, bool)
        for lb in labels:
            inside |= (t >= lb.start) & (t <= lb.end + grace)
        normal.append(s[~inside])
    allv = np.concatenate(every) if every else np.empty(0)
    norm = np.concatenate(normal) if normal else np.empty(0)
    base = norm if norm.size else allv
    if not base.size:
        grid = [c * f for c in configured[:1] for f in np.linspace(0.5, 1.5, 11)]
    else:
        lo, hi = float(np.median(base)), float(allv.max())
        if direction == "abs":
            lo = max(lo, 0.0)
        warnings = [sev_limit(p.limit, direction) for p in kept.points if p.level == "warning"]
        if level == "alarm" and warnings:
            lo = max(lo, max(warnings))  # an alarm limit on the near side of its warning is refused by the config
        hi = hi + 0.05 * max(abs(hi), abs(hi - lo))
        if not hi > lo:
            hi = lo + max(abs(lo), 1e-3) * 0.5
        grid = [from_sev(x, direction) for x in np.linspace(lo, hi, steps)]
    return sorted({*(round_sig(x) for x in grid), *configured}, key=lambda x: sev_limit(x, direction))


def event_peaks(kept: Kept, labels: Sequence[Label], grace: float) -> list[EventPeak]:
    """Each event's most abnormal valid value (severity) on the chosen objects it concerns, within its window."""
    keys = list(dict.fromkeys((p.kind, p.object_id) for p in kept.points))
    direction = kept.points[0].direction
    names = {k: {k[1], *next(p.blames for p in kept.points if (p.kind, p.object_id) == k)} for k in keys}
    series = {k: _valid_severity(kept, k, direction) for k in keys}
    out = []
    for lb in labels:
        mine = [k for k in keys if not lb.objects or not names[k].isdisjoint(lb.objects)]
        peak = -math.inf
        for k in mine:
            t, s = series[k]
            w = s[(t >= lb.start) & (t <= lb.end + grace)]
            if w.size:
                peak = max(peak, float(w.max()))
        out.append(EventPeak(lb, tuple(k[1] for k in mine), peak if math.isfinite(peak) else math.nan))
    return out


def evaluate(kept: Kept, line: Line, level: str, limit: float, on_delay: float | None, labels: Sequence[Label],
             grace: float, span: tuple[float, float]) -> tuple[TuneSetting, list]:
    """One setting: the episodes of the chosen points with the level's limit (and both levels' on-delay) replaced,
    scored against the labels."""
    points = [replace(p, limit=float(limit) if p.level == level else p.limit,
                      on_delay=p.on_delay if on_delay is None else float(on_delay)) for p in kept.points]
    episodes, t_end = run_points(kept, line, points)
    mine = [e for e in episodes if e.point.level == level]
    end = t_end if t_end is not None else span[1]
    raises = [Raise(e.raised, e.point.kind, e.point.object_id, e.point.level, e.point.priority, e.point.blames)
              for e in mine]
    objs = tuple(dict.fromkeys(p.object_id for p in kept.points))
    windows = [lb.window(objs) for lb in labels]
    false = outside_windows(raises, windows, grace)
    wins = [w.window(grace) for w in windows]
    standing = [e for e in mine if any(lo <= e.raised <= hi for lo, hi in wins)
                and (e.cleared is None or e.cleared > max(hi for lo, hi in wins if lo <= e.raised <= hi))
                and (e.cleared is not None or end > max(hi for lo, hi in wins if lo <= e.raised <= hi))]
    clean = (span[1] - span[0]) - covered_seconds(windows, grace, span[0], span[1])
    delays = []
    for w in windows:
        if set(w.blame).isdisjoint({n for p in kept.points for n in (p.object_id, *p.blames)}):
            continue  # an event on other objects: neither found nor missed by this check
        sc = score_fault(w, raises, grace)
        if sc.right and sc.delay is not None:
            delays.append(sc.delay)
    other = {p.object_id: p.limit for p in points if p.level != level}
    order_ok = all(limit_order_problem(p.direction, *((p.limit, other[p.object_id]) if level == "warning"
                                                      else (other[p.object_id], p.limit))) is None
                   for p in points if p.level == level and p.object_id in other)
    setting = TuneSetting(limit=float(limit), on_delay=float(points[0].on_delay if on_delay is None else on_delay),
                          raises=len(mine), time_in_alarm=float(sum(e.duration(end) for e in mine)),
                          false_raises=len(false) + len(standing),
                          false_rate=(len(false) + len(standing)) * 3600.0 / clean if clean > 0 else math.nan,
                          detected=len(delays), delays=delays, order_ok=order_ok)
    return setting, mine


def tune(kept: Kept, line: Line, *, level: str, limits: Sequence[float] | None, on_delays: Sequence[float] | None,
         labels: Sequence[Label], target_per_hour: float, grace: float = DEFAULT_GRACE, guard: int = 1) -> TuneResult:
    """The sweep over ``limits`` x ``on_delays`` and the suggestion for ``target_per_hour`` (module docstring)."""
    pts = [p for p in kept.points if p.level == level]
    if not pts:
        have = ", ".join(sorted({p.level for p in kept.points}))
        raise ValueError(f"--level: expected a level this check has ({have}), got {level!r}")
    first = next((b.t[0] for b in kept.blocks if b.t.size), None)
    last = next((b.t[-1] for b in reversed(kept.blocks) if b.t.size), None)
    if first is None or last is None:
        raise ValueError("the recording gave no frame to evaluate")
    span = (float(first), float(last))
    direction = pts[0].direction
    grid = list(limits) if limits else default_limits(kept, level, labels, grace)
    grid.sort(key=lambda x: sev_limit(x, direction))
    delays: list[float | None] = list(on_delays) if on_delays else [None]
    settings = [evaluate(kept, line, level, x, d, labels, grace, span)[0] for d in delays for x in grid]
    events = event_peaks(kept, labels, grace)
    objs = tuple(dict.fromkeys(p.object_id for p in kept.points))
    windows = [lb.window(objs) for lb in labels]
    res = TuneResult(kind=pts[0].kind, object_id=pts[0].object_id if len({p.object_id for p in pts}) == 1 else None,
                     level=level, unit=pts[0].unit, direction=direction,
                     configured={p.object_id: p.limit for p in pts}, configured_on_delay=pts[0].on_delay,
                     settings=settings, events=events, seconds=span[1] - span[0],
                     clean_seconds=(span[1] - span[0]) - covered_seconds(windows, grace, *span),
                     target_per_hour=target_per_hour, grace=grace)
    normal = []
    for key in dict.fromkeys((p.kind, p.object_id) for p in pts):
        t, s = _valid_severity(kept, key, direction)
        inside = np.zeros(t.shape, bool)
        for lb in labels:
            inside |= (t >= lb.start) & (t <= lb.end + grace)
        normal.append(s[~inside])
    nv = np.concatenate(normal) if normal else np.empty(0)
    if nv.size:
        res.normal_max, res.normal_p999 = float(nv.max()), float(np.percentile(nv, 99.9))
    res.suggestion = suggest(res, grid, guard)
    if not any(s.raises for s in settings):
        res.notes.append("no setting of the sweep raised an alarm: the recording does not reach these limits, so it "
                         "says nothing about them; sweep nearer normal (--limits) or use a recording that does")
    if res.suggestion is not None:
        lim = sev_limit(res.suggestion.limit, direction)
        near = [e for e in res.relevant if math.isfinite(e.peak)]
        res.nearest = min(near, key=lambda e: abs(e.peak - lim)) if near else None
        hours = res.clean_seconds / 3600.0
        bound = upper_rate(res.suggestion.false_raises, hours)
        if bound > target_per_hour:
            res.notes.append(
                f"{_hours(hours)} outside labelled events cannot show a rate as low as the target: "
                f"{res.suggestion.false_raises} false raise(s) there allow up to {bound:.3g} per hour "
                f"(95 % upper bound); record longer, or check the setting on another recording")
    return res


def suggest(res: TuneResult, grid: Sequence[float], guard: int) -> TuneSetting | None:
    """The setting the module docstring describes, or None when no setting meets the target."""
    ok = [s for s in res.settings if s.order_ok and s.false_rate <= res.target_per_hour + 1e-12]
    if not ok:
        return None
    rank = {x: i for i, x in enumerate(grid)}
    best = min(ok, key=lambda s: (-s.detected, rank[s.limit], s.on_delay))
    same_delay = {s.limit: s for s in res.settings if s.on_delay == best.on_delay}
    i = rank[best.limit]
    for j in range(i + 1, min(i + guard, len(grid) - 1) + 1):
        s = same_delay.get(grid[j])
        if s is None or not s.order_ok or s.detected < best.detected or s.false_rate > res.target_per_hour:
            break
        best = s
    return best


# --- how it reads ----------------------------------------------------------------------------------------------


def _hours(h: float) -> str:
    return f"{h * 60:.1f} min" if h < 1 else f"{h:.2f} h"


def config_value(limit: float, unit: str) -> str:
    """A limit as the config file takes it: ``"5 %"`` for a share in a % unit, a plain number otherwise."""
    if unit.startswith("%"):
        return f'"{round_sig(limit * 100, 6):g} %"'
    return f"{limit:.6g}"


def paste_lines(res: TuneResult, s: TuneSetting, overrides: Sequence[str] = ()) -> list[str]:
    """The TOML lines that set ``s`` in a line file; ``overrides``: objects with their own limit of the level in
    the config, which a ``[checks.KIND]`` line does not change."""
    table = f"[checks.{res.kind}.overrides.{res.object_id}]" if res.object_id else f"[checks.{res.kind}]"
    out = [table, f"{res.level} = {config_value(s.limit, res.unit)}"]
    if s.on_delay != res.configured_on_delay:
        out.append(f'on_delay = "{s.on_delay:g} s"')
    if not res.object_id and overrides:
        out.append(f"# overrides.{', overrides.'.join(overrides)} set their own {res.level}: remove them to "
                   "apply this")
    return out


def render(res: TuneResult, fmt_time: Callable[[float], str], overrides: Sequence[str] = ()) -> list[str]:
    """The sweep as lines of at most 80 characters; ``fmt_time`` shows an epoch time on the plant's clock."""
    from spanwatch.monitor.checkstats import clock, display_scale, num

    scale, unit = display_scale(res.unit)
    who = res.object_id or "every object"
    conf = ", ".join(f"{o} {v * scale:g}" for o, v in res.configured.items())
    lines = [f"tune {res.kind} {res.level} on {who}: values in {unit}",
             f"  configured: {conf}; on-delay {res.configured_on_delay:g} s",
             f"  recording {clock(res.seconds)}, {clock(res.clean_seconds)} outside labelled events "
             f"(grace {res.grace:g} s); target {res.target_per_hour:.3g} false raises per hour"]
    rel = res.relevant
    if res.events:
        lines.append("  labelled events:")
        for e in res.events:
            where = ", ".join(e.objects) if e.objects else "not on these objects"
            peak = f"peak {num(e.peak * scale, 7).strip()}" if math.isfinite(e.peak) else "no valid value"
            text = f"    {fmt_time(e.label.start)} {clock(e.label.end - e.label.start)} {e.label.label}"
            lines.append(f"{text[:58]:<58} {peak}")
            lines.append(f"      ({e.label.origin}; {where})"[:80])
    else:
        lines.append("  no labelled events (no truth file, no marks): every raise counts as false")
    head = "    limit  delay raises false  per h in alarm"
    if rel:
        head += f"  found/{len(rel)} mean delay"
    lines += ["", head]
    for s in res.settings:
        mark = "*" if res.suggestion is s else ("!" if not s.order_ok else " ")
        row = (f"{mark}{num(s.limit * scale, 8)} {s.on_delay:5.3g}s {s.raises:6d} {s.false_raises:5d} "
               f"{num(s.false_rate, 6)} {clock(s.time_in_alarm):>8}")
        if rel:
            row += f" {s.detected:7d} {s.mean_delay:9.1f} s" if s.delays else f" {s.detected:7d}         -"
        lines.append(row)
    lines.append("  * suggested   ! warning beyond its alarm (the config would refuse it)")
    lines.append("")
    s = res.suggestion
    if s is None:
        lines.append(f"no setting in the sweep meets {res.target_per_hour:.3g} false raises per hour: sweep "
                     "further from normal (--limits)")
        return wrap80(lines)
    lines.append(f"suggested: {res.level} {num(s.limit * scale, 8).strip()} {unit}, on-delay {s.on_delay:g} s: "
                 f"{s.false_raises} false raise(s), {num(s.false_rate, 6).strip()} per hour")
    lim = sev_limit(s.limit, res.direction)
    if math.isfinite(res.normal_max):
        room = (lim - res.normal_max) * scale
        lines.append(f"  outside the events the most abnormal value is {num(res.normal_max * scale, 7).strip()} "
                     f"(p99.9 {num(res.normal_p999 * scale, 7).strip()}): {num(abs(room), 7).strip()} "
                     + ("below the limit" if room >= 0 else "beyond the limit (on-delay and deadband hold it)"))
    if res.nearest is not None:
        e = res.nearest
        m = (e.peak - lim) * scale
        how = "found with" if m >= 0 else "missed by"
        lines.append(f"  nearest labelled event: {e.label.label} at {fmt_time(e.label.start)}, peak "
                     f"{num(e.peak * scale, 7).strip()}: {how} {num(abs(m), 7).strip()} {unit}")
    if rel:
        lines.append(f"  finds {s.detected} of {len(rel)} labelled event(s)"
                     + (f", mean delay {s.mean_delay:.1f} s" if s.delays else ""))
    for n in res.notes:
        lines.append(f"  note: {n}")
    lines += ["", "paste into the line file:", *(f"  {x}" for x in paste_lines(res, s, overrides))]
    return wrap80(lines)


def wrap80(lines: Sequence[str]) -> list[str]:
    """Lines longer than 80 characters wrapped at spaces, continued 4 columns further in."""
    import textwrap

    out = []
    for line in lines:
        if len(line) <= 80:
            out.append(line)
            continue
        indent = " " * (len(line) - len(line.lstrip()))
        out += textwrap.wrap(line, 80, subsequent_indent=indent + "    ", break_long_words=False,
                             break_on_hyphens=False)
    return out
