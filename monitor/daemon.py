"""``spanwatch run``: the daemon beside the drives.

One asyncio loop runs every live connector of the config, a tick task that feeds
their samples through the pipeline and computes frames up to ``clock() - latency``
(so a tag that stops updating goes stale on time even when nothing arrives), and a
small HTTP server on localhost with ``/healthz`` and Prometheus ``/metrics``.

Alarms go to the history through a writer thread (``connectors/history/writer.py``), so the
event loop never waits for the database: each tick's transitions are committed in one
transaction (SQLite in WAL mode or PostgreSQL), and while the database is unavailable
(locked, full, read-only, down) they wait in a spool on disk, in order, and are written
when it returns; ``/healthz`` says ``degraded`` meanwhile. One daemon writes a line into a
history (a writer lock); on the next start, what the spool holds is written first, then
alarms left open by the previous run are restored as active, so the restart carries on
instead of raising them again. SIGTERM and SIGINT stop the connectors, process what has
arrived, close the run, the writer and the database.
"""

from __future__ import annotations

import asyncio
import contextlib
import functools
import gc
import json
import logging
import signal
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING

from prometheus_client import CollectorRegistry, generate_latest
from spanwatch.connectors.history import History
from spanwatch.connectors.history.store import RequestAnswer
from spanwatch.connectors.history.writer import open_writer
from spanwatch.connectors.live import LiveConnector
from spanwatch.monitor.daemonlog import SourceWatch, log_lifecycle, log_start, log_stop, log_transition
from spanwatch.monitor.exposure import remember_config
from spanwatch.monitor.httpd import HttpEndpoint, serve_http
from spanwatch.monitor.line import Line
from spanwatch.monitor.metrics import DaemonCollector
from spanwatch.monitor.operate import ActionInbox, Outcome, Pending, carry_out
from spanwatch.monitor.pipeline import Pipeline
from spanwatch.monitor.sources import build_connectors
from spanwatch.rules.alarms import AlarmEngine, Transition
from spanwatch.rules.lifecycle import Lifecycle, LifecycleEvent, Record
from spanwatch.rules.samples import SampleBatch

if TYPE_CHECKING:
    from spanwatch.connectors.mqtt import ActionMessage, MqttActionListener

log = logging.getLogger("spanwatch.daemon")


@dataclass
class TickStats:
    ticks: int = 0
    eval_seconds: float = 0.0
    last_tick_wall: float = 0.0
    transitions: dict[str, int] = field(default_factory=lambda: {"raise": 0, "clear": 0})




