"""End to end: each fault class raises the expected alarm on the expected object within a bounded delay,
and a clean shift (speed change, stop, rewind roll change) raises nothing.

The fault windows come from the simulator's ground truth; the expected check per fault class is the
physics of the fault (which measurement it disturbs), stated beside each case.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
from spanwatch.connectors.history import History, query_episodes, sqlite_url
from spanwatch.monitor.line import load_line
from spanwatch.monitor.pipeline import Pipeline
from spanwatch.monitor.simline import SimulatedLine, load_scenario
from spanwatch.rules.alarms import Transition

ROOT = Path(__file__).resolve().parent.parent
SCEN = ROOT / "config" / "scenarios"


def run_scenario(name: str, db: Path | None = None) -> tuple[list[Transition], dict]:
    sc, cfg = load_scenario(SCEN / f"{name}.toml")
    line = load_line(cfg)
    sim = SimulatedLine(line, sc)
    history = None
    if db is not None:
        history = History(sqlite_url(str(db)))
        history.start_run(mode="replay", line_name=line.name, config_file=line.file, config_hash=line.config_hash)
    pipe = Pipeline(line, history)
    out: list[Transition] = []
    while sim.t < sc.scenario.duration - 1e-9:
        out += pipe.feed(sim.advance(min(10.0, sc.scenario.duration - sim.t)))
    out += pipe.finish()
    if history is not None:
        history.close()
    return out, sim.truth()


# (scenario, expected check, expected object, bound on the delay from fault start to raise, why)
CASES = [
    ("cof-drop", "draw", "pull_1-pull_2", 30.0,
     "pull_1 slips at the capstan limit, so the middle zone loses the tension its draw should give"),
    ("air-entrainment", "traction", "pull_2", 30.0,
     "Knox–Sweeney film at 780 m/min exceeds the roughness of pull_2: its capacity falls below the ratio"),
    ("loadcell-drift", "draw", "pull_1-pull_2", 90.0,
     "the s5 reading departs from the tension the draw and the upstream tension predict"),
    ("out-of-round", "runout", "unwind", 30.0, "an eccentric roll modulates tension at its rotation frequency"),
    ("caliper-change", "roll_diameter", "rewind", 120.0,
     "a thicker web builds the roll faster than the calibrated effective caliper predicts"),
    ("stuck-diameter", "speed_diameter", "rewind", 60.0,
     "the frozen diameter disagrees with V / (pi n) as the roll grows"),
    ("stuck-diameter", "tag_frozen", "q2.rewind.diameter", 90.0, "no change for 60 s while the line runs"),
    ("length-undercount", "length_rate", "rewind", 30.0, "the counter advances slower than the web speed"),
    ("tag-dropout", "tag_stale", "q2.unwind.rpm", 5.0, "no sample within 5 sample periods"),
]

_cache: dict[str, tuple[list[Transition], dict]] = {}


def cached(name: str) -> tuple[list[Transition], dict]:
    if name not in _cache:
        _cache[name] = run_scenario(name)
    return _cache[name]


@pytest.mark.parametrize(("scenario", "check", "obj", "bound", "why"), CASES,
                         ids=[f"{c[0]}-{c[1]}" for c in CASES])
def test_fault_raises_expected_alarm(scenario, check, obj, bound, why):
    transitions, truth = cached(scenario)
    fault = truth["faults"][0]
    start = fault["start_epoch"]
    raised = [tr for tr in transitions if tr.event == "raise"]
    # nothing before the fault: the lead-in is clean
    early = [tr.key for tr in raised if tr.t < start]
    assert not early, f"alarms before the fault started: {early}"
    hits = [tr for tr in raised if tr.point.kind == check and tr.point.object_id == obj]
    assert hits, f"{why}: expected {check} on {obj}, got {[tr.key for tr in raised]}"
    delay = hits[0].t - start
    assert 0.0 <= delay <= bound, f"{check} on {obj} raised {delay:.1f} s after the fault (bound {bound} s)"


def test_clean_shift_raises_nothing(tmp_path):
    # 32 simulated minutes: speed change 400 -> 300 -> 400 m/min, stop, rewind core change, restart.
    db = tmp_path / "clean.db"
    transitions, truth = run_scenario("clean-shift", db)
    assert truth["duration_s"] >= 30 * 60
    assert truth["roll_changes"] and len(truth["speed_steps"]) >= 3
    assert [tr.key for tr in transitions] == []
    assert query_episodes(History(sqlite_url(str(db))).engine) == []


def test_demo_over_opcua(tmp_path):
    # The default demo: the simulated line behind an embedded OPC UA server, read by the OPC UA client.
    db = tmp_path / "demo.db"
    proc = subprocess.run([sys.executable, "-m", "spanwatch", "demo", "--duration", "50 s", "--speedup", "5",
                           "--db", str(db)], capture_output=True, text=True, timeout=300, cwd=ROOT)
    assert proc.returncode == 0, proc.stderr
    flat = " ".join(proc.stdout.split())
    assert "OPC UA server at opc.tcp://127.0.0.1:" in flat
    episodes = query_episodes(History(sqlite_url(str(db))).engine)
    # the speed ramp from 20 s pushes pull_2 into air entrainment; nothing else may alarm in 50 s
    assert {(e["check"], e["object"]) for e in episodes} <= {("traction", "pull_2"), ("idler_lag", "idler_3"),
                                                             ("idler_lag", "idler_5")}
    assert any(e["check"] == "traction" and e["object"] == "pull_2" for e in episodes)


def test_demo_command_runs(tmp_path):
    db = tmp_path / "demo.db"
    proc = subprocess.run([sys.executable, "-m", "spanwatch", "demo", "--duration", "2 min", "--no-pace",
                           "--db", str(db)], capture_output=True, text=True, timeout=300, cwd=ROOT)
    assert proc.returncode == 0, proc.stderr
    assert "RAISE" in proc.stdout and "traction" in proc.stdout
    assert "advisory" in proc.stdout
    episodes = query_episodes(History(sqlite_url(str(db))).engine)
    assert any(e["check"] == "traction" and e["object"] == "pull_2" for e in episodes)
    # every raise keeps a context window of the signals its check read (before and after the raise)
    import sqlite3

    con = sqlite3.connect(db)
    counts = con.execute("select e.id, count(c.id) from alarm_episodes e left join alarm_context c "
                         "on c.episode_id = e.id group by e.id").fetchall()
    con.close()
    assert counts and all(n >= 1 for _, n in counts), counts
