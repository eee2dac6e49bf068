"""Event time: how far each source's data has come, and how far frames may be computed.

Frames are computed in *event time*: a frame waits for the data of its time, not for the
wall clock. Each source has a **watermark**, the newest source timestamp accepted from it.
While a source delivers, frames go up to its watermark minus a small ``hold`` (samples
arriving up to that much out of step with the others are folded into open frames, not
late). A source that has delivered nothing for ``lost_after`` seconds (of the elapsed
clock, which never steps) stops holding frames back: its event time is extrapolated from
its watermark with the elapsed clock, so the other sources go on; the frames without its data
show how long it has been silent (the pipeline's ``source_lag`` signal): one condition of the
source, not one stale alarm per tag.

Timestamps are not trusted blindly. Live, a sample more than ``future_horizon`` seconds
beyond the wall clock is refused as ``future time`` and never adopted as the new "now". In a
recording (no wall clock), a sample more than ``future_horizon`` beyond its source's
watermark (at first: the median of its batch) is refused the same way, unless such samples
keep coming for ``confirm`` seconds of their own time: then the recording resumed after a gap
and they are accepted (the aligner skips the gap). If a source keeps sending only samples older
than its watermark by more than ``future_horizon``, its clock has stepped back (a PLC that
restarted its clock): its times are shifted by the step from then on, counted and shown.
"Keeps sending" means: such samples spanning ``confirm`` seconds of their own time, so a
replay and a live source are judged alike.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np


@dataclass
class SourceClock:
    """What is known of one source's time."""

    name: str
    watermark: float = -math.inf  # newest accepted source time (after any shift), epoch s
    arrived: float = -math.inf  # elapsed clock at the last batch that brought a sample
    advanced: float = -math.inf  # elapsed clock when the watermark last moved
    offset: float = 0.0  # added to every source time after a backward clock step
    steps: list[float] = field(default_factory=list)  # clock steps seen (s; negative: backwards)
    _ahead_since: float | None = None
    _behind_since: float | None = None

    @property
    def started(self) -> bool:
        return math.isfinite(self.watermark)

    def event_now(self, elapsed: float) -> float:
        """The source's time now, extrapolated from its watermark with the elapsed clock."""
        return self.watermark + max(0.0, elapsed - self.advanced)


