"""`spanwatch run` with two live sources at once: the drives' tags over OPC UA, the winders' over MQTT.

One scenario with one seed is served by a real asyncua server and published to a real mosquitto
(two simulations of the same line with the same seed, started together, give the same samples);
the daemon reads half the tags from each, and the checks that combine them (traction needs both
zone tensions and the web speed, the roll checks need the winders) run on the joined frames.
"""

from __future__ import annotations

import asyncio
import logging
import time
import uuid
from pathlib import Path

from spanwatch.connectors.history import sqlite_url
from spanwatch.monitor.daemon import Daemon
from spanwatch.monitor.line import load_line
from spanwatch.monitor.simline import SimulatedLine, load_scenario
from spanwatch.monitor.simserve import SimLineServer
from spanwatch.monitor.simulate import publish_mqtt
from spanwatch.rules.base import Reason

ROOT = Path(__file__).resolve().parent.parent
STEADY = ROOT / "config" / "scenarios" / "steady.toml"


def test_one_daemon_reads_an_opcua_and_an_mqtt_source_together(mqtt_broker, tmp_path):
    logging.getLogger("asyncua").setLevel(logging.CRITICAL)

    async def scenario() -> tuple[dict, dict, list[str]]:
        sc, base = load_scenario(STEADY)
        line = load_line(base)
        server = SimLineServer(SimulatedLine(line, sc), speedup=1.0, start_time=time.time())
        await server.start()
        winder = [n for n in line.tags if n.startswith(("q2.unwind.", "q2.rewind."))]
        parts = [f'''extends = "{ROOT / 'config' / 'quillmere-q2.toml'}"

[sources.plc]
kind = "opcua"
endpoint = "{server.endpoint}"
queue_size = 50

[sources.broker]
kind = "mqtt"
port = {mqtt_broker.port}
client_id = "spanwatch-both-{uuid.uuid4().hex[:6]}"
protocol = "3.1.1"
payload = "json"
subscribe = ["quillmere/q2/#"]
topic_map = [{{ pattern = "quillmere/q2/+/+", tag = "q2.{{1}}.{{2}}" }}]

[daemon]
history = "{sqlite_url(str(tmp_path / 'h.db'))}"
http = ""
''']
        for name in line.tags:
            if name in winder:
                parts.append(f'[tags."{name}"]\nsource = "broker"\n')
            else:
                parts.append(f'[tags."{name}"]\nsource = "plc"\naddress = "ns=2;s={name}"\n')
        cfg = tmp_path / "both.toml"
        cfg.write_text("\n".join(parts), encoding="utf-8")
        daemon = Daemon(load_line(cfg))
        task = asyncio.create_task(daemon.run())
        sc2, _ = load_scenario(STEADY)
        feed = asyncio.create_task(publish_mqtt(SimulatedLine(line, sc2), mqtt_broker.host, mqtt_broker.port))
        try:
            start = time.monotonic()
            while time.monotonic() - start < 30 and not (
                    all(c.state == "connected" for c in daemon.connectors) and daemon.pipe.frames > 400):
                await asyncio.sleep(0.2)
            await asyncio.sleep(2.0)
            status = daemon.status()
            latest = {f"{k}:{o}": r for (k, o), (_, _, r) in daemon.pipe.latest.items()}
            active = [p.key for p in daemon.pipe.engine.active()]
        finally:
            feed.cancel()
            await asyncio.gather(feed, return_exceptions=True)
            daemon.request_stop()
            await task
            await server.stop()
        return status, latest, active

    status, latest, active = asyncio.run(scenario())
    conns = status["connectors"]
    assert conns["plc"]["state"] == "connected" and conns["broker"]["state"] == "connected"
    assert conns["plc"]["samples_in"] > 0 and conns["broker"]["samples_in"] > 0
    # checks that read tags of both sources are valid on the joined frames
    for key in ("traction:pull_1", "traction:pull_2", "speed_diameter:unwind", "length_rate:rewind", "runout:unwind"):
        assert latest[key] == int(Reason.OK), (key, latest[key])
    assert active == [], active  # a clean line: nothing alarms
