"""The simulated line as a live source: paced against a clock, for the daemon, the demo and tests."""

from __future__ import annotations

import asyncio
import time
from collections.abc import Callable
from pathlib import Path

from spanwatch.connectors.live import LiveConnector
from spanwatch.monitor.line import Line
from spanwatch.monitor.simline import SimulatedLine, load_scenario
from spanwatch.rules.samples import SampleBatch


class SimulatedConnector(LiveConnector):
    """Runs a scenario's simulated line paced at ``speedup`` x real time.

    The simulated clock starts at the wall-clock time the connector starts, so at
    ``speedup = 1`` sample timestamps are real times; at other speed-ups the consumer
    must follow :attr:`clock` instead of the wall clock.
    """

    kind = "simulated"

    def __init__(self, name: str, line: Line, scenario: str | Path, sink: Callable[[SampleBatch], None], *,
                 speedup: float = 1.0, tick: float = 0.05, start: float | None = None) -> None:
        super().__init__(name, sink)
        sc, _cfg = load_scenario(scenario)
        self.sim = SimulatedLine(line, sc)
        self.sim.t0 = time.time() if start is None else start
        self.speedup, self.tick = speedup, tick
        self.duration = sc.scenario.duration
        self.finished = asyncio.Event()

    def clock(self) -> float:
        """The simulated time now, epoch seconds."""
        return self.sim.t0 + self.sim.t

    async def _session(self) -> None:
        self.state = "connected"
        wall0 = time.perf_counter() - self.sim.t / self.speedup
        while not self._stop.is_set() and self.sim.t < self.duration - 1e-9:
            batch = self.sim.advance(min(self.tick * self.speedup, self.duration - self.sim.t))
            self.stats.samples_in += len(batch)
            self.sink(batch)
            lag = wall0 + self.sim.t / self.speedup - time.perf_counter()
            await asyncio.sleep(max(0.0, lag))
        self.finished.set()
        await self._stop.wait()  # the scenario is over: stay "connected" with no data (tags go stale)
