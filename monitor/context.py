"""Context windows: the signals a check read, from shortly before to shortly after each raise.

Keeps the last ``pre + post`` seconds of every signal and raw tag (as blocks, trimmed
by time). When an alarm is raised, the window of the check's inputs (or, for a tag
check, the tag itself) is cut out once ``post`` seconds have passed, decimated to at
most ``max_points`` values, and handed to the history.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass

import numpy as np
from spanwatch.connectors.history import Context


@dataclass
class _Pending:
    key: str
    raised_t: float
    names: tuple[str, ...]


class ContextRecorder:
    def __init__(self, frame_rate: float, *, pre: float = 20.0, post: float = 10.0, max_points: int = 300) -> None:
        self.rate, self.pre, self.post, self.max_points = frame_rate, pre, post, max_points
        self._blocks: deque[tuple[np.ndarray, dict[str, np.ndarray]]] = deque()
        self._pending: list[_Pending] = []

    def push(self, t: np.ndarray, series: dict[str, np.ndarray]) -> None:
        if t.size == 0:
            return
        self._blocks.append((t, series))
        horizon = t[-1] - (self.pre + self.post + 5.0)
        while len(self._blocks) > 1 and self._blocks[0][0][-1] < horizon:
            self._blocks.popleft()

    def on_raise(self, key: str, raised_t: float, names: tuple[str, ...]) -> None:
        self._pending.append(_Pending(key, raised_t, names))

    def collect(self, now: float, *, flush: bool = False) -> list[Context]:
        ready = [p for p in self._pending if flush or now >= p.raised_t + self.post]
        if not ready:
            return []
        self._pending = [p for p in self._pending if p not in ready]
        t = np.concatenate([b[0] for b in self._blocks])
        out = []
        for p in ready:
            sel = (t >= p.raised_t - self.pre) & (t <= p.raised_t + self.post)
            if not sel.any():
                continue
            idx = np.flatnonzero(sel)
            step = max(1, int(np.ceil(idx.size / self.max_points)))
            idx = idx[::step]
            for name in p.names:
                parts = [b[1].get(name) for b in self._blocks]
                if any(x is None for x in parts):
                    continue
                vals = np.concatenate(parts)[idx]  # type: ignore[arg-type]
                out.append(Context(p.key, p.raised_t, name, float(t[idx[0]]), step / self.rate,
                                   [None if not np.isfinite(v) else round(float(v), 6) for v in vals]))
        return out
