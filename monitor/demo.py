"""``spanwatch demo``: the simulated line, monitored live, alarms printed as they happen.

By default the simulated line runs behind an embedded OPC UA server on loopback (as a
PLC would serve it) and spanwatch monitors it through its real OPC UA client and the
same daemon that ``spanwatch run`` uses, paced against the wall clock at a speed-up
factor; every alarm transition is printed the moment it is computed. ``transport =
"direct"`` (or no pacing) feeds the simulated samples straight into the pipeline
instead. Nothing is written outside a temporary folder unless a database path is given.
"""

from __future__ import annotations

import asyncio
import tempfile
import textwrap
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from rich.console import Console
from rich.table import Table
from spanwatch.connectors.history import History, query_episodes, sqlite_url
from spanwatch.monitor.examples import ExampleError, example_path
from spanwatch.monitor.exposure import remember_config
from spanwatch.monitor.line import Line, load_line
from spanwatch.monitor.operate import Outcome, carry_out
from spanwatch.monitor.pipeline import Pipeline
from spanwatch.monitor.present import (
    drift_text,
    fmt_value,
    lifecycle_line,
    mmss,
    quiet_suppression,
    transition_line,
)
from spanwatch.monitor.simline import SimulatedLine, load_scenario
from spanwatch.rules.alarms import Transition
from spanwatch.rules.base import state_name
from spanwatch.rules.lifecycle import LifecycleEvent

if TYPE_CHECKING:
    from spanwatch.monitor.daemon import Daemon

DEFAULT_SCENARIO = "scenarios/demo.toml"  # a shipped example (spanwatch.monitor.examples), found where installed


@dataclass
class DemoResult:
    db_path: str
    raised: list[Transition]
    episodes: list[dict[str, object]]
    simulated_seconds: float
    wall_seconds: float


def run_demo(console: Console, *, scenario: Path | None = None, speedup: float = 6.0, duration: float | None = None,
             db: Path | None = None, tick: float = 0.1, pace: bool = True, status_every: float = 30.0,
             transport: str = "opcua") -> DemoResult:
    """Run the demo; returns what was raised and where the history went.

    ``scenario`` is a scenario file, or the name of a shipped one (``"cof-drop"``,
    ``"scenarios/cof-drop.toml"``); by default the shipped demo scenario.
    """
    scenario = scenario_file(scenario)
    sc, cfg_path = load_scenario(scenario)
    line = load_line(cfg_path)
    sim = SimulatedLine(line, sc)
    total = min(duration, sc.scenario.duration) if duration else sc.scenario.duration
    tmp = tempfile.TemporaryDirectory(prefix="spanwatch-demo-")
    if db is None:
        db = Path(tmp.name) / "demo.db"
    try:
        if transport == "opcua" and pace:
            return asyncio.run(_demo_opcua(console, sim, sc.scenario.name, scenario, total, speedup, db, Path(tmp.name),
                                           status_every))
        return _demo_direct(console, sim, line, scenario, total, speedup, db, tick, pace, status_every)
    finally:
        tmp.cleanup()


def scenario_file(scenario: str | Path | None) -> Path:
    """The scenario to run: an existing file as given, else a shipped example of that name, else ``scenario``.

    A name that is neither is returned as a path, so loading it reports the missing file.
    """
    if scenario is None:
        return example_path(DEFAULT_SCENARIO)
    if Path(scenario).exists():
        return Path(scenario)
    try:
        return example_path(str(scenario))
    except ExampleError:
        return Path(scenario)


def _banner(console: Console, line_name: str, plant: str, name: str, total: float, speedup: float, db: Path,
            faults: str, via: str) -> None:
    console.print(f"[bold]spanwatch demo[/]: {line_name} ({plant}), scenario [bold]{name}[/], {total / 60:.1f} "
                  f"simulated minutes at {speedup:g}x (about {total / speedup:.0f} s) {via}; history in {db}",
                  highlight=False)
    console.print("Faults injected: " + faults, highlight=False)


def _faults(sim: SimulatedLine) -> str:
    return "; ".join(f"{f.kind} on {f.target or 'line'} from {f.start:.0f} s to {f.end:.0f} s" for f in sim.faults)


