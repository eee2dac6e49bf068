"""How the alarm list reads (``spanwatch alarms``, ``spanwatch runs``): short values with their unit, durations,
columns that fit a terminal, sorting, per-check and per-object summaries, export rows whose numbers agree with their
unit, and the summary of the signals kept around a raise.

**Units in exports.** A check value is kept in the history as the check computes it (SI; a share as a fraction:
an idler lag of 0.8 % is 0.008). CSV and JSON give ``value``, ``peak`` and ``limit`` in the unit their ``unit``
column names: a unit that starts with ``%`` is exported in per cent (0.8 with unit ``%``); every other unit
(``N/m``, ``s``, ``x band``, ``share of capacity``, ``flag``) is the stored value, already in that unit.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from spanwatch.monitor.shifts import PlantClock

ELLIPSIS = "…"

# the table's short forms of long units (the full unit is in --wide, show and the exports)
SHORT_UNIT = {"share of capacity": "of cap", "x tolerance": "x tol", "x threshold": "x thr",
              "% of mean tension": "%", "% of setpoint": "% sp"}
# the table's short forms of lifecycle states (ANSI/ISA-18.2 state names; the full name in --wide and exports)
SHORT_STATE = {"rtn_unack": "rtn-unack", "latched_unack": "l-unack", "out_of_service": "oos",
               "suppressed": "suppr"}
PRIORITY_RANK = {"urgent": 0, "high": 1, "medium": 2, "low": 3, "advisory": 4}
SORTS = ("time", "duration", "peak", "priority")
BY = ("check", "object")


def unit_scale(unit: str) -> float:
    """The factor from a stored check value to the unit it names: 100 for a unit in per cent, else 1.

    >>> unit_scale("%"), unit_scale("% of setpoint"), unit_scale("N/m")
    (100.0, 100.0, 1.0)
    """
    return 100.0 if unit.startswith("%") else 1.0


def in_unit(value: float | None, unit: str) -> float | None:
    """A stored check value in the unit its ``unit`` names (see the module docstring); None if not finite.

    >>> in_unit(0.008, "%")
    0.8
    """
    if value is None or not math.isfinite(value):
        return None
    return round(value * unit_scale(unit), 12)


def _num(v: float) -> str:
    """Four significant figures without an exponent for the table.

    >>> _num(1234.5), _num(0.91234), _num(-2.4305)
    ('1234', '0.9123', '-2.430')
    """
    a = abs(v)
    if a >= 1000:
        return f"{v:.0f}"
    if a >= 100:
        return f"{v:.1f}"
    if a >= 10:
        return f"{v:.2f}"
    if a >= 1:
        return f"{v:.3f}"
    return f"{v:.4f}"


def short_value(value: float | None, unit: str) -> str:
    """A check value for the table: its number in the unit named and a short unit.

    >>> short_value(0.008, "%"), short_value(1.0, "flag"), short_value(-2.43047, "x band")
    ('0.8000 %', 'on', '-2.430 x band')
    """
    v = in_unit(value, unit)
    if v is None:
        return "-"
    if unit == "flag":
        return "on" if v >= 0.5 else "off"
    return f"{_num(v)} {SHORT_UNIT.get(unit, unit)}"


def full_value(value: float | None, unit: str) -> str:
    """A check value with its full unit (``--wide``, ``show``).

    >>> full_value(0.0125, "% of mean tension")
    '1.250 % of mean tension'
    """
    v = in_unit(value, unit)
    if v is None:
        return "-"
    if unit == "flag":
        return "on" if v >= 0.5 else "off"
    return f"{_num(v)} {unit}"


def duration_text(seconds: float | None) -> str:
    """A duration for the table: ``45s``, ``12m04s``, ``3h05m``, ``2d04h``; ``active`` for None.

    >>> duration_text(724), duration_text(45.2), duration_text(3 * 3600 + 301), duration_text(None)
    ('12m04s', '45s', '3h05m', 'active')
    """
    if seconds is None:
        return "active"
    s = max(0, round(seconds))
    if s < 60:
        return f"{s}s"
    if s < 3600:
        return f"{s // 60}m{s % 60:02d}s"
    if s < 86400:
        return f"{s // 3600}h{s % 3600 // 60:02d}m"
    return f"{s // 86400}d{s % 86400 // 3600:02d}h"


def ellipsize(text: str, width: int) -> str:
    """``text`` cut to ``width`` characters with one ellipsis in the middle, keeping more of the end (a tag's or
    object's distinguishing part is usually its last segment).

    >>> ellipsize("q2.unwind.rpm", 9)
    'q2…nd.rpm'
    >>> ellipsize("draw", 9)
    'draw'
    """
    if len(text) <= width:
        return text
    if width <= 1:
        return text[:width]
    head = (width - 1) // 3
    return text[:head] + ELLIPSIS + text[len(text) - (width - 1 - head):]


@dataclass(frozen=True)
class Column:
    header: str
    right: bool = False  # aligned right (numbers)
    shrink: int = 0  # the narrowest it may be ellipsized to (0: never)


def layout(columns: Sequence[Column], rows: Sequence[Sequence[str]], width: int | None) -> list[str]:
    """Plain text lines of a table, two spaces apart (header first). ``width`` None (piped output): every cell in
    full. A width: one space apart if that fits, else the shrinkable columns are ellipsized, widest first, until
    the lines fit (or reach their minimum)."""
    widths = [max([len(c.header), *(len(r[i]) for r in rows)]) for i, c in enumerate(columns)]
    gap = 2
    if width is not None and sum(widths) + gap * (len(widths) - 1) > width:
        gap = 1  # closer columns before any name is cut
    if width is not None:
        while sum(widths) + gap * (len(widths) - 1) > width:
            can = [i for i, c in enumerate(columns) if c.shrink and widths[i] > c.shrink]
            if not can:
                break
            widths[max(can, key=lambda i: widths[i])] -= 1

    def line(cells: Sequence[str]) -> str:
        out = []
        for c, w, cell in zip(columns, widths, cells, strict=True):
            text = ellipsize(cell, w) if width is not None else cell
            out.append(text.rjust(w) if c.right else text.ljust(w))
        return (" " * gap).join(out).rstrip()

    return [line([c.header for c in columns]), *(line(r) for r in rows)]


# --- what a listing shows ------------------------------------------------------------------------------------------


def open_end(row: dict[str, Any], ends: dict[int, float]) -> float:
    """Where an episode's time in alarm ends: its clear, or for one still active its run's end (``ends``)."""
    if row["cleared_t"] is not None:
        return float(row["cleared_t"])
    return max(float(row["raised_t"]), ends.get(int(row["run"]), float(row["raised_t"])))


def time_in_alarm(row: dict[str, Any], ends: dict[int, float], start: float | None, end: float | None) -> float:
    """Seconds an episode was active inside ``[start, end)`` (the whole episode without a window)."""
    a = float(row["raised_t"]) if start is None else max(start, float(row["raised_t"]))
    b = open_end(row, ends) if end is None else min(end, open_end(row, ends))
    return max(0.0, b - a)


def exceedance(row: dict[str, Any]) -> float:
    """How far past its limit the peak went (the value at raise while it is active), relative to the limit (0 when
    not known): what ``--sort peak`` orders by, so checks in different units compare."""
    peak, limit = row.get("peak"), row.get("limit")
    peak = row.get("value") if peak is None else peak  # still active: its peak is not known yet, its raise value is
    if peak is None or limit is None or not math.isfinite(peak):
        return 0.0
    return abs(abs(peak) - abs(limit)) / (abs(limit) or 1.0)


def sort_rows(rows: list[dict[str, Any]], how: str, ends: dict[int, float]) -> list[dict[str, Any]]:
    """``time``: oldest raise first; ``duration``: longest first (an active one to its run's end); ``peak``: the
    farthest past its limit first; ``priority``: the most urgent first, then by time."""
    key: Callable[[dict[str, Any]], Any] = {
        "time": lambda r: (r["raised_t"], r["id"]),
        "duration": lambda r: (-(open_end(r, ends) - r["raised_t"]), r["raised_t"], r["id"]),
        "peak": lambda r: (-exceedance(r), r["raised_t"], r["id"]),
        "priority": lambda r: (PRIORITY_RANK.get(r["priority"], 9), r["raised_t"], r["id"]),
    }[how]
    return sorted(rows, key=key)


def summary(rows: list[dict[str, Any]], by: str, ends: dict[int, float], start: float | None, end: float | None
            ) -> list[dict[str, Any]]:
    """Per check (``by="check"``) or per object: count, time in alarm (s, inside the window), the episode that
    went farthest past its limit (its peak and unit), and the share of the alarms; most alarms first."""
    field = "check" if by == "check" else "object"
    groups: dict[str, list[dict[str, Any]]] = {}
    for r in rows:
        groups.setdefault(str(r[field]), []).append(r)
    out = []
    for name, rs in groups.items():
        worst = max(rs, key=exceedance)
        out.append({by: name, "count": len(rs), "time_in_alarm_s": sum(time_in_alarm(r, ends, start, end) for r in rs),
                    "peak": in_unit(worst["peak"], worst["unit"]), "unit": worst["unit"],
                    "peak_check": worst["check"], "share": len(rs) / len(rows)})
    return sorted(out, key=lambda g: (-g["count"], -g["time_in_alarm_s"], g[by]))


EXPORT_COLUMNS = ["id", "line", "run", "raised", "raised_epoch", "cleared", "cleared_epoch", "duration_s", "check",
                  "object", "level", "priority", "value", "peak", "limit", "unit", "line_state", "config_hash",
                  "state", "first_out", "chattering", "cause", "consequence", "corrective_action", "response_time"]


def export_row(r: dict[str, Any], clock: PlantClock) -> dict[str, Any]:
    """One episode for CSV and JSON: times in ISO 8601 with the plant's offset and as epoch seconds, numbers in the
    unit named (see the module docstring)."""
    unit = str(r["unit"])
    return {"id": r["id"], "line": r.get("line"), "run": r["run"], "raised": clock.iso(r["raised_t"]),
            "raised_epoch": r["raised_t"], "cleared": clock.iso(r["cleared_t"]) or None,
            "cleared_epoch": r["cleared_t"], "duration_s": r["duration_s"], "check": r["check"],
            "object": r["object"], "level": r["level"], "priority": r["priority"],
            "value": in_unit(r["value"], unit), "peak": in_unit(r["peak"], unit), "limit": in_unit(r["limit"], unit),
            "unit": unit, "line_state": r["line_state"], "config_hash": r["config_hash"],
            **{c: r.get(c) for c in ("state", "first_out", "chattering", "cause", "consequence", "corrective_action",
                                     "response_time")}}


def iso_s(clock: PlantClock, t: float) -> str:
    """ISO 8601 in plant time to the second, with the offset: ``2026-03-02T06:14:05+01:00``."""
    return clock.local(t).isoformat(timespec="seconds")


def short_time(clock: PlantClock, t: float) -> str:
    """``03-02 06:14`` in plant time."""
    return clock.fmt(t)[5:]


def list_lines(rows: list[dict[str, Any]], clock: PlantClock, ends: dict[int, float], width: int | None,
               wide: bool = False) -> list[str]:
    """The alarm list as plain text lines: on a terminal (``width``) short local times and ellipsized names that
    fit; piped (``width`` None) full ISO 8601 local times with offset and nothing cut."""
    cols = [Column("id", right=True), Column("raised"), Column("for", right=True), Column("prio"),
            Column("check", shrink=6), Column("object", shrink=8), Column("peak", right=True), Column("state")]
    if wide:
        cols += [Column("value", right=True), Column("limit", right=True), Column("level"), Column("line state"),
                 Column("run", right=True), Column("first-out"), Column("chattering")]
    table = []
    for r in rows:
        unit = str(r["unit"])
        dur = None if r["cleared_t"] is None else r["cleared_t"] - r["raised_t"]
        state = str(r.get("state") or "-")
        cells = [str(r["id"]), short_time(clock, r["raised_t"]) if width is not None else iso_s(clock, r["raised_t"]),
                 duration_text(dur), str(r["priority"]), str(r["check"]),
                 str(r["object"]), short_value(r["peak"], unit), state if wide else SHORT_STATE.get(state, state)]
        if wide:
            flag = {True: "yes", False: "no", None: "-"}
            cells += [full_value(r["value"], unit), full_value(r["limit"], unit), str(r["level"]),
                      str(r["line_state"]), str(r["run"]), flag[r.get("first_out")], flag[r.get("chattering")]]
        table.append(cells)
    return layout(cols, table, None if wide else width)


def summary_lines(groups: list[dict[str, Any]], by: str, width: int | None) -> list[str]:
    cols = [Column(by, shrink=8), Column("alarms", right=True), Column("in alarm", right=True),
            Column("peak", right=True), Column("share", right=True)]
    table = [[g[by], str(g["count"]), duration_text(g["time_in_alarm_s"]),
              "-" if g["peak"] is None else short_value(g["peak"] / unit_scale(g["unit"]), g["unit"])
              + ("" if by == "check" else f" ({g['peak_check']})"), f"{100 * g['share']:.0f} %"] for g in groups]
    return layout(cols, table, width)


# --- runs ----------------------------------------------------------------------------------------------------------


def run_source(r: dict[str, Any]) -> str:
    """The file a replay read, ``live`` (a daemon, with its sources) or what a demo simulated."""
    if r["mode"] == "replay":
        return str(r["source"]).replace("\\", "/").rsplit("/", 1)[-1]
    if r["mode"] == "daemon":
        return "live " + str(r["source"]) if r["source"] else "live"
    return str(r["source"] or r["mode"])


def run_span(r: dict[str, Any], clock: PlantClock, width: int | None) -> str:
    """The span of data a run saw (else its start and finish), local: ``03-02 06:00-14:00`` on a terminal."""
    a = r["data_start_t"] if r["data_start_t"] is not None else r["started_t"]
    b = r["data_end_t"] if r["data_end_t"] is not None else r["finished_t"]
    if width is None:
        return f"{iso_s(clock, a)}..{iso_s(clock, b) if b is not None else ''}"
    first = short_time(clock, a)
    if b is None:
        return first + "-"
    last = short_time(clock, b)
    return f"{first}-{last[6:] if last[:5] == first[:5] else last}"


def runs_lines(runs: list[dict[str, Any]], clock_of: Callable[[dict[str, Any]], PlantClock], width: int | None
               ) -> list[str]:
    cols = [Column("run", right=True), Column("line", shrink=6), Column("source", shrink=8),
            Column("config", shrink=10), Column("time span"), Column("alarms", right=True), Column("ended")]
    table = []
    for r in runs:
        name = str(r["config_file"]).replace("\\", "/").rsplit("/", 1)[-1].removesuffix(".toml")
        table.append([str(r["id"]), str(r["line"]), run_source(r), f"{name} {str(r['config_hash'])[:6]}",
                      run_span(r, clock_of(r), width), str(r["alarms"]), r["end"] or "running?"])
    return layout(cols, table, width)


def default_runs(runs: list[dict[str, Any]]) -> tuple[list[int], str]:
    """The runs ``spanwatch alarms`` lists by default, and why: the latest run when every run is a replay (or a
    demo), else every daemon (live) run."""
    if not runs:
        return [], "no runs"
    if all(r["mode"] != "daemon" for r in runs):
        last = max(runs, key=lambda r: r["id"])
        return [last["id"]], f"run {last['id']}, the latest"
    live = [r["id"] for r in runs if r["mode"] == "daemon"]
    return live, "the live runs" if len(live) > 1 else f"run {live[0]}, the live run"


def clock_from_kept(content: str | None) -> PlantClock | None:
    """The plant's clock of a configuration the history kept (``config_versions``: JSON with ``config.line.timezone``
    and ``config.shifts``), or None when it has none or cannot be read."""
    if not content:
        return None
    try:
        cfg = json.loads(content).get("config", {})
        tz = cfg.get("line", {}).get("timezone") or "UTC"
        return PlantClock(tz, cfg.get("shifts") or {})
    except (ValueError, AttributeError, TypeError):
        return None


# --- alarms show: the signals around the raise ---------------------------------------------------------------------

# a context signal's name -> (display unit, factor from SI); raw tags are shown as recorded
SIGNAL_UNITS = {"tension": ("N/m", 1.0), "speed": ("m/min", 60.0), "diameter": ("mm", 1000.0),
                "length": ("m", 1.0), "rotation": ("rpm", 60.0)}


def context_summary(windows: list[dict[str, Any]], raised_t: float) -> list[dict[str, Any]]:
    """For each kept signal: min, mean and max before the raise and from the raise on (None where no usable value),
    in its display unit (:data:`SIGNAL_UNITS`: tension N/m, speed m/min, diameter mm, rotation rpm; a raw tag in
    its recorded unit)."""
    out = []
    for w in windows:
        kind = str(w["signal"]).split("/", 1)[0] if "/" in str(w["signal"]) else ""
        unit, factor = SIGNAL_UNITS.get(kind, ("", 1.0))
        before: list[float] = []
        after: list[float] = []
        for i, v in enumerate(w["values"]):
            if v is None or not math.isfinite(v):
                continue
            (before if w["t0"] + i * w["dt"] < raised_t else after).append(v * factor)

        def stats(xs: list[float]) -> dict[str, float] | None:
            return None if not xs else {"min": min(xs), "mean": sum(xs) / len(xs), "max": max(xs)}

        out.append({"signal": w["signal"], "unit": unit, "before": stats(before), "after": stats(after),
                    "seconds_before": max(0.0, raised_t - w["t0"]),
                    "seconds_after": max(0.0, w["t0"] + len(w["values"]) * w["dt"] - raised_t)})
    return out


def context_lines(summary_rows: list[dict[str, Any]]) -> list[str]:
    """The context summary as lines within 80 columns: one per signal and side."""
    out = []
    for s in summary_rows:
        out.append(f"  {s['signal']}" + (f" ({s['unit']})" if s["unit"] else ""))
        for side, label in (("before", f"{s['seconds_before']:.0f} s before"),
                            ("after", f"{s['seconds_after']:.0f} s after")):
            st = s[side]
            text = "no usable value" if st is None else (f"min {_num(st['min'])}  mean {_num(st['mean'])}  "
                                                          f"max {_num(st['max'])}")
            out.append(f"    {label:14} {text}")
    return out