class Daemon:
    """Owns the pipeline, the connectors, the history and the HTTP endpoint of one line."""

    def __init__(self, line: Line, *, history_url: str | None = None, http: str | None = None,
                 clock: Callable[[], float] = time.time, elapsed: Callable[[], float] | None = None,
                 latency: float | None = None, lost_after: float | None = None, tick: float | None = None,
                 connectors: list[LiveConnector] | None = None,
                 on_transition: Callable[[Transition], None] | None = None, mode: str = "daemon") -> None:
        d = line.config.daemon
        self.line = line
        self.clock = clock  # the wall clock: start time, the future horizon, how far a source is behind
        # the elapsed clock, in the same units: it never steps (time.monotonic, or a paced simulation's clock)
        self.elapsed = elapsed if elapsed is not None else (time.monotonic if clock is time.time else clock)
        self.frame_latency = 0.0  # how far behind the wall clock frames are computed, for the status
        self.tick = d.tick if tick is None else tick
        self.http = d.http if http is None else http
        # the history: schema, writer lock of the line, spool (and what a killed run left in it), before any run
        if history_url is None:  # the config's history, its password from [daemon] history_password (env:/file:)
            from spanwatch.connectors.secrets import url_with_password

            history_url = url_with_password(d.history, d.history_password)
        self.writer = open_writer(history_url, line_name=line.name, spool_folder=d.spool or None,
                                  default_spool_folder=Path(line.file).resolve().parent / ".spanwatch-spool",
                                  spool_max=d.spool_max, timeout=d.history_timeout, lock_timeout=d.lock_timeout)
        self.history = self.writer.history
        try:
            self.history.start_run(mode=mode, line_name=line.name, config_file=line.file,
                                   config_hash=line.config_hash,
                                   source=", ".join(f"{n} ({s.kind})" for n, s in line.config.sources.items()))
            dead = self.history.interrupt_dead_runs()
            if dead:
                log.info("run(s) %s of this line ended without closing (killed): marked interrupted",
                         ", ".join(map(str, dead)))
            if mode == "daemon":  # one log line per transition (spanwatch.monitor.daemonlog); the demo prints its own
                on_transition = _logged(on_transition)
            self.pipe = Pipeline(line, self.writer, on_transition=on_transition)
            if latency is not None:
                self.pipe.clocks.hold = latency
            if lost_after is not None:
                self.pipe.clocks.lost_after = lost_after
            restored = carry_on_open_alarms(self.history, self.pipe.engine)
            self.pipe.keep_states = True
            restore_lifecycle(self.pipe.lifecycle, self.history.load_states(line.name), self.pipe.engine)
            remember_config(self.history, line, self.pipe.points)
            self.actions = ActionInbox(history_url, line.name, timeout=d.history_timeout)
        except BaseException:
            self.writer.close()  # releases the writer lock: a failed start does not block the next one
            raise
        self._counts: deque[tuple[float, int, int]] = deque()  # (elapsed, samples seen, samples refused/late/lost)
        self._wall0 = self._elapsed0 = 0.0
        self._last_step: float | None = None
        if restored:
            log.info("carrying on %d alarm(s) left active by the previous run", restored)
        self.inbox: list[tuple[float, float, SampleBatch]] = []  # (elapsed and wall clock at arrival, batch)
        self.connectors = connectors if connectors is not None else build_connectors(line, self.receive)
        self.publishers = self._publishers()
        self.stats = TickStats()
        self.stopping = asyncio.Event()
        self.registry = CollectorRegistry()
        self.registry.register(DaemonCollector(self))
        self._http: HttpEndpoint | None = None
        self.http_port: int | None = None
        self.mode = mode
        self.stop_reason = "stop requested"
        self.requests: list[Pending] = []  # operators' requests read from the inbox, for the next tick
        self.pipe.on_lifecycle = self._lifecycle_out
        self.pipe.on_committed = self._publish
        self.on_lifecycle: Callable[[list[LifecycleEvent]], None] | None = None  # the demo prints them

    def _publishers(self) -> list:  # type: ignore[type-arg]
        pubs = []
        for spec in self.line.config.sources.values():
            if spec.kind == "mqtt" and (spec.alarm_topic or spec.active_topic):
                from spanwatch.connectors.mqtt import MqttAlarmPublisher
                from spanwatch.monitor.config import mqtt_settings

                pubs.append(MqttAlarmPublisher(mqtt_settings(spec)))
        return pubs

    # --- the loop --------------------------------------------------------------------------

    def begin(self) -> None:
        """Start the history writer and the clocks (``run`` does it; tests that drive ``step`` call it)."""
        self.writer.start()
        self._wall0, self._elapsed0 = self.clock(), self.elapsed()
        self.pipe.aligner.start_at(self._wall0, grace=self.line.config.daemon.startup_grace)
        self.pipe.clocks.begin(self._wall0, self._elapsed0)

    def end(self) -> None:
        """Compute what is left, close the run and the writer (what ``run`` does after its connectors stop)."""
        self.step(final=True)
        self.pipe.finish_history()
        self.writer.close()

    def _wall(self) -> float:
        """The wall clock for judging source times: the later of the clock and the start time plus the elapsed
        clock, so a host clock stepped back does not make every sample look like the future."""
        return max(self.clock(), self._wall0 + (self.elapsed() - self._elapsed0))

    async def run(self) -> None:
        """Run until :meth:`request_stop` (or SIGTERM / SIGINT when installed)."""
        self.begin()
        if self.http:
            try:
                await self._start_http()
            except BaseException:
                await asyncio.to_thread(self.writer.close)
                raise
        for p in self.publishers:
            p.start()
            p.publish_list(self.pipe.point_of, self.pipe.lifecycle.records)  # what a restart carried on
        listeners = self._action_listeners(asyncio.get_running_loop())
        tasks = [asyncio.create_task(c.run(), name=f"connector {c.name}") for c in self.connectors]
        started = time.monotonic()
        if self.mode == "daemon":
            log_start(self)
        watch = asyncio.create_task(self._watch_sources(), name="source watch")
        inbox = asyncio.create_task(self._poll_actions(), name="operator actions")
        prune = asyncio.create_task(self._prune_context(), name="context retention")
        gc.freeze()  # long-lived objects of the start-up out of the collector's way: shorter GC pauses
        try:
            while not self.stopping.is_set():
                self.step()
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(self.stopping.wait(), timeout=self.tick)
        except BaseException as exc:
            self.stop_reason = f"error: {type(exc).__name__}: {exc}" if isinstance(exc, Exception) else \
                f"{type(exc).__name__}"
            raise
        finally:
            watch.cancel()
            inbox.cancel()
            prune.cancel()
            for c in self.connectors:
                await c.stop()
            for t in tasks:
                t.cancel()
            await asyncio.gather(*tasks, return_exceptions=True)
            self.step(final=True)
            self.pipe.finish_history()
            for p in self.publishers:
                p.stop()
            for listener in listeners:
                listener.stop()
            if self._http is not None:
                await self._http.close()
            await asyncio.to_thread(self.writer.close)  # writes what is queued (or spools it); off the event loop
            self.actions.close()
            if self.mode == "daemon":
                log_stop(self, self.stop_reason, time.monotonic() - started)

    def receive(self, batch: SampleBatch) -> None:
        """The connectors' sink (event-loop thread): keep the batch with its arrival time for the next tick."""
        if len(batch):
            self.inbox.append((self.elapsed(), self._wall(), batch))

    def step(self, *, final: bool = False) -> list[Transition]:
        """Feed what arrived, compute the frames its event time allows, record, publish.

        Frames wait for the data of their time (each source's watermark, see
        :mod:`spanwatch.monitor.watermarks`), not for the wall clock, so a loaded machine or a slow
        delivery delays the alarms a little but never makes tags stale; a source that delivers
        nothing for ``lost_after`` stops holding the others back and raises its own alarm.
        """
        t0 = time.perf_counter()
        now = self.elapsed()
        stalled = now - self._last_step - 1.0 if self._last_step is not None else 0.0
        if stalled > 0:  # we did not run for a while (suspended, no CPU): not the sources' silence
            self.pipe.clocks.excuse(stalled)
        self._last_step = now
        arrived, self.inbox[:] = list(self.inbox), []
        if arrived:
            elapsed, wall = max(a[0] for a in arrived), max(a[1] for a in arrived)
            for b in _merged([a[2] for a in arrived]):
                self.pipe.ingest(b, elapsed=elapsed, wall=wall)
        until = self.pipe.last_t if final else self.pipe.clocks.bound(self.elapsed())
        trs = self.pipe.advance(until) if until is not None else []
        if until is not None:
            self.frame_latency = max(0.0, self.clock() - until)
        self.stats.ticks += 1
        self.stats.eval_seconds += time.perf_counter() - t0
        self.stats.last_tick_wall = time.time()
        for tr in trs:
            self.stats.transitions[tr.event] = self.stats.transitions.get(tr.event, 0) + 1
        self._operate()
        self._note_counts()
        return trs

    # --- operator actions and the lifecycle --------------------------------------------------

    async def _poll_actions(self) -> None:
        """Read the operators' requests for this line from the history, every ``[alarms] actions_poll`` s."""
        every = self.line.config.alarms.actions_poll
        while True:
            with contextlib.suppress(Exception):  # a database hiccup must never stop the monitor
                self.requests += await asyncio.to_thread(self.actions.poll)
            await asyncio.sleep(every)

    async def _prune_context(self, every: float = 3600.0) -> None:
        """Delete context windows older than ``[alarms] context_keep`` or beyond ``context_max_rows``, and the
        checks' minutes older than ``context_keep``, hourly.

        Only the signals kept around raises and the checks' per-minute values go: transitions, episodes and actions
        are never deleted.
        """
        from spanwatch.connectors.history.queries import prune_context
        from spanwatch.connectors.history.trends import prune_check_minutes

        a = self.line.config.alarms
        while True:
            try:
                n = await asyncio.to_thread(prune_context, self.actions.engine,
                                            older_than=self.clock() - a.context_keep, max_rows=a.context_max_rows)
                if n:
                    log.info("history retention: %d context window(s) deleted (older than %.0f days, or beyond %d)",
                             n, a.context_keep / 86400, a.context_max_rows)
                n = await asyncio.to_thread(prune_check_minutes, self.actions.engine,
                                            older_than=self.clock() - a.context_keep)
                if n:
                    log.info("history retention: %d check minute(s) deleted (older than %.0f days)", n,
                             a.context_keep / 86400)
            except Exception as exc:  # the database unavailable: the next hour tries again
                log.warning("history retention: %s", exc)
            await asyncio.sleep(every)

    def _operate(self) -> None:
        """End the shelves whose time ran out; carry out the requests that arrived; record both."""
        now = self.clock()
        events = self.pipe.lifecycle.expire(now)
        answers = []
        reqs, self.requests = self.requests, []
        for r in reqs:
            out = carry_out(self.pipe.lifecycle, t=now, target=r.target, action=r.action, user=r.user,
                            comment=r.comment, until=r.until, one_shot=r.one_shot, request=r.id)
            log.info("request %d by %s: %s %s: %s: %s", r.id, r.user, r.action, r.target, out.status, out.answer)
            events += out.events
            answers.append(RequestAnswer(r.id, out.status, out.answer, now))
        if events or answers:
            self.pipe.record_lifecycle(events, answers)

    def act(self, target: str, action: str, *, user: str, comment: str = "", until: float | None = None,
            one_shot: bool = False) -> Outcome:
        """Carry out an operator's action in this process (the demo's operator, an MQTT action), recorded."""
        out = carry_out(self.pipe.lifecycle, t=self.clock(), target=target, action=action, user=user,
                        comment=comment, until=until, one_shot=one_shot)
        if out.events:
            self.pipe.record_lifecycle(out.events)
        return out

    def _lifecycle_out(self, events: list[LifecycleEvent], transitions: list[Transition]) -> None:
        """Log the lifecycle's changes (the daemon) or hand them to the demo."""
        if self.mode == "daemon":
            for e in events:
                log_lifecycle(e)
        if self.on_lifecycle is not None:
            self.on_lifecycle(events)

    def _publish(self, events: list[LifecycleEvent], transitions: list[Transition]) -> None:
        """Publish lifecycle changes with the transitions among them (MQTT), once the history has them: called on
        the history writer's thread after the commit (or the spool)."""
        for p in self.publishers:
            p.publish_lifecycle(events, self.pipe.point_of, self.pipe.lifecycle.records, transitions=transitions)

    def _action_listeners(self, loop: asyncio.AbstractEventLoop) -> list:  # type: ignore[type-arg]
        """Listen for operators' actions on each MQTT source's ``actions_topic`` (the broker authenticates)."""
        out = []
        for spec in self.line.config.sources.values():
            if spec.kind == "mqtt" and spec.actions_topic:
                from spanwatch.connectors.mqtt import MqttActionListener
                from spanwatch.monitor.sources import mqtt_settings

                listener = MqttActionListener(mqtt_settings(spec), spec.actions_topic, lambda _msg: None, loop=loop)
                listener.on_action = functools.partial(self._mqtt_answer, listener)
                listener.start()
                out.append(listener)
        return out

    def _mqtt_answer(self, listener: MqttActionListener, msg: ActionMessage) -> None:
        """Carry out an action that came over MQTT (on the event loop) and answer on the result topic."""
        target = msg.alarm
        if target.isdigit():
            target = self.actions.key_of_episode(int(target)) or f"episode {target}"
        until = None if msg.until is None or msg.until == float("inf") else msg.until
        out = self.act(target, msg.action.value, user=msg.user, comment=msg.comment or "", until=until,
                       one_shot=msg.one_shot)
        log.info("mqtt action by %s: %s %s: %s: %s", msg.user, msg.action.value, target, out.status, out.answer)
        listener.reply(msg, out.status == "applied", out.answer, state={e.key: e.after.value for e in out.events})

    # reasons a sample was not used as it should have been (malformed payloads are counted by the connectors)
    TROUBLE = ("out of order", "duplicate timestamp", "late", "future time", "malformed", "unknown tag")

    def _trouble(self) -> int:
        refused = sum(self.pipe.inputs.total(r) for r in self.TROUBLE)
        lost = sum(c.stats.malformed_total + c.stats.overflow + sum(c.stats.lost.values()) for c in self.connectors)
        return refused + lost

    def _note_counts(self) -> None:
        now, trouble = self.elapsed(), self._trouble()
        self._counts.append((now, self.pipe.samples + trouble, trouble))
        while len(self._counts) > 2 and now - self._counts[1][0] > 60.0:
            self._counts.popleft()

    def trouble_rate(self) -> float:
        """Share of the samples of the last minute that were refused, late or lost (0 when none arrived)."""
        if len(self._counts) < 2:
            return 0.0
        (_, seen0, bad0), (_, seen1, bad1) = self._counts[0], self._counts[-1]
        return (bad1 - bad0) / (seen1 - seen0) if seen1 > seen0 else 0.0

    def request_stop(self, reason: str = "stop requested") -> None:
        if not self.stopping.is_set():
            self.stop_reason = reason
        self.stopping.set()

    def install_signal_handlers(self) -> None:
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGTERM, signal.SIGINT):
            loop.add_signal_handler(sig, self.request_stop, sig.name)

    async def _watch_sources(self) -> None:
        """Log source state changes as they happen (spanwatch.monitor.daemonlog.SourceWatch)."""
        watch = SourceWatch(self.connectors)
        while True:
            with contextlib.suppress(Exception):  # the log must never stop the monitor
                watch.poll()
            await asyncio.sleep(0.1)

    # --- status and HTTP -------------------------------------------------------------------

    def status(self) -> dict[str, object]:
        now = time.time()
        d = self.line.config.daemon
        fresh = now - self.stats.last_tick_wall < max(5.0, 20 * self.tick)
        up = [c for c in self.connectors if c.state == "connected"]
        elapsed, wall = self.elapsed(), self.clock()
        sources = {}
        for name in self.line.config.sources:
            state, delay = self.pipe.clocks.state(name, elapsed, wall, d.delay_limit)
            sources[name] = {"state": state, "behind_s": None if delay is None else round(delay, 3)}
        rate = self.trouble_rate()
        history = self.writer.status()
        reasons = [] if history["state"] == "ok" else [
            f"history {history['state']} ({history['reason']}): {history['spooled']} record(s) spooled, "
            f"{history['lost']} lost"]
        if not fresh:
            reasons.append("the pipeline has not run for a while")
        if self.connectors and not up:
            reasons.append("no source connected")
        reasons += [f"source {n} {v['state']}" for n, v in sources.items() if v["state"] in ("lost", "delayed")]
        if rate > d.degraded_rate:
            by = {r: self.pipe.inputs.total(r) for r in self.TROUBLE if self.pipe.inputs.total(r)}
            reasons.append(f"{rate:.1%} of the samples of the last minute refused, late or lost ({by})")
        return {
            "status": "degraded" if reasons else "ok",
            "reasons": reasons,
            "sources": sources,
            "trouble_rate": round(rate, 4),
            "line": self.line.name,
            "line_state": None if self.pipe.line_state is None else int(self.pipe.line_state),
            "frames": self.pipe.frames,
            "frame_latency_s": round(self.frame_latency, 3),
            "samples": self.pipe.samples,
            "active_alarms": [p.key for p in self.pipe.engine.active()],
            "alarm_states": {k: r.state.value for k, r in self.pipe.lifecycle.records.items()
                             if r.state.value != "normal"},
            "connectors": {c.name: {"kind": c.kind, "state": c.state, "samples_in": c.stats.samples_in,
                                    "reconnects": c.stats.reconnects, "malformed": c.stats.malformed_total,
                                    "queue_depth": c.stats.queue_depth, "last_error": c.stats.last_error,
                                    "lost": dict(c.stats.lost), "publisher_restarts": c.stats.publisher_restarts}
                           for c in self.connectors},
            "input_issues": {f"{r['tag']}: {r['reason']}": r["count"] for r in self.pipe.inputs.rows()},
            "history": history,
        }

    async def _start_http(self) -> None:
        self._http = await serve_http(self.http, {
            "/healthz": self._healthz, "/status": self._healthz, "/metrics": self._metrics})
        self.http_port = self._http.port

    def _healthz(self) -> tuple[int, bytes, str]:
        st = self.status()
        return (200 if st["status"] == "ok" else 503), json.dumps(st).encode(), "application/json"

    def _metrics(self) -> tuple[int, bytes, str]:
        return 200, generate_latest(self.registry), "text/plain; version=0.0.4; charset=utf-8"


