"""A shift report's content: what the history says about one line over one window, gathered once and shown twice
(the terminal summary here, the HTML page in :mod:`spanwatch.monitor.reporthtml`).

The alarm-system metrics are :func:`spanwatch.rules.kpi.alarm_kpis` (ISA-18.2-2016 clause 16 / IEC 62682 / EEMUA 191
benchmarks; see that module). This module adds what a shift hand-over needs beside them, as pure functions over
the episodes and the lifecycle journal:

* **time in alarm per check**: the length of the union of the check's episodes (every object and level) clipped to
  the window, so two objects in alarm at once count once (the time the operator had that check's alarm to face);
* **shelved and out-of-service periods**: each shelve or removal from service paired with what ended it
  (unshelve, the shelf time running out, a one-shot shelve's clear, return to service), with who and why.
"""

from __future__ import annotations

import math
import textwrap
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from spanwatch.monitor.shifts import PlantClock
from spanwatch.rules.kpi import AlarmKpis, Episodes, alarm_kpis

SAFETY_TEXT = ("spanwatch is advisory: it is not a safety function. It does not replace guarding, safety-rated "
               "controls or lock-out. Defer to local codes and qualified practice.")
NO_TRENDS = "no check values stored for this window"
HIDE_START = {"shelve": "shelved", "out_of_service": "out of service"}
HIDE_END = {"shelve": ("unshelve", "shelve_expired"), "out_of_service": ("return_to_service",)}


@dataclass
class ShiftReport:
    """Everything one report shows (times epoch s; shown through ``clock``)."""

    plant: str
    line: str
    label: str  # "early 2026-03-02" or "2026-03-02 06:00 to 2026-03-02 14:00"
    start: float
    end: float
    clock: PlantClock
    config_source: str
    runs: list[dict[str, Any]]
    episodes: list[dict[str, Any]]  # every episode active in the window, oldest raise first; one its run left open
    # ends at the end of that run's data ("open_at_run_end")
    kpis: AlarmKpis
    in_alarm: list[dict[str, Any]]  # per check: seconds, share, episodes
    hidden: list[dict[str, Any]]  # shelved / out-of-service periods
    details: list[dict[str, Any]] = field(default_factory=list)  # episodes shown in full (episode_detail + context)
    more_episodes: int = 0
    trends: list[dict[str, Any]] = field(default_factory=list)  # query_check_minutes rows
    limits: dict[tuple[str, str], list[dict[str, Any]]] = field(default_factory=dict)  # (check, object) -> points


# --- pure functions ---------------------------------------------------------------------------------------------


def union_length(starts: np.ndarray, ends: np.ndarray) -> float:
    """Total length of the union of intervals ``[starts[i], ends[i])`` (seconds).

    >>> union_length(np.array([0.0, 5.0, 20.0]), np.array([10.0, 12.0, 25.0]))
    17.0
    """
    if not len(starts):
        return 0.0
    order = np.argsort(starts, kind="stable")
    a, b = np.asarray(starts, float)[order], np.asarray(ends, float)[order]
    reach = np.maximum.accumulate(b)
    # a new block starts where an interval begins after everything before it has ended
    new = np.empty(len(a), dtype=bool)
    new[0] = True
    new[1:] = a[1:] > reach[:-1]
    idx = np.flatnonzero(new)
    block_end = np.append(reach[idx[1:] - 1], reach[-1])
    return float(np.sum(np.maximum(block_end - a[idx], 0.0)))


def time_in_alarm(episodes: Sequence[dict[str, Any]], start: float, end: float) -> list[dict[str, Any]]:
    """Per check kind: the time at least one of its alarms was active within ``[start, end)`` (the union of its
    episodes clipped to the window; an episode still active runs to ``end``), its share of the window and its
    number of episodes; most time first.

    >>> rows = time_in_alarm([{"check": "slip", "raised_t": 0.0, "cleared_t": 60.0},
    ...                       {"check": "slip", "raised_t": 30.0, "cleared_t": None}], 0.0, 100.0)
    >>> rows[0]["seconds"], rows[0]["episodes"]
    (100.0, 2)
    """
    by: dict[str, list[tuple[float, float]]] = {}
    for e in episodes:
        a = max(float(e["raised_t"]), start)
        b = min(end if e.get("cleared_t") is None else float(e["cleared_t"]), end)
        by.setdefault(str(e["check"]), []).append((a, max(a, b)))
    out = []
    for check, spans in by.items():
        arr = np.asarray(spans, dtype=float)
        secs = union_length(arr[:, 0], arr[:, 1])
        out.append({"check": check, "seconds": secs, "share": secs / (end - start), "episodes": len(spans)})
    return sorted(out, key=lambda r: (-r["seconds"], r["check"]))


