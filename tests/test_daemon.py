"""The daemon (`spanwatch run`): live loop, HTTP health and metrics, clean stop, and crash safety.

These tests use the simulated source (in-process, real time) so they need no external server;
the OPC UA and MQTT connectors have their own tests against real servers.
"""

from __future__ import annotations

import asyncio
import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest
from spanwatch.connectors.history import sqlite_url
from spanwatch.monitor.daemon import Daemon
from spanwatch.monitor.line import load_line

ROOT = Path(__file__).resolve().parent.parent
CONFIG = ROOT / "config" / "quillmere-q2.toml"


def write_config(tmp: Path, *, fault_start: str = "3 s", extra: str = "", http: str = "127.0.0.1:0") -> Path:
    """The example line fed by the simulated line with a tag dropout from ``fault_start``."""
    scenario = tmp / "scenario.toml"
    scenario.write_text(f"""
[scenario]
name = "daemon-test"
config = "{CONFIG}"
duration = "10 min"
seed = 9

[[speed]]
at = "0 s"
to = "400 m/min"

[[fault]]
kind = "tag_dropout"
target = "q2.unwind.rpm"
start = "{fault_start}"
end = "10 min"
""", encoding="utf-8")
    cfg = tmp / "line.toml"
    cfg.write_text(CONFIG.read_text(encoding="utf-8") + f"""
[sources.sim]
kind = "simulated"
scenario = "{scenario}"

[daemon]
history = "{sqlite_url(str(tmp / 'history.db'))}"
http = "{http}"
startup_grace = "1 s"
{extra}
""", encoding="utf-8")
    return cfg


def episodes(db: Path) -> list[tuple]:
    con = sqlite3.connect(db)
    try:
        return con.execute("select run_id, alarm_key, raised_t, cleared_t from alarm_episodes order by id").fetchall()
    finally:
        con.close()


def wait_for(pred, timeout: float, what: str):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        got = pred()
        if got:
            return got
        time.sleep(0.2)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_daemon_raises_serves_health_and_metrics_and_stops_cleanly(tmp_path):
    line = load_line(write_config(tmp_path))

    async def scenario() -> tuple[dict, str, list]:
        daemon = Daemon(line)
        task = asyncio.create_task(daemon.run())

        async def get(path: str) -> tuple[int, bytes]:
            for _ in range(100):
                if daemon.http_port:
                    break
                await asyncio.sleep(0.05)
            r, w = await asyncio.open_connection("127.0.0.1", daemon.http_port)
            w.write(f"GET {path} HTTP/1.1\r\nHost: x\r\n\r\n".encode())
            data = await r.read()
            w.close()
            head, _, body = data.partition(b"\r\n\r\n")
            return int(head.split()[1]), body

        raised = []
        for _ in range(100):  # the dropout starts 3 s in: the stale alarm follows within the stale limit
            await asyncio.sleep(0.1)
            raised = [p.key for p in daemon.pipe.engine.active()]
            if "tag_stale:q2.unwind.rpm:alarm" in raised:
                break
        code, body = await get("/healthz")
        status = json.loads(body)
        status["code"] = code
        _, metrics = await get("/metrics")
        daemon.request_stop()
        await task
        return status, metrics.decode(), raised

    status, metrics, raised = asyncio.run(scenario())
    assert "tag_stale:q2.unwind.rpm:alarm" in raised
    assert status["code"] == 200 and status["status"] == "ok"
    assert status["connectors"]["sim"]["state"] == "connected"
    assert "tag_stale:q2.unwind.rpm:alarm" in status["active_alarms"]
    # Prometheus text exposition format: metric names and labels as the client library renders them
    assert 'spanwatch_samples_in_total{source="sim"}' in metrics
    assert 'spanwatch_active_alarms{priority="medium"} 1.0' in metrics
    # the stale alarm raised and not acknowledged (ANSI/ISA-18.2 state B, unacknowledged alarm; from memory)
    assert 'spanwatch_alarm_states{state="unack"} 1.0' in metrics
    assert "spanwatch_check_evaluation_seconds_count" in metrics
    con = sqlite3.connect(tmp_path / "history.db")
    finished = con.execute("select finished_at from runs").fetchall()
    con.close()
    assert finished and finished[0][0] is not None  # the run was closed by the clean stop


def test_never_seen_tag_goes_stale_after_the_startup_grace(tmp_path):
    extra_tag = '\n[tags."q2.unwind.tension_setpoint"]\nunit = "N"\nsample_period = "100 ms"\n'
    cfg = write_config(tmp_path, fault_start="9 min")
    text = cfg.read_text(encoding="utf-8").replace("\n[sources.sim]", extra_tag + "\n[sources.sim]")
    cfg.write_text(text, encoding="utf-8")
    line = load_line(cfg)

    async def scenario() -> tuple[list[str], list[str]]:
        daemon = Daemon(line, http="")
        task = asyncio.create_task(daemon.run())
        await asyncio.sleep(0.6)  # inside the 1 s grace: nothing is stale yet
        early = [p.key for p in daemon.pipe.engine.active()]
        await asyncio.sleep(1.5)
        late = [p.key for p in daemon.pipe.engine.active()]
        daemon.request_stop()
        await task
        return early, late

    early, late = asyncio.run(scenario())
    assert early == []
    assert late == ["tag_stale:q2.unwind.tension_setpoint:alarm"]


@pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals")
def test_sigkill_loses_no_committed_alarm_and_restart_carries_on(tmp_path):
    port = free_port()
    cfg = write_config(tmp_path, http=f"127.0.0.1:{port}")
    db = tmp_path / "history.db"
    cmd = [sys.executable, "-m", "spanwatch", "run", "--config", str(cfg), "--log-level", "warning"]
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    proc = subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    try:
        def stale_committed() -> list[tuple]:
            try:  # the file exists a moment before the daemon has created its tables
                return [e for e in episodes(db) if "q2.unwind.rpm" in e[1]] if db.exists() else []
            except sqlite3.OperationalError:
                return []

        committed = wait_for(stale_committed, 60, "the stale alarm to be committed")
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
    after_kill = episodes(db)
    for row in committed:
        assert row in after_kill  # committed before the kill, still there
    assert after_kill[-1][3] is None  # left open by the killed run

    # restart on the same database: the open alarm is carried on, and closes when its condition goes away
    proc2 = subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    try:
        def health() -> dict | None:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=2) as r:
                    return json.loads(r.read())
            except OSError:
                return None

        st = wait_for(health, 60, "the restarted daemon's /healthz")
        assert st["status"] == "ok"
        # the new run restarts the simulated line: the rpm tag reports again, so the carried alarm clears
        wait_for(lambda: episodes(db)[len(after_kill) - 1][3] is not None, 60, "the carried-on alarm to clear")
        proc2.send_signal(signal.SIGTERM)
        out, _ = proc2.communicate(timeout=30)
        assert proc2.returncode == 0, out.decode(errors="replace")[-2000:]
    finally:
        if proc2.poll() is None:
            proc2.kill()
    rows = episodes(db)
    carried = rows[len(after_kill) - 1]
    assert carried[0] == after_kill[-1][0]  # still the episode of the first run, closed by the second
    con = sqlite3.connect(db)
    runs = con.execute("select id, finished_at from runs order by id").fetchall()
    con.close()
    assert len(runs) == 2 and runs[0][1] is None and runs[1][1] is not None
