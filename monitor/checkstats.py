"""``spanwatch stats``: how each check's value is distributed in each line state over a recording.

What an engineer needs to choose a limit: per check and object, and per line state (running, accelerating,
decelerating, threading, stopped; see :mod:`spanwatch.rules.linestate`), the percentiles of the check value over
its valid frames, the share of valid frames beyond each candidate limit (the configured warning and alarm and a
few around them) and the share of frames that were valid at all (a check gated in a state has none there).

Percentiles are numpy's (linear interpolation between order statistics: Hyndman & Fan (1996), "Sample
quantiles in statistical packages", definition 7). The values are kept as float32 (4 bytes per valid frame and
object: an 8-hour shift at 50 Hz holds 5.8 MB per object); the shares beyond a limit are counted on the full
values as they stream past.

"Beyond" follows the check's direction as the alarm engine reads it: value >= limit (high), value <= limit
(low), |value| >= |limit| (abs).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from spanwatch.monitor.line import Line
from spanwatch.monitor.sweep import line_points, pass_results
from spanwatch.rules.alarms import AlarmPoint
from spanwatch.rules.base import CheckResult, LineState, Reason, state_name

PERCENTILES = (1.0, 5.0, 50.0, 95.0, 99.0, 99.9)
STATE_ORDER = (LineState.RUNNING, LineState.ACCELERATING, LineState.DECELERATING, LineState.THREADING,
               LineState.STOPPED, LineState.UNKNOWN)
FLAG_UNITS = ("flag", "s")  # on/off checks: a distribution says nothing a count of alarms does not
_OK = int(Reason.OK)


def beyond(value: np.ndarray, limit: float, direction: str) -> np.ndarray:
    """Frames beyond ``limit`` as the alarm engine reads the direction: v >= L (high), v <= L (low),
    |v| >= |L| (abs)."""
    v = np.asarray(value, dtype=float)
    if direction == "high":
        return v >= limit
    if direction == "low":
        return v <= limit
    return np.abs(v) >= abs(limit)


def round_sig(x: float, digits: int = 3) -> float:
    """``x`` to ``digits`` significant digits (0 stays 0).

    >>> round_sig(0.84999), round_sig(1234.5)
    (0.85, 1230.0)
    """
    if x == 0 or not math.isfinite(x):
        return x
    return float(round(x, digits - 1 - math.floor(math.log10(abs(x)))))


def candidate_limits(warning: float | None, alarm: float | None) -> list[float]:
    """The configured limits and a few around them: 0.8 and 0.9 of the warning (or of the alarm when there is no
    warning), the point halfway between them, 1.1 and 1.2 of the alarm; three significant digits."""
    base = [x for x in (warning, alarm) if x is not None]
    if not base:
        return []
    low, high = base[0], base[-1]
    around = [low * 0.8, low * 0.9, high * 1.1, high * 1.2]
    if warning is not None and alarm is not None:
        around.append((warning + alarm) / 2)
    return sorted({*base, *(round_sig(x) for x in around)}, key=abs)  # the configured ones as they are


@dataclass
class StateStats:
    """One check on one object in one line state (``all``: every state)."""

    state: str
    frames: int
    valid: int
    seconds: float
    percentiles: dict[float, float]  # empty without valid frames
    beyond: dict[float, float]  # candidate limit -> share of valid frames beyond it (NaN without valid frames)

    @property
    def valid_share(self) -> float:
        return self.valid / self.frames if self.frames else math.nan


@dataclass
class CheckStats:
    """The statistics of one check on one object, its unit, direction and configured limits."""

    kind: str
    object_id: str
    unit: str
    direction: str
    warning: float | None
    alarm: float | None
    candidates: list[float]
    states: list[StateStats]
    total: StateStats
    values: dict[str, np.ndarray] = field(default_factory=dict, repr=False)  # state -> valid values (float32)

    @property
    def key(self) -> str:
        return f"{self.kind}:{self.object_id}"


@dataclass
class _Acc:
    point_unit: str
    direction: str
    warning: float | None
    alarm: float | None
    candidates: list[float]
    frames: dict[int, int] = field(default_factory=dict)
    valid: dict[int, int] = field(default_factory=dict)
    counts: dict[int, np.ndarray] = field(default_factory=dict)  # per state: frames beyond each candidate
    chunks: dict[int, list[np.ndarray]] = field(default_factory=dict)

    def add(self, r: CheckResult, state: np.ndarray) -> None:
        ok = r.reason == _OK
        for code in np.unique(state).tolist():
            here = state == code
            self.frames[code] = self.frames.get(code, 0) + int(here.sum())
            v = r.value[here & ok]
            self.valid[code] = self.valid.get(code, 0) + v.size
            if v.size:
                c = np.array([int(beyond(v, x, self.direction).sum()) for x in self.candidates], dtype=np.int64)
                self.counts[code] = self.counts.get(code, np.zeros(len(self.candidates), dtype=np.int64)) + c
                self.chunks.setdefault(code, []).append(v.astype(np.float32))


def select_points(points: Sequence[AlarmPoint], kind: str | None, object_id: str | None) -> list[AlarmPoint]:
    """The points of ``kind`` on ``object_id`` (None: any); without a kind, on/off checks (flags) are left out."""
    return [p for p in points if (p.kind == kind if kind else p.unit not in FLAG_UNITS)
            and (object_id is None or p.object_id == object_id)]


def check_stats(line: Line, recording: str | Path, kind: str | None = None, object_id: str | None = None, *,
                chunk_rows: int = 200_000) -> list[CheckStats]:
    """One pass of ``recording`` through the line's checks; the statistics of every chosen check and object.

    Raises ValueError when no alarm point matches ``kind`` / ``object_id``."""
    points = line_points(line)
    chosen = select_points(points, kind, object_id)
    if not chosen:
        known = ", ".join(sorted({f"{p.kind}:{p.object_id}" for p in points}))
        what = f"{kind or 'any check'}{':' + object_id if object_id else ''}"
        raise ValueError(f"no alarm point of {what} on this line (it has {known})")
    accs: dict[tuple[str, str], _Acc] = {}
    for p in chosen:
        k = (p.kind, p.object_id)
        if k not in accs:
            lim = {q.level: q.limit for q in chosen if (q.kind, q.object_id) == k}
            accs[k] = _Acc(p.unit, p.direction, lim.get("warning"), lim.get("alarm"),
                           candidate_limits(lim.get("warning"), lim.get("alarm")))

    def on_block(t: np.ndarray, results: dict[tuple[str, str], CheckResult], line_state: np.ndarray) -> None:
        for k, acc in accs.items():
            r = results.get(k)
            if r is not None:
                acc.add(r, np.asarray(line_state))

    pass_results(line, recording, on_block, chunk_rows=chunk_rows)
    rate = line.config.line.frame_rate
    out = []
    for (kd, obj), acc in accs.items():
        values = {state_name(code): np.concatenate(acc.chunks[code]) for code in acc.chunks}
        states = []
        for code in (int(s) for s in STATE_ORDER):
            if acc.frames.get(code):
                states.append(_state(state_name(code), acc.frames[code], acc.valid.get(code, 0), rate,
                                     values.get(state_name(code)), acc.counts.get(code), acc.candidates))
        every = np.concatenate(list(values.values())) if values else None
        counts = sum(acc.counts.values()) if acc.counts else None
        total = _state("all", sum(acc.frames.values()), sum(acc.valid.values()), rate, every, counts,
                       acc.candidates)
        out.append(CheckStats(kd, obj, acc.point_unit, acc.direction, acc.warning, acc.alarm, acc.candidates,
                              states, total, values))
    return out


def _state(name: str, frames: int, valid: int, rate: float, values: np.ndarray | None, counts: np.ndarray | None,
           candidates: list[float]) -> StateStats:
    if values is None or not values.size:
        return StateStats(name, frames, valid, frames / rate, {}, dict.fromkeys(candidates, math.nan))
    pct = np.percentile(values.astype(float), PERCENTILES)
    share = (counts if counts is not None else np.zeros(len(candidates))) / values.size
    return StateStats(name, frames, valid, frames / rate, dict(zip(PERCENTILES, pct.tolist(), strict=True)),
                      dict(zip(candidates, share.tolist(), strict=True)))


# --- how it reads ----------------------------------------------------------------------------------------------


def display_scale(unit: str) -> tuple[float, str]:
    """How a check value reads: a share in a ``%`` unit is shown times 100."""
    return (100.0, unit) if unit.startswith("%") else (1.0, unit)


def num(x: float, width: int = 7) -> str:
    """A number in at most ``width`` characters ('-' for NaN)."""
    if x is None or not math.isfinite(x):
        return "-".rjust(width)
    for d in (4, 3, 2, 1):
        s = f"{x:.{d}g}"
        if len(s) <= width:
            return s.rjust(width)
    return f"{x:.0e}".rjust(width)


def clock(seconds: float) -> str:
    """Seconds as h:mm:ss (or m:ss under an hour)."""
    s = round(seconds)
    h, rest = divmod(s, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def share(x: float) -> str:
    """A share as a percentage in 6 characters."""
    if not math.isfinite(x):
        return "-".rjust(6)
    if x == 0:
        return "0".rjust(6)
    if x < 0.001:
        return "<0.1%".rjust(6)
    return f"{x * 100:.1f}%".rjust(6) if x < 0.9995 or x == 1 else ">99.9%"


def limit_text(limit: float | None, unit: str) -> str:
    scale, _ = display_scale(unit)
    return "-" if limit is None else f"{limit * scale:g}"


def render_table(stats: Sequence[CheckStats]) -> list[str]:
    """The statistics as lines of at most 80 characters."""
    lines: list[str] = []
    for c in stats:
        scale, unit = display_scale(c.unit)
        side = {"high": "alarm when high", "low": "alarm when low", "abs": "alarm when far from 0 either way"}
        lines.append(f"{c.kind} {c.object_id}: values in {unit}, {side.get(c.direction, c.direction)}")
        lines.append(f"  configured: warning {limit_text(c.warning, c.unit)}, alarm {limit_text(c.alarm, c.unit)}")
        lines.append("  state           time  valid" + "".join(f" {'p' + format(p, 'g'):>7}" for p in PERCENTILES))
        for s in (*c.states, c.total):
            row = f"  {s.state:<12} {clock(s.seconds):>7} {share(s.valid_share)}"
            if s.percentiles:
                row += "".join(" " + num(s.percentiles[p] * scale) for p in PERCENTILES)
            else:
                row += "  no valid frame (gated or inputs bad)"
            lines.append(row)
        if c.candidates:
            lines.append("  share of valid time beyond the limit (w: warning, a: alarm)")
            marks = [("w" if x == c.warning else "a" if x == c.alarm else " ") for x in c.candidates]
            head = "".join(f"{num(x * scale, 6)}{m}" for x, m in zip(c.candidates, marks, strict=True))
            lines.append(f"  {'limit':<12}{head}")
            for s in (*c.states, c.total):
                lines.append(f"  {s.state:<12}" + "".join(f"{share(s.beyond[x])} " for x in c.candidates))
        lines.append("")
    return [x.rstrip() for x in lines]


def rows(stats: Sequence[CheckStats]) -> list[dict[str, object]]:
    """One plain row per check, object and state (values as the check gives them: a share, not percent)."""
    out = []
    for c in stats:
        for s in (*c.states, c.total):
            row: dict[str, object] = {"check": c.kind, "object": c.object_id, "unit": c.unit, "direction": c.direction,
                                      "state": s.state, "seconds": round(s.seconds, 3), "frames": s.frames,
                                      "valid_frames": s.valid, "valid_share": _plain(s.valid_share)}
            for p in PERCENTILES:
                row[f"p{p:g}"] = _plain(s.percentiles.get(p, math.nan))
            row["warning"], row["alarm"] = c.warning, c.alarm
            row["beyond_warning"] = _plain(s.beyond.get(c.warning, math.nan)) if c.warning is not None else None
            row["beyond_alarm"] = _plain(s.beyond.get(c.alarm, math.nan)) if c.alarm is not None else None
            row["beyond"] = {format(x, "g"): _plain(v) for x, v in s.beyond.items()}
            out.append(row)
    return out


def _plain(x: float) -> float | None:
    return float(x) if x is not None and math.isfinite(x) else None