async def _demo_opcua(console: Console, sim: SimulatedLine, name: str, scenario: Path, total: float, speedup: float,
                      db: Path, tmp: Path, status_every: float) -> DemoResult:
    """The simulated line behind an embedded OPC UA server, monitored through the OPC UA client and the daemon."""
    import logging

    from spanwatch.monitor.daemon import Daemon
    from spanwatch.monitor.simserve import SimLineServer, opcua_line_config

    logging.getLogger("asyncua").setLevel(logging.CRITICAL)
    line = sim.line
    natural = sum(1.0 / t.sample_period for t in line.tags.values())
    server = SimLineServer(sim, speedup=speedup, start_time=time.time(),
                           max_write_rate=min(6000.0, max(1500.0, 1.05 * natural * speedup)))
    await server.start()
    live_cfg = tmp / "line-opcua.toml"
    # a queue per tag deep enough for a publishing interval at this speed-up, with room for a stalled loop
    queue = int(min(5000, 50 * speedup * 10))
    live_cfg.write_text(opcua_line_config(server.endpoint, base=line.file, queue_size=queue), encoding="utf-8")
    live_line = load_line(live_cfg)
    show = _Printer(console, sim.t0)

    publishing = max(s.publishing_interval for s in live_line.config.sources.values())  # type: ignore[union-attr]
    daemon = Daemon(live_line, history_url=sqlite_url(str(db)), http="", clock=server.clock,
                    latency=(publishing + 0.05) * speedup, lost_after=5.0 * speedup, on_transition=show, mode="demo")
    daemon.on_lifecycle = show.lifecycle
    operator = DemoOperator(show, daemon.act)
    _banner(console, line.name, line.config.line.plant, name, total, speedup, db, _faults(sim),
            f"behind an OPC UA server at {server.endpoint}")
    wall0 = time.perf_counter()
    task = asyncio.create_task(daemon.run())
    next_status = status_every
    try:
        while sim.t < total - 1e-9 and not task.done():
            await asyncio.sleep(0.1)
            operator.step(sim.t)
            if sim.t >= next_status:
                _status(console, daemon.pipe, sim.t, daemon)
                next_status += status_every
    finally:
        daemon.request_stop()
        await task
        await server.stop()
    wall = time.perf_counter() - wall0
    episodes = query_episodes(History(sqlite_url(str(db))).engine, run_id=daemon.history.run_id)
    _summary(console, episodes, daemon.pipe, sim.t, wall, sim.t0)
    return DemoResult(str(db), show.raised, episodes, sim.t, wall)


def _demo_direct(console: Console, sim: SimulatedLine, line: Line, scenario: Path, total: float, speedup: float,
                 db: Path, tick: float, pace: bool, status_every: float) -> DemoResult:
    """The simulated samples straight into the pipeline (no transport), paced or as fast as possible."""
    history = History(sqlite_url(str(db)))
    history.start_run(mode="demo", line_name=line.name, config_file=line.file, config_hash=line.config_hash,
                      source=f"simulated: {scenario.name}")
    show = _Printer(console, sim.t0)

    pipe = Pipeline(line, history, on_transition=show)
    remember_config(history, line, pipe.points)
    pipe.keep_states = True
    pipe.on_lifecycle = lambda events, _trs: show.lifecycle(events)

    def act(target: str, action: str, **kw: object) -> Outcome:
        out = carry_out(pipe.lifecycle, t=sim.t0 + sim.t, target=target, action=action, **kw)  # type: ignore[arg-type]
        pipe.record_lifecycle(out.events)
        return out

    operator = DemoOperator(show, act)
    _banner(console, line.name, line.config.line.plant, sim.sc.scenario.name, total, speedup, db, _faults(sim),
            "fed in process" if pace else "as fast as possible, in process")
    wall0 = time.perf_counter()
    step = tick * speedup
    next_status = status_every
    try:
        while sim.t < total - 1e-9:
            chunk = min(step, total - sim.t)
            pipe.feed(sim.advance(chunk))
            operator.step(sim.t)
            if sim.t >= next_status:
                _status(console, pipe, sim.t)
                next_status += status_every
            if pace:
                lag = (wall0 + sim.t / speedup) - time.perf_counter()
                if lag > 0:
                    time.sleep(lag)
        pipe.finish()
    finally:
        history.close()
    wall = time.perf_counter() - wall0
    episodes = query_episodes(History(sqlite_url(str(db))).engine, run_id=history.run_id)
    _summary(console, episodes, pipe, sim.t, wall, sim.t0)
    return DemoResult(str(db), show.raised, episodes, sim.t, wall)