class Watermarks:
    """Watermarks of the sources of one line; owned by the pipeline."""

    def __init__(self, sources: tuple[str, ...], *, hold: float = 0.1, lost_after: float = 5.0,
                 future_horizon: float = 60.0, confirm: float = 5.0) -> None:
        self.sources = {s: SourceClock(s) for s in sources}
        self.hold, self.lost_after, self.future_horizon, self.confirm = hold, lost_after, future_horizon, confirm
        self.start: float | None = None  # event time the monitoring started at (live), epoch s
        self.start_elapsed = 0.0

    def begin(self, now: float, elapsed: float) -> None:
        """Live monitoring starts: ``now`` the wall clock, ``elapsed`` the elapsed clock (same units)."""
        self.start, self.start_elapsed = now, elapsed

    def accept(self, source: str, t: np.ndarray, elapsed: float, wall: float | None = None) -> np.ndarray:
        """Shift a batch's times by the source's offset and say which to refuse as ``future time`` (a mask).

        Updates the source's watermark with the accepted times and notes its arrival. ``t`` is changed in
        place when the source has an offset.
        """
        sc = self.sources.get(source)
        if sc is None:
            sc = self.sources[source] = SourceClock(source)
        if sc.offset:
            t += sc.offset
        fin = np.isfinite(t)
        if not fin.any():
            return np.zeros(t.shape, dtype=bool)
        if wall is not None:  # live: a time beyond the wall clock's horizon is never plausible
            future = fin & (t > wall + self.future_horizon)
        else:  # a recording: beyond the horizon of the source's newest time (or of the batch's median at first)
            ref = sc.watermark if sc.started else float(np.median(t[fin]))
            future = _ahead_of_stream(t, fin, ref, self.future_horizon)
            if future.any():  # a consistent stream after a gap, or a glitch? a glitch does not span ``confirm``
                lo, hi = float(np.min(t[future])), float(np.max(t[future]))
                sc._ahead_since = lo if sc._ahead_since is None else min(sc._ahead_since, lo)
                if hi - sc._ahead_since >= self.confirm:
                    sc.steps.append(sc._ahead_since - ref)
                    sc._ahead_since = None
                    future = np.zeros(t.shape, dtype=bool)
        ok = fin & ~future
        if ok.any() and not future.any():
            sc._ahead_since = None
        if sc.started and ok.any():
            lo, hi = float(np.min(t[ok])), float(np.max(t[ok]))
            if hi < sc.watermark - self.future_horizon:  # everything far behind: stepped back, once it persists
                sc._behind_since = lo if sc._behind_since is None else min(sc._behind_since, lo)
                if hi - sc._behind_since >= self.confirm:
                    shift = sc.event_now(elapsed) - sc._behind_since
                    sc.offset += shift
                    sc.steps.append(-shift)
                    sc._behind_since = None
                    t += shift
                else:
                    sc.arrived = elapsed  # it is talking, with a clock behind: not lost, not yet followed
                    ok = np.zeros(t.shape, dtype=bool)  # not adopted: the aligner refuses them as out of order
            else:
                sc._behind_since = None
        if ok.any():
            newest = float(np.max(t[ok]))
            sc.arrived = elapsed
            if newest > sc.watermark:
                sc.watermark = newest
                sc.advanced = elapsed
        return future

    def excuse(self, seconds: float) -> None:
        """The monitor itself did not run for ``seconds`` (suspended, starved of CPU): that is no silence of the
        sources, so their last arrival moves on by as much (what arrived meanwhile is still queued for us)."""
        for sc in self.sources.values():
            if sc.started:
                sc.arrived += seconds
                sc.advanced += seconds

    def alive(self, sc: SourceClock, elapsed: float) -> bool:
        return sc.started and elapsed - sc.arrived <= self.lost_after

    def bound(self, elapsed: float) -> float | None:
        """How far frames may be computed now (epoch s of event time); None before any data or start."""
        cands = []
        for sc in self.sources.values():
            if not sc.started:
                continue
            if self.alive(sc, elapsed):
                cands.append(sc.watermark - self.hold)
            else:
                cands.append(sc.event_now(elapsed) - self.lost_after)
        if cands:
            return min(cands)
        if self.start is not None:  # nothing heard yet: time runs on from the start
            return self.start + (elapsed - self.start_elapsed) - self.lost_after
        return None

    def state(self, source: str, elapsed: float, wall: float | None = None,
              delay_limit: float = 30.0) -> tuple[str, float | None]:
        """("waiting" | "ok" | "delayed" | "lost", delay behind the wall clock in s or None)."""
        sc = self.sources[source]
        if not sc.started:
            return "waiting", None
        alive = self.alive(sc, elapsed)
        delay = None if wall is None else wall - sc.watermark
        if not alive:
            return "lost", delay
        if delay is not None and delay > delay_limit:
            return "delayed", delay
        return "ok", delay


def _ahead_of_stream(t: np.ndarray, fin: np.ndarray, ref: float, horizon: float) -> np.ndarray:
    """Which samples of a recording's batch (in file order) jumped more than ``horizon`` beyond the newest time
    before them: the source's watermark ``ref`` or the samples of the batch accepted before them. A batch may span
    far more than the horizon (a reader's chunk holds minutes): only a jump ahead counts, not the batch's length.

    The batch is cut where consecutive times differ by more than the horizon; a piece whose first time lies beyond
    the newest accepted time + horizon is ahead (a glitch, or the stream after a gap: the caller tells them apart
    by how long it goes on); the others are accepted and move the newest time.

    >>> t = np.array([0.0, 30.0, 70.0, 110.0, 5000.0, 150.0, 9000.0, 9001.0])
    >>> _ahead_of_stream(t, np.isfinite(t), 0.0, 60.0).tolist()
    [False, False, False, False, True, False, True, True]
    """
    future = np.zeros(t.shape, dtype=bool)
    idx = np.flatnonzero(fin)
    if idx.size == 0:
        return future
    tf = t[idx]
    cuts = np.flatnonzero(np.abs(np.diff(tf)) > horizon) + 1
    newest = ref
    for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, tf.size], strict=True):
        if tf[lo] > newest + horizon:
            future[idx[lo:hi]] = True
        else:
            newest = max(newest, float(np.max(tf[lo:hi])))
    return future
