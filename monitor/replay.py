"""Replay a recording through the pipeline into a history database, as fast as the CPU allows.

Replay writes the history synchronously (it has no event loop to keep free). A run that stops on an error
(the recording, the database) is closed as ``failed``, one stopped by Ctrl-C as ``interrupted``, before the
error goes on to the caller; a failure of the history itself is a one-line
:class:`~spanwatch.connectors.history.errors.HistoryError`.
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from spanwatch.connectors.history import History, HistoryError
from spanwatch.connectors.history.database import SQLITE_BUSY_TIMEOUT_S
from spanwatch.connectors.history.models import RunEnd
from spanwatch.connectors.recording import ReadProblems, read_recording
from spanwatch.monitor.exposure import remember_config
from spanwatch.monitor.line import Line
from spanwatch.monitor.periods import PeriodEstimator, PeriodMismatch, mismatches
from spanwatch.monitor.pipeline import Pipeline


@dataclass
class ReplaySummary:
    samples: int
    frames: int
    seconds_of_data: float
    wall_seconds: float
    raised: dict[str, int] = field(default_factory=dict)
    input_rows: list[dict[str, object]] = field(default_factory=list)
    run_id: int | None = None
    period_mismatches: list[PeriodMismatch] = field(default_factory=list)  # tags arriving at another sample period

    @property
    def speedup(self) -> float:
        return self.seconds_of_data / self.wall_seconds if self.wall_seconds > 0 else float("inf")


def replay(line: Line, recording: str | Path, db_url: str | None, *,
           progress: Callable[[int, int], None] | None = None, chunk_rows: int = 200_000,
           timeout: float = SQLITE_BUSY_TIMEOUT_S) -> ReplaySummary:
    """Run a recording through a fresh pipeline; write alarms to ``db_url`` (None: no database).

    ``timeout``: how long a write waits for a database another process holds locked. The summary names the
    tags whose samples arrive at another period than configured (:mod:`spanwatch.monitor.periods`, estimated
    from the first samples of each tag).
    """
    recording = Path(recording)
    total = recording.stat().st_size
    history = History(db_url, timeout=timeout) if db_url else None
    if history is not None:
        try:
            history.start_run(mode="replay", line_name=line.name, config_file=line.file,
                              config_hash=line.config_hash, source=str(recording))
        except BaseException:
            history.close()
            raise
    pipe = Pipeline(line, history, block_seconds=60.0, minutes_every=900.0)
    if history is not None:
        remember_config(history, line, pipe.points)
    problems = ReadProblems()
    raised: dict[str, int] = {}
    used = 0
    periods = PeriodEstimator(pipe.names)
    start = time.perf_counter()
    finished = False
    try:
        for batch, pos in read_recording(recording, pipe.names, chunk_rows=chunk_rows, problems=problems,
                                         with_position=True):
            used += len(batch)
            periods.feed(batch)
            for tr in pipe.feed(batch):
                if tr.event == "raise":
                    raised[tr.point.kind] = raised.get(tr.point.kind, 0) + 1
            if progress is not None:
                progress(pos, total)
        if not used:
            raise ValueError(f"{recording}: no samples to replay: {_nothing_read(total, problems)}")
        for tr in pipe.finish_frames():
            if tr.event == "raise":
                raised[tr.point.kind] = raised.get(tr.point.kind, 0) + 1
        for reason, count in problems.counts.items():
            tag = reason.split(": ", 1)[1] if reason.startswith("unknown tag: ") else "*"
            why = "unknown tag" if reason.startswith("unknown tag: ") else reason
            pipe.inputs.add(tag, why, problems.lines.get(reason, []), count=count)
        pipe.finish_history()
        finished = True
    except BaseException as exc:
        if history is not None and not finished:
            _close_as(history, pipe, RunEnd.INTERRUPTED if isinstance(exc, KeyboardInterrupt) else RunEnd.FAILED, exc)
        raise
    finally:
        if history is not None:
            history.close()
    wall = time.perf_counter() - start
    span = (pipe.last_t - pipe.first_t) if pipe.first_t is not None and pipe.last_t is not None else 0.0
    return ReplaySummary(samples=pipe.samples, frames=pipe.frames, seconds_of_data=span, wall_seconds=wall,
                         raised=raised, input_rows=pipe.inputs.rows(),
                         run_id=history.run_id if history is not None else None,
                         period_mismatches=mismatches(line, periods.periods()))


def _nothing_read(size: int, problems: ReadProblems) -> str:
    """Why a recording gave no sample, in one line."""
    if size == 0 or not problems.header:
        return "the file is empty"
    if problems.rows == 0:
        return (f"{problems.damage} before the first row" if problems.damage
                else "the file has only the header")
    why = ", ".join(f"{reason} {n}" for reason, n in problems.counts.items())
    return f"none of its {problems.rows} row{'s' if problems.rows != 1 else ''} could be used ({why})"


def _close_as(history: History, pipe: Pipeline, state: RunEnd, exc: BaseException) -> None:
    """Close a run that stopped before its end, with what it saw; a history that refuses it too is noted on ``exc``."""
    with contextlib.suppress(HistoryError):  # what the checks computed up to the stop; the run's end matters more
        pipe.flush_minutes()
    try:
        history.finish_run(input_rows=pipe.inputs.rows(), data_start=pipe.first_t, data_end=pipe.last_t, state=state)
    except HistoryError as again:
        exc.add_note(f"run {history.run_id} could not be closed as {state}: {again}")