def hidden_periods(actions: Sequence[dict[str, Any]], start: float, end: float,
                   cleared: Callable[[str, float], float | None] | None = None) -> list[dict[str, Any]]:
    """Shelved and out-of-service periods that meet ``[start, end)``, from the lifecycle journal (``actions``:
    :func:`spanwatch.connectors.history.actions_of` rows, oldest first, from before ``start`` as well).

    A shelve ends at the first unshelve or shelve expiry of its key after it, else at its ``until`` (a timed
    shelve), else - a one-shot shelve - when ``cleared(key, t)`` says its alarm cleared; out of service ends at the
    return to service. ``to`` is None while it had not ended by ``end``. Each period: ``key``, ``what``
    ("shelved" or "out of service"), ``user``, ``comment``, ``from``, ``to``, ``ended_by`` (the user and action
    that ended it, or "expired" / "alarm cleared" / None).
    """
    out: list[dict[str, Any]] = []
    for i, a in enumerate(actions):
        kind = a["action"]
        if kind not in HIDE_START:
            continue
        t0 = float(a["t"])
        stop, ended_by = None, None
        for b in actions[i + 1:]:
            if b["key"] == a["key"] and (b["action"] in HIDE_END[kind] or b["action"] == kind):
                stop = float(b["t"])
                ended_by = ("expired" if b["action"] == "shelve_expired" else
                            f"{b['action'].replace('_', ' ')}" + (f" by {b['user']}" if b["user"] else ""))
                break
        until = a.get("until")
        if kind == "shelve" and until is not None and math.isfinite(until) and (stop is None or until < stop):
            stop, ended_by = float(until), "expired"
        if kind == "shelve" and a.get("one_shot") and cleared is not None:
            c = cleared(str(a["key"]), t0)
            if c is not None and (stop is None or c < stop):
                stop, ended_by = c, "alarm cleared"
        if t0 >= end or (stop is not None and stop < start):
            continue
        if stop is not None and stop >= end:
            stop, ended_by = None, None
        out.append({"key": a["key"], "what": HIDE_START[kind], "user": a["user"], "comment": a["comment"],
                    "from": t0, "to": stop, "ended_by": ended_by, "episode": a.get("episode"),
                    "one_shot": bool(a.get("one_shot")), "until": until})
    return out


def episodes_kpi_input(episodes: Sequence[dict[str, Any]], hidden_ids: set[int]) -> Episodes:
    """The episodes as :class:`spanwatch.rules.kpi.Episodes` (``hidden``: raised while shelved, suppressed or out
    of service)."""
    return Episodes.of([e["key"] for e in episodes], [e["check"] for e in episodes], [e["object"] for e in episodes],
                       [e["priority"] for e in episodes], [e["raised_t"] for e in episodes],
                       [e["cleared_t"] for e in episodes], [int(e["id"]) in hidden_ids for e in episodes])


def limits_by_object(points: Sequence[dict[str, Any]]) -> dict[tuple[str, str], list[dict[str, Any]]]:
    """Alarm points (as dicts: kind, object_id, level, limit, direction, unit) grouped by (check, object)."""
    out: dict[tuple[str, str], list[dict[str, Any]]] = {}
    for p in points:
        out.setdefault((str(p["kind"]), str(p["object_id"])), []).append(
            {"level": p.get("level", ""), "limit": p.get("limit"), "direction": p.get("direction", "high"),
             "unit": p.get("unit", "")})
    return out


def fmt_duration(s: float) -> str:
    """``3725`` -> ``1 h 02 min``; ``75`` -> ``1 min 15 s``; ``4.2`` -> ``4.2 s``.

    >>> fmt_duration(3725.0), fmt_duration(75.0), fmt_duration(4.2)
    ('1 h 02 min', '1 min 15 s', '4.2 s')
    """
    if s < 60:
        return f"{s:.1f} s"
    if s < 3600:
        return f"{int(s // 60)} min {int(s % 60):02d} s"
    return f"{int(s // 3600)} h {int(s % 3600 // 60):02d} min"


