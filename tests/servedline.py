"""The simulated line served live over OPC UA from a thread of the test process (a real asyncua server), so that
a recorder in a subprocess, or a command run in the test's own thread, can read it; every batch served is kept."""

from __future__ import annotations

import asyncio
import logging
import threading
import time
from pathlib import Path

import numpy as np
from spanwatch.monitor.line import load_line
from spanwatch.monitor.simline import SimulatedLine, load_scenario
from spanwatch.monitor.simserve import SimLineServer
from spanwatch.rules.samples import SampleBatch

ROOT = Path(__file__).resolve().parent.parent
STEADY = ROOT / "config" / "scenarios" / "steady.toml"


class ServedLine:
    """``with ServedLine(config) as s:`` serves the line of ``config`` (default: the example line) in real time at
    ``s.endpoint``; ``s.served`` is every batch the server wrote; ``s.call(coro_fn)`` runs a coroutine on its loop."""

    def __init__(self, config: Path | None = None) -> None:
        logging.getLogger("asyncua").setLevel(logging.CRITICAL)
        sc, cfg = load_scenario(STEADY)
        sc.scenario.__dict__["duration"] = 3600.0  # on for the whole test
        self.sim = SimulatedLine(load_line(config or cfg), sc)
        self.served: list[SampleBatch] = []
        advance = self.sim.advance

        def keep(seconds: float) -> SampleBatch:
            b = advance(seconds)
            self.served.append(b)
            return b

        self.sim.advance = keep  # type: ignore[method-assign]
        self.loop = asyncio.new_event_loop()
        self.server: SimLineServer | None = None
        self._thread = threading.Thread(target=self.loop.run_forever, daemon=True)

    def call(self, make, timeout: float = 60.0):  # type: ignore[no-untyped-def]
        return asyncio.run_coroutine_threadsafe(make(), self.loop).result(timeout)

    def __enter__(self) -> ServedLine:
        self._thread.start()

        async def start() -> None:
            self.server = SimLineServer(self.sim, speedup=1.0, start_time=time.time())
            await self.server.start()

        self.call(start)
        return self

    @property
    def endpoint(self) -> str:
        assert self.server is not None
        return self.server.endpoint

    def __exit__(self, *exc: object) -> None:
        if self.server is not None:
            self.call(self.server.stop)
        self.loop.call_soon_threadsafe(self.loop.stop)
        self._thread.join(10)

    def values(self) -> dict[tuple[str, int], float]:
        """(tag, time in whole microseconds) -> value of every sample served so far."""
        out: dict[tuple[str, int], float] = {}
        for b in list(self.served):
            us = np.round(b.t * 1e6).astype(np.int64)
            for k, t, v in zip(b.tag.tolist(), us.tolist(), b.value.tolist(), strict=True):
                out[(b.tags[k], t)] = v
        return out