def _logged(then: Callable[[Transition], None] | None) -> Callable[[Transition], None]:
    """Log each transition, then pass it on to ``then``."""
    def on_transition(tr: Transition) -> None:
        log_transition(tr)
        if then is not None:
            then(tr)

    return on_transition


def _merged(batches: list[SampleBatch]) -> list[SampleBatch]:
    """Join consecutive batches that share a tag list, so a tick ingests one batch per source."""
    out: list[SampleBatch] = []
    run: list[SampleBatch] = []
    for b in batches:
        if run and b.tags != run[0].tags:
            out.append(SampleBatch.concat(run) if len(run) > 1 else run[0])
            run = []
        run.append(b)
    if run:
        out.append(SampleBatch.concat(run) if len(run) > 1 else run[0])
    return out


async def run_daemon(line: Line, *, history_url: str | None = None, http: str | None = None) -> None:
    """Entry point of ``spanwatch run``."""
    daemon = Daemon(line, history_url=history_url, http=http)
    daemon.install_signal_handlers()
    await daemon.run()


def restore_lifecycle(lifecycle: Lifecycle, states: dict[str, Record], engine: AlarmEngine) -> int:
    """Take on the lifecycle records a previous run of the line left (acknowledged, shelved, out of service ...).

    The condition is the engine's (what :func:`carry_on_open_alarms` restored): a record whose alarm the
    configuration no longer has is dropped, and one whose condition disagrees with the engine's follows the
    engine. Returns how many records were taken on.
    """
    n = 0
    for key, rec in states.items():
        if key not in lifecycle.records:
            continue
        active = engine.state[key].active
        if rec.active != active:
            rec = replace(rec, active=active, acked=rec.acked and not active)
        lifecycle.set(key, rec)
        n += 1
    return n


def carry_on_open_alarms(history: History, engine: AlarmEngine) -> int:
    """Carry on the alarms an earlier run of this line and mode left open; returns how many.

    Each open episode whose alarm the engine still has is restored as active in the engine (its
    condition taken to hold since the raise) and adopted by this run, so the next clear completes it
    instead of a new raise opening a second episode. One whose alarm the configuration no longer has
    is closed at this run's start. Of two open episodes of one alarm, the older is carried on.
    """
    assert history.mode is not None and history.started_at is not None, "start_run first"
    restored: set[str] = set()
    gone: list[int] = []
    for ep in history.open_episodes(line_name=history.line_name, mode=history.mode):
        if ep.alarm_key in restored:
            continue
        if engine.restore(ep.alarm_key, ep.raised_t):
            history.adopt(ep)
            restored.add(ep.alarm_key)
        else:
            gone.append(ep.episode_id)
    history.close_episodes(gone, at=history.started_at)
    return len(restored)
