"""The pipeline: samples -> frames -> signals -> line state -> checks -> alarms -> history.

One :class:`Pipeline` owns all streaming state of one line (aligner, line-state and
roll-change trackers, check windows, alarm states). Sources push
:class:`~spanwatch.rules.samples.SampleBatch` objects with :meth:`Pipeline.ingest`; whoever
drives the clock calls :meth:`Pipeline.advance` with the time up to which frames may
be computed (the newest sample time minus a small lag in a replay, the wall clock
minus the network latency allowance live). Everything per frame is numpy over a
block of frames; Python loops run per block, per check and per alarm transition.
"""

from __future__ import annotations

import functools
import logging
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from spanwatch.connectors.history.store import HistorySink
from spanwatch.connectors.history.trends import MINUTE, CheckMinute
from spanwatch.monitor.aligner import Aligner
from spanwatch.monitor.checkset import alarm_points, build_checks, chatter_settings, suppression_rules
from spanwatch.monitor.context import ContextRecorder
from spanwatch.monitor.inputs import InputStats
from spanwatch.monitor.line import Line
from spanwatch.monitor.minutes import MinuteAccumulator
from spanwatch.monitor.signals import SignalDeriver
from spanwatch.monitor.watermarks import Watermarks
from spanwatch.rules.alarms import AlarmEngine, Transition
from spanwatch.rules.base import QUALITY_BAD, QUALITY_UNCERTAIN, Block, CheckResult, Reason, Signal, batches_of
from spanwatch.rules.driftcheck import DriftCheck
from spanwatch.rules.lifecycle import Action, Lifecycle, LifecycleEvent
from spanwatch.rules.linestate import LineStateTracker, RollChangeDetector, apply_line_state
from spanwatch.rules.samples import SampleBatch
from spanwatch.rules.values import iso
from spanwatch.rules.windows import forward_fill_index

log = logging.getLogger("spanwatch.pipeline")


@dataclass
class CheckStats:
    """Frames evaluated per check, by reason (OK, LINE_STATE, INPUT_BAD, ...)."""

    keys: list[tuple[str, str]] = field(default_factory=list)
    counts: np.ndarray = field(default_factory=lambda: np.zeros((0, len(Reason)), dtype=np.int64))

    def add_block(self, keys: list[tuple[str, str]], reasons: np.ndarray) -> None:
        """``reasons``: (checks, frames) reason codes of one block, rows in the order of ``keys``."""
        if keys != self.keys:
            self.keys = list(keys)
            self.counts = np.zeros((len(keys), len(Reason)), dtype=np.int64)
        for r in range(len(Reason)):
            self.counts[:, r] += (reasons == r).sum(axis=1)

    @property
    def by_reason(self) -> dict[tuple[str, str], np.ndarray]:
        return {k: self.counts[i] for i, k in enumerate(self.keys)}


