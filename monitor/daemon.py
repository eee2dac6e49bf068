"""``spanwatch run``: the daemon beside the drives.

One asyncio loop runs every live connector of the config, a tick task that feeds
their samples through the pipeline and computes frames up to ``clock() - latency``
(so a tag that stops updating goes stale on time even when nothing arrives), and a
small HTTP server on localhost with ``/healthz`` and Prometheus ``/metrics``.

Alarms are committed to the history at every tick that has transitions (SQLite in
WAL mode or PostgreSQL), so a crash or ``kill -9`` loses nothing committed; on the
next start, alarms left open by the previous run are restored as active, so the
restart carries on instead of raising them again. SIGTERM and SIGINT stop the
connectors, process what has arrived, close the run and the database.
"""

from __future__ import annotations

import asyncio
import contextlib
import gc
import json
import logging
import signal
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from prometheus_client import CollectorRegistry, generate_latest
from spanwatch.connectors.history import History
from spanwatch.connectors.live import LiveConnector
from spanwatch.monitor.daemonlog import SourceWatch, log_start, log_stop, log_transition
from spanwatch.monitor.httpd import HttpEndpoint, serve_http
from spanwatch.monitor.line import Line
from spanwatch.monitor.metrics import DaemonCollector
from spanwatch.monitor.pipeline import Pipeline
from spanwatch.monitor.sources import build_connectors
from spanwatch.rules.alarms import AlarmEngine, Transition
from spanwatch.rules.samples import SampleBatch

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
                 clock: Callable[[], float] = time.time, latency: float | None = None, tick: float | None = None,
                 max_latency: float | None = None,
                 connectors: list[LiveConnector] | None = None,
                 on_transition: Callable[[Transition], None] | None = None, mode: str = "daemon") -> None:
        d = line.config.daemon
        self.line = line
        self.clock = clock
        latency = d.latency if latency is None else latency
        self.latency = latency
        self.max_latency = max(latency, d.max_latency if max_latency is None else max_latency)
        self.delay = 0.0  # observed delivery delay (95th percentile of recent batches), seconds of the clock
        self._delays: deque[float] = deque(maxlen=500)
        self.frame_latency = latency
        self.tick = d.tick if tick is None else tick
        self.http = d.http if http is None else http
        self.history = History(history_url or d.history)
        self.history.start_run(mode=mode, line_name=line.name, config_file=line.file, config_hash=line.config_hash,
                               source=", ".join(f"{n} ({s.kind})" for n, s in line.config.sources.items()))
        if mode == "daemon":  # one log line per transition (spanwatch.monitor.daemonlog); the demo prints its own
            on_transition = _logged(on_transition)
        self.pipe = Pipeline(line, self.history, on_transition=on_transition)
        restored = carry_on_open_alarms(self.history, self.pipe.engine)
        if restored:
            log.info("carrying on %d alarm(s) left active by the previous run", restored)
        self.inbox: list[tuple[float, SampleBatch]] = []  # (clock at arrival, batch)
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

    def _publishers(self) -> list:  # type: ignore[type-arg]
        pubs = []
        for spec in self.line.config.sources.values():
            if spec.kind == "mqtt" and (spec.alarm_topic or spec.active_topic):
                from spanwatch.connectors.mqtt import MqttAlarmPublisher
                from spanwatch.monitor.config import mqtt_settings

                pubs.append(MqttAlarmPublisher(mqtt_settings(spec)))
        return pubs

    # --- the loop --------------------------------------------------------------------------

    async def run(self) -> None:
        """Run until :meth:`request_stop` (or SIGTERM / SIGINT when installed)."""
        self.pipe.aligner.start_at(self.clock(), grace=self.line.config.daemon.startup_grace)
        if self.http:
            await self._start_http()
        for p in self.publishers:
            p.start(active=self.pipe.engine.active())  # the retained list starts with what a restart carried on
        tasks = [asyncio.create_task(c.run(), name=f"connector {c.name}") for c in self.connectors]
        started = time.monotonic()
        if self.mode == "daemon":
            log_start(self)
        watch = asyncio.create_task(self._watch_sources(), name="source watch")
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
            for c in self.connectors:
                await c.stop()
            for t in tasks:
                t.cancel()
            await asyncio.gather(*tasks, return_exceptions=True)
            self.step(final=True)
            self.pipe.finish_history()
            for p in self.publishers:
                p.stop()
            if self._http is not None:
                await self._http.close()
            self.history.close()
            if self.mode == "daemon":
                log_stop(self, self.stop_reason, time.monotonic() - started)

    def receive(self, batch: SampleBatch) -> None:
        """The connectors' sink (event-loop thread): keep the batch with its arrival time for the next tick."""
        if len(batch):
            self.inbox.append((self.clock(), batch))

    def step(self, *, final: bool = False) -> list[Transition]:
        """Feed what arrived, compute frames up to now minus the latency allowance, record, publish."""
        t0 = time.perf_counter()
        arrived, self.inbox[:] = list(self.inbox), []
        for b in _merged([b for _, b in arrived]):
            self.pipe.ingest(b)
        for at, b in arrived:
            self._delays.append(at - float(b.t.max()))
        trs = self.pipe.advance(self._until(final))
        self.stats.ticks += 1
        self.stats.eval_seconds += time.perf_counter() - t0
        self.stats.last_tick_wall = time.time()
        for tr in trs:
            self.stats.transitions[tr.event] = self.stats.transitions.get(tr.event, 0) + 1
        if trs and self.publishers:
            active = self.pipe.engine.active()
            for p in self.publishers:
                p.publish(trs, active)
        return trs

    def _until(self, final: bool) -> float:
        """How far frames may be computed.

        ``clock - (latency + observed delivery delay)``: the delay is how far behind the clock the newest
        sample of each batch was when it arrived (slow delivery, a source clock behind ours), the
        95th percentile over the last 500 batches, so ordinary delivery does not read as stale tags; capped
        at ``max_latency`` so a source that has really stopped still goes stale within that time.
        """
        now = self.clock()
        if final:
            return self.pipe.last_t if self.pipe.last_t is not None else now
        if self._delays:
            self.delay = float(np.percentile(self._delays, 95))
        self.frame_latency = min(self.max_latency, self.latency + max(0.0, self.delay))
        return now - self.frame_latency

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
        fresh = now - self.stats.last_tick_wall < max(5.0, 20 * self.tick)
        up = [c for c in self.connectors if c.state == "connected"]
        healthy = fresh and (bool(up) or not self.connectors)
        return {
            "status": "ok" if healthy else "degraded",
            "line": self.line.name,
            "line_state": None if self.pipe.line_state is None else int(self.pipe.line_state),
            "frames": self.pipe.frames,
            "frame_latency_s": round(self.frame_latency, 3),
            "samples": self.pipe.samples,
            "active_alarms": [p.key for p in self.pipe.engine.active()],
            "connectors": {c.name: {"kind": c.kind, "state": c.state, "samples_in": c.stats.samples_in,
                                    "reconnects": c.stats.reconnects, "malformed": c.stats.malformed_total,
                                    "queue_depth": c.stats.queue_depth, "last_error": c.stats.last_error}
                           for c in self.connectors},
            "input_issues": {f"{r['tag']}: {r['reason']}": r["count"] for r in self.pipe.inputs.rows()},
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
