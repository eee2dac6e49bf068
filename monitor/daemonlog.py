"""The daemon's log as an operator reads it: start and shutdown lines, sources, alarm transitions, exposures.

What ``spanwatch run`` writes to its log (logger ``spanwatch.daemon``), besides the connectors' own
details:

* one start line: version, line, config file and hash, each source with where it is and how many tags,
  the history (URL with the password hidden), the HTTP address; then one WARNING per exposure of the
  config (:func:`spanwatch.monitor.exposure.exposure_warnings`);
* source state changes, from the connectors' ``state`` and ``stats`` (:class:`SourceWatch`): the
  first failure to connect at once, then at most one line a minute with the number of failed attempts;
  connected; connection lost, with the reason; reconnected, with how long the source was down;
* one line per alarm transition: RAISE (WARNING) or clear (INFO), with source time, priority, check,
  object, level, value or peak with its unit, limit and line state (:mod:`spanwatch.monitor.present`);
* one shutdown line: why (the signal, or the error), how long it ran, frames, samples, raises, clears,
  alarms still active, refused input, reconnections.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

from spanwatch.connectors.ratelog import RateLimitedLog
from spanwatch.connectors.secrets import redact, redact_url
from spanwatch.monitor.exposure import exposure_warnings
from spanwatch.monitor.present import quiet_suppression, transition_log_line
from spanwatch.rules.alarms import Transition
from spanwatch.rules.lifecycle import LifecycleEvent

if TYPE_CHECKING:
    from spanwatch.connectors.live import LiveConnector
    from spanwatch.monitor.daemon import Daemon

log = logging.getLogger("spanwatch.daemon")

RETRY_LOG_EVERY = 60.0  # seconds between two lines about a source that keeps failing to connect
LOST_REASON_WAIT = 1.0  # seconds a "connection lost" line waits for the connector to say why


def log_start(daemon: Daemon) -> None:
    """The start line and the exposure warnings."""
    from spanwatch import __version__
    from spanwatch.monitor.sources import SOURCE_KINDS

    line = daemon.line
    sources = "; ".join(f"{name} ({spec.kind} {SOURCE_KINDS[spec.kind].where(spec)}, "
                        f"{len(line.tags_of_source(name))} tags)" for name, spec in line.config.sources.items())
    http = f"HTTP {daemon._http.address} (/healthz, /metrics)" if daemon._http is not None else "HTTP off"
    log.info("spanwatch %s started: line %s, config %s (hash %s), sources %s, history %s, %s", __version__,
             line.name, line.file, line.config_hash, sources or "none", redact_url(daemon.history.url), http)
    for w in exposure_warnings(line.config, http=daemon.http):
        log.warning("exposure: %s", w)


def log_stop(daemon: Daemon, why: str, seconds: float) -> None:
    """The shutdown line."""
    p = daemon.pipe
    refused = sum(int(r["count"]) for r in p.inputs.rows())  # type: ignore[call-overload]
    reconnects = sum(c.stats.reconnects for c in daemon.connectors)
    log.info("spanwatch stopped (%s) after %s: %d frames, %d samples, %d raise(s), %d clear(s), %d alarm(s) still "
             "active, %d sample(s) refused or flagged, %d reconnection(s)", why, _duration(seconds), p.frames,
             p.samples, daemon.stats.transitions.get("raise", 0), daemon.stats.transitions.get("clear", 0),
             len(p.engine.active()), refused, reconnects)


def log_transition(tr: Transition) -> None:
    """One line per alarm transition: a raise as a WARNING, a clear as INFO."""
    log.log(logging.WARNING if tr.event == "raise" else logging.INFO, "alarm %s", transition_log_line(tr))


def log_lifecycle(e: LifecycleEvent) -> None:
    """One line per lifecycle change other than a raise or clear (those have their own line): who did what."""
    if e.action in ("raise", "clear") or quiet_suppression(e):
        return
    who = f" by {e.user}" if e.user else ""
    note = f": {e.comment}" if e.comment else ""
    log.info("alarm %s %s%s (%s -> %s)%s", e.key, e.action.value.replace("_", " "), who, e.before.value,
             e.after.value, note)


@dataclass
class _Seen:
    up: bool = False  # connected, as last logged
    ever: bool = False  # connected at least once
    base: int = 0  # the connector's reconnect count, as last accounted for
    absorb: int = 0  # reconnect counts that end a lost session (not failed attempts)
    since: float = 0.0  # monotonic time of the last up/down change
    failures: int = 0  # failed attempts since the source was last up
    lost_at: float | None = None  # a loss not logged yet: waiting for its reason
    error: str = ""  # last_error when the state last changed


class SourceWatch:
    """Turns the connectors' ``state`` and ``stats`` into log lines about each source; :meth:`poll` often."""

    def __init__(self, connectors: Sequence[LiveConnector], logger: logging.Logger = log,
                 retry_every: float = RETRY_LOG_EVERY) -> None:
        self.connectors = list(connectors)
        self.log = logger
        self._retries = RateLimitedLog(logger, retry_every)
        now = time.monotonic()
        self._seen = {c.name: _Seen(base=c.stats.reconnects, since=now, error=c.stats.last_error)
                      for c in self.connectors}

    def poll(self) -> None:
        now = time.monotonic()
        for c in self.connectors:
            s = self._seen[c.name]
            count, error, connected = c.stats.reconnects, c.stats.last_error, c.state == "connected"
            ended = count - s.base  # sessions or attempts that ended since the last poll
            s.base = count
            if s.up and (not connected or ended > 0):  # lost (and maybe already back)
                s.up, s.since, s.lost_at, s.failures, s.absorb = False, now, now, 0, 1
            fresh = error != s.error or ended > 0  # the connector has said why, or ended the session
            if s.lost_at is not None and (fresh or connected or now - s.lost_at >= LOST_REASON_WAIT):
                why = _reason(error) if fresh and error else "no reason given"
                self.log.warning("source %s (%s): connection lost: %s; reconnecting", c.name, c.kind, why)
                s.lost_at, s.error = None, error
            failed = max(0, ended - s.absorb)
            s.absorb = max(0, s.absorb - ended)
            if failed and not s.up:
                s.failures += failed
                n = self._retries.tally(c.name, failed)
                if n:
                    down = now - s.since
                    self.log.warning("source %s (%s): cannot connect: %s; retrying (%d failed attempt(s) in %s)",
                                     c.name, c.kind, _reason(error), s.failures, _duration(down))
                s.error = error
            if connected and not s.up:
                if s.ever:
                    self.log.info("source %s (%s): reconnected after %s down (%d failed attempt(s))", c.name, c.kind,
                                  _duration(now - s.since), s.failures)
                else:
                    self.log.info("source %s (%s): connected%s", c.name, c.kind,
                                  f" after {s.failures} failed attempt(s)" if s.failures else "")
                s.up, s.ever, s.since, s.failures, s.error = True, True, now, 0, error
                self._retries = RateLimitedLog(self.log, self._retries.every)  # the next failure is news again


def _reason(error: str) -> str:
    """The connector's last error without the exception class name its reconnect loop puts first."""
    head, sep, rest = error.partition(": ")
    if sep and head.isidentifier() and head.endswith(("Error", "Exception")) and rest:
        error = rest if head in ("OpcUaSessionError", "MqttConnectionError") else error
    return redact(error) or "no reason given"


def _duration(seconds: float) -> str:
    """``42 s``, ``12 min 05 s``, ``3 h 07 min``."""
    s = int(max(0.0, seconds))
    if s < 60:
        return f"{seconds:.1f} s" if seconds < 10 else f"{s} s"
    if s < 3600:
        return f"{s // 60} min {s % 60:02d} s"
    return f"{s // 3600} h {s % 3600 // 60:02d} min"
