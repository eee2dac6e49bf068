"""Alarm-system KPIs of a history window: loading the episodes, a plain-text summary beside the benchmarks, and a
JSON-ready form (what ``spanwatch kpi`` prints).

The metrics and their sources are in :mod:`spanwatch.rules.kpi`.
"""

from __future__ import annotations

import dataclasses
from datetime import UTC, datetime
from typing import TYPE_CHECKING, Any

from spanwatch.connectors.history.queries import episodes_in_window, hidden_raises
from spanwatch.rules import kpi as K
from spanwatch.rules.kpi import AlarmKpis, Episodes
from spanwatch.rules.values import iso
from sqlalchemy.engine import Engine

if TYPE_CHECKING:
    from spanwatch.monitor.shifts import PlantClock


def load_episodes(engine: Engine, start: float, end: float, line_name: str | None = None) -> Episodes:
    """The episodes of the history ``engine`` active during ``[start, end)`` (epoch s), of one line if given."""
    rows = episodes_in_window(engine, start, end, line_name)
    hidden = hidden_raises(engine, [int(r["id"]) for r in rows])
    return Episodes.of([r["alarm_key"] for r in rows], [r["kind"] for r in rows], [r["object_id"] for r in rows],
                       [r["priority"] for r in rows], [r["raised_t"] for r in rows], [r["cleared_t"] for r in rows],
                       [int(r["id"]) in hidden for r in rows])


def _when(t: float, clock: PlantClock | None = None) -> str:
    """Epoch s -> ``2026-03-02 06:05:00Z`` (UTC), or ``2026-03-02 07:05:00`` in the plant's time with a clock."""
    if clock is not None:
        return clock.fmt(t, seconds=True)
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%d %H:%M:%SZ")


def _pct(x: float) -> str:
    return f"{100 * x:.1f} %"


def _hours(s: float) -> str:
    return f"{s / 3600:.1f} h" if s < 2 * K.DAY_S else f"{s / K.DAY_S:.1f} d"


def kpi_text(k: AlarmKpis, width: int = 80, clock: PlantClock | None = None) -> str:
    """A compact plain-text summary of ``k``, no line longer than ``width`` (at least 60), with the benchmark of
    each metric beside it (ISA-18.2-2016 / IEC 62682 / EEMUA 191; see :mod:`spanwatch.rules.kpi`); times in the
    plant's time with ``clock``, else in UTC."""
    width = max(60, width)
    th = k.thresholds
    ops = f"{k.operators} operator position" + ("s" if k.operators != 1 else "")
    out = [f"Alarm KPIs {_when(k.start, clock)} to {_when(k.end, clock)} ({_hours(k.end - k.start)})",
           f"{ops}; annunciated raises {k.raises}",
           f"not counted: {k.advisory_raises} advisory, {k.hidden_raises} raised while shelved, suppressed or "
           "out of service",
           f"{'':30}{'measured':>12}{'acceptable':>12}{'manageable':>12}"]

    def row(name: str, value: str, good: str = "", ok: str = "") -> None:
        out.append(f"{name:30}{value:>12}{good:>12}{ok:>12}")

    row("alarms per 10 min, average", f"{k.avg_per_10min:.2f}", f"~{K.PER_10MIN_ACCEPTABLE:g}",
        f"~{K.PER_10MIN_MANAGEABLE:g}")
    row("alarms per 10 min, maximum", f"{k.max_per_10min:g}")
    row("10-min slots over 1", _pct(k.share_slots_over_1))
    row("10-min slots over 2", _pct(k.share_slots_over_2))
    row("alarms per hour, average", f"{k.avg_per_hour:.1f}", f"~{K.PER_HOUR_ACCEPTABLE:g}",
        f"~{K.PER_HOUR_MANAGEABLE:g}")
    row("alarms per hour, maximum", f"{k.max_per_hour:g}")
    row("alarms per day, average", f"{k.avg_per_day:.1f}", f"~{K.PER_DAY_ACCEPTABLE:g}", f"~{K.PER_DAY_MANAGEABLE:g}")
    mins = th.flood_window / 60
    out.append(f"Floods (>{th.flood_start:g} in {mins:g} min, until <{th.flood_end:g}): {len(k.floods)}, "
               f"{_pct(k.flood_time_share)} of the time (target < ~{_pct(K.FLOOD_TIME_SHARE_MAX)})")
    if k.largest_flood is not None:
        f = k.largest_flood
        out.append(f"  largest: {_when(f.start, clock)} to {_when(f.end, clock)[11:]}, {f.alarms} alarms"
                   + (" (still at the end)" if f.ongoing else ""))
    out.append(f"Top {th.top_n} alarms: {_pct(k.top_share)} of the raises (target <= ~{_pct(K.TOP10_SHARE_MAX)})")
    key_w = width - 20
    for c in k.top:
        out.append(f"  {c.count:>7} {_pct(c.share):>8}  {_fit(c.key, key_w)}")
    out.append(f"Chattering (>={th.chatter_count} in {th.chatter_window:g} s): {len(k.chattering_keys)} alarms, "
               f"{k.chattering_raises} raises (target 0)")
    for key in k.chattering_keys[:5]:
        out.append(f"  {_fit(key, width - 2)}")
    out.append(f"Fleeting (< {th.fleeting_s:g} s): {k.fleeting} (target 0)")
    out.append(f"Stale (active >= {_hours(th.stale_s)}): {len(k.stale)} (target < {K.STALE_MAX_PER_DAY} on any day)")
    for s in k.stale[:5]:
        out.append(f"  {_hours(s.age_s):>7}  since {_when(s.raised_t, clock)}  {_fit(s.key, width - 37)}")
    names = [p.priority for p in k.priorities]
    out.append(f"{'Priority':14}" + "".join(f"{n:>10}" for n in names))
    out.append(f"{'  measured':14}" + "".join(f"{_pct(p.share):>10}" for p in k.priorities))
    out.append(f"{'  recommended':14}" + "".join(
        f"{'':>10}" if p.recommended is None else
        f"{('<~' if p.priority == 'urgent' else '~') + f'{100 * p.recommended:g} %':>10}" for p in k.priorities))
    return "\n".join(_fit(line.rstrip(), width) for line in out)


def _fit(text: str, width: int) -> str:
    """``text`` cut to ``width`` characters, a cut marked by a final ``~``."""
    return text if len(text) <= width else text[: width - 1] + "~"


def kpi_dict(k: AlarmKpis) -> dict[str, Any]:
    """``k`` as plain JSON-ready values, with the window's times also in ISO 8601 and the benchmarks beside."""
    d = dataclasses.asdict(k)
    d["start_iso"], d["end_iso"] = iso(k.start), iso(k.end)
    d["benchmarks"] = {
        "per_10min": [K.PER_10MIN_ACCEPTABLE, K.PER_10MIN_MANAGEABLE],
        "per_hour": [K.PER_HOUR_ACCEPTABLE, K.PER_HOUR_MANAGEABLE],
        "per_day": [K.PER_DAY_ACCEPTABLE, K.PER_DAY_MANAGEABLE],
        "flood_time_share_max": K.FLOOD_TIME_SHARE_MAX, "top10_share_max": K.TOP10_SHARE_MAX,
        "stale_max_per_day": K.STALE_MAX_PER_DAY, "priority_share_3": dict(K.PRIORITY_SHARE_3),
        "priority_share_highest_max": K.PRIORITY_SHARE_HIGHEST_MAX,
    }
    return d
