"""The shift report's plots (matplotlib, Agg backend, PNG bytes), readable in grey print: every series is told apart
by its line style, marker or hatch as well as its shade, and limits are labelled where they are drawn.

Times on the axes are the plant's local time (:class:`spanwatch.monitor.shifts.PlantClock`); an episode's signals
are drawn against the seconds from its raise.
"""

from __future__ import annotations

import io
import math
from collections.abc import Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")  # no display: files only (before pyplot is imported)

import matplotlib.dates as mdates
import numpy as np
from matplotlib.figure import Figure
from spanwatch.monitor.shifts import PlantClock

WIDTH_IN = 9.0
DPI = 110
# priority -> (grey fill, hatch): darker and denser for the more urgent
PRIORITY_STYLE = {"advisory": ("#f2f2f2", ""), "low": ("#d0d0d0", "//"), "medium": ("#a0a0a0", "xx"),
                  "high": ("#606060", "\\\\"), "urgent": ("#202020", "..")}
LINESTYLES = [("-", None), ("--", None), (":", "o"), ("-.", None), ("-", "s"), ("--", "^"), (":", "v"), ("-.", "D")]
LIMIT_STYLES = {"warning": ("--", "#555555"), "alarm": ("-.", "#000000")}


def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, bbox_inches="tight")
    return buf.getvalue()


def _days(t: float) -> float:
    """Epoch s -> matplotlib date number."""
    return t / 86400.0 + mdates.date2num(np.datetime64("1970-01-01T00:00:00"))


def _time_axis(ax: Any, clock: PlantClock, start: float, end: float) -> None:
    ax.set_xlim(_days(start), _days(end))
    span = end - start
    step = 60 if span > 6 * 3600 else 30 if span > 2 * 3600 else 15 if span > 3600 else 5 if span > 1200 else 1
    ax.xaxis.set_major_locator(mdates.MinuteLocator(byminute=range(0, 60, step), tz=clock.tz)
                               if step < 60 else mdates.HourLocator(tz=clock.tz))
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=clock.tz))
    ax.set_xlabel(f"plant time ({clock.tz.key})")


def _scale(unit: str) -> tuple[float, str]:
    """A check unit shown to people: fractions in ``%`` units are scaled by 100 (as present.fmt_value)."""
    return (100.0, unit) if unit.startswith("%") else (1.0, unit)


def timeline(episodes: Sequence[dict[str, Any]], start: float, end: float, clock: PlantClock) -> bytes:
    """One lane per object and check, a bar per episode (clipped to the window; an active one runs to the end), its
    fill and hatch by priority; a bar too short to see is drawn at a minimum width with a marker."""
    objects = sorted({(str(e["object"]), str(e["check"])) for e in episodes})
    n = max(1, len(objects))
    fig = Figure(figsize=(WIDTH_IN, 1.2 + 0.32 * n))
    ax = fig.add_subplot()
    lane = {o: i for i, o in enumerate(objects)}
    min_w = (end - start) / 400.0
    seen = set()
    for e in episodes:
        a = max(float(e["raised_t"]), start)
        b = min(end if e.get("cleared_t") is None else float(e["cleared_t"]), end)
        w = max(b - a, min_w)
        fill, hatch = PRIORITY_STYLE.get(str(e["priority"]), PRIORITY_STYLE["low"])
        p = str(e["priority"])
        y = lane[(str(e["object"]), str(e["check"]))]
        ax.broken_barh([(_days(a), w / 86400.0)], (y - 0.35, 0.7), facecolors=fill, edgecolors="black",
                       linewidth=0.6, hatch=hatch, label=p if p not in seen else None)
        seen.add(p)
        if e.get("open_at_run_end") and b < end:
            ax.plot([_days(b)], [y], marker="x", color="black", markersize=6)
        elif e.get("cleared_t") is None or e.get("open_at_run_end"):
            ax.plot([_days(b)], [y], marker=">", color="black", markersize=5)
    ax.set_yticks(range(len(objects)), [f"{o}  {c}" for o, c in objects], fontsize=8)
    ax.set_ylim(-0.7, n - 0.3)
    ax.invert_yaxis()
    ax.grid(axis="x", linestyle=":", color="#999999")
    _time_axis(ax, clock, start, end)
    if seen:
        order = [p for p in PRIORITY_STYLE if p in seen]
        handles, labels = ax.get_legend_handles_labels()
        by = dict(zip(labels, handles, strict=True))
        ax.legend([by[p] for p in order], [f"{p} priority" for p in order], loc="upper left",
                  bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)
    else:
        ax.text(0.5, 0.5, "no alarm in this window", transform=ax.transAxes, ha="center", va="center")
    ax.set_title("Alarm episodes per object and check (> still active at the end; x still active when its run "
                 "ended)", fontsize=10, loc="left")
    return _png(fig)


