"""``spanwatch demo``: the simulated line, monitored live, alarms printed as they happen.

The simulated line runs paced against the wall clock at a speed-up factor; every
tick its new samples go through the same pipeline the daemon uses, and every alarm
transition is printed the moment it is computed. Nothing is written outside a
temporary folder unless a database path is given.
"""

from __future__ import annotations

import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

from rich.console import Console
from rich.table import Table

from connectors.simline import SimulatedLine, load_scenario
from monitor.alarms import Transition
from monitor.history import History, query_episodes, sqlite_url, state_name
from monitor.line import load_line
from monitor.pipeline import Pipeline
from monitor.present import fmt_value, transition_line

REPO = Path(__file__).resolve().parent.parent
DEFAULT_SCENARIO = REPO / "config" / "scenarios" / "demo.toml"


@dataclass
class DemoResult:
    db_path: str
    raised: list[Transition]
    episodes: list[dict[str, object]]
    simulated_seconds: float
    wall_seconds: float


def run_demo(console: Console, *, scenario: Path | None = None, speedup: float = 16.0, duration: float | None = None,
             db: Path | None = None, tick: float = 0.1, pace: bool = True, status_every: float = 30.0) -> DemoResult:
    """Run the demo; returns what was raised and where the history went."""
    scenario = scenario or DEFAULT_SCENARIO
    sc, cfg_path = load_scenario(scenario)
    line = load_line(cfg_path)
    sim = SimulatedLine(line, sc)
    total = min(duration, sc.scenario.duration) if duration else sc.scenario.duration
    tmp = None
    if db is None:
        tmp = tempfile.TemporaryDirectory(prefix="spanwatch-demo-")
        db = Path(tmp.name) / "demo.db"
    history = History(sqlite_url(str(db)))
    history.start_run(mode="demo", line_name=line.name, config_file=line.file, config_hash=line.config_hash,
                      source=f"simulated: {scenario.name}")
    raised: list[Transition] = []

    def show(tr: Transition) -> None:
        text, style = transition_line(tr, sim.t0)
        console.print(text, style=style, highlight=False, markup=False)
        if tr.event == "raise":
            raised.append(tr)

    pipe = Pipeline(line, history, on_transition=show)
    console.print(f"[bold]spanwatch demo[/]: {line.name} ({line.config.line.plant}), scenario "
                  f"[bold]{sc.scenario.name}[/], {total / 60:.1f} simulated minutes at {speedup:g}x "
                  f"(about {total / speedup:.0f} s); history in {db}", highlight=False)
    console.print("Faults injected: " + "; ".join(
        f"{f.kind} on {f.target or 'line'} from {f.start:.0f} s to {f.end:.0f} s" for f in sc.fault), highlight=False)
    wall0 = time.perf_counter()
    step = tick * speedup
    next_status = status_every
    try:
        while sim.t < total - 1e-9:
            chunk = min(step, total - sim.t)
            pipe.feed(sim.advance(chunk))
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
    episodes = query_episodes(History(sqlite_url(str(db))).engine)
    _summary(console, episodes, pipe, sim.t, wall)
    result = DemoResult(str(db), raised, episodes, sim.t, wall)
    if tmp is not None:
        tmp.cleanup()
        result.db_path = "(temporary, removed)"
    return result


def _status(console: Console, pipe: Pipeline, t: float) -> None:
    parts = [f"+{int(t) // 60:02d}:{int(t) % 60:02d}", state_name(pipe.line_state or 0)]
    for (kind, obj), (_, value, reason) in pipe.latest.items():
        if kind == "traction":
            parts.append(f"traction {obj} {value:.2f}" if reason == 0 else f"traction {obj} -")
    active = pipe.engine.active()
    parts.append(f"active alarms {len(active)}")
    console.print("  status: " + " | ".join(parts), style="dim", highlight=False)


def _summary(console: Console, episodes: list[dict[str, object]], pipe: Pipeline, sim_t: float, wall: float) -> None:
    table = Table(title=f"Alarms raised ({len(episodes)})", title_justify="left")
    for col in ("raised", "cleared", "priority", "check", "object", "level", "value", "peak"):
        table.add_column(col)
    for e in episodes:
        unit = str(e["unit"])
        table.add_row(str(e["raised"])[11:23], str(e["cleared"])[11:23] or "active", str(e["priority"]),
                      str(e["check"]), str(e["object"]), str(e["level"]),
                      fmt_value(e["value"], unit), fmt_value(e["peak"], unit))  # type: ignore[arg-type]
    console.print(table)
    bad = pipe.inputs.rows()
    if bad:
        console.print("Input problems: " + "; ".join(f"{r['tag']}: {r['count']} {r['reason']}" for r in bad),
                      highlight=False)
    console.print(f"{sim_t / 60:.1f} simulated minutes in {wall:.1f} s; {pipe.samples} samples, {pipe.frames} frames.",
                  highlight=False)
    console.print("spanwatch is advisory: it is not a safety function and does not replace guarding, safety-rated "
                  "controls or lock-out. Defer to local codes and qualified practice.", style="dim")
