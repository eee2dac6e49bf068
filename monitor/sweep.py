"""Tuning sweep: many alarm limits of one check over one recording, its check values computed once.

Commissioning tries a check's limit at several settings over the same recording. The check values do not
depend on the limit, only the alarm states do, so :func:`sweep` runs the recording through the pipeline once
(as ``spanwatch replay`` does, without a history database), keeps each block's results of the chosen checks
(value and reason per frame, and the extras an alarm's raise carries), then runs a fresh
:class:`~spanwatch.rules.alarms.AlarmEngine` over the kept blocks per setting, with copies of the chosen alarm
points whose limit changes. The alarm engine is the one a replay runs (on-delay, deadband, off-delay,
chattering), so at the configured limit a sweep gives the raises a replay gives (tested).

What a setting reports: the raises of the chosen points and the time they spent in alarm (a raise to its clear,
or to the last frame of the recording when it never clears).

Assumption: the chosen checks' values do not depend on alarm states. Only the drift detectors read alarm states
(a detector learns nothing while an alarm stands on the object it watches); their values here are those of the
plain replay, at the configured limits of every other check.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
from spanwatch.connectors.recording import read_recording
from spanwatch.monitor.checkset import alarm_points, build_checks, chatter_settings
from spanwatch.monitor.line import Line
from spanwatch.monitor.pipeline import Pipeline
from spanwatch.rules.alarms import LEVELS, AlarmEngine, AlarmPoint
from spanwatch.rules.base import CheckResult


@dataclass(frozen=True)
class KeptBlock:
    """One block of frames: times, line state, and the kept check results by (kind, object)."""

    t: np.ndarray
    line_state: np.ndarray
    results: dict[tuple[str, str], CheckResult]


@dataclass
class Kept:
    """What one pass of the pipeline kept for a sweep: the chosen alarm points (at their configured settings),
    the blocks of their check results, and the pass's frame and sample counts."""

    points: list[AlarmPoint]
    blocks: list[KeptBlock] = field(default_factory=list)
    frames: int = 0
    samples: int = 0


@dataclass(frozen=True)
class SweepSetting:
    """The outcome of one setting: the limit given (absolute, or the factor on each configured limit when the
    sweep is relative), the raises of the chosen points (in all and by alarm key) and their time in alarm (s)."""

    setting: float
    raises: int
    time_in_alarm: float
    raises_by_key: dict[str, int]
    time_by_key: dict[str, float]


def _chosen(points: Sequence[AlarmPoint], kind: str, object_id: str | None) -> list[AlarmPoint]:
    return [p for p in points if p.kind == kind and (object_id is None or p.object_id == object_id)]


def pass_results(line: Line, recording: str | Path,
                 on_block: Callable[[np.ndarray, dict[tuple[str, str], CheckResult], np.ndarray], None], *,
                 chunk_rows: int = 200_000, block_seconds: float = 60.0) -> Pipeline:
    """Run ``recording`` through a fresh pipeline (no history, no context windows) and hand every block's times,
    check results (by kind and object) and line state to ``on_block`` before the alarm engine sees them.
    Returns the pipeline after the last frame (its ``points``, ``frames``, ``samples``). The results' arrays are
    the pipeline's own: copy what you keep."""
    pipe = Pipeline(line, None, context=False, block_seconds=block_seconds)
    engine = pipe.engine
    evaluate = engine.evaluate

    def seeing(t: np.ndarray, results: dict[tuple[str, str], CheckResult], line_state: np.ndarray) -> list:
        on_block(t, results, line_state)
        return evaluate(t, results, line_state)

    engine.evaluate = seeing  # type: ignore[method-assign]
    for batch in read_recording(Path(recording), pipe.names, chunk_rows=chunk_rows):
        pipe.feed(batch)
    pipe.finish_frames()
    return pipe


def line_points(line: Line) -> list[AlarmPoint]:
    """The alarm points of the line as configured (what a pipeline of the line evaluates)."""
    return alarm_points(line, build_checks(line))