def rate_plot(slot_counts: Sequence[int], start: float, end: float, clock: PlantClock, *, operators: int = 1,
              acceptable: float = 1.0, manageable: float = 2.0, flood: float = 10.0) -> bytes:
    """Annunciated alarms per 10-min slot (per operator position) as hatched bars, with the benchmark lines
    (acceptable dashed, manageable dash-dot, flood dotted), each labelled."""
    counts = np.asarray(slot_counts, dtype=float) / max(1, operators)
    fig = Figure(figsize=(WIDTH_IN, 2.8))
    ax = fig.add_subplot()
    lefts = [_days(start + 600.0 * i) for i in range(len(counts))]
    widths = [(min(start + 600.0 * (i + 1), end) - (start + 600.0 * i)) / 86400.0 for i in range(len(counts))]
    ax.bar(lefts, counts, width=widths, align="edge", color="#bbbbbb", edgecolor="black", linewidth=0.5,
           hatch="//", label="alarms per 10 min")
    top = max(float(counts.max()) if len(counts) else 0.0, manageable) * 1.25
    for y, style, text in ((acceptable, "--", f"acceptable ~{acceptable:g}"),
                           (manageable, "-.", f"manageable ~{manageable:g}"),
                           (flood, ":", f"flood > {flood:g}")):
        if y <= top or (text.startswith("flood") and counts.max(initial=0) >= flood / 2):
            ax.axhline(y, linestyle=style, color="black", linewidth=1.0)
            ax.text(_days(end), y, " " + text, va="center", ha="left", fontsize=8)
            top = max(top, y * 1.1)
    ax.set_ylim(0, top)
    ax.set_ylabel("alarms / 10 min" + (f" / operator ({operators})" if operators > 1 else ""))
    ax.yaxis.get_major_locator().set_params(integer=True)
    ax.grid(axis="y", linestyle=":", color="#999999")
    _time_axis(ax, clock, start, end)
    ax.set_title("Alarm rate against the ISA-18.2 / EEMUA 191 benchmarks", fontsize=10, loc="left")
    return _png(fig)


def in_alarm_plot(rows: Sequence[dict[str, Any]]) -> bytes:
    """Time in alarm per check (minutes) as hatched horizontal bars."""
    fig = Figure(figsize=(WIDTH_IN, 0.8 + 0.3 * max(1, len(rows))))
    ax = fig.add_subplot()
    names = [r["check"] for r in rows]
    ax.barh(range(len(rows)), [r["seconds"] / 60.0 for r in rows], color="#bbbbbb", edgecolor="black",
            hatch="xx", linewidth=0.5)
    ax.set_yticks(range(len(rows)), names)
    ax.invert_yaxis()
    ax.set_xlabel("minutes with at least one alarm of the check active")
    ax.grid(axis="x", linestyle=":", color="#999999")
    return _png(fig)