def shown_value(value: float | None, unit: str) -> str:
    """A check value for people (``%`` units scaled by 100, as :func:`spanwatch.monitor.present.fmt_value`)."""
    from spanwatch.monitor.present import fmt_value

    return fmt_value(value, unit or "")


# --- gathering --------------------------------------------------------------------------------------------------


def check_minutes(engine: Any, start: float, end: float, line: str | None) -> list[dict[str, Any]]:
    """Per-minute check values of the window from the history, or [] where none were stored; ``line`` None: of
    every line, each object prefixed with its line."""
    from spanwatch.connectors.history.trends import query_check_minutes
    from sqlalchemy.exc import SQLAlchemyError

    try:
        rows = list(query_check_minutes(engine, start=start, end=end, line=line))
    except SQLAlchemyError:  # a history from before the trend table: the report goes on without trends
        return []
    if line is None:
        rows = [dict(r, object=f"{r['line']}/{r['object']}") for r in rows]
    return rows


def gather(engine: Any, *, line: str | None, plant: str, start: float, end: float, label: str, clock: PlantClock,
           points: Sequence[dict[str, Any]], config_source: str, operators: int = 1,
           max_episodes: int = 30, title: str | None = None) -> ShiftReport:
    """Read the history ``engine`` for line ``line`` over ``[start, end)`` and build the report.

    ``line`` None: every line of the history (a plant report, headed ``title``): each alarm's key and object are
    then prefixed with its line (``Q2 film rewinder/traction:pull_1:alarm``), so the same check on the same
    roller id of two lines is counted, ranked and drawn apart."""
    from spanwatch.connectors.history.queries import actions_of, episode_detail, episodes_in_window, hidden_raises
    from spanwatch.connectors.history.reportreads import context_series, episode_lines, runs_in_window

    rows = episodes_in_window(engine, start, end, line)
    more = episode_lines(engine, [int(r["id"]) for r in rows])
    episodes = [{"id": int(r["id"]), "key": r["alarm_key"], "check": r["kind"], "object": r["object_id"],
                 "object_id": r["object_id"],
                 "level": r["level"], "priority": r["priority"], "raised_t": r["raised_t"],
                 "cleared_t": r["cleared_t"], **more.get(int(r["id"]), {})} for r in rows]
    if line is None:
        for e in episodes:
            e["key"], e["object"] = f"{e.get('line')}/{e['key']}", f"{e.get('line')}/{e['object']}"
    hidden_ids = hidden_raises(engine, [e["id"] for e in episodes])
    for e in episodes:
        e["hidden"] = e["id"] in hidden_ids
        # an episode its run left open is known active only up to the end of that run's data, not beyond
        e["open_at_run_end"] = e["cleared_t"] is None and e.get("run_to") is not None
    known = [dict(e, cleared_t=e["run_to"]) if e["open_at_run_end"] else e for e in episodes]
    known = [e for e in known if e["cleared_t"] is None or e["cleared_t"] > start]
    kpis = alarm_kpis(episodes_kpi_input(known, hidden_ids), start, end, operators=operators)

    actions = actions_of(engine, line_name=line, since=start - 7 * 86400.0, until=end)

    def cleared(key: str, t: float) -> float | None:
        ts = [e["cleared_t"] for e in episodes if e["key"] == key and e["cleared_t"] is not None
              and e["cleared_t"] > t]
        return min(ts) if ts else None

    raised_here = [e for e in episodes if e["raised_t"] >= start]
    # the annunciated first, then the advisory, up to the cap; shown in the order they were raised
    ranked = sorted(raised_here, key=lambda e: (e["priority"] == "advisory", e["raised_t"], e["id"]))
    shown = sorted(ranked[:max_episodes], key=lambda e: (e["raised_t"], e["id"]))
    contexts = context_series(engine, [e["id"] for e in shown])
    limits = limits_by_object(points)
    details = []
    for e in shown:
        d = episode_detail(engine, e["id"]) or {}
        d["series"] = contexts.get(e["id"], [])
        d["hidden"] = e["hidden"]
        d["direction"] = next((p["direction"] for p in limits.get((e["check"], e["object_id"]), [])
                               if p["level"] == e["level"]), None)
        details.append(d)
    return ShiftReport(plant=plant, line=title or line or "all lines", label=label, start=start, end=end, clock=clock,
                       config_source=config_source, runs=runs_in_window(engine, start, end, line),
                       episodes=known, kpis=kpis, in_alarm=time_in_alarm(known, start, end),
                       hidden=hidden_periods(actions, start, end, cleared), details=details,
                       more_episodes=len(raised_here) - len(shown), trends=check_minutes(engine, start, end, line),
                       limits=limits)