class _Printer:
    """Prints each alarm transition and lifecycle change the moment it is computed; keeps the raises.

    The first raise of each check kind is followed by its rationalization (the master alarm database's cause,
    corrective action and time to respond), shortened to the width of an 80-column terminal.
    """

    def __init__(self, console: Console, t0: float) -> None:
        self.console, self.t0 = console, t0
        self.raised: list[Transition] = []
        self._told: set[str] = set()

    def __call__(self, tr: Transition) -> None:
        text, style = transition_line(tr, self.t0)
        self.console.print(text, style=style, highlight=False, markup=False)
        if tr.event == "raise":
            self.raised.append(tr)
            p = tr.point
            if p.kind == "drift" and tr.detail:
                short = textwrap.shorten(drift_text(p.object_id, dict(tr.detail), now=tr.t), 74, placeholder=" ...")
                self.console.print(f"    {short}", style="dim", highlight=False, markup=False)
            if p.kind not in self._told:
                self._told.add(p.kind)
                for label, text in (("why", p.cause), (f"do within {p.response_time:g} s", p.action)):
                    if text:
                        short = textwrap.shorten(text, 74 - len(label), placeholder=" ...")
                        self.console.print(f"    {label}: {short}", style="dim", highlight=False, markup=False)

    def lifecycle(self, events: list[LifecycleEvent]) -> None:
        for e in events:
            if e.action in ("raise", "clear") or quiet_suppression(e):
                continue
            self.console.print(lifecycle_line(e, self.t0), style="bold" if e.user else "dim", highlight=False,
                               markup=False)


class DemoOperator:
    """The demo's shift operator: acknowledges the first alarm raised and shelves the next one (another alarm),
    each a little later in simulated time, as a person at the panel would."""

    USER = "shift-op"

    def __init__(self, printer: _Printer, act: Callable[..., Outcome], delay: float = 15.0) -> None:
        self.printer, self.act, self.delay = printer, act, delay
        self.acked: str | None = None
        self.shelved: str | None = None

    def step(self, sim_t: float) -> None:
        raised = self.printer.raised
        t0 = self.printer.t0
        if self.acked is None and raised and sim_t >= raised[0].t - t0 + self.delay:
            self.acked = raised[0].key
            self.act(self.acked, "ack", user=self.USER, comment="seen; checking the nip and the web path")
        if self.shelved is None and self.acked is not None:
            later = [tr for tr in raised if tr.key != self.acked]
            if later and sim_t >= later[0].t - t0 + self.delay:
                self.shelved = later[0].key
                self.act(self.shelved, "shelve", user=self.USER, until=later[0].t + self.delay + 3600.0,
                         comment="known; maintenance informed")


def _status(console: Console, pipe: Pipeline, t: float, daemon: Daemon | None = None) -> None:
    parts = [f"+{int(t) // 60:02d}:{int(t) % 60:02d} {state_name(pipe.line_state or 0)}"]
    if daemon is not None:
        parts += [f"{c.kind} {c.state}" for c in daemon.connectors if c.state != "connected"]
    shares = [f"{obj} {value:.2f}" if reason == 0 else f"{obj} -"
              for (kind, obj), (_, value, reason) in pipe.latest.items() if kind == "traction"]
    if shares:
        parts.append("traction " + " ".join(shares))
    parts.append(f"{len(pipe.engine.active())} active")
    console.print("  " + " | ".join(parts), style="dim", highlight=False)


def _summary(console: Console, episodes: list[dict[str, object]], pipe: Pipeline, sim_t: float, wall: float,
             t0: float) -> None:
    """The alarms of the run as a table that fits 80 columns: when (since the start), how long, priority,
    which alarm, and its worst value (the peak of a cleared one, the value at the raise of one still active)."""
    table = Table(title=f"Alarms raised ({len(episodes)})", title_justify="left")
    table.add_column("raised", no_wrap=True)
    table.add_column("lasted", no_wrap=True)
    table.add_column("priority", no_wrap=True)
    table.add_column("alarm")
    table.add_column("worst value")
    for e in episodes:
        unit = str(e["unit"])
        raised, cleared = float(e["raised_t"]), e["cleared_t"]  # type: ignore[arg-type]
        worst = e["peak"] if cleared is not None else e["value"]
        table.add_row(f"+{mmss(raised - t0)}", "active" if cleared is None else mmss(float(cleared) - raised),
                      str(e["priority"]), f"{e['check']} {e['object']} {e['level']}",
                      fmt_value(worst, unit))  # type: ignore[arg-type]
    console.print(table)
    bad = pipe.inputs.rows()
    if bad:
        console.print("Input problems: " + "; ".join(f"{r['tag']}: {r['count']} {r['reason']}" for r in bad),
                      highlight=False)
    console.print(f"{sim_t / 60:.1f} simulated minutes in {wall:.1f} s; {pipe.samples} samples, {pipe.frames} frames.",
                  highlight=False)
    console.print("spanwatch is advisory: it is not a safety function and does not replace guarding, safety-rated "
                  "controls or lock-out. Defer to local codes and qualified practice.", style="dim")