def episode_plot(detail: dict[str, Any], clock: PlantClock, minutes: Sequence[dict[str, Any]] = ()) -> bytes:
    """The signals an alarm's check read around its raise, one panel each (seconds from the raise; SI units as
    the pipeline holds them), under a panel of the check's own value against its limit: the per-minute values
    around the raise when stored (``minutes``), and the value at the raise and the peak."""
    series = [s for s in detail.get("series", []) if any(math.isfinite(v) for v in s["values"])]
    unit = str(detail.get("unit") or "")
    k, shown_unit = _scale(unit)
    raised = float(detail["raised_t"])
    n = 1 + len(series)
    fig = Figure(figsize=(WIDTH_IN * 0.62, 1.5 + 1.05 * n))
    axes = fig.subplots(n, 1, squeeze=False)[:, 0]
    top = axes[0]
    lim = detail.get("limit")
    if minutes:
        t = np.array([m["t"] + 30.0 - raised for m in minutes])
        mean = np.array([np.nan if m["mean"] is None else m["mean"] for m in minutes], dtype=float) * k
        lo = np.array([np.nan if m["min"] is None else m["min"] for m in minutes], dtype=float) * k
        hi = np.array([np.nan if m["max"] is None else m["max"] for m in minutes], dtype=float) * k
        top.fill_between(t, lo, hi, facecolor="none", edgecolor="#777777", hatch="///", linewidth=0.0,
                         label="min-max per minute")
        top.plot(t, mean, "-", color="black", marker=".", label="mean per minute")
    v = detail.get("value")
    if v is not None and math.isfinite(v):
        top.plot([0.0], [v * k], marker="o", color="black", linestyle="none", markersize=6, label="at the raise")
    v, ref = detail.get("peak"), [abs(x) for x in (detail.get("value"), lim) if x is not None and math.isfinite(x)]
    if v is not None and math.isfinite(v):
        if not ref or abs(v) <= 3.0 * max(ref):
            top.axhline(v * k, linestyle=":", color="#555555", linewidth=1.2, label="peak, raise to clear")
        else:  # far off this scale: said, not drawn
            top.text(0.01, 0.05, f"peak {v * k:.4g} {shown_unit}: off this scale", transform=top.transAxes,
                     fontsize=7, va="bottom")
    if lim is not None and math.isfinite(lim) and unit != "flag":
        top.axhline(lim * k, linestyle="-.", color="black", linewidth=1.0, label=f"{detail.get('level')} limit")
        if detail.get("direction") == "abs":  # |x| >= limit: both sides
            top.axhline(-lim * k, linestyle="-.", color="black", linewidth=1.0)
    top.axvline(0.0, color="#444444", linestyle=":", linewidth=1.0)
    top.set_ylabel(shown_unit or "value", fontsize=8)
    top.tick_params(labelsize=7)
    top.set_title(f"{detail['check']} on {detail['object']}: check value and limit", fontsize=9, loc="left")
    top.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    for i, (ax, s) in enumerate(zip(axes[1:], series, strict=True)):
        t = np.asarray(s["t"], dtype=float) - raised
        ls, mk = LINESTYLES[i % len(LINESTYLES)]
        ax.plot(t, np.asarray(s["values"], dtype=float), linestyle=ls, marker=mk, markevery=max(1, len(t) // 12),
                markersize=3, color="black", linewidth=1.0)
        ax.axvline(0.0, color="#444444", linestyle=":", linewidth=1.0)
        ax.set_title(f"{s['signal']} ({signal_unit(str(s['signal']))})", fontsize=8, loc="left")
        ax.tick_params(labelsize=7)
        ax.grid(linestyle=":", color="#bbbbbb")
    if series:
        lo = min(float(np.min(np.asarray(s["t"]))) for s in series) - raised
        hi = max(float(np.max(np.asarray(s["t"]))) for s in series) - raised
        for ax in axes:
            ax.set_xlim(lo, hi)
    axes[-1].set_xlabel(f"seconds from the raise at {clock.fmt(raised, seconds=True)}")
    if not series:
        top.text(0.5, 0.2, "no signals kept around this raise", transform=top.transAxes, ha="center", fontsize=8)
    fig.tight_layout()
    return _png(fig)


def trend_plot(check: str, rows: Sequence[dict[str, Any]], limits: dict[str, list[dict[str, Any]]], start: float,
               end: float, clock: PlantClock) -> bytes:
    """A check's value over the window, one line per object (mean per minute; line style and marker per object),
    with its limits as labelled horizontal lines.

    ``rows``: per-minute dicts of this check (``object``, ``t`` minute start, ``mean``, ``min``, ``max``,
    ``unit``), as ``query_check_minutes`` returns them; ``limits``: object -> its alarm points (``level``,
    ``limit``). A gap of more than two minutes breaks the line.
    """
    objects = sorted({str(r["object"]) for r in rows})
    unit = next((str(r["unit"]) for r in rows if r.get("unit")), "")
    k, shown_unit = _scale(unit)
    fig = Figure(figsize=(WIDTH_IN, 2.9))
    ax = fig.add_subplot()
    for i, o in enumerate(objects):
        mine = sorted((r for r in rows if str(r["object"]) == o), key=lambda r: r["t"])
        t = np.array([float(r["t"]) + 30.0 for r in mine])
        v = np.array([np.nan if r.get("mean") is None else float(r["mean"]) for r in mine]) * k
        if len(t) > 1:  # break the line over gaps
            gap = np.flatnonzero(np.diff(t) > 120.0)
            t = np.insert(t, gap + 1, t[gap] + 60.0)
            v = np.insert(v, gap + 1, np.nan)
        ls, mk = LINESTYLES[i % len(LINESTYLES)]
        ax.plot([_days(x) for x in t], v, linestyle=ls, marker=mk, markevery=max(1, len(t) // 16), markersize=4,
                color="black" if i % 2 == 0 else "#555555", linewidth=1.0, label=o)
    drawn: set[tuple[str, float]] = set()
    for o in objects:
        for p in limits.get(o, []):
            lim = p.get("limit")
            if lim is None or not math.isfinite(lim) or (p["level"], lim) in drawn:
                continue
            drawn.add((p["level"], lim))
            style, colour = LIMIT_STYLES.get(str(p["level"]), ("--", "#333333"))
            ax.axhline(lim * k, linestyle=style, color=colour, linewidth=1.2)
            ax.text(_days(end), lim * k, f" {p['level']} {lim * k:g}", va="center", ha="left", fontsize=7)
    ax.set_ylabel(shown_unit or "value")
    ax.grid(linestyle=":", color="#bbbbbb")
    _time_axis(ax, clock, start, end)
    if objects:
        ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.08, 1.0), frameon=False)
    ax.set_title(f"{check}: mean per minute per object, with its limits", fontsize=10, loc="left")
    return _png(fig)


# the SI unit of each kind of derived signal the pipeline names ``kind/object`` (spanwatch.monitor.signals,
# spanwatch.monitor.line: tension per width, surface speeds, roll diameters, rotation in revolutions per second)
SIGNAL_UNITS = {"tension": "N/m", "speed": "m/s", "diameter": "m", "length": "m", "rotation": "rev/s",
                "source_lag": "s", "source_quiet": "s"}


def signal_unit(name: str) -> str:
    """The unit a context signal is stored in: ``tension/s5`` -> ``N/m``; a raw tag or another kind: ``SI``.

    >>> signal_unit("tension/unwind-pull_1"), signal_unit("rotation/unwind"), signal_unit("tag/q2.unwind.rpm")
    ('N/m', 'rev/s', 'SI')
    """
    return SIGNAL_UNITS.get(name.split("/", 1)[0], "SI")