# --- the terminal summary ---------------------------------------------------------------------------------------


def summary_text(r: ShiftReport, width: int = 80) -> str:
    """The report in a few lines for a terminal, none longer than ``width`` (at least 60)."""
    from spanwatch.rules import kpi as K

    width = max(60, width)
    k = r.kpis
    c = r.clock
    out: list[str] = []

    def wrap(text: str, indent: str = "", first: str | None = None) -> None:
        head = indent if first is None else first
        out.extend(textwrap.wrap(text, width, initial_indent=head, subsequent_indent=indent,
                                 break_on_hyphens=False) or [head.rstrip()])

    wrap(f"Shift report: {r.plant}, " + (r.line if r.line.startswith("all lines") else f"line {r.line}"))
    wrap(f"{r.label}: {c.fmt(r.start)} to {c.fmt(r.end)} ({c.tz.key}, {fmt_duration(r.end - r.start)})")
    runs = ", ".join(f"{x['id']} ({x['mode']})" for x in r.runs) or "none: no data in this window"
    wrap(f"runs: {runs}")
    wrap(f"config: {r.config_source}")
    wrap(SAFETY_TEXT)
    out.append("")
    wrap(f"Alarms raised: {k.raises} annunciated, {k.advisory_raises} advisory, {k.hidden_raises} while shelved, "
         f"suppressed or out of service; {len(r.episodes)} episodes active in the window")
    wrap(f"per 10 min (per operator): average {k.avg_per_10min:.2f}, maximum {k.max_per_10min:g}; benchmark "
         f"~{K.PER_10MIN_ACCEPTABLE:g} acceptable, ~{K.PER_10MIN_MANAGEABLE:g} manageable (ISA-18.2, EEMUA 191)")
    wrap(f"10-min slots over the acceptable rate: {100 * k.share_slots_over_1:.0f} %; floods: {len(k.floods)} "
         f"({100 * k.flood_time_share:.1f} % of the time)")
    if k.top:
        out.append(f"Top contributors ({100 * k.top_share:.0f} % of the raises):")
        for t in k.top[:5]:
            out.append(f"  {t.count:>5} {100 * t.share:5.1f} %  {_fit(t.key, width - 17)}")
    wrap(f"Chattering: {', '.join(k.chattering_keys) or 'none'}", "  ", "")
    wrap(f"Fleeting (< {k.thresholds.fleeting_s:g} s): {k.fleeting}" + (
        f" ({', '.join(k.fleeting_keys)})" if k.fleeting_keys else ""), "  ", "")
    wrap(f"Standing (active {fmt_duration(k.thresholds.stale_s)} or more): "
         + (", ".join(s.key for s in k.stale) or "none"), "  ", "")
    if r.in_alarm:
        out.append("Time in alarm per check:")
        for row in r.in_alarm:
            out.append(f"  {_fit(row['check'], 24):24} {fmt_duration(row['seconds']):>12} "
                       f"{100 * row['share']:6.1f} %  {row['episodes']:>5} episodes")
    if r.hidden:
        out.append("Shelved and out of service:")
        for h in r.hidden:
            until = c.fmt(h["to"], date_too=False) if h["to"] is not None else "end of window"
            since = c.fmt(h["from"], date_too=h["from"] < r.start)
            wrap(f"{h['key']} {h['what']} {since}-{until} by {h['user'] or '?'}: "
                 f"{h['comment'] or '(no reason given)'}", "    ", "  ")
    else:
        out.append("Shelved and out of service: none")
    return "\n".join(out)


def _fit(text: str, n: int) -> str:
    return text if len(text) <= n else text[: n - 1] + "~"
