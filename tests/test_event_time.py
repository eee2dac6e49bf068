"""Event time: frames wait for their data, not for the wall clock; bad times are refused, gaps skipped.

The daemon here is driven tick by tick with clocks the test controls (the wall clock, which may
step, and the elapsed clock, which never does), fed by the simulated line; no network, so a
loaded machine cannot change what these tests see. The real-process tests under load are in
tests/test_under_load.py.
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from spanwatch.connectors.history import query_episodes, sqlite_url
from spanwatch.monitor.daemon import Daemon
from spanwatch.monitor.line import load_line
from spanwatch.monitor.pipeline import Pipeline
from spanwatch.monitor.simline import SimulatedLine, load_scenario
from spanwatch.rules.samples import SampleBatch

ROOT = Path(__file__).resolve().parent.parent
STEADY = ROOT / "config" / "scenarios" / "steady.toml"
LIVE = ROOT / "config" / "quillmere-q2-opcua.toml"
T0 = 1_780_000_000.0
TICK = 0.05


class Clocks:
    def __init__(self) -> None:
        self.wall = T0
        self.elapsed = 1000.0


def _sim(duration: float = 3600.0) -> SimulatedLine:
    sc, cfg = load_scenario(STEADY)
    sc.scenario.__dict__["duration"] = duration
    sim = SimulatedLine(load_line(cfg), sc)
    sim.t0 = T0
    return sim


def _daemon(tmp_path: Path, clocks: Clocks) -> Daemon:
    d = Daemon(load_line(LIVE), history_url=sqlite_url(str(tmp_path / "h.db")), http="",
               clock=lambda: clocks.wall, elapsed=lambda: clocks.elapsed, connectors=[])
    d.begin()
    return d


def _drive(d: Daemon, sim: SimulatedLine, clocks: Clocks, seconds: float, *, deliver_every: float = TICK,
           wall_step: dict[float, float] | None = None, time_shift: float = 0.0) -> None:
    """Run ``seconds``: the line produces data every tick; it reaches the daemon every ``deliver_every`` seconds
    (a loaded machine or a slow link delivers in bursts); ``wall_step`` steps the wall clock at given times."""
    held: list[SampleBatch] = []
    waited = 0.0
    steps = dict(wall_step or {})
    end = sim.t + seconds
    while sim.t < end - 1e-9:
        b = sim.advance(TICK)
        if time_shift:
            b = SampleBatch(b.tags, b.tag, b.t + time_shift, b.value, b.quality, b.ref)
        held.append(b)
        clocks.wall += TICK
        clocks.elapsed += TICK
        for at in [a for a in steps if sim.t >= a]:
            clocks.wall += steps.pop(at)
        waited += TICK
        if waited >= deliver_every - 1e-9:
            for x in held:
                d.receive(x)
            held, waited = [], 0.0
        d.step()
    for x in held:
        d.receive(x)
    d.step()


def _finish(d: Daemon) -> list[dict]:
    d.end()
    return query_episodes(d.history.engine, run_id=d.history.run_id)


def test_data_delivered_in_bursts_makes_no_tag_stale(tmp_path):
    # Delivered in 3 s bursts (a loaded machine, a slow link): with frames in wall-clock time every tag would read
    # as stale for most of each burst (the stale limit is 5 sample periods, 0.1 s at 50 Hz).
    clocks = Clocks()
    d = _daemon(tmp_path, clocks)
    sim = _sim()
    _drive(d, sim, clocks, 60.0, deliver_every=3.0)
    assert d.pipe.frames > 2500
    assert d.pipe.inputs.total("late") == 0
    assert _finish(d) == []


def test_a_silent_source_is_one_alarm_not_one_per_tag(tmp_path):
    clocks = Clocks()
    d = _daemon(tmp_path, clocks)
    sim = _sim()
    _drive(d, sim, clocks, 20.0)
    for _ in range(int(15 / TICK)):  # the source says nothing for 15 s
        sim.advance(TICK)
        clocks.wall += TICK
        clocks.elapsed += TICK
        d.step()
    _drive(d, sim, clocks, 15.0)
    episodes = _finish(d)
    assert [(e["check"], e["object"]) for e in episodes] == [("source_lost", "plc")]
    assert episodes[0]["cleared"], "the source's alarm clears when its data is back"


@pytest.mark.parametrize(("silent", "lost"), [(8.0, False), (25.0, True)])
def test_a_source_silent_from_the_start_is_lost_only_after_the_startup_grace(tmp_path, silent, lost):
    # The daemon starts before its source delivers anything (the PLC or its publisher still starting). The default
    # start-up grace is 10 s: a source heard 8 s after the start raised nothing; one first heard after 25 s was lost
    # meanwhile, as one alarm of the source (no tag of it is stale), cleared once its data came.
    clocks = Clocks()
    d = _daemon(tmp_path, clocks)
    for _ in range(round(silent / TICK)):
        clocks.wall += TICK
        clocks.elapsed += TICK
        d.step()
    sim = _sim()
    sim.t0 = clocks.wall  # the data's times follow the wall clock from when it starts
    _drive(d, sim, clocks, 20.0)
    episodes = _finish(d)
    assert [(e["check"], e["object"]) for e in episodes] == ([("source_lost", "plc")] if lost else [])
    assert all(e["cleared"] for e in episodes)


@pytest.mark.parametrize("step", [3600.0, -3600.0])
def test_a_wall_clock_step_changes_nothing(tmp_path, step):
    # The host's clock steps by an hour (a wrong time zone fixed, a manual set): frames follow the data, the
    # elapsed clock never steps, and no sample is refused as from the future.
    clocks = Clocks()
    d = _daemon(tmp_path, clocks)
    sim = _sim()
    _drive(d, sim, clocks, 60.0, wall_step={20.0: step})
    assert d.pipe.inputs.total() - d.pipe.inputs.total("bad quality") - d.pipe.inputs.total("uncertain quality") == 0
    assert _finish(d) == []


def test_a_sample_a_year_ahead_is_refused_and_never_becomes_now(tmp_path):
    # One sample a year in the future used to make every later sample of its tag "out of order" until restart.
    clocks = Clocks()
    d = _daemon(tmp_path, clocks)
    sim = _sim()
    _drive(d, sim, clocks, 10.0)
    bogus = SampleBatch(("q2.s5.tension",), np.zeros(1, np.int32), np.array([clocks.wall + 365 * 86400.0]),
                        np.array([140.0]), np.zeros(1, np.int8), np.array([-1]))
    d.receive(bogus)
    huge = SampleBatch(("q2.s5.tension",), np.zeros(1, np.int32), np.array([1e30]), np.array([140.0]),
                       np.zeros(1, np.int8), np.array([-1]))
    d.receive(huge)
    _drive(d, sim, clocks, 20.0)
    assert d.pipe.inputs.counts[("q2.s5.tension", "future time")] == 2
    assert d.pipe.inputs.total("out of order") == 0
    assert abs(d.pipe.last_t - clocks.wall) < 1.0
    assert _finish(d) == []


def test_a_source_that_restarts_its_clock_is_followed(tmp_path):
    # A PLC restarts with its clock a day behind: after a few seconds of consistent new times they are shifted onto
    # the line's event time (counted), and monitoring goes on with no tag going stale.
    clocks = Clocks()
    d = _daemon(tmp_path, clocks)
    sim = _sim()
    _drive(d, sim, clocks, 20.0)
    _drive(d, sim, clocks, 40.0, time_shift=-86400.0)
    src = d.pipe.clocks.sources["plc"]
    assert len(src.steps) == 1 and src.steps[0] == pytest.approx(-86400.0, abs=10.0)
    frames_before = d.pipe.frames
    _drive(d, sim, clocks, 10.0, time_shift=-86400.0)
    assert d.pipe.frames - frames_before >= 0.9 * 10.0 * 50
    assert not [e for e in _finish(d) if e["check"] == "tag_stale"]


def test_late_within_the_hold_is_folded_into_its_frame():
    # Two tags of one source; one tag's sample arrives 60 ms after the other's newer one: within the 100 ms hold it
    # still lands in the frame of its time, counted as nothing.
    line = load_line(LIVE)
    pipe = Pipeline(line, context=False)
    names = ("q2.s5.tension", "q2.s2.tension")
    t = T0 + np.arange(0, 2.0, 0.02)
    for k in range(t.size):
        pipe.ingest(SampleBatch(names[:1], np.zeros(1, np.int32), t[k:k + 1], np.array([140.0]), np.zeros(1, np.int8),
                                np.array([k])), elapsed=float(k), wall=float(t[k]))
        if k >= 3:
            j = k - 3
            pipe.ingest(SampleBatch(names[1:], np.zeros(1, np.int32), t[j:j + 1], np.array([90.0]),
                                    np.zeros(1, np.int8), np.array([j])), elapsed=float(k), wall=float(t[k]))
        bound = pipe.clocks.bound(float(k))
        if bound is not None:
            pipe.advance(bound)
    assert pipe.inputs.total("late") == 0


def _limit_memory(limit: int):
    def apply() -> None:
        resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
    return apply


def test_a_six_hour_gap_in_a_recording_is_skipped_in_bounded_memory(tmp_path):
    # Before: the frames across a 6 h hole were computed as one block (about 6 GB for line Q2) and the replay died.
    first, second = tmp_path / "a.csv", tmp_path / "b.csv"
    scenario = tmp_path / "short.toml"
    scenario.write_text(STEADY.read_text().replace('config = "../quillmere-q2.toml"',
                                                   f'config = "{ROOT / "config" / "quillmere-q2.toml"}"')
                        .replace('duration = "2 min"', 'duration = "40 s"'))
    assert 'duration = "40 s"' in scenario.read_text()
    for out in (first, second):
        proc = subprocess.run([sys.executable, "-m", "spanwatch", "simulate", str(scenario), "--out", str(out),
                               "--time-format", "epoch", "--no-progress"], capture_output=True, text=True, timeout=300)
        assert proc.returncode == 0, proc.stderr
    rows_a = first.read_text().splitlines()
    rows_b = second.read_text().splitlines()
    header, body_a = rows_a[0], rows_a[1:]
    shifted = []
    for row in rows_b[1:]:
        t, rest = row.split(",", 1)
        shifted.append(f"{float(t) + 6 * 3600.0 + 40.0:.4f},{rest}" if t[0].isdigit() else row)
    joined = tmp_path / "gap.csv"
    joined.write_text("\n".join([header, *body_a, *shifted]) + "\n")
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}
    proc = subprocess.run([sys.executable, "-m", "spanwatch", "replay", str(joined), "--config",
                           str(ROOT / "config" / "quillmere-q2.toml"), "--db", str(tmp_path / "r.db")],
                          capture_output=True, text=True, timeout=600, env=env,
                          preexec_fn=_limit_memory(1_500_000_000))
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert f"replayed {len(body_a) + len(shifted)} samples" in " ".join(proc.stdout.split())


def test_a_recording_batch_longer_than_the_horizon_is_accepted_whole():
    # Before: a reader's chunk (200,000 rows, about 280 s of line Q2) was judged against the watermark from before
    # the chunk, so its last part lay "beyond the horizon": the first 5 s of it were refused as future time and
    # every tag went stale for 2.5 s in a clean hour (found by benchmarks/replay_throughput.py).
    from spanwatch.monitor.watermarks import Watermarks

    w = Watermarks(("rec",), future_horizon=60.0, confirm=5.0)
    t0 = 1.77e9
    first = t0 + np.arange(0.0, 280.0, 0.02)
    assert not w.accept("rec", first.copy(), 0.0).any()
    second = first + 280.0
    assert not w.accept("rec", second.copy(), 0.0).any()
    # a glitch inside a long batch is refused alone; the samples after it are not
    third = second + 280.0
    third[100] += 86400.0
    refused = w.accept("rec", third.copy(), 0.0)
    assert refused.tolist().count(True) == 1 and refused[100]
    # the stream after a 6 h gap, going on for more than `confirm`, is accepted (a gap, not a glitch)
    after = third[-1] + 6 * 3600.0 + np.arange(0.0, 30.0, 0.02)
    assert not w.accept("rec", np.r_[third[-10:] + 0.2, after], 0.0).any()
