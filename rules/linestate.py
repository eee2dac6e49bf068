"""Line state from line speed and its rate of change, and roll changes from winder signals.

The line state gates the checks: a draw residual means nothing while the line
accelerates, a traction margin nothing while it stands still. Classification:

* STOPPED       |v| < stop_speed
* THREADING     |v| < thread_speed (crawl speed; tensions may be off)
* ACCELERATING  dv/dt >  accel_threshold, and for ``settle_time`` after
* DECELERATING  dv/dt < -accel_threshold, and for ``settle_time`` after
* RUNNING       otherwise
* UNKNOWN       the speed signal is not usable

dv/dt is the difference of two adjacent rolling means of v, each half of
``accel_window`` long, divided by half the window: a smoothed derivative whose
noise falls with the square root of the window.

The classes and their thresholds are common practice, no source; the thresholds are
configuration.
"""

from __future__ import annotations

import numpy as np
from spanwatch.rules.base import Block, LineState, Signal
from spanwatch.rules.windows import Lagged, RollingMean, forward_fill_index

_STOPPED, _THREADING, _ACCELERATING, _RUNNING, _DECELERATING = (
    int(LineState.STOPPED), int(LineState.THREADING), int(LineState.ACCELERATING), int(LineState.RUNNING),
    int(LineState.DECELERATING))


def classify_line_state(speed: np.ndarray, accel: np.ndarray, *, stop_speed: float, thread_speed: float,
                        accel_threshold: float) -> np.ndarray:
    """Vectorised line-state codes (see module docstring); NaN speed gives UNKNOWN."""
    v = np.abs(np.asarray(speed, dtype=float))
    a = np.asarray(accel, dtype=float)
    state = np.full(v.shape, int(LineState.RUNNING), dtype=np.int8)
    state[a > accel_threshold] = int(LineState.ACCELERATING)
    state[a < -accel_threshold] = int(LineState.DECELERATING)
    state[v < thread_speed] = int(LineState.THREADING)
    state[v < stop_speed] = int(LineState.STOPPED)
    state[~np.isfinite(v)] = int(LineState.UNKNOWN)
    return state


class LineStateTracker:
    """Streaming line state; ``update(t, speed)`` returns codes per frame and keeps its history."""

    def __init__(self, *, stop_speed: float, thread_speed: float, accel_threshold: float,
                 accel_window: float, settle_time: float, frame_rate: float) -> None:
        half = max(1, round(accel_window * frame_rate / 2))
        self.half_dt = half / frame_rate
        self._recent = RollingMean(half)
        self._older = Lagged(half)
        self.kw = dict(stop_speed=stop_speed, thread_speed=thread_speed, accel_threshold=accel_threshold)
        self.settle = settle_time
        self._last_transient_t = -np.inf
        self._last_transient_state = int(LineState.RUNNING)
        self._last_slow_t = -np.inf

    def update(self, t: np.ndarray, speed: Signal) -> tuple[np.ndarray, np.ndarray]:
        """Return ``(state, accel)`` for the block."""
        recent, ok_r = self._recent.update(speed.value, speed.ok)
        older, ok_o = self._older.update(recent, ok_r)
        accel = np.where(ok_r & ok_o, (recent - older) / self.half_dt, 0.0)
        v = np.where(speed.ok, speed.value, np.nan)
        state = classify_line_state(v, accel, **self.kw)
        # Hold ACCELERATING / DECELERATING for settle_time after the ramp ends.
        transient = (state == _ACCELERATING) | (state == _DECELERATING)
        idx = forward_fill_index(transient)
        last_t = np.where(idx >= 0, t[np.maximum(idx, 0)], self._last_transient_t)
        last_s = np.where(idx >= 0, state[np.maximum(idx, 0)], self._last_transient_state)
        hold = (state == _RUNNING) & (t - last_t < self.settle)
        state = np.where(hold, last_s, state).astype(np.int8)
        if t.size:
            self._last_transient_t = float(last_t[-1])
            self._last_transient_state = int(last_s[-1])
        # Anything slower than running (stopped, threading) also needs settling before RUNNING.
        slow = (state == _STOPPED) | (state == _THREADING)
        idx = forward_fill_index(slow)
        t_slow = np.where(idx >= 0, t[np.maximum(idx, 0)], self._last_slow_t)
        after = (state == _RUNNING) & (t - t_slow < self.settle)
        state[after] = int(LineState.ACCELERATING)
        if t.size:
            self._last_slow_t = float(t_slow[-1])
        return state, accel


class RollChangeDetector:
    """Roll change on one winder: a diameter jump, a rising edge of the core-change tag,
    or the length counter falling back (reset).

    ``update`` returns ``(start, settling)``: start is true on the first frame of a new
    roll; settling is true for ``settle_time`` seconds from it.
    """

    def __init__(self, *, jump: float, settle_time: float, length_drop: float = 1.0) -> None:
        self.jump, self.settle, self.length_drop = jump, settle_time, length_drop
        self._d = np.nan
        self._c = 0.0
        self._len = np.nan
        self._t_start = -np.inf

    def update(self, t: np.ndarray, diameter: Signal, core_change: Signal | None = None,
               length: Signal | None = None) -> tuple[np.ndarray, np.ndarray]:
        n = t.shape[0]
        d = np.where(diameter.ok, diameter.value, np.nan)
        d_fill = _ffill(d, self._d)
        prev = np.concatenate([[self._d], d_fill[:-1]])
        with np.errstate(invalid="ignore"):
            start = np.abs(d - prev) > self.jump
        if core_change is not None:
            c = _ffill(np.where(core_change.ok, core_change.value, np.nan), self._c)
            cprev = np.concatenate([[self._c], c[:-1]])
            start |= (c >= 0.5) & (cprev < 0.5)
            self._c = float(c[-1]) if n else self._c
        if length is not None:
            ln = _ffill(np.where(length.ok, length.value, np.nan), self._len)
            lprev = np.concatenate([[self._len], ln[:-1]])
            with np.errstate(invalid="ignore"):
                start |= (lprev - ln) > self.length_drop
            self._len = float(ln[-1]) if n else self._len
        if n:
            self._d = float(d_fill[-1])
        idx = forward_fill_index(start)
        t_start = np.where(idx >= 0, t[np.maximum(idx, 0)], self._t_start)
        if n:
            self._t_start = float(t_start[-1])
        settling = (t - t_start) < self.settle
        return start, settling


def _ffill(x: np.ndarray, before: float) -> np.ndarray:
    ok = np.isfinite(x)
    idx = forward_fill_index(ok)
    return np.where(idx >= 0, x[np.maximum(idx, 0)], before)


def apply_line_state(block: Block, tracker: LineStateTracker, speed_signal: str = "speed/line") -> np.ndarray:
    """Fill ``block.line_state`` from the named speed signal; returns the acceleration."""
    state, accel = tracker.update(block.t, block.signal(speed_signal))
    block.line_state = state
    return accel