def keep_results(line: Line, recording: str | Path, kind: str, object_id: str | None = None, *,
                 chunk_rows: int = 200_000, block_seconds: float = 60.0) -> Kept:
    """Run ``recording`` through a fresh pipeline (no history) and keep the results of the checks of ``kind``
    (on ``object_id``, or on every object) block by block. Raises ValueError when the line has no alarm point
    of that check."""
    all_points = line_points(line)
    points = _chosen(all_points, kind, object_id)
    if not points:
        known = ", ".join(sorted({f"{p.kind}:{p.object_id}" for p in all_points}))
        raise ValueError(f"no alarm point of {kind}{':' + object_id if object_id else ''} on this line "
                         f"(it has {known})")
    keys = list(dict.fromkeys((p.kind, p.object_id) for p in points))
    detail = {k: tuple(dict.fromkeys(f for p in points if (p.kind, p.object_id) == k for f in p.detail))
              for k in keys}
    kept = Kept(points)

    def keeping(t: np.ndarray, results: dict[tuple[str, str], CheckResult], line_state: np.ndarray) -> None:
        mine = {}
        for k in keys:
            r = results.get(k)
            if r is not None:
                mine[k] = CheckResult(r.value.copy(), r.reason.copy(),
                                      {f: np.array(r.extras[f]) for f in detail[k] if f in r.extras})
        kept.blocks.append(KeptBlock(t.copy(), np.array(line_state, copy=True), mine))

    pipe = pass_results(line, recording, keeping, chunk_rows=chunk_rows, block_seconds=block_seconds)
    kept.frames, kept.samples = pipe.frames, pipe.samples
    return kept


@dataclass(frozen=True)
class Episode:
    """One alarm of a setting: its point, when it was raised and cleared (None: still active at the end), the
    check value at the raise and the most abnormal value of the episode (on a clear)."""

    point: AlarmPoint
    raised: float
    cleared: float | None
    value: float
    peak: float = float("nan")

    def duration(self, t_end: float) -> float:
        """Seconds in alarm: to the clear, or to ``t_end`` (the last frame) when it never cleared."""
        return (self.cleared if self.cleared is not None else max(t_end, self.raised)) - self.raised


def run_points(kept: Kept, line: Line, points: Sequence[AlarmPoint]) -> tuple[list[Episode], float | None]:
    """Run a fresh alarm engine with ``points`` over the kept blocks; return the episodes (in raise order) and the
    time of the last frame (None without frames)."""
    engine = AlarmEngine(list(points), chatter_settings(line))
    done: list[Episode] = []
    open_: dict[str, Episode] = {}
    t_end = None
    for b in kept.blocks:
        for tr in engine.evaluate(b.t, b.results, b.line_state):
            if tr.event == "raise":
                open_[tr.key] = Episode(tr.point, tr.t, None, tr.value)
            else:
                ep = open_.pop(tr.key, None)
                if ep is not None:
                    done.append(replace(ep, cleared=tr.t, peak=tr.peak))
        if b.t.size:
            t_end = float(b.t[-1])
    done.extend(open_.values())
    done.sort(key=lambda e: (e.raised, e.point.key))
    return done, t_end


def evaluate_setting(kept: Kept, line: Line, setting: float, *, level: str = "warning",
                     relative: bool = False) -> SweepSetting:
    """Run the alarm engine over the kept blocks with the ``level`` limit of every chosen point set to ``setting``
    (``relative``: the configured limit times ``setting``); the other level keeps its configured limit."""
    if level not in LEVELS:
        raise ValueError(f"expected level one of {', '.join(LEVELS)}, got {level!r}")
    points = [replace(p, limit=p.limit * setting if relative else float(setting)) if p.level == level else p
              for p in kept.points]
    episodes, t_end = run_points(kept, line, points)
    raises = {p.key: 0 for p in points}
    in_alarm = {p.key: 0.0 for p in points}
    for ep in episodes:
        raises[ep.point.key] += 1
        in_alarm[ep.point.key] += ep.duration(t_end if t_end is not None else ep.raised)
    return SweepSetting(setting=float(setting), raises=sum(raises.values()),
                        time_in_alarm=float(sum(in_alarm.values())), raises_by_key=raises, time_by_key=in_alarm)


def sweep(line: Line, recording: str | Path, kind: str, settings: Sequence[float], *, object_id: str | None = None,
          level: str = "warning", relative: bool = False, chunk_rows: int = 200_000) -> list[SweepSetting]:
    """The alarms of check ``kind`` (on ``object_id``, or every object) over ``recording`` at each of
    ``settings`` for its ``level`` limit: the check values are computed once (:func:`keep_results`), the alarm
    engine runs once per setting (:func:`evaluate_setting`)."""
    kept = keep_results(line, recording, kind, object_id, chunk_rows=chunk_rows)
    return [evaluate_setting(kept, line, s, level=level, relative=relative) for s in settings]
