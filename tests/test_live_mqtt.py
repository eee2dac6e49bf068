"""The daemon on a live MQTT source: the broker goes away and comes back.

A real mosquitto (started by the fixture on a free port), the simulated line published to it
in real time by ``spanwatch.monitor.simulate.publish_mqtt`` (JSON payloads, QoS 1), and the daemon with
the example MQTT configuration (``config/quillmere-q2-mqtt.toml``) reading it; no protocol
mocks. While the broker is down the daemon must show the outage (connector state, stale
alarms on every tag) and clear it by itself after the restart; every transition committed,
alarms published back to the broker, no unhandled exception.
"""

from __future__ import annotations

import asyncio
import json
import threading
import time
import uuid
from pathlib import Path

import paho.mqtt.client as mqtt
from livewait import assert_outage_committed, until
from paho.mqtt.enums import CallbackAPIVersion
from spanwatch.connectors.history import History, query_episodes, sqlite_url
from spanwatch.monitor.daemon import Daemon
from spanwatch.monitor.line import load_line
from spanwatch.monitor.simline import SimulatedLine, load_scenario
from spanwatch.monitor.simulate import publish_mqtt

ROOT = Path(__file__).resolve().parent.parent
STEADY = ROOT / "config" / "scenarios" / "steady.toml"


def test_daemon_rides_through_a_broker_restart_and_publishes_its_alarms(mqtt_broker, tmp_path):
    cfg = tmp_path / "line.toml"
    cfg.write_text(f"""extends = "{ROOT / 'config' / 'quillmere-q2-mqtt.toml'}"

[sources.broker]
port = {mqtt_broker.port}
client_id = "spanwatch-test-{uuid.uuid4().hex[:8]}"
keepalive = "2 s"
reconnect_min = "0.2 s"
reconnect_max = "1 s"

[daemon]
history = "{sqlite_url(str(tmp_path / 'h.db'))}"
http = ""
startup_grace = "2 s"
""", encoding="utf-8")
    line = load_line(cfg)
    alarm_topic = line.config.sources["broker"].alarm_topic
    received: list[dict] = []
    lock = threading.Lock()

    def on_message(_c, _u, msg) -> None:
        with lock:
            received.append(json.loads(msg.payload))

    listener = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"listener-{uuid.uuid4().hex[:6]}",
                           protocol=mqtt.MQTTv311, clean_session=False)
    listener.on_message = on_message
    listener.on_connect = lambda c, *_: c.subscribe(alarm_topic, qos=1)
    listener.connect(mqtt_broker.host, mqtt_broker.port)
    listener.loop_start()
    errors: list[dict] = []

    async def scenario() -> dict:
        asyncio.get_running_loop().set_exception_handler(lambda _loop, ctx: errors.append(ctx))
        sc, base = load_scenario(STEADY)
        sim = SimulatedLine(load_line(base), sc)
        daemon = Daemon(line)
        conn = daemon.connectors[0]
        task = asyncio.create_task(daemon.run())
        feed = asyncio.create_task(publish_mqtt(sim, mqtt_broker.host, mqtt_broker.port, speedup=1.0))
        out: dict = {}
        try:
            await until(lambda: conn.state == "connected" and daemon.pipe.frames > 150, 20, "connected and framing")
            await asyncio.sleep(3.0)
            out["before"] = [p.key for p in daemon.pipe.engine.active()]
            await asyncio.to_thread(mqtt_broker.stop)  # the broker goes away
            await until(lambda: conn.state != "connected", 10, "the connector to see the loss")
            await until(lambda: [p.kind for p in daemon.pipe.engine.active()] == ["source_lost"], 15,
                        "the source's own alarm, not one per tag")
            await asyncio.sleep(2.0)
            await asyncio.to_thread(mqtt_broker.restart)  # and comes back
            await until(lambda: conn.state == "connected", 20, "reconnection")
            await until(lambda: not daemon.pipe.engine.active(), 30, "the source alarm to clear")
            out["reconnects"] = conn.stats.reconnects
        finally:
            feed.cancel()
            await asyncio.gather(feed, return_exceptions=True)
            daemon.request_stop()
            await task
        return out

    try:
        out = asyncio.run(scenario())
        time.sleep(1.0)
    finally:
        listener.loop_stop()
        listener.disconnect()
    assert out["before"] == []
    assert out["reconnects"] >= 1
    assert_outage_committed(tmp_path / "h.db", next(iter(line.config.sources)))
    # the transitions went out on the alarm topic too (QoS 1, persistent listener session): at least the clears,
    # which happen after the broker is back
    with lock:
        published = {(m.get("check"), m.get("event")) for m in received}
    assert ("source_lost", "clear") in published, received[:3]
    assert not errors, errors


def test_daemon_reads_samples_published_in_batches_without_a_false_alarm(mqtt_broker, tmp_path):
    # The simulated line at its own rates (50 Hz and 10 Hz tags), each tag's samples of 0.5 s in one message, as a
    # gateway that publishes twice a second: every sample reaches the pipeline, none is refused, late or counted
    # lost, and the steady line raises nothing, given a latency allowance that covers the batch.
    cfg = tmp_path / "line.toml"
    cfg.write_text(f"""extends = "{ROOT / 'config' / 'quillmere-q2-mqtt.toml'}"

[sources.broker]
port = {mqtt_broker.port}
client_id = "spanwatch-test-{uuid.uuid4().hex[:8]}"

[daemon]
history = "{sqlite_url(str(tmp_path / 'h.db'))}"
http = ""
startup_grace = "5 s"
latency = "0.7 s"
""", encoding="utf-8")
    line = load_line(cfg)

    async def scenario() -> tuple[int, dict, dict, int, int]:
        sc, base = load_scenario(STEADY)
        sim = SimulatedLine(load_line(base), sc)
        daemon = Daemon(line)
        conn = daemon.connectors[0]
        task = asyncio.create_task(daemon.run())
        try:
            await until(lambda: conn.state == "connected", 20, "connected")
            await publish_mqtt(sim, mqtt_broker.host, mqtt_broker.port, speedup=1.0, duration=10.0, batch=0.5)
            await until(lambda: daemon.pipe.frames > 400, 20, "frames")
            await asyncio.sleep(1.0)
        finally:
            daemon.request_stop()
            await task
        late = daemon.pipe.inputs.total("late") + daemon.pipe.inputs.total("out of order")
        return conn.stats.samples_in, dict(conn.stats.malformed), dict(conn.stats.lost), late, daemon.pipe.frames

    samples_in, malformed, lost, late, frames = asyncio.run(scenario())
    sc, base = load_scenario(STEADY)  # the same 10 s of the (seeded) simulated line, counted here
    again = SimulatedLine(load_line(base), sc)
    assert samples_in == sum(len(again.advance(0.1).t) for _ in range(100))
    assert malformed == {} and lost == {} and late == 0
    assert frames > 400
    episodes = query_episodes(History(sqlite_url(str(tmp_path / "h.db"))).engine)
    assert episodes == [], [(e["check"], e["object"]) for e in episodes]
