"""What every live connector (OPC UA, MQTT) offers the daemon.

A connector runs as an asyncio task (:meth:`LiveConnector.run`) that connects,
subscribes, hands every sample to ``sink`` as a :class:`~spanwatch.rules.samples.SampleBatch`
(raw value in the tag's unit, source timestamp, quality 0 good / 1 uncertain / 2 bad,
a sequence number as ``ref``), and reconnects with capped exponential backoff when the
connection is lost, until :meth:`LiveConnector.stop`. ``sink`` is always called on the
event loop's thread. ``state`` and ``stats`` are what the daemon shows in its status
and metrics; nothing secret ever goes into them or into a log line.
"""

from __future__ import annotations

import abc
import asyncio
import contextlib
import random
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from spanwatch.rules.samples import SampleBatch

STATES = ("starting", "connecting", "connected", "reconnecting", "stopped")


@dataclass
class ConnectorStats:
    samples_in: int = 0
    malformed: dict[str, int] = field(default_factory=dict)  # "<topic or node>: <reason>" -> count
    reconnects: int = 0
    overflow: int = 0
    queue_depth: int = 0
    server_timestamps: int = 0  # samples that came without a source timestamp
    lost: dict[str, int] = field(default_factory=dict)  # how it was seen ("sequence", "time gap") -> messages lost
    publisher_restarts: int = 0  # sequence numbers that started again from 0 or 1
    last_error: str = ""

    def count_malformed(self, where: str, reason: str, n: int = 1) -> None:
        key = f"{where}: {reason}"
        self.malformed[key] = self.malformed.get(key, 0) + n

    def count_lost(self, how: str, n: int) -> None:
        self.lost[how] = self.lost.get(how, 0) + n

    @property
    def malformed_total(self) -> int:
        return sum(self.malformed.values())


class LiveConnector(abc.ABC):
    """Base of the live connectors; subclasses implement :meth:`_session`."""

    kind = "live"

    def __init__(self, name: str, sink: Callable[[SampleBatch], None], *, reconnect_min: float = 0.5,
                 reconnect_max: float = 30.0) -> None:
        self.name = name
        self.sink = sink
        self.state = "starting"
        self.stats = ConnectorStats()
        self.reconnect_min, self.reconnect_max = reconnect_min, reconnect_max
        self._stop = asyncio.Event()

    async def run(self) -> None:
        """Connect and stay connected until stopped; every failure is retried after a capped backoff."""
        delay = self.reconnect_min
        first = True
        while not self._stop.is_set():
            self.state = "connecting" if first else "reconnecting"
            began = time.monotonic()
            try:
                await self._session()  # returns or raises when the connection ends
                delay = self.reconnect_min
            except asyncio.CancelledError:
                raise
            except Exception as exc:  # any failure means: reconnect later
                self.stats.last_error = f"{type(exc).__name__}: {exc}"[:300]
                if time.monotonic() - began > 60.0:  # a long session that ended: start the backoff afresh
                    delay = self.reconnect_min
            if self._stop.is_set():
                break
            first = False
            self.stats.reconnects += 1
            self.state = "reconnecting"
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._stop.wait(), timeout=delay * (0.8 + 0.4 * random.random()))
            delay = min(self.reconnect_max, delay * 2.0)
        self.state = "stopped"

    async def stop(self) -> None:
        self._stop.set()

    @abc.abstractmethod
    async def _session(self) -> None:
        """One connection: connect, subscribe, deliver samples; return or raise when it ends."""
