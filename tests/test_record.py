"""``spanwatch record``: the live line into recordings that survive a kill, rotated into segments.

Real parts: the simulated line behind a real asyncua server (tests/servedline.py) and a real mosquitto
(fixture ``mqtt_broker``); the recorder runs as its own process (``python -m spanwatch record``) and is
killed with SIGKILL or stopped with SIGTERM. What is checked against something outside the recorder:
every file reads back with the project's one reader (``read_recording``), every recorded value is the
value the server served at that time, bit for bit, and a gzip file cut off by the kill is what RFC 1952
calls a member without its trailer: the reader counts it as damage, once, and keeps every whole line.
No timing asserts: the waits are generous and only wait for files to appear.
"""

from __future__ import annotations

import asyncio
import os
import signal
import subprocess
import sys
import time
import uuid
from pathlib import Path

import numpy as np
import pytest
from servedline import ROOT, ServedLine
from spanwatch.connectors.recording import ReadProblems, read_recording
from spanwatch.monitor.cli import app
from spanwatch.monitor.line import load_line
from spanwatch.monitor.simserve import opcua_line_config
from typer.testing import CliRunner

ENV = {**os.environ, "PYTHONDONTWRITEBYTECODE": "1"}


def _recorder(config: Path, out: Path, *more: str) -> subprocess.Popen[str]:
    return subprocess.Popen([sys.executable, "-m", "spanwatch", "record", "--config", str(config), "--out", str(out),
                             "--no-progress", *more], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=ENV)


def _wait(what, timeout: float, proc: subprocess.Popen[str] | None = None):  # type: ignore[no-untyped-def]
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        got = what()
        if got:
            return got
        if proc is not None and proc.poll() is not None:
            raise AssertionError(f"the recorder ended early: {proc.communicate()}")
        time.sleep(0.2)
    raise AssertionError(f"not within {timeout} s")


def _read(path: Path, tags: tuple[str, ...]) -> tuple[list, ReadProblems]:
    problems = ReadProblems()
    batches = list(read_recording(path, tags, problems=problems))
    return batches, problems


def _segments(folder: Path, stem: str, suffix: str) -> list[Path]:
    return sorted(folder.glob(f"{stem}-[0-9][0-9][0-9][0-9]-*{suffix}"))


def test_a_recorder_killed_with_sigkill_leaves_every_segment_readable(tmp_path):
    """OPC UA, gzip CSV rotated by size; a bad sample on the way; SIGKILL mid-run."""
    from asyncua import ua

    with ServedLine() as served:
        cfg = tmp_path / "line.toml"
        cfg.write_text(opcua_line_config(served.endpoint), encoding="utf-8")
        tags = tuple(load_line(cfg).tags)
        out = tmp_path / "q2.csv.gz"
        proc = _recorder(cfg, out, "--rotate", "16KB", "--flush-every", "0.5")
        try:
            _wait(lambda: len(_segments(tmp_path, "q2", ".csv.gz")) >= 2, 90, proc)
            # a bad value from the server: recorded with its quality, not dropped
            served.call(lambda: served.server.write("q2.s5.tension", 0.0, t=time.time(),  # type: ignore[union-attr]
                                                    status=ua.StatusCodes.BadSensorFailure))
            _wait(lambda: len(_segments(tmp_path, "q2", ".csv.gz")) >= 4, 120, proc)
            open_seg = _segments(tmp_path, "q2", ".csv.gz")[-1]
            # what the open segment holds while the recorder runs: all of it must be there after the kill
            before = _wait(lambda: sum(len(b) for b in _read(open_seg, tags)[0]), 60, proc)
        finally:
            proc.send_signal(signal.SIGKILL)
            proc.wait(30)
        served_values = served.values()
    segs = _segments(tmp_path, "q2", ".csv.gz")
    assert [int(p.name.split("-")[1]) for p in segs] == list(range(1, len(segs) + 1))  # numbered, none missing
    total, bad, compared = 0, 0, 0
    for i, seg in enumerate(segs):
        batches, problems = _read(seg, tags)
        rows = sum(len(b) for b in batches)
        total += rows
        allowed = {"non-finite value"}  # the bad sample: NaN with quality bad
        if i == len(segs) - 1:  # the open one: at most its cut-off tail, counted once as damage
            allowed.add("damaged file: gzip data truncated")
        assert set(problems.counts) <= allowed, (seg.name, problems.counts)
        assert problems.counts.get("damaged file: gzip data truncated", 0) <= 1
        if seg == open_seg:
            assert rows >= before
        for b in batches:
            bad += int(((b.quality == 2) & (np.array(b.tags)[b.tag] == "q2.s5.tension")).sum())
            # every good value is the one served at that time (microsecond times, values exact)
            us = np.round(b.t * 1e6).astype(np.int64)
            for k, t, v, q in zip(b.tag.tolist(), us.tolist(), b.value.tolist(), b.quality.tolist(), strict=True):
                if q != 0:
                    continue
                got = [served_values.get((b.tags[k], t + d)) for d in (0, -1, 1)]
                assert v in got, (b.tags[k], t, v, got)
                compared += 1
    assert total > 0 and compared > 0.9 * total
    assert bad >= 1