class Pipeline:
    """Streaming monitor of one line."""

    def __init__(self, line: Line, history: HistorySink | None = None, *,
                 on_transition: Callable[[Transition], None] | None = None, context: bool = True,
                 replay_lag: float | None = None, block_seconds: float = 10.0, minutes_every: float = 0.0) -> None:
        self.line = line
        lw, d = line.config.line, line.config.daemon
        self.names = tuple(line.tags)
        self.frame_rate = lw.frame_rate
        # frames are computed in blocks of at most ``block_seconds`` (10 s live; a replay takes longer blocks: every
        # check's per-block cost is paid less often, and the results do not depend on the block size)
        self.aligner = Aligner(self.names, lw.frame_rate, max_gap=lw.max_gap,
                               max_frames=max(1, round(block_seconds * lw.frame_rate)))
        self.deriver = SignalDeriver(line, self.names)
        self._new_trackers()
        # event time: one watermark per live source ("" for the tags of a recording)
        model_tags = line.model.tags
        self.source_names = tuple(dict.fromkeys(model_tags[n].source or "" for n in self.names))
        self.source_col = np.array([self.source_names.index(model_tags[n].source or "") for n in self.names])
        self.clocks = Watermarks(self.source_names, hold=d.latency, lost_after=d.lost_after,
                                 future_horizon=lw.future_horizon)
        self.gaps = 0
        self._last_silent: dict[str, float] = {}
        self._periods = np.array([line.tags[n].sample_period for n in self.names])
        self._source_cols = [(name, np.flatnonzero(self.source_col == self.source_names.index(name)))
                             for name in line.model.sources if name in self.source_names]
        self.checks = build_checks(line)
        self.batches = batches_of(self.checks)  # each kind's objects evaluated together (catalog order kept)
        self.points = alarm_points(line, self.checks)
        self.engine = AlarmEngine(self.points, chatter_settings(line))
        # the lifecycle of every alarm point (acknowledge, shelve, suppression by design, out of service)
        self.lifecycle = Lifecycle([p.key for p in self.points], latched=[p.key for p in self.points if p.latched],
                                   shelve_max=line.config.alarms.shelve_max)
        self.suppression = suppression_rules(line, self.points, self.checks)
        self.point_of = {p.key: p for p in self.points}
        self.keep_states = False  # write each alarm's lifecycle record as it changes (the daemon's, not a replay's)
        # the lifecycle's changes with the transitions that caused the raises and clears among them
        self.on_lifecycle: Callable[[list[LifecycleEvent], list[Transition]], None] | None = None
        # the same, once committed to the history (or in its spool): what goes out of the process (MQTT)
        self.on_committed: Callable[[list[LifecycleEvent], list[Transition]], None] | None = None
        self.inputs = InputStats()
        self.check_stats = CheckStats()
        self.history = history
        self.on_transition = on_transition
        self.context = ContextRecorder(lw.frame_rate) if context else None
        # each check's value per minute (frames, valid frames, min, mean, max) for the history's trends
        units = {(c.kind, c.object_id): c.defaults.unit for c in self.checks}
        units.update({(p.kind, p.object_id): p.unit for p in self.points})
        self.minutes = MinuteAccumulator(units) if history is not None else None
        # the minutes' rows are written as each minute completes (0), or held until they cover ``minutes_every``
        # seconds (a replay: fewer, larger writes)
        self.minutes_every = minutes_every
        self._held: list[CheckMinute] = []
        self._drift = [c for c in self.checks if isinstance(c, DriftCheck)]
        self._drift_by_key = {f"drift:{c.object_id}": c for c in self._drift}
        self._inputs_of = {(c.kind, c.object_id): (c.inputs or (f"tag/{c.object_id}",)) for c in self.checks}
        self.scale = np.array([line.tags[n].scale for n in self.names])
        self.offset = np.array([line.tags[n].offset for n in self.names])
        self._maps: dict[tuple[str, ...], np.ndarray] = {}
        self._unknown_seen: set[str] = set()
        self.lag = replay_lag if replay_lag is not None else 2.5 * max(i.sample_period for i in line.tags.values())
        self.frames = 0
        self.samples = 0
        self.first_t: float | None = None
        self.last_t: float | None = None
        self.latest: dict[tuple[str, str], tuple[float, float, int]] = {}
        self.line_state: int | None = None
        self.transitions = 0

    def _new_trackers(self) -> None:
        lw = self.line.config.line
        self.tracker = LineStateTracker(stop_speed=lw.stop_speed, thread_speed=lw.thread_speed,
                                        accel_threshold=lw.accel_threshold, accel_window=lw.accel_window,
                                        settle_time=lw.settle_time, frame_rate=lw.frame_rate)
        self.rolls = {w.id: RollChangeDetector(jump=lw.roll_change_jump, settle_time=lw.roll_settle_time)
                      for w in self.line.winders}

    # --- input ---------------------------------------------------------------------------

    def _map(self, tags: tuple[str, ...]) -> np.ndarray:
        m = self._maps.get(tags)
        if m is None:
            index = {n: i for i, n in enumerate(self.names)}
            m = np.array([index.get(t, -1) for t in tags], dtype=np.int64)
            self._maps[tags] = m
        return m

    def ingest(self, batch: SampleBatch, *, elapsed: float | None = None, wall: float | None = None) -> None:
        """Take a batch of raw samples: map tags, convert to SI, count bad input, queue for alignment.

        ``elapsed`` is the elapsed clock at arrival (live; it never steps), ``wall`` the wall clock; a
        replay gives neither. Each source's watermark moves with what is accepted (see
        :mod:`spanwatch.monitor.watermarks`); samples too far in the future are refused.
        """
        if len(batch) == 0:
            return
        col = self._map(batch.tags)[batch.tag]
        unknown = col < 0
        if unknown.any():
            for i in np.unique(batch.tag[unknown]):
                name = batch.tags[int(i)]
                sel = unknown & (batch.tag == i)
                refs = batch.ref[sel][:1] if name not in self._unknown_seen else []
                self._unknown_seen.add(name)
                self.inputs.add(name, "unknown tag", refs, count=int(sel.sum()))
            keep = ~unknown
            col, batch = col[keep], _take(batch, keep)
        t, q, ref = batch.t.astype(float, copy=True), batch.quality, batch.ref
        v = batch.value * self.scale[col] + self.offset[col]
        bad_t = ~np.isfinite(t)
        if bad_t.any():
            for c in np.unique(col[bad_t]):
                self.inputs.add(self.names[c], "malformed", ref[bad_t & (col == c)])
            keep = ~bad_t
            col, t, v, q, ref = col[keep], t[keep], v[keep], q[keep], ref[keep]
        src = self.source_col[col]
        future = np.zeros(t.size, dtype=bool)
        when = time.monotonic() if elapsed is None else elapsed
        if len(self.source_names) == 1:  # one source (every recording): no selection to make
            future = self.clocks.accept(self.source_names[0], t, when, wall)
        else:
            for s in np.unique(src):
                sel = src == s
                ts = t[sel]
                future[sel] = self.clocks.accept(self.source_names[int(s)], ts, when, wall)
                t[sel] = ts  # shifted when the source's clock stepped back
        if future.any():
            for c in np.unique(col[future]):
                self.inputs.add(self.names[c], "future time", ref[future & (col == c)])
            keep = ~future
            col, t, v, q, ref = col[keep], t[keep], v[keep], q[keep], ref[keep]
        nonfinite = ~np.isfinite(v)
        if nonfinite.any():
            q = np.where(nonfinite, QUALITY_BAD, q).astype(np.int8)
        for code, reason in ((QUALITY_UNCERTAIN, "uncertain quality"), (QUALITY_BAD, "bad quality")):
            flagged = q == code
            if flagged.any():
                for c in np.unique(col[flagged]):
                    self.inputs.add(self.names[c], reason, ref[flagged & (col == c)])
        refused = self.aligner.push(col, t, v, q)
        accepted = np.ones(t.size, dtype=bool)
        for reason, mask in refused.items():
            if mask.any():
                for c in np.unique(col[mask]):
                    self.inputs.add(self.names[c], reason, ref[mask & (col == c)])
                if reason != "late":
                    accepted &= ~mask
        self.samples += int(accepted.sum())
        if accepted.any():
            lo, hi = float(np.min(t[accepted])), float(np.max(t[accepted]))
            self.first_t = lo if self.first_t is None else min(self.first_t, lo)
            self.last_t = hi if self.last_t is None else max(self.last_t, hi)

    # --- processing ----------------------------------------------------------------------

    def next_block(self, until: float) -> Block | None:
        """The next frames up to ``until`` (epoch s; at most the aligner's ``max_frames``) as a block the checks
        read: aligned tags, SI signals, each source's lag, line state and roll changes; None when no frame is due.

        After a gap (the aligner skipped a stretch without any sample) every check, the line-state tracker and
        the roll-change detectors start afresh.
        """
        gaps = len(self.aligner.gaps)
        out = self.aligner.emit(until)
        if out is None:
            return None
        if len(self.aligner.gaps) != gaps:
            self.gaps += 1
            before, after = self.aligner.gaps[-1]
            log.warning("no data from %s to %s (%.0f s): the gap is skipped and the checks start afresh",
                        iso(before), iso(after), after - before)
            for b in self.batches:
                b.reset()
            self._new_trackers()
        t, frames = out
        signals = self.deriver.derive(frames)
        for name, cols in self._source_cols:
            # how long the source has been silent at each frame beyond what its fastest tag's period allows
            with np.errstate(invalid="ignore"):
                lag = np.maximum(0.0, np.min(frames.age[:, cols] - self._periods[cols], axis=1))
            # not judged during the start-up grace: the source may still be connecting
            signals[f"source_lag/{name}"] = Signal(lag, np.isfinite(lag) & (t >= self.aligner.grace_until))
            # seconds since the source was last silent: a tag is not judged stale on a silence that was its source's
            silent = lag > 0
            idx = forward_fill_index(silent)
            last = np.where(idx >= 0, t[np.maximum(idx, 0)], self._last_silent.get(name, -np.inf))
            if t.size:
                self._last_silent[name] = float(last[-1])
            signals[f"source_quiet/{name}"] = Signal(t - last, np.ones(t.size, dtype=bool))
        block = Block(t=t, signals=signals, line_state=np.zeros(t.size, np.int8), tags=frames)
        apply_line_state(block, self.tracker)
        for wid, det in self.rolls.items():
            block.roll_start[wid], block.roll_settling[wid] = det.update(
                t, block.signal(f"diameter/{wid}"), signals.get(f"core_change/{wid}"), signals.get(f"length/{wid}"))
        return block

    def advance(self, until: float) -> list[Transition]:
        """Compute every frame up to ``until`` (epoch s), block by block; return the alarm transitions they caused."""
        out: list[Transition] = []
        while (block := self.next_block(until)) is not None:
            out += self._evaluate(block)
        if self.minutes is not None and self.aligner.next_frame is not None:
            # every frame before the aligner's next one is computed: a minute that ends by then is complete
            self._write_minutes(self.minutes.complete_before(self.aligner.next_frame / self.aligner.rate))
        return out

    def _write_minutes(self, rows: list[CheckMinute], *, flush: bool = False) -> None:
        """Hand the completed minutes' rows to the history, or hold them until they cover ``minutes_every``."""
        self._held += rows
        held = self._held
        if self.history is None or not held:
            return
        if flush or held[-1].t - held[0].t + MINUTE >= self.minutes_every:
            self._held = []
            self.history.record_minutes(held)

    def flush_minutes(self) -> None:
        """Write the minutes held and the open minute, complete or not (the end of a run, or a run that stops)."""
        if self.minutes is not None:
            self._write_minutes(self.minutes.flush(), flush=True)

    def _evaluate(self, block: Block) -> list[Transition]:
        t, frames, signals = block.t, block.tags, block.signals
        results: dict[tuple[str, str], CheckResult] = {}
        block.results = results
        if self._drift:
            self._hold_drift_learning()
        for b in self.batches:
            for c, r in zip(b.checks, b.update(block), strict=True):
                results[(c.kind, c.object_id)] = r
        keys = list(results)
        reasons = np.stack([r.reason for r in results.values()])
        minutes: list[CheckMinute] = []
        if self.minutes is not None:
            values = np.stack([r.value for r in results.values()])
            with np.errstate(invalid="ignore"):
                valid = (reasons == Reason.OK) & np.isfinite(values)
            minutes = self.minutes.push(t, keys, values, valid)
        last_values = np.array([r.value[-1] for r in results.values()])
        self.check_stats.add_block(keys, reasons)
        t_last = float(t[-1])
        self.latest = {k: (t_last, float(v), int(r)) for k, v, r in zip(keys, last_values, reasons[:, -1], strict=True)}
        transitions = self.engine.evaluate(t, results, block.line_state)
        self.frames += t.size
        self.line_state = int(block.line_state[-1])
        self.transitions += len(transitions)
        if self.context is not None:
            series = {name: np.where(s.ok, s.value, np.nan) for name, s in signals.items()}
            series.update({f"tag/{n}": frames.value[:, k] for k, n in enumerate(self.names)})
            self.context.push(t, series)
            for tr in transitions:
                if tr.event == "raise":
                    self.context.on_raise(tr.key, tr.t, self._inputs_of[(tr.point.kind, tr.point.object_id)])
        events = self.follow(transitions)
        after = functools.partial(self.on_committed, events, transitions) \
            if self.on_committed is not None and events else None
        if self.history is not None:
            self.history.record(transitions, lifecycle=events, states=self.states_of(events), after=after)
            if self.context is not None:
                self.history.record_contexts(self.context.collect(float(t[-1])))
            self._write_minutes(minutes)
        elif after is not None:
            after()
        if self.on_transition is not None:
            for tr in transitions:
                self.on_transition(tr)
        if events and self.on_lifecycle is not None:
            self.on_lifecycle(events, transitions)
        return transitions

    # --- the lifecycle ---------------------------------------------------------------------

    def _hold_drift_learning(self) -> None:
        """A drift detector learns nothing while an alarm (other than a drift) stands on a thing it blames: a
        baseline is never learnt while a fault is present."""
        faulty: set[str] = set()
        for p in self.points:
            if p.kind != "drift" and self.engine.state[p.key].active:
                faulty.update(p.blames or (p.object_id,))
        for c in self._drift:
            c.hold = bool(faulty.intersection(c.blames))

    def follow(self, transitions: list[Transition]) -> list[LifecycleEvent]:
        """The lifecycle's changes from the condition engine's raises and clears, in time order, each followed by
        the suppression by design that the new set of abnormal conditions calls for."""
        out: list[LifecycleEvent] = []
        records = self.lifecycle.records
        for tr in transitions:
            e = self.lifecycle.condition(tr.t, tr.key, tr.event)
            if e is None:
                continue
            out.append(e)
            active = {k for k, r in records.items() if r.active}
            out += self.lifecycle.suppress(tr.t, self.suppression.suppressed(active))
        return out

    def states_of(self, events: list[LifecycleEvent]) -> dict[str, object] | None:
        """The lifecycle records the events changed (to store), when this pipeline keeps them."""
        if not self.keep_states or not events:
            return None
        return {e.key: self.lifecycle.records[e.key] for e in events}

    def record_lifecycle(self, events: list[LifecycleEvent], answers: list[object] | None = None) -> None:
        """Write lifecycle changes that did not come with a block (operator actions, shelves expiring).

        An acknowledged drift is accepted as the new normal: its detector learns its baseline again."""
        for e in events:
            if e.action is Action.ACK and e.key.startswith("drift:"):
                check = self._drift_by_key.get(e.key.rsplit(":", 1)[0])
                if check is not None:
                    check.relearn()
        after = functools.partial(self.on_committed, events, []) if self.on_committed is not None and events else None
        if self.history is not None and (events or answers):
            self.history.record([], lifecycle=events, states=self.states_of(events), answers=answers or [],
                                after=after)
        elif after is not None:
            after()
        if events and self.on_lifecycle is not None:
            self.on_lifecycle(events, [])

    def feed(self, batch: SampleBatch) -> list[Transition]:
        """Ingest a batch and compute frames up to its newest sample minus the alignment lag (replay)."""
        self.ingest(batch)
        if self.last_t is None:
            return []
        return self.advance(self.last_t - self.lag)

    def finish_frames(self) -> list[Transition]:
        """Compute the frames still held back by the alignment lag (end of a recording)."""
        return self.advance(self.last_t) if self.last_t is not None else []

    def finish_history(self) -> None:
        """Write pending context windows and the input summary; close the run."""
        if self.history is not None:
            if self.context is not None:
                self.history.record_contexts(self.context.collect(float("inf"), flush=True))
            self.flush_minutes()
            self.history.finish_run(input_rows=self.inputs.rows(), data_start=self.first_t, data_end=self.last_t)

    def finish(self) -> list[Transition]:
        """End of input: compute the remaining frames, then close the run in the history."""
        trs = self.finish_frames()
        self.finish_history()
        return trs


def _take(b: SampleBatch, keep: np.ndarray) -> SampleBatch:
    return SampleBatch(b.tags, b.tag[keep], b.t[keep], b.value[keep], b.quality[keep], b.ref[keep])
