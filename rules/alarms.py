"""Alarm handling: from check values to raised and cleared alarms.

Each :class:`AlarmPoint` (a check on one object at one level) is a
small state machine, evaluated over whole blocks of frames with numpy.
``direction`` says which side is abnormal (``high``, ``low``, or ``abs`` for |value|);
the *severity* turns the value so that larger is more abnormal (:func:`severity`).

1. **On-delay, beyond the limit** (ANSI/ISA-18.2-2016 / IEC 62682 nuisance-alarm tools;
   EEMUA 191; from memory): while the alarm is normal, the on-delay counts the time the
   value stays continuously *beyond the limit* (severity >= limit). A valid frame back on
   the normal side of the limit restarts the delay -- a value inside the deadband is on the
   normal side. So the value recorded at a raise, and the peak of an episode, are beyond
   the limit.
2. **Deadband and off-delay, on the return to normal only**: while the alarm is active,
   the off-delay counts the time the value stays continuously beyond the limit minus the
   deadband on the normal side (severity < limit - deadband); a valid frame at or above
   limit - deadband restarts it. The alarm clears once the off-delay has run.
3. **Validity**: frames where the check is invalid hold whatever is pending (a lost input
   neither raises nor clears an alarm; the delay keeps running), except frames gated by
   the line state, which count as normal (suppression by design: a stopped line has no
   traction alarm). A raise waits for a valid frame beyond the limit.
4. **Chattering** (ISA-18.2 TR / EEMUA 191, from memory: 3 or more raises of one alarm
   within 60 s): every raise that brings the raises within ``chatter.window`` seconds to
   ``chatter.count`` or more is flagged ``chattering``; while the alarm chatters (for
   ``chatter.hold`` seconds after such a raise) a return to normal needs the longer
   off-delay ``chatter.off_delay`` (0: no remedy). See :func:`chattering`.
5. **First-out** (ISA-18.2 first-out alarming, from memory): each point may belong to
   named groups. A group is *quiet* when none of its points is active. A raise is
   first-out when one of its groups was quiet before the frame of the raise; every point
   of that group raised on that same frame is first-out too (frames are the engine's
   resolution of time). A raise while every group of the point already has an active
   point is not first-out; a clear on the same frame as a raise does not make the group
   quiet for it.

The result is a list of :class:`Transition` (raise / clear) with the frame time,
value, limit, priority and line state. Acknowledge, shelve and the rest of the
ISA-18.2 lifecycle build on these transitions.

Sources: ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries*;
IEC 62682:2014; EEMUA 191, 3rd ed. (2013). The tools above are named as these documents
name them; their exact clauses were not checked (from memory).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from spanwatch.rules.base import CheckResult, Reason
from spanwatch.rules.windows import forward_fill_index

_OK, _LINE_STATE = int(Reason.OK), int(Reason.LINE_STATE)
_EPS = 1e-9  # s: frame times are integer frame indices over a rate; a due time within this is reached

LEVELS = ("warning", "alarm")


@dataclass(frozen=True)
class AlarmPoint:
    """One alarm: a check kind on one object at one level, with its settings and rationalization.

    ``latched``: an ISA-18.2 latched alarm stays annunciated after its return to normal until an
    operator resets it (the lifecycle reads the flag; the engine raises and clears as for any
    other). ``groups``: the first-out groups the alarm belongs to. ``blames``: the measured things
    a user can go and look at (:func:`spanwatch.rules.base.blames_of`). ``detail``: extras of the
    check's result the raise carries at its frame (a drift's change time and size).
    """

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
    latched: bool = False
    groups: tuple[str, ...] = ()
    blames: tuple[str, ...] = ()
    detail: tuple[str, ...] = ()

    @property
    def key(self) -> str:
        return f"{self.kind}:{self.object_id}:{self.level}"


@dataclass(frozen=True)
class Transition:
    """An alarm raised or cleared.

    ``first_out``: a raise that was the first in one of its point's groups since that group was
    last quiet (see the module docstring). ``chattering``: a raise that made ``count`` or more
    raises of its point within the chatter window.
    """

    t: float
    point: AlarmPoint
    event: str  # "raise" | "clear"
    value: float
    line_state: int
    peak: float = float("nan")  # most abnormal value of the episode (on clear)
    first_out: bool = False
    chattering: bool = False
    detail: tuple[tuple[str, float], ...] = ()  # on a raise: the point's detail extras at its frame

    @property
    def key(self) -> str:
        return self.point.key


@dataclass(frozen=True)
class ChatterSettings:
    """When an alarm chatters and what the engine does about it (the ``[alarms]`` config section).

    ``count`` raises within ``window`` seconds make chattering (ISA-18.2 TR / EEMUA 191: 3 within
    60 s, from memory); while it chatters, and for ``hold`` seconds after its last chattering
    raise, its off-delay is at least ``off_delay`` seconds (0 disables the remedy; chattering is
    flagged either way). The 30 s and 10 min are common practice, no source.
    """

    count: int = 3
    window: float = 60.0
    off_delay: float = 30.0
    hold: float = 600.0


def chattering(recent: tuple[float, ...], t: float, count: int, window: float) -> tuple[tuple[float, ...], bool]:
    """Add a raise at ``t`` to the raise times ``recent``; say whether it chatters.

    Keeps the raises no older than ``window`` seconds before ``t`` (``t - r <= window``) and
    returns them with True when they are ``count`` or more (this raise included).

    >>> chattering((0.0, 30.0), 60.0, 3, 60.0)
    ((0.0, 30.0, 60.0), True)
    >>> chattering((0.0, 30.0), 60.5, 3, 60.0)
    ((30.0, 60.5), False)
    """
    kept = (*(r for r in recent if t - r <= window), t)
    return kept, len(kept) >= count


@dataclass
class _State:
    cond: bool = False  # normal: beyond the limit; active: at or beyond limit - deadband
    since: float = -np.inf  # time the condition took its current value
    active: bool = False
    peak: float = float("nan")  # largest severity of the episode
    peak_value: float = float("nan")  # the check value (with its sign) at that severity
    restored: bool = False  # carried on from a previous run and not yet evaluated on fresh data
    raises: tuple[float, ...] = ()  # raise times within the chatter window
    chatter_until: float = -np.inf  # the longer off-delay applies to returns to normal starting before this
    chatter_flags: list[float] | None = None  # times of this block's chattering raises


class AlarmEngine:
    """Evaluate every alarm point over blocks of check results."""

    def __init__(self, points: list[AlarmPoint], chatter: ChatterSettings | None = None) -> None:
        self.points = points
        self.chatter = chatter if chatter is not None else ChatterSettings()
        self.state = {p.key: _State() for p in points}
        self.groups: dict[tuple[str, str], list[AlarmPoint]] = {}
        for p in points:
            self.groups.setdefault((p.kind, p.object_id), []).append(p)
        self.first_out_groups: dict[str, list[AlarmPoint]] = {}
        for p in points:
            for g in p.groups:
                self.first_out_groups.setdefault(g, []).append(p)

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
        busy = {g: sum(self.state[p.key].active for p in pts) for g, pts in self.first_out_groups.items()}
        worst = _worst(self.groups, results)
        for key, pts in self.groups.items():
            res = results.get(key)
            if res is None:
                continue
            w = worst[key]
            engaged = [p for p in pts if self._engaged(p, w)]
            if not engaged:
                continue  # quiet: nothing pending, nothing standing, no valid frame beyond a limit
            valid = res.reason == _OK
            gated = res.reason == _LINE_STATE
            sev: dict[str, np.ndarray] = {}
            for p in engaged:
                x = sev.get(p.direction)
                if x is None:
                    x = sev[p.direction] = severity(res.value, p.direction)
                out.extend(self._point(p, t, res, x, valid, gated, line_state))
        out.sort(key=lambda tr: tr.t)
        if busy and out:
            out = _first_out(out, busy)
        return out

    def _engaged(self, p: AlarmPoint, worst: tuple[float, float, float]) -> bool:
        """Whether ``p`` needs its frame-by-frame evaluation this block: its condition is pending or it stands, or
        its most abnormal valid value (``worst``: the largest, the smallest and the largest magnitude) reaches its
        limit. A quiet point (most of them, most of the time) costs nothing more."""
        st = self.state[p.key]
        if st.active or st.cond:
            return True
        hi, lo, ab = worst
        if p.direction == "high":
            return hi >= p.limit
        if p.direction == "low":
            return lo <= p.limit
        return ab >= p.limit

    def _point(self, p: AlarmPoint, t: np.ndarray, res: CheckResult, x: np.ndarray, valid: np.ndarray,
               gated: np.ndarray, line_state: np.ndarray) -> list[Transition]:
        st = self.state[p.key]
        n = t.shape[0]
        limit = p.limit if p.direction != "low" else -p.limit
        back = limit - p.deadband  # the return to normal: below this
        with np.errstate(invalid="ignore"):
            beyond = valid & (x >= limit)
            if not st.active and not st.cond and not beyond.any():
                return []  # quiet: nothing pending, nothing to raise
            if st.restored:  # carried on from a previous run: only a valid evaluation may clear it
                first = int(np.argmax(valid)) if valid.any() else n
                gated = gated.copy()
                gated[:first] = False
                st.restored = first == n
            normal = (valid & (x < limit)) | gated
            held = valid & (x >= back)
            returned = (valid & (x < back)) | gated
        # per frame: the condition of each phase, invalid frames holding the last valid one
        on = _held(beyond, normal, st.cond if not st.active else False)
        off = _held(held, returned, st.cond if st.active else True)
        cuts_on = _cuts(on, st.cond if not st.active else False)
        cuts_off = _cuts(off, st.cond if st.active else True)
        out: list[Transition] = []
        pos = 0
        while pos < n:
            if not st.active:  # pending: the on-delay runs while the value is beyond the limit
                end = _next_cut(cuts_on, pos, n)
                if bool(on[pos]) != st.cond:
                    st.cond, st.since = bool(on[pos]), float(t[pos])
                if st.cond:
                    k = pos + int(np.searchsorted(t[pos:end], st.since + p.on_delay - _EPS))
                    ready = np.flatnonzero(valid[k:end])  # raise on a valid frame (beyond the limit, as on[] holds)
                    if ready.size:
                        k += int(ready[0])
                        tr = self._raise(p, st, float(t[k]), float(res.value[k]), int(line_state[k]))
                        if p.detail:
                            tr = replace(tr, detail=tuple((f, float(res.extras[f][k])) for f in p.detail
                                                          if f in res.extras))
                        out.append(tr)
                        pos = k
                        continue
                pos = end
                continue
            end = _next_cut(cuts_off, pos, n)  # active: the off-delay runs while the value is back past the band
            if bool(off[pos]) != st.cond:
                st.cond, st.since = bool(off[pos]), float(t[pos])
            hi = end
            if not st.cond:
                delay = p.off_delay
                if st.since < st.chatter_until:
                    delay = max(delay, self.chatter.off_delay)
                due = st.since + delay
                if t[end - 1] >= due - _EPS:
                    hi = pos + int(np.searchsorted(t[pos:end], due - _EPS))
            self._track_peak(st, x[pos:hi], res.value[pos:hi])
            if hi < end:
                st.active = False  # the on-phase condition at the clear is normal (see _held)
                st.cond, st.since = False, float(t[hi])
                out.append(Transition(float(t[hi]), p, "clear", float(res.value[hi]), int(line_state[hi]),
                                      peak=st.peak_value))
                pos = hi
                continue
            pos = end
        return out

    def _raise(self, p: AlarmPoint, st: _State, t: float, value: float, line_state: int) -> Transition:
        st.active = True
        st.cond, st.since = True, t
        st.peak = st.peak_value = float("nan")
        c = self.chatter
        st.raises, chatters = chattering(st.raises, t, c.count, c.window)
        if chatters:
            st.chatter_until = t + c.hold
        return Transition(t, p, "raise", value, line_state, chattering=chatters)

    @staticmethod
    def _track_peak(st: _State, xs: np.ndarray, values: np.ndarray) -> None:
        """Keep the most abnormal severity of the episode and the signed check value it came from."""
        fin = np.isfinite(xs)
        if fin.any():
            i = int(np.argmax(np.where(fin, xs, -np.inf)))
            if not np.isfinite(st.peak) or xs[i] > st.peak:
                st.peak, st.peak_value = float(xs[i]), float(values[i])


def _held(sets: np.ndarray, resets: np.ndarray, initial: bool) -> np.ndarray:
    """Per frame: True after a ``sets`` frame, False after a ``resets`` frame, ``initial`` before either.

    Between two phases the same frames decide: a frame that resets the active phase (valid and
    below limit - deadband, or gated) also resets the normal phase, and an invalid frame holds
    both, so each phase's array is right from the frame its phase begins on.
    """
    code = np.where(sets, 1, np.where(resets, 0, -1))
    idx = forward_fill_index(code >= 0)
    return np.where(idx >= 0, code[np.maximum(idx, 0)] == 1, initial)


def _cuts(cond: np.ndarray, initial: bool) -> np.ndarray:
    """Frames where ``cond`` differs from the frame before (the first frame: from ``initial``)."""
    return np.flatnonzero(cond != np.r_[initial, cond[:-1]])


def _next_cut(cuts: np.ndarray, pos: int, n: int) -> int:
    """The first cut after frame ``pos``, or ``n``."""
    i = int(np.searchsorted(cuts, pos, side="right"))
    return int(cuts[i]) if i < cuts.size else n


def _first_out(trs: list[Transition], busy: dict[str, int]) -> list[Transition]:
    """Mark the first-out raises of time-sorted transitions; ``busy``: active points per group before them.

    A group's state is taken as it was before each frame: raises on the frame a quiet group
    first sees are all first-out; clears and raises of that frame update the counts after.
    """
    out: list[Transition] = []
    i = 0
    while i < len(trs):
        j = i
        while j < len(trs) and trs[j].t == trs[i].t:
            j += 1
        before = dict(busy)
        for tr in trs[i:j]:
            gs = tr.point.groups
            if tr.event == "raise":
                if any(before.get(g, 1) == 0 for g in gs):
                    tr = replace(tr, first_out=True)
                for g in gs:
                    busy[g] += 1
            else:
                for g in gs:
                    busy[g] -= 1
            out.append(tr)
        i = j
    return out


def _worst(groups: dict[tuple[str, str], list[AlarmPoint]], results: dict[tuple[str, str], CheckResult]
           ) -> dict[tuple[str, str], tuple[float, float, float]]:
    """Per check result of ``groups``: the largest, the smallest and the largest magnitude of its valid values
    over the block (-inf, inf, -inf when it has none), over a (results x frames) matrix in two reductions."""
    keys = [k for k in groups if k in results]
    if not keys:
        return {}
    res = [results[k] for k in keys]
    v = np.stack([r.value for r in res])
    ok = np.stack([r.reason for r in res]) == _OK
    hi = np.fmax.reduce(np.where(ok, v, -np.inf), axis=1)  # fmax: a NaN on a valid frame is passed over
    lo = np.fmin.reduce(np.where(ok, v, np.inf), axis=1)
    ab = np.fmax(hi, -lo)
    return dict(zip(keys, zip(hi.tolist(), lo.tolist(), ab.tolist(), strict=True), strict=True))


def severity(value: np.ndarray, direction: str) -> np.ndarray:
    """The value turned so that larger is more abnormal: v (high), -v (low), |v| (abs)."""
    if direction == "high":
        return value
    if direction == "low":
        return -value
    if direction == "abs":
        return np.abs(value)
    raise ValueError(f"expected direction 'high', 'low' or 'abs', got {direction!r}")