def test_rotation_by_time_to_parquet_and_a_clean_stop_on_sigterm(tmp_path, mqtt_broker):
    """MQTT (real mosquitto, the simulator publishing), --rotate 2s --parquet, stopped with SIGTERM."""
    from servedline import STEADY
    from spanwatch.monitor.simline import SimulatedLine, load_scenario
    from spanwatch.monitor.simulate import publish_mqtt

    cfg = tmp_path / "line.toml"
    cfg.write_text(f"""extends = "{ROOT / 'config' / 'quillmere-q2-mqtt.toml'}"

[sources.broker]
port = {mqtt_broker.port}
client_id = "spanwatch-rec-{uuid.uuid4().hex[:8]}"
""", encoding="utf-8")
    tags = tuple(load_line(cfg).tags)
    sc, base = load_scenario(STEADY)
    sc.scenario.__dict__["duration"] = 3600.0
    sim = SimulatedLine(load_line(base), sc)
    stop = asyncio.Event()

    async def publish() -> None:
        feed = asyncio.create_task(publish_mqtt(sim, mqtt_broker.host, mqtt_broker.port, speedup=1.0))
        await stop.wait()
        feed.cancel()
        await asyncio.gather(feed, return_exceptions=True)

    import threading

    loop = asyncio.new_event_loop()
    thread = threading.Thread(target=loop.run_until_complete, args=(publish(),), daemon=True)
    thread.start()
    out = tmp_path / "shift.csv.gz"
    proc = _recorder(cfg, out, "--rotate", "2s", "--parquet")
    try:
        _wait(lambda: len(_segments(tmp_path, "shift", ".parquet")) >= 3, 120, proc)
        proc.send_signal(signal.SIGTERM)
        stdout, stderr = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
        loop.call_soon_threadsafe(stop.set)
        thread.join(10)
    assert proc.returncode == 0, stderr
    parts = _segments(tmp_path, "shift", ".parquet")
    assert not _segments(tmp_path, "shift", ".csv.gz")  # the open one too was closed and converted
    assert not list(tmp_path.glob("*.part"))
    assert [int(p.name.split("-")[1]) for p in parts] == list(range(1, len(parts) + 1))
    total = 0
    for p in parts:
        batches, problems = _read(p, tags)
        assert problems.counts == {}, (p.name, problems.counts)
        total += sum(len(b) for b in batches)
    said = int(stdout.split("recorded ", 1)[1].split(" ", 1)[0])
    assert total == said > 0  # every sample the recorder counted is in the segments, none twice


@pytest.mark.parametrize(("args", "expected"), [
    (["--rotate", "soon"], "--rotate: expected a time such as 1h"),
    (["--rotate", "10B"], "--rotate: expected a size of at least"),
    (["--duration", "forever"], "--duration: expected a time"),
    (["--parquet"], "--parquet: converts closed segments"),
])
def test_bad_options_say_what_was_expected(tmp_path, args, expected):
    cfg = tmp_path / "line.toml"
    cfg.write_text(opcua_line_config("opc.tcp://127.0.0.1:4840/"), encoding="utf-8")
    r = CliRunner().invoke(app, ["record", "--config", str(cfg), "--out", str(tmp_path / "r.csv.gz"), *args])
    assert r.exit_code == 2
    assert expected in r.output


def test_the_recorder_refuses_to_overwrite_or_to_write_parquet_directly(tmp_path):
    cfg = tmp_path / "line.toml"
    cfg.write_text(opcua_line_config("opc.tcp://127.0.0.1:4840/"), encoding="utf-8")
    old = tmp_path / "r.csv.gz"
    old.write_bytes(b"keep me")
    r = CliRunner().invoke(app, ["record", "--config", str(cfg), "--out", str(old)])
    assert r.exit_code == 2 and "never overwrites" in r.output
    assert old.read_bytes() == b"keep me"
    r = CliRunner().invoke(app, ["record", "--config", str(cfg), "--out", str(tmp_path / "r.parquet")])
    assert r.exit_code == 2 and "expected a recording name ending in .csv.gz or .csv" in r.output


def test_a_config_without_live_sources_is_refused(tmp_path):
    r = CliRunner().invoke(app, ["record", "--config", str(ROOT / "config" / "quillmere-q2.toml"), "--out",
                                 str(tmp_path / "r.csv.gz")])
    assert r.exit_code == 2 and "sources" in r.output


def test_nothing_recorded_from_a_server_that_is_not_there_is_exit_1(tmp_path):
    from spanwatch.connectors.opcua_server import free_port

    cfg = tmp_path / "line.toml"
    cfg.write_text(opcua_line_config(f"opc.tcp://127.0.0.1:{free_port()}/"), encoding="utf-8")
    out = tmp_path / "r.csv.gz"
    r = CliRunner().invoke(app, ["record", "--config", str(cfg), "--out", str(out), "--duration", "3 s",
                                 "--no-progress"])
    assert r.exit_code == 1, r.output
    assert "recorded 0 samples" in r.stdout and "source plc: " in r.stdout
    batches, problems = _read(out, ("q2.s5.tension",))
    assert problems.header and not batches and problems.damage is None  # a complete file with its header only
