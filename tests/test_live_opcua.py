"""The daemon on a live OPC UA source: the line's server goes away and comes back.

A real asyncua server (the simulated line behind :class:`SimLineServer`, real time) and the
real OPC UA client inside the daemon; no protocol mocks. While the server is down the daemon
must show the outage (connector state, stale alarms on the affected tags) and clear it by
itself after the restart, with every transition committed and no unhandled exception.
"""

from __future__ import annotations

import asyncio
import logging
import time
from pathlib import Path

from livewait import assert_outage_committed, until
from spanwatch.connectors.history import sqlite_url
from spanwatch.monitor.daemon import Daemon
from spanwatch.monitor.line import load_line
from spanwatch.monitor.simline import SimulatedLine, load_scenario
from spanwatch.monitor.simserve import SimLineServer, opcua_line_config

ROOT = Path(__file__).resolve().parent.parent
STEADY = ROOT / "config" / "scenarios" / "steady.toml"


def test_daemon_rides_through_an_opcua_server_restart(tmp_path):
    logging.getLogger("asyncua").setLevel(logging.CRITICAL)
    errors: list[dict] = []

    async def scenario() -> dict:
        asyncio.get_running_loop().set_exception_handler(lambda _loop, ctx: errors.append(ctx))
        sc, cfg = load_scenario(STEADY)
        sc.scenario.__dict__["duration"] = 3600.0  # run on for the whole test
        sim = SimulatedLine(load_line(cfg), sc)
        server = SimLineServer(sim, speedup=1.0, start_time=time.time())
        await server.start()
        live = tmp_path / "line.toml"
        live.write_text(opcua_line_config(server.endpoint, queue_size=50, watchdog_interval="0.5 s",
                                          reconnect_min="0.2 s", reconnect_max="1 s"), encoding="utf-8")
        daemon = Daemon(load_line(live), history_url=sqlite_url(str(tmp_path / "h.db")), http="")
        conn = daemon.connectors[0]
        task = asyncio.create_task(daemon.run())
        out: dict = {}
        try:
            await until(lambda: conn.state == "connected" and daemon.pipe.frames > 100, 20, "connected and framing")
            await asyncio.sleep(3.0)
            out["before"] = [p.key for p in daemon.pipe.engine.active()]
            await server.stop()  # the PLC's server goes away
            out["detect_s"] = await until(lambda: conn.state != "connected", 10, "the connector to see the loss")
            # the outage shows as one alarm of the source (lost after 5 s of silence), not one per tag
            out["lost_s"] = await until(
                lambda: [p.key for p in daemon.pipe.engine.active()] == ["source_lost:plc:alarm"],
                15, "the source's own alarm")
            await asyncio.sleep(2.0)
            await server.start()  # and comes back
            out["reconnect_s"] = await until(lambda: conn.state == "connected", 15, "reconnection")
            out["clear_s"] = await until(lambda: not daemon.pipe.engine.active(), 20, "the source alarm to clear")
            out["reconnects"] = conn.stats.reconnects
            out["samples"] = conn.stats.samples_in
        finally:
            daemon.request_stop()
            await task
            await server.stop()
        return out

    out = asyncio.run(scenario())
    assert out["before"] == []  # a clean line before the outage
    assert out["reconnects"] >= 1
    assert_outage_committed(tmp_path / "h.db", "plc")
    assert not errors, errors


def test_daemon_says_clearly_when_the_secured_server_refuses_it(tmp_path, monkeypatch, caplog):
    """Basic256Sha256 SignAndEncrypt server with a user list; the daemon comes with the wrong password."""
    from spanwatch.connectors.opcua_server import make_test_pki

    logging.getLogger("asyncua").setLevel(logging.CRITICAL)
    caplog.set_level(logging.INFO, logger="spanwatch")
    pki = make_test_pki(tmp_path / "pki")
    right, wrong = "Tarn-17!operator", "Tarn-17!operat0r"
    monkeypatch.setenv("SPANWATCH_TEST_PW", wrong)

    async def scenario() -> dict:
        sc, cfg = load_scenario(STEADY)
        sim = SimulatedLine(load_line(cfg), sc)
        server = SimLineServer(sim, security=("SignAndEncrypt",), certificate=pki["server_cert"],
                               private_key=pki["server_key"], trusted=[pki["ca_dir"]], users={"operator": right})
        await server.start(pump=False)
        live = tmp_path / "line.toml"
        live.write_text(opcua_line_config(
            server.endpoint, security_policy="Basic256Sha256", security_mode="SignAndEncrypt",
            certificate=str(pki["client_cert"]), private_key=str(pki["client_key"]),
            server_certificate=str(pki["server_cert"]), username="operator", password="env:SPANWATCH_TEST_PW",
            reconnect_min="0.2 s", reconnect_max="1 s"), encoding="utf-8")
        daemon = Daemon(load_line(live), history_url=sqlite_url(str(tmp_path / "h.db")), http="")
        task = asyncio.create_task(daemon.run())
        try:
            await until(lambda: bool(daemon.connectors[0].stats.last_error), 20, "the refusal")
            return daemon.status()
        finally:
            daemon.request_stop()
            await task
            await server.stop()

    status = asyncio.run(scenario())
    plc = status["connectors"]["plc"]
    assert status["status"] == "degraded" and plc["state"] != "connected"
    assert "refused" in plc["last_error"] and "BadUserAccessDenied" in plc["last_error"], plc["last_error"]
    logs = "\n".join(r.getMessage() for r in caplog.records)
    assert wrong not in str(status) and wrong not in logs and right not in logs
