"""Time alignment: tag samples in, frames on a fixed grid out.

Frames are at integer multiples of the frame period (epoch-aligned, so a restart
lands on the same grid). Each frame holds, per tag, the newest sample at or before
the frame time (sample and hold), its quality, and its age. Per tag, a sample must
be newer than the newest one accepted: an older one is *out of order*, an equal one
a *duplicate*; both are refused and reported, never silently used.

Frames advance in bounded steps whatever the span asked for: :meth:`Aligner.emit`
returns at most ``max_frames`` frames per call, and a stretch longer than ``max_gap``
seconds in which no sample at all arrived is a *gap*: it is skipped instead of being
filled with held values (a recording with a six-hour hole, a process that was
suspended, a clock that stepped). After a gap the values held from before it are not
carried over (quality "no sample yet") and ages count from the end of the gap, so the
checks start afresh rather than read hours-old values as current.
"""

from __future__ import annotations

import math

import numpy as np
from spanwatch.rules.base import QUALITY_NONE, TagFrames

REJECT_OUT_OF_ORDER = "out of order"
REJECT_DUPLICATE = "duplicate timestamp"


class Aligner:
    """Sample-and-hold alignment of ``names`` onto a frame grid at ``frame_rate``."""

    def __init__(self, names: tuple[str, ...], frame_rate: float, *, max_gap: float = 30.0,
                 max_frames: int | None = None) -> None:
        self.names = names
        self.rate = frame_rate
        self.max_gap = max_gap
        self.max_frames = max_frames if max_frames is not None else max(1, round(10.0 * frame_rate))
        self.gaps: list[tuple[float, float]] = []  # (last frame before, first frame after) of every gap skipped
        k = len(names)
        self.last_t = np.full(k, -np.inf)  # newest accepted sample per tag (pending included)
        self.held_t = np.full(k, -np.inf)  # newest sample at or before the last emitted frame
        self.held_v = np.full(k, np.nan)
        self.held_q = np.full(k, QUALITY_NONE, dtype=np.int8)
        self._pend: list[list[tuple[np.ndarray, np.ndarray, np.ndarray]]] = [[] for _ in range(k)]
        self.next_frame: int | None = None  # index of the next frame to emit
        self.late = 0
        self.grace_until = -np.inf  # a tag not seen yet ages from this time
        self.start: float | None = None  # live: when monitoring started (frames start there at the latest)
        self.backlog = 3600.0

    def start_at(self, t: float, grace: float = 0.0, backlog: float = 3600.0) -> None:
        """Monitoring starts at ``t``: frames start there even if no sample ever arrives, so a tag that never
        reports goes stale (``grace`` seconds are allowed for connecting before a never-seen tag ages); if older
        samples arrive first (a broker's queue after a restart, up to ``backlog`` seconds old), frames start at
        the first of them instead, so nothing queued is skipped."""
        self.start, self.backlog = t, backlog
        self.grace_until = t + grace

    def _first_frame(self, until: float) -> int | None:
        """Index of the first frame: the first sample (a recording), or the start of monitoring (live) unless older
        samples within the backlog arrived first."""
        first = self._first_pending()
        if self.start is None:
            return None if first is None else math.ceil(first * self.rate - 1e-9)
        if first is None or first >= self.start:
            if until < self.start:
                return None
            first = self.start
        else:
            first = max(first, self.start - self.backlog)
        return math.ceil(first * self.rate - 1e-9)

    @property
    def emitted_until(self) -> float:
        return -np.inf if self.next_frame is None else (self.next_frame - 1) / self.rate

    def push(self, col: np.ndarray, t: np.ndarray, v: np.ndarray, q: np.ndarray) -> dict[str, np.ndarray]:
        """Accept samples (column index, time, SI value, quality). Returns masks of refused samples by reason,
        plus ``"late"``: accepted samples older than frames already emitted (used for later frames only)."""
        n = t.shape[0]
        refused_ooo = np.zeros(n, dtype=bool)
        refused_dup = np.zeros(n, dtype=bool)
        if n == 0:
            return {REJECT_OUT_OF_ORDER: refused_ooo, REJECT_DUPLICATE: refused_dup, "late": refused_ooo}
        # small tag indices sort by radix (O(n)) as 16-bit integers
        order = np.argsort(col.astype(np.int16) if len(self.names) < 32_768 else col, kind="stable")
        cs = col[order]
        starts = np.flatnonzero(np.r_[True, cs[1:] != cs[:-1]])
        ends = np.r_[starts[1:], n]
        for a, b in zip(starts, ends, strict=True):
            c = int(cs[a])
            idx = order[a:b]
            tt = t[idx]
            prev_max = np.maximum.accumulate(np.r_[self.last_t[c], tt])[:-1]
            ok = tt > prev_max
            refused_ooo[idx[tt < prev_max]] = True
            refused_dup[idx[tt == prev_max]] = True
            if ok.any():
                good = idx[ok]
                self._pend[c].append((t[good], v[good], q[good]))
                self.last_t[c] = float(t[good][-1])
        late = ~refused_ooo & ~refused_dup & (t <= self.emitted_until)
        self.late += int(late.sum())
        return {REJECT_OUT_OF_ORDER: refused_ooo, REJECT_DUPLICATE: refused_dup, "late": late}

    def _first_pending(self) -> float | None:
        firsts = [p[0][0][0] for p in self._pend if p and p[0][0].size]
        return min(firsts) if firsts else None

    def _skip_gap(self, until: float) -> None:
        """Skip a stretch of more than ``max_gap`` seconds with no sample at all (see the module docstring)."""
        done = self.emitted_until
        first = self._first_pending()
        resume = min(until, first) if first is not None else until
        if resume - done <= self.max_gap:
            return
        self.next_frame = math.ceil(resume * self.rate - 1e-9)
        self.gaps.append((done, self.next_frame / self.rate))
        self.held_t[:] = -np.inf
        self.held_v[:] = np.nan
        self.held_q[:] = QUALITY_NONE
        self.grace_until = max(self.grace_until, resume)

    def emit(self, until: float) -> tuple[np.ndarray, TagFrames] | None:
        """``(frame times, frames)`` with time <= ``until`` not emitted yet, at most ``max_frames`` of them (call
        again for the rest); None if there are none. A gap longer than ``max_gap`` is skipped first."""
        if self.next_frame is None:
            self.next_frame = self._first_frame(until)
            if self.next_frame is None:
                return None
        elif math.isfinite(until) and until - self.emitted_until > self.max_gap:
            self._skip_gap(until)
        last = math.floor(until * self.rate + 1e-9) if math.isfinite(until) else None
        if last is None or last < self.next_frame:
            return None
        last = min(last, self.next_frame + self.max_frames - 1)
        frames = np.arange(self.next_frame, last + 1) / self.rate
        k = len(self.names)
        n = frames.shape[0]
        value = np.empty((k, n)).T  # column-major: each tag's frames contiguous (written and read by tag)
        quality = np.empty((k, n), dtype=np.int8).T
        age = np.empty((k, n)).T
        t_end = frames[-1]
        for c in range(k):
            pend = self._pend[c]
            if pend:
                pt = np.concatenate([p[0] for p in pend])
                pv = np.concatenate([p[1] for p in pend])
                pq = np.concatenate([p[2] for p in pend])
            else:
                pt = pv = np.zeros(0)
                pq = np.zeros(0, dtype=np.int8)
            j = np.searchsorted(pt, frames, side="right") - 1
            use = j >= 0
            jj = np.maximum(j, 0)
            if pt.size:
                value[:, c] = np.where(use, pv[jj], self.held_v[c])
                quality[:, c] = np.where(use, pq[jj], self.held_q[c])
                st = np.where(use, pt[jj], self.held_t[c])
            else:
                value[:, c] = self.held_v[c]
                quality[:, c] = self.held_q[c]
                st = np.full(n, self.held_t[c])
            # a tag seen ages from its sample; one never seen (or not since a gap) from the end of the grace
            age[:, c] = np.where(np.isfinite(st), frames - st, frames - self.grace_until)
            # carry the newest sample at or before the last frame; keep the rest pending
            m = int(np.searchsorted(pt, t_end, side="right"))
            if m > 0:
                self.held_t[c], self.held_v[c], self.held_q[c] = pt[m - 1], pv[m - 1], pq[m - 1]
            self._pend[c] = [(pt[m:], pv[m:], pq[m:])] if m < pt.size else []
        self.next_frame = last + 1
        return frames, TagFrames(self.names, value, quality, age)
