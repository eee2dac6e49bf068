"""The commissioning plots (``spanwatch stats --plot``, ``spanwatch tune --plot``): matplotlib with the Agg
backend (no display), black and greys told apart by line style and marker, so that they read printed in grey."""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from spanwatch.monitor.checkstats import CheckStats, display_scale
from spanwatch.monitor.tuning import TuneResult

MAX_PANELS = 12  # checks x objects in one stats figure
STYLES = [("black", "-", None), ("0.35", "--", None), ("0.55", ":", None), ("black", "-.", None),
          ("0.35", "-", "o"), ("0.55", "--", "s")]


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def stats_plot(stats: Sequence[CheckStats], out: Path) -> None:
    """Per check and object: the histogram of its values per line state (left) and the share of valid time
    beyond each value (right, log scale), with the configured warning and alarm limits."""
    plt = _pyplot()
    n = len(stats)
    fig, axes = plt.subplots(n, 2, figsize=(10, 2.8 * n + 0.6), squeeze=False)
    for row, c in zip(axes, stats, strict=True):
        scale, unit = display_scale(c.unit)
        hist, exceed = row
        allv = np.concatenate([v for v in c.values.values() if v.size]) if c.values else np.empty(0)
        if allv.size:
            lo, hi = np.percentile(allv, [0.05, 99.95]) if allv.size > 20 else (allv.min(), allv.max())
            bins = np.linspace(lo, hi if hi > lo else lo + 1e-9, 60) * scale
            for i, (state, v) in enumerate(c.values.items()):
                color, ls, mk = STYLES[i % len(STYLES)]
                hist.hist(v * scale, bins=bins, histtype="step", color=color, linestyle=ls, label=state,
                          density=True)
                s = np.sort(np.abs(v) if c.direction == "abs" else (-v if c.direction == "low" else v))
                share = 1.0 - np.arange(s.size) / s.size
                x = (-s if c.direction == "low" else s) * scale
                exceed.plot(x, share, color=color, linestyle=ls, marker=mk, markevery=max(1, s.size // 8),
                            label=state)
        for lim, name, ls in ((c.warning, "warning", "--"), (c.alarm, "alarm", "-")):
            if lim is not None and math.isfinite(lim):
                for ax in row:
                    ax.axvline(lim * scale, color="black", linestyle=ls, linewidth=1.2)
                    if c.direction == "abs" and ax is hist:
                        ax.axvline(-lim * scale, color="black", linestyle=ls, linewidth=1.2)
                exceed.annotate(name, (lim * scale, 1.0), rotation=90, va="top", ha="right", fontsize=8)
        hist.set_title(f"{c.kind} {c.object_id}: values per line state", fontsize=9)
        hist.set_xlabel(unit if c.direction != "abs" else f"{unit} (limits at +/-)", fontsize=8)
        hist.set_ylabel("density", fontsize=8)
        exceed.set_yscale("log")
        exceed.set_title("share of valid time beyond", fontsize=9)
        exceed.set_xlabel(f"|value| in {unit}" if c.direction == "abs" else unit, fontsize=8)
        if c.values:
            hist.legend(fontsize=7, frameon=False)
        for ax in row:
            ax.tick_params(labelsize=7)
            ax.grid(color="0.85", linewidth=0.5)
    fig.text(0.01, 0.003, "spanwatch is advisory: not a safety function.", fontsize=7, color="0.3")
    fig.tight_layout(rect=(0, 0.02, 1, 1))
    fig.savefig(out, dpi=110)
    plt.close(fig)


def tune_plot(res: TuneResult, out: Path) -> None:
    """False raises per hour and time in alarm against the limit, one line per on-delay; the configured and the
    suggested limit, the target rate and the labelled events' peaks."""
    plt = _pyplot()
    scale, unit = display_scale(res.unit)
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(8, 6.5), sharex=True)
    delays = list(dict.fromkeys(s.on_delay for s in res.settings))
    for i, d in enumerate(delays):
        color, ls, _ = STYLES[i % len(STYLES)]
        mk = "osd^v<>"[i % 7]
        ss = [s for s in res.settings if s.on_delay == d]
        x = [s.limit * scale for s in ss]
        top.plot(x, [s.false_rate for s in ss], color=color, linestyle=ls, marker=mk, label=f"on-delay {d:g} s")
        bottom.plot(x, [s.time_in_alarm / 60 for s in ss], color=color, linestyle=ls, marker=mk,
                    label=f"on-delay {d:g} s")
        if res.relevant:
            for s in ss:
                if s.detected < len(res.relevant):
                    bottom.plot([s.limit * scale], [s.time_in_alarm / 60], marker="x", color="black", markersize=9)
    top.axhline(res.target_per_hour, color="black", linestyle=":", linewidth=1)
    top.annotate("target", (0.01, res.target_per_hour), xycoords=("axes fraction", "data"), va="bottom", fontsize=8)
    for ax in (top, bottom):
        for v in res.configured.values():
            ax.axvline(v * scale, color="0.5", linestyle="--", linewidth=1)
        if res.suggestion is not None:
            ax.axvline(res.suggestion.limit * scale, color="black", linestyle="-", linewidth=1.5)
        for e in res.relevant:
            if math.isfinite(e.peak):
                ax.axvline((-e.peak if res.direction == "low" else e.peak) * scale, color="0.3", linestyle="-.",
                           linewidth=1)
        ax.grid(color="0.85", linewidth=0.5)
        ax.tick_params(labelsize=8)
    ymax = top.get_ylim()[1]
    for v in res.configured.values():
        top.annotate("configured", (v * scale, ymax), rotation=90, va="top", ha="right", fontsize=7)
    if res.suggestion is not None:
        top.annotate("suggested", (res.suggestion.limit * scale, ymax), rotation=90, va="top", ha="right",
                     fontsize=7)
    for e in res.relevant:
        if math.isfinite(e.peak):
            top.annotate(f"peak: {e.label.label}"[:30], ((-e.peak if res.direction == "low" else e.peak) * scale, ymax),
                         rotation=90, va="top", ha="right", fontsize=7)
    top.set_ylabel("false raises per hour", fontsize=9)
    bottom.set_ylabel("time in alarm, min", fontsize=9)
    bottom.set_xlabel(f"{res.level} limit, {unit}" + ("  (x: misses a labelled event)" if res.relevant else ""),
                      fontsize=9)
    top.legend(fontsize=8, frameon=False)
    top.set_title(f"{res.kind} {res.level} on {res.object_id or 'every object'}", fontsize=10)
    fig.text(0.01, 0.003, "spanwatch is advisory: not a safety function.", fontsize=7, color="0.3")
    fig.tight_layout(rect=(0, 0.02, 1, 1))
    fig.savefig(out, dpi=110)
    plt.close(fig)
