"""From tag frames to named SI signals with a usable-or-not mask.

A tag's frame is *usable* when its value is finite, its quality is good, it is not
stale (age within the tag's stale limit) and it lies in the tag's plausible range.
A derived signal is a usable tag times a factor (per-width tension from a force,
surface speed from rpm); a winder without a diameter sensor gets its diameter
computed as ``V_web / (pi n)``.
"""

from __future__ import annotations

import numpy as np
from spanwatch.monitor.line import Line
from spanwatch.rules.base import QUALITY_GOOD, Signal, TagFrames
from spanwatch.rules.woundroll import diameter_from_speed


class SignalDeriver:
    """Turns :class:`TagFrames` into the signals the checks read."""

    def __init__(self, line: Line, names: tuple[str, ...]) -> None:
        self.line = line
        infos = [line.tags[n] for n in names]
        self.low = np.array([i.low for i in infos])
        self.high = np.array([i.high for i in infos])
        self.stale = np.array([i.stale_after for i in infos])
        col = {n: k for k, n in enumerate(names)}
        self.specs = [(s.name, col[s.tag], s.factor) for s in line.signals if s.tag in col]
        self.computed = sorted(line.computed_signals)

    def usable(self, frames: TagFrames) -> np.ndarray:
        v = frames.value
        with np.errstate(invalid="ignore"):
            return (np.isfinite(v) & (frames.quality == QUALITY_GOOD) & (frames.age <= self.stale)
                    & (v >= self.low) & (v <= self.high))

    def derive(self, frames: TagFrames) -> dict[str, Signal]:
        ok = self.usable(frames)
        out = {name: Signal(frames.value[:, c] * f, ok[:, c]) for name, c, f in self.specs}
        for name in self.computed:
            winder = name.split("/", 1)[1]
            rot = out.get(f"rotation/{winder}")
            web = out.get("speed/web")
            if rot is None or web is None:
                continue
            d = diameter_from_speed(web.value, rot.value)
            out[name] = Signal(d, rot.ok & web.ok & np.isfinite(d))
        return out
