"""Alarm handling: from check values to raised and cleared alarms.

Each :class:`AlarmPoint` (a check on one object at one level) is a
small state machine, evaluated over whole blocks of frames with numpy:

1. **Condition with deadband** (ISA-18.2 / IEC 62682 nuisance-alarm tools): the
   condition sets when the value reaches the limit and resets only once it is back
   past the limit by the deadband. ``direction`` says which side is abnormal
   (``high``, ``low``, or ``abs`` for |value|).
2. **Validity**: frames where the check is invalid hold the condition (a lost input
   neither raises nor clears an alarm), except frames gated by the line state, which
   reset it (suppression by design: a stopped line has no traction alarm).
3. **On-delay / off-delay**: the condition must hold for ``on_delay`` seconds before
   the alarm is raised and stay clear for ``off_delay`` seconds before it clears.

The result is a list of :class:`Transition` (raise / clear) with the frame time,
value, limit, priority and line state. Acknowledge, shelve and the rest of the
ISA-18.2 lifecycle build on these transitions.

Sources: ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries*;
IEC 62682:2014; EEMUA 191, 3rd ed. (2013). The tools above are named as these documents
name them; their exact clauses were not checked (from memory).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from spanwatch.rules.base import CheckResult, Reason
from spanwatch.rules.windows import forward_fill_index

_OK, _LINE_STATE = int(Reason.OK), int(Reason.LINE_STATE)

LEVELS = ("warning", "alarm")

@dataclass(frozen=True)
class AlarmPoint:
    """One alarm: a check kind on one object at one level, with its settings and rationalization."""

    kind: str
    object_id: str
    level: str
    limit: float
    direction: str
    deadband: float
    on_delay: float
    off_delay: float
    priority: str
    unit: str
    cause: str
    consequence: str
    action: str
    response_time: float

    @property
    def key(self) -> str:
        return f"{self.kind}:{self.object_id}:{self.level}"


@dataclass(frozen=True)
class Transition:
    """An alarm raised or cleared."""

    t: float
    point: AlarmPoint
    event: str  # "raise" | "clear"
    value: float
    line_state: int
    peak: float = float("nan")  # most abnormal value of the episode (on clear)

    @property
    def key(self) -> str:
        return self.point.key


@dataclass
class _State:
    cond: bool = False
    since: float = -np.inf  # time the condition took its current value
    active: bool = False
    peak: float = float("nan")  # largest severity of the episode
    peak_value: float = float("nan")  # the check value (with its sign) at that severity
    restored: bool = False  # carried on from a previous run and not yet evaluated on fresh data


class AlarmEngine:
    """Evaluate every alarm point over blocks of check results."""

    def __init__(self, points: list[AlarmPoint]) -> None:
        self.points = points
        self.state = {p.key: _State() for p in points}
        self.groups: dict[tuple[str, str], list[AlarmPoint]] = {}
        for p in points:
            self.groups.setdefault((p.kind, p.object_id), []).append(p)

    def active(self) -> list[AlarmPoint]:
        return [p for p in self.points if self.state[p.key].active]

    def restore(self, key: str, since: float) -> bool:
        """Mark an alarm active as left by a previous run (its condition is taken to hold since ``since``).

        A carried-on alarm stays active until its check has been evaluated on fresh data and found clear:
        frames where the check is invalid hold it (as always), and so do frames gated by the line state
        until the check has had one valid frame (a restart's line state is not yet known).
        """
        st = self.state.get(key)
        if st is None:
            return False
        st.active = st.cond = True
        st.since = since
        st.restored = True
        return True

    def evaluate(self, t: np.ndarray, results: dict[tuple[str, str], CheckResult],
                 line_state: np.ndarray) -> list[Transition]:
        out: list[Transition] = []
        if t.shape[0] == 0:
            return out
        for key, pts in self.groups.items():
            res = results.get(key)
            if res is None:
                continue
            valid = res.reason == _OK
            gated = res.reason == _LINE_STATE
            sev: dict[str, np.ndarray] = {}
            for p in pts:
                x = sev.get(p.direction)
                if x is None:
                    x = sev[p.direction] = severity(res.value, p.direction)
                out.extend(self._point(p, t, res, x, valid, gated, line_state))
        out.sort(key=lambda tr: tr.t)
        return out

    def _point(self, p: AlarmPoint, t: np.ndarray, res: CheckResult, x: np.ndarray, valid: np.ndarray,
               gated: np.ndarray, line_state: np.ndarray) -> list[Transition]:
        st = self.state[p.key]
        n = t.shape[0]
        limit = p.limit if p.direction != "low" else -p.limit
        with np.errstate(invalid="ignore"):
            sets = valid & (x >= limit)
            if not st.active and not st.cond and not sets.any():
                return []  # quiet: nothing pending, nothing to raise
            if st.restored:  # carried on from a previous run: only a valid evaluation may clear it
                first = int(np.argmax(valid)) if valid.any() else n
                gated = gated.copy()
                gated[:first] = False
                st.restored = first == n
            resets = (valid & (x < limit - p.deadband)) | gated
        code = np.where(sets, 1, np.where(resets, 0, -1))
        idx = forward_fill_index(code >= 0)
        cond = np.where(idx >= 0, code[np.maximum(idx, 0)] == 1, st.cond)
        prev = np.r_[st.cond, cond[:-1]]
        cuts = np.flatnonzero(cond != prev)
        cut_set = set(cuts.tolist())
        bounds = [0, *cuts.tolist(), n]
        out: list[Transition] = []
        for a, b in itertools.pairwise(bounds):
            if a == b:
                continue
            if a in cut_set:
                st.cond = bool(cond[a])
                st.since = float(t[a])
            seg_start = a
            if st.cond and not st.active:
                due = st.since + p.on_delay
                k = a + int(np.searchsorted(t[a:b], due - 1e-9))
                ready = np.flatnonzero(valid[k:b])  # raise on a frame where the check is valid
                if ready.size:
                    k += int(ready[0])
                    st.active = True
                    st.peak = st.peak_value = float("nan")
                    out.append(Transition(float(t[k]), p, "raise", float(res.value[k]), int(line_state[k])))
                    seg_start = k
            if st.active:
                hi = b
                if not st.cond:
                    due = st.since + p.off_delay
                    if t[b - 1] >= due - 1e-9:
                        k = a + int(np.searchsorted(t[a:b], due - 1e-9))
                        hi = k
                        st.active = False
                        self._track_peak(st, x[seg_start:hi], res.value[seg_start:hi])
                        out.append(Transition(float(t[k]), p, "clear", float(res.value[k]), int(line_state[k]),
                                              peak=st.peak_value))
                        continue
                self._track_peak(st, x[seg_start:hi], res.value[seg_start:hi])
        return out

    @staticmethod
    def _track_peak(st: _State, xs: np.ndarray, values: np.ndarray) -> None:
        """Keep the most abnormal severity of the episode and the signed check value it came from."""
        fin = np.isfinite(xs)
        if fin.any():
            i = int(np.argmax(np.where(fin, xs, -np.inf)))
            if not np.isfinite(st.peak) or xs[i] > st.peak:
                st.peak, st.peak_value = float(xs[i]), float(values[i])


def severity(value: np.ndarray, direction: str) -> np.ndarray:
    """The value turned so that larger is more abnormal: v (high), -v (low), |v| (abs)."""
    if direction == "high":
        return value
    if direction == "low":
        return -value
    if direction == "abs":
        return np.abs(value)
    raise ValueError(f"expected direction 'high', 'low' or 'abs', got {direction!r}")
