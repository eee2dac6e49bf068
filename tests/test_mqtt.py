"""The MQTT connector and alarm publisher against a real mosquitto broker (no protocol mocks).

Every test that needs a broker starts its own mosquitto on a free port (tests/mqtt_broker.py);
publishers and subscribers on the other side are independent paho-mqtt clients. What the
tests hold the connector to is the MQTT v5.0 OASIS standard as the broker implements it
(section numbers are from memory where marked) and the payload conventions of the
adapter's settings (connectors/mqtt/settings.py, MqttSettings), which the configuration
schema (monitor/config.py, MqttSource) fills in.
"""

from __future__ import annotations

import asyncio
import calendar
import dataclasses
import itertools
import json
import logging
import math
import time
import uuid
from collections.abc import Awaitable, Callable, Iterator
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from mqtt_broker import MosquittoBroker, make_password_file, make_tls_files, need
from paho.mqtt.enums import CallbackAPIVersion
from spanwatch.connectors.mqtt import (
    MalformedPayload,
    MqttAlarmPublisher,
    MqttConnector,
    MqttSettings,
    PayloadDecoder,
    TopicRule,
)
from spanwatch.connectors.mqtt.topics import check_filter, match_filter
from spanwatch.monitor.config import MqttSource, mqtt_settings
from spanwatch.rules.alarms import AlarmPoint, Transition
from spanwatch.rules.samples import SampleBatch

ROOT = Path(__file__).resolve().parents[1]
T0 = calendar.timegm((2026, 3, 2, 5, 0, 0)) + 0.25  # 2026-03-02T05:00:00.250Z, computed without datetime


# --- helpers ------------------------------------------------------------------------------------


def run(coro: Awaitable[Any], timeout: float = 45.0) -> Any:
    """Run one coroutine on a fresh event loop with an overall time limit."""
    return asyncio.run(asyncio.wait_for(coro, timeout))  # type: ignore[arg-type]


async def until(pred: Callable[[], object], timeout: float, what: str) -> None:
    """Wait until ``pred()`` is true (polling); fail the test with ``what`` if it is not within ``timeout``."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if pred():
            return
        await asyncio.sleep(0.01)
    if not pred():
        pytest.fail(f"timed out after {timeout} s waiting for {what}")


def source(broker: MosquittoBroker, **kw: Any) -> MqttSettings:
    """Settings for the test broker with quick reconnection (seconds) and a client id of their own."""
    base: dict[str, Any] = {"host": broker.host, "port": broker.port,
                            "client_id": f"spanwatch-test-{uuid.uuid4().hex[:8]}", "reconnect_min": 0.1,
                            "reconnect_max": 1.0, "keepalive": 5.0}
    base.update(kw)
    return MqttSettings(**base)


class Collector:
    """A sink that keeps every batch and flattens them into (tag, t, value, quality, ref) rows."""

    def __init__(self) -> None:
        self.batches: list[SampleBatch] = []

    def __call__(self, batch: SampleBatch) -> None:
        self.batches.append(batch)

    def __len__(self) -> int:
        return sum(len(b) for b in self.batches)

    def rows(self) -> list[tuple[str, float, float, int, int]]:
        return [(b.tags[int(b.tag[i])], float(b.t[i]), float(b.value[i]), int(b.quality[i]), int(b.ref[i]))
                for b in self.batches for i in range(len(b))]

    def values(self, name: str | None = None) -> list[float]:
        return [r[2] for r in self.rows() if name is None or r[0] == name]


class Publisher:
    """An independent paho-mqtt v5 client that publishes at QoS 1 and waits for each PUBACK."""

    def __init__(self, broker: MosquittoBroker, client_id: str | None = None, *, tls: Any = None) -> None:
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id or f"pub-{uuid.uuid4().hex[:8]}",
                                  protocol=mqtt.MQTTv5)
        self.refused: list[str] = []
        self.client.on_publish = self._on_publish
        if tls is not None:
            self.client.tls_set(ca_certs=str(tls.ca_cert), certfile=str(tls.client_cert), keyfile=str(tls.client_key))
        self.client.connect(broker.host, broker.port, keepalive=30)
        self.client.loop_start()
        end = time.monotonic() + 10
        while not self.client.is_connected() and time.monotonic() < end:
            time.sleep(0.01)
        assert self.client.is_connected(), "test publisher could not connect"

    def _on_publish(self, _c: Any, _u: Any, _mid: int, rc: Any, _p: Any) -> None:
        if rc.is_failure:
            self.refused.append(str(rc))

    def publish(self, items: list[tuple[str, bytes | str]], retain: bool = False) -> int:
        """Publish every (topic, payload) at QoS 1; return how many the broker acknowledged."""
        infos = [self.client.publish(t, p, qos=1, retain=retain) for t, p in items]
        for info in infos:
            info.wait_for_publish(15)
        assert not self.refused, f"the broker refused messages: {self.refused}"
        return sum(1 for i in infos if i.is_published())

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


@contextmanager
def publisher(broker: MosquittoBroker, **kw: Any) -> Iterator[Publisher]:
    p = Publisher(broker, **kw)
    try:
        yield p
    finally:
        p.close()


async def start(conn: MqttConnector, timeout: float = 10.0) -> asyncio.Task[None]:
    task = asyncio.create_task(conn.run())
    await until(lambda: conn.state == "connected" or task.done(), timeout, f"{conn.name} to connect")
    if task.done():
        task.result()
    return task


async def finish(conn: MqttConnector, task: asyncio.Task[None]) -> None:
    await conn.stop()
    await task
    assert conn.state == "stopped"


class Subscriber:
    """An independent paho-mqtt v5 subscriber that records (topic, payload, retain) of every message.

    The constructor returns once the broker has acknowledged the subscriptions (SUBACK).
    """

    def __init__(self, broker: MosquittoBroker, topics: list[str], decode: bool = True) -> None:
        self.messages: list[tuple[str, Any, bool]] = []
        self.subacks = 0
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"sub-{uuid.uuid4().hex[:8]}",
                                  protocol=mqtt.MQTTv5)
        self.client.on_message = lambda _c, _u, m: self.messages.append(
            (m.topic, json.loads(m.payload.decode()) if decode else m.payload, bool(m.retain)))
        self.client.on_subscribe = self._on_subscribe
        self.client.connect(broker.host, broker.port)
        self.client.loop_start()
        for t in topics:
            self.client.subscribe(t, qos=1)
        end = time.monotonic() + 10
        while self.subacks < len(topics) and time.monotonic() < end:
            time.sleep(0.005)
        assert self.subacks == len(topics), "the broker did not acknowledge the subscriptions"

    def _on_subscribe(self, _c: Any, _u: Any, _mid: int, codes: list[Any], _p: Any) -> None:
        assert not any(c.is_failure for c in codes)
        self.subacks += 1

    def wait(self, pred: Callable[[list[tuple[str, Any, bool]]], bool], what: str, timeout: float = 10) -> None:
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if pred(list(self.messages)):
                return
            time.sleep(0.01)
        pytest.fail(f"subscriber: timed out waiting for {what}; got {self.messages}")

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


# --- payloads and topics -------------------------------------------------------------------------


def test_number_payloads_become_samples_stamped_with_arrival_time(mqtt_broker):
    """The text of a number on a tag's address topic is one good sample timestamped on arrival (wall clock)."""
    tags = {"q2.s5.tension": "quillmere/q2/s5/tension", "q2.line.speed_ref": "quillmere/q2/line/speed"}
    got = Collector()

    async def main() -> tuple[float, float, MqttConnector]:
        conn = MqttConnector("broker", source(mqtt_broker, payload="number"), tags, got)
        assert sorted(conn.filters) == ["quillmere/q2/line/speed", "quillmere/q2/s5/tension"]  # subscribe = addresses
        task = await start(conn)
        before = time.time()
        with publisher(mqtt_broker) as pub:
            pub.publish([("quillmere/q2/s5/tension", "412.5"), ("quillmere/q2/s5/tension", "-3e2"),
                         ("quillmere/q2/s5/tension", " 7 "), ("quillmere/q2/line/speed", b"250")])
        await until(lambda: len(got) == 4, 10, "4 samples")
        after = time.time()
        await finish(conn, task)
        return before, after, conn

    before, after, conn = run(main())
    rows = got.rows()
    assert [r[2] for r in rows if r[0] == "q2.s5.tension"] == [412.5, -300.0, 7.0]  # publish order (one topic)
    assert [r[2] for r in rows if r[0] == "q2.line.speed_ref"] == [250.0]
    assert all(r[3] == 0 for r in rows)
    assert all(before <= r[1] <= after for r in rows)
    refs = [r[4] for r in rows]
    assert refs == sorted(refs) and len(set(refs)) == 4
    assert conn.stats.server_timestamps == 4 and conn.stats.samples_in == 4 and conn.stats.malformed == {}


def _iso_times() -> list[str]:
    # The same four instants as T0, T0 + 0.5, T0 + 1, T0 + 1.5 s written with different UTC offsets.
    return ["2026-03-02T06:00:00.250+01:00", "2026-03-02T05:00:00.750Z", "2026-03-02T00:00:01.250-05:00",
            "2026-03-02T05:00:01.750+00:00"]


@pytest.mark.parametrize("unit", ["s", "ms", "iso"])
def test_json_payloads_read_value_time_and_quality_from_dotted_paths(mqtt_broker, unit):
    """JSON objects: value, source time (epoch s, epoch ms or ISO 8601 with offset) and quality at dotted paths."""
    times: list[Any] = {"s": [T0, T0 + 0.5, T0 + 1, T0 + 1.5], "ms": [int(T0 * 1000) + k * 500 for k in range(4)],
                        "iso": _iso_times()}[unit]
    qualities: list[Any] = ["good", "uncertain", 2, None]  # None: no quality field, which means good
    values = [12.5, 3, -1.25, 7.0]
    payloads = []
    for v, t, q in zip(values, times, qualities, strict=True):
        data: dict[str, Any] = {"v": v, "t": t}
        if q is not None:
            data["q"] = q
        payloads.append(("quillmere/q2/s5/tension", json.dumps({"data": data, "seq": 1})))
    got = Collector()

    async def main() -> MqttConnector:
        spec = source(mqtt_broker, payload="json", value_path="data.v", time_path="data.t", quality_path="data.q",
                      time_unit=unit)
        conn = MqttConnector("broker", spec, {"q2.s5.tension": "quillmere/q2/s5/tension"}, got)
        task = await start(conn)
        with publisher(mqtt_broker) as pub:
            pub.publish(payloads)
        await until(lambda: len(got) == 4, 10, "4 samples")
        await finish(conn, task)
        return conn

    conn = run(main())
    rows = got.rows()
    assert [r[2] for r in rows] == [12.5, 3.0, -1.25, 7.0]
    assert [r[1] for r in rows] == pytest.approx([T0, T0 + 0.5, T0 + 1.0, T0 + 1.5], abs=1e-6)
    assert [r[3] for r in rows] == [0, 1, 2, 0]
    assert conn.stats.server_timestamps == 0 and conn.stats.malformed == {}


def test_topic_map_wildcards_exact_addresses_and_unknown_topics(mqtt_broker):
    """``+`` takes one level, ``#`` the rest; an exact address wins; a topic with no configured tag is counted."""
    tags = {"q2.s5.tension": None, "q2.pull_1.speed": None, "lab.rig/temp": None,
            "q2.unwind.rpm": "quillmere/q2/legacy/unwind_rpm"}
    spec = source(mqtt_broker, subscribe=["quillmere/#"],
                  topic_map=[TopicRule("quillmere/q2/+/+", "q2.{1}.{2}"), TopicRule("quillmere/lab/#", "lab.{1}")])
    got = Collector()

    async def main() -> MqttConnector:
        conn = MqttConnector("broker", spec, tags, got)
        task = await start(conn)
        with publisher(mqtt_broker) as pub:
            pub.publish([("quillmere/q2/s5/tension", "1"), ("quillmere/q2/pull_1/speed", "2"),
                         ("quillmere/q2/s9/tension", "3"), ("quillmere/q2/s5/tension/extra", "4"),
                         ("quillmere/lab/rig/temp", "5"), ("quillmere/q2/legacy/unwind_rpm", "6")])
        await until(lambda: len(got) + conn.stats.malformed_total == 6, 10, "6 messages accounted for")
        await finish(conn, task)
        return conn

    conn = run(main())
    assert sorted((r[0], r[2]) for r in got.rows()) == [("lab.rig/temp", 5.0), ("q2.pull_1.speed", 2.0),
                                                        ("q2.s5.tension", 1.0), ("q2.unwind.rpm", 6.0)]
    assert conn.stats.malformed == {"quillmere/q2/s9/tension: unknown topic": 1,
                                    "quillmere/q2/s5/tension/extra: unknown topic": 1}


# Filter / topic pairs in the spirit of the examples of MQTT v5.0 section 4.7 (from memory).
FILTERS = ["sport/tennis/player1/#", "sport/#", "sport/+", "+/+", "/+", "+", "sport/+/player1", "#", "+/tennis/#"]
TOPICS = ["sport", "sport/", "sport/tennis", "sport/tennis/player1", "sport/tennis/player1/ranking",
          "sport/tennis/player1/score/wimbledon", "/finance", "finance", "sport/chess/player1", "a/tennis"]


def test_wildcard_matching_agrees_with_the_broker(mqtt_broker):
    """match_filter gives, for each filter and topic, the same answer as mosquitto's own subscription matching."""
    sentinel = "zz-end"  # every subscriber also subscribes to it; published last, it arrives last (one publisher)
    subs = {f: Subscriber(mqtt_broker, [f, sentinel], decode=False) for f in FILTERS}
    try:
        with publisher(mqtt_broker) as pub:
            pub.publish([(t, "1") for t in [*TOPICS, sentinel]])
        for f, sub in subs.items():
            sub.wait(lambda ms: any(t == sentinel for t, _, _ in ms), f"the sentinel on {f!r}")
    finally:
        for sub in subs.values():
            sub.close()
    for f, sub in subs.items():
        ours = {t for t in TOPICS if match_filter(f.split("/"), t) is not None}
        assert ours == {t for t, _, _ in sub.messages} - {sentinel}, f"filter {f!r}"
    assert match_filter(["sport", "+", "#"], "sport/tennis/player1/score") == ["tennis", "player1/score"]


def test_a_bad_topic_map_is_refused_by_the_config_schema():
    # MQTT filter rules (v5.0 section 4.7.1, from memory): '+' alone in a level, '#' alone in the last level;
    # a template may only name the levels the wildcards match.
    with pytest.raises(ValueError, match="wildcard"):
        MqttSource(kind="mqtt", topic_map=[{"pattern": "quillmere/q2/+", "tag": "q2.{1}.{2}"}])
    with pytest.raises(ValueError, match="topic filter"):
        MqttSource(kind="mqtt", topic_map=[{"pattern": "quillmere/#/x", "tag": "q2.{1}"}])
    with pytest.raises(ValueError, match="topic filter"):
        MqttSource(kind="mqtt", topic_map=[{"pattern": "quillmere/q2+/x", "tag": "q2.x"}])


# MQTT Version 5.0 OASIS Standard (7 March 2019), the examples of section 4.7.1.2 (multi-level wildcard '#': alone,
# as the whole filter or after a '/', and the last character) and 4.7.1.3 (single-level wildcard '+': occupies an
# entire level); section 4.7.3: a filter is at least one character long. MQTT 3.1.1 (29 October 2014) has the same
# rules and examples in the same sections.
VALID_FILTERS = ["sport/tennis/player1/#", "sport/#", "#", "sport/tennis/#", "+", "+/tennis/#", "sport/+/player1",
                 "sport/tennis/+", "+/+", "/+", "/finance", "sport/"]
INVALID_FILTERS = ["sport/tennis#", "sport/tennis/#/ranking", "sport+", "", "#/", "sport/+tennis", "##", "+#"]


def test_topic_filter_check_follows_the_standard():
    for f in VALID_FILTERS:
        assert check_filter(f) == f.split("/"), f
    for f in INVALID_FILTERS:
        with pytest.raises(ValueError, match="topic filter"):
            check_filter(f)


def test_topic_filter_check_agrees_with_the_paho_client():
    """Every string of up to five characters from {a, +, #, /}: the filter check accepts exactly what paho-mqtt's
    Client.subscribe accepts (the reference Python client refuses an invalid filter with ValueError before it
    sends anything; not connected, it answers MQTT_ERR_NO_CONN for a valid one)."""
    client = mqtt.Client(CallbackAPIVersion.VERSION2, protocol=mqtt.MQTTv311)
    checked = 0
    for n in range(6):
        for chars in itertools.product("a+#/", repeat=n):
            f = "".join(chars)
            try:
                client.subscribe(f, qos=0)
                paho_accepts = True
            except ValueError:
                paho_accepts = False
            try:
                check_filter(f)
                ours = True
            except ValueError:
                ours = False
            assert ours == paho_accepts, f"filter {f!r}"
            checked += 1
    assert checked == sum(4**n for n in range(6))


def test_a_bad_topic_rule_or_subscription_is_refused_by_the_connector():
    """The adapter checks its plain settings itself (the same rules as the config schema)."""
    tags = {"q2.s5.tension": None}
    with pytest.raises(ValueError, match="wildcard"):
        MqttConnector("broker", MqttSettings(topic_map=(TopicRule("quillmere/q2/+", "q2.{1}.{2}"),)), tags, Collector())
    with pytest.raises(ValueError, match="topic filter"):
        MqttConnector("broker", MqttSettings(subscribe=("quillmere/q2+/x",)), tags, Collector())
    with pytest.raises(ValueError, match="topic filter"):  # a shared subscription is checked by its filter part
        MqttConnector("broker", MqttSettings(subscribe=("$share/q2/quillmere/#/x",)), tags, Collector())
    with pytest.raises(ValueError, match="overflow"):
        MqttSettings(overflow="drop_newest")


def test_the_config_fills_in_every_setting_in_si():
    """Every MqttSettings field comes from the [sources.NAME] table of the same name; quantities arrive in seconds
    (1 h = 3600 s, 1 min = 60 s: SI Brochure, 9th edition (2019), table 8)."""
    assert {f.name for f in dataclasses.fields(MqttSettings)} == set(MqttSource.model_fields) - {"kind"}
    spec = MqttSource(kind="mqtt", host="broker.q2", session_expiry="1 h", keepalive="1 min", reconnect_min="500 ms",
                      subscribe=["quillmere/q2/#"], topic_map=[{"pattern": "quillmere/q2/+/+", "tag": "q2.{1}.{2}"}],
                      password="env:QUILLMERE_MQTT_PW")
    s = mqtt_settings(spec)
    assert (s.host, s.password, s.subscribe) == ("broker.q2", "env:QUILLMERE_MQTT_PW", ("quillmere/q2/#",))
    assert (s.session_expiry, s.keepalive, s.reconnect_min) == (3600.0, 60.0, 0.5)
    assert s.topic_map == (TopicRule("quillmere/q2/+/+", "q2.{1}.{2}"),)


# --- sessions: reconnection and QoS 1 -------------------------------------------------------------


class StreamingPublisher:
    """A paho-mqtt v5 client that keeps publishing at QoS 1 through a broker restart.

    paho queues what is published while it is disconnected and, after reconnecting, sends again every QoS 1
    message not yet acknowledged (MQTT v5.0 section 4.4, from memory), so every message is eventually acked.
    """

    def __init__(self, broker: MosquittoBroker) -> None:
        self.acked = 0
        self.refused: list[str] = []
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"stream-{uuid.uuid4().hex[:8]}",
                                  protocol=mqtt.MQTTv5)
        self.client.reconnect_delay_set(0.1, 0.5)  # type: ignore[arg-type]
        self.client.on_publish = self._on_publish
        self.client.connect_async(broker.host, broker.port, keepalive=5)
        self.client.loop_start()

    def _on_publish(self, _c: Any, _u: Any, _mid: int, rc: Any, _p: Any) -> None:
        self.acked += 1
        if rc.is_failure:
            self.refused.append(str(rc))

    def stream(self, topic: str, values: range, every: float) -> None:
        for i in values:
            self.client.publish(topic, str(i), qos=1)
            time.sleep(every)

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def test_broker_restart_mid_stream_reconnects_and_loses_nothing_acknowledged(mqtt_broker):
    """The broker is stopped and restarted while a QoS 1 stream is running: the connector goes reconnecting ->
    connected within 15 s, resumes its session and receives every message of the stream at least once.

    MQTT v5.0 section 3.1.2.4 (Clean Start 0) and 3.1.2.11.2 (Session Expiry Interval), from memory: the broker
    keeps the session and its queued QoS 1 messages; mosquitto's persistence keeps them across its restart.
    QoS 1 is "at least once" (section 4.3.2): a message in flight at the stop may come twice, none may be missing.
    """
    spec = source(mqtt_broker, clean_start=False, session_expiry=3600.0, reconnect_min=0.2, reconnect_max=2.0)
    got = Collector()
    states: list[str] = []
    stream = StreamingPublisher(mqtt_broker)

    async def main() -> MqttConnector:
        conn = MqttConnector("broker", spec, {"q2.s5.tension": "quillmere/q2/s5/tension"}, got)
        task = await start(conn)

        async def watch() -> None:
            while True:
                if not states or states[-1] != conn.state:
                    states.append(conn.state)
                await asyncio.sleep(0.005)

        watcher = asyncio.create_task(watch())
        with publisher(mqtt_broker) as pub:
            pub.publish([("quillmere/q2/s5/tension", str(i)) for i in range(50)])
        await until(lambda: len(got) == 50, 10, "the first 50 samples")
        streaming = asyncio.ensure_future(asyncio.to_thread(stream.stream, "quillmere/q2/s5/tension",
                                                            range(50, 250), 0.005))
        await until(lambda: len(got) >= 80, 10, "the stream to be flowing")
        await asyncio.to_thread(mqtt_broker.stop)  # mid-stream
        await until(lambda: conn.state == "reconnecting", 10, "the connector to notice the broker is gone")
        await asyncio.to_thread(mqtt_broker.restart)
        await until(lambda: conn.state == "connected", 15, "the connector to reconnect within 15 s")
        assert conn.session_present is True
        await streaming
        await until(lambda: stream.acked == 200, 20, "the broker to acknowledge all 200 streamed messages")
        await until(lambda: set(got.values()) >= set(map(float, range(250))), 15, "every message")
        watcher.cancel()
        await finish(conn, task)
        return conn

    try:
        conn = run(main())
    finally:
        stream.close()
    assert not stream.refused
    values = got.values()
    assert set(values) == set(map(float, range(250)))
    assert conn.stats.reconnects >= 1
    i = states.index("reconnecting")
    assert "connected" in states[:i] and "connected" in states[i:]
    assert conn.stats.last_error  # the lost connection is reported


def _offline_session_run(broker: MosquittoBroker, clean_start_again: bool, protocol: str = "5"
                         ) -> tuple[Collector, MqttConnector]:
    """Connector A subscribes and stops; 300 messages are published; the broker restarts; connector B resumes."""
    client_id = f"spanwatch-q2-{uuid.uuid4().hex[:8]}"
    tags = {"q2.s5.tension": "quillmere/q2/s5/tension"}
    got = Collector()

    async def main() -> MqttConnector:
        # Clean Start 0 from the first connection: mosquitto 2.0 writes to its persistence file only sessions whose
        # last connection had Clean Start 0 (in memory it keeps the others too).
        a = MqttConnector("broker", source(broker, client_id=client_id, clean_start=False, protocol=protocol), tags,
                          Collector())
        task = await start(a)
        await finish(a, task)  # clean DISCONNECT: with a Session Expiry Interval the session stays
        with publisher(broker) as pub:
            assert pub.publish([("quillmere/q2/s5/tension", str(i)) for i in range(300)]) == 300
        await asyncio.to_thread(broker.restart)  # SIGTERM: mosquitto writes its persistence file
        b = MqttConnector("broker", source(broker, client_id=client_id, clean_start=clean_start_again,
                                           protocol=protocol), tags, got)
        task = await start(b)
        with publisher(broker) as pub:
            pub.publish([("quillmere/q2/s5/tension", "-1")])  # a marker after everything queued (one topic: in order)
        await until(lambda: -1.0 in got.values(), 10, "the marker")
        await finish(b, task)
        return b

    return got, run(main())


@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_messages_published_while_the_connector_is_away_arrive_when_it_resumes(mqtt_broker, protocol):
    """QoS 1 messages accepted while the connector was disconnected are all delivered once it reconnects.

    MQTT v5.0 section 4.1 (session state held by the server includes QoS 1 messages pending transmission) and
    section 3.1.2.4 (Clean Start 0 resumes the session); MQTT 3.1.1 section 3.1.2.4 (Clean Session 0), from
    memory. Counted exactly: 300 of 300.
    """
    got, b = _offline_session_run(mqtt_broker, clean_start_again=False, protocol=protocol)
    assert b.session_present is True
    values = got.values()
    assert values[:-1] == [float(i) for i in range(300)] and values[-1] == -1.0
    assert len(values) == 301


@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_clean_start_discards_the_messages_queued_for_the_old_session(mqtt_broker, protocol):
    """The control: with Clean Start 1 the broker discards the old session and what it held (section 3.1.2.4)."""
    got, b = _offline_session_run(mqtt_broker, clean_start_again=True, protocol=protocol)
    assert b.session_present is False
    assert got.values() == [-1.0]


# --- hostile input -------------------------------------------------------------------------------

MAX_PAYLOAD = 256
LEVEL = st.text(st.characters(categories=("L", "N"), max_codepoint=0x2FFF) | st.sampled_from("-_."),
                min_size=1, max_size=8)
JSON_VALUES = st.recursive(st.none() | st.booleans() | st.floats() | st.integers() | st.text(max_size=10),
                           lambda c: st.lists(c, max_size=3) | st.dictionaries(st.text(max_size=6), c, max_size=3),
                           max_leaves=8)


@st.composite
def fuzz_message(draw: st.DrawFn) -> tuple[str, str, bytes, float | None]:
    """(connector, topic, payload, expected value or None) — expected only for payloads built to be valid."""
    conn = draw(st.sampled_from(["json", "number"]))
    kind = draw(st.sampled_from(["valid", "bytes", "json", "huge", "nonfinite", "unknown"]))
    topic = f"fuzz/{conn}/" + draw(st.sampled_from(["a", "b"]))
    expected: float | None = None
    if kind == "valid":
        expected = draw(st.floats(allow_nan=False, allow_infinity=False, width=64))
        payload = (json.dumps({"value": expected, "time": 1772427600.5}) if conn == "json" else repr(expected)).encode()
    elif kind == "bytes":
        payload = draw(st.binary(max_size=64))
    elif kind == "json":
        doc = draw(JSON_VALUES | st.fixed_dictionaries({"value": JSON_VALUES, "time": JSON_VALUES},
                                                       optional={"quality": JSON_VALUES}))
        payload = json.dumps(doc).encode()
    elif kind == "huge":
        payload = b"1" * draw(st.integers(MAX_PAYLOAD + 1, 300_000))
    elif kind == "nonfinite":
        v = draw(st.sampled_from(["NaN", "Infinity", "-Infinity"]))
        payload = (f'{{"value": {v}, "time": 1772427600.5}}' if conn == "json" else v.lower()).encode()
    else:
        topic = f"fuzz/{conn}/" + "/".join(draw(st.lists(LEVEL, min_size=1, max_size=3)))
        if topic in ("fuzz/json/a", "fuzz/json/b", "fuzz/number/a", "fuzz/number/b"):
            topic += "/x"
        payload = b"1"
    return conn, topic, payload, expected


def accounted(conn: MqttConnector) -> int:
    """Messages delivered or counted as malformed; a NaN / inf value is both, so it is subtracted once."""
    malformed = dict(conn.stats.malformed)  # a copy: the network thread may add keys meanwhile
    nonfinite = sum(v for k, v in malformed.items() if k.endswith("non-finite value"))
    return conn.stats.samples_in + sum(malformed.values()) - nonfinite


@settings(max_examples=25, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow, HealthCheck.data_too_large])
@given(messages=st.lists(fuzz_message(), min_size=1, max_size=40))
def test_fuzzed_messages_never_stop_the_connector_and_every_one_is_accounted_for(mqtt_broker, messages):
    """Arbitrary bytes, arbitrary JSON, huge payloads, NaN / inf and unknown topics, through the real broker.

    Each message published (and acknowledged by the broker) is either delivered as a sample or counted as
    malformed (a NaN / inf value both); payloads built to be valid arrive with their exact value.
    """
    results: dict[str, tuple[Collector, MqttConnector]] = {}

    async def main() -> None:
        tasks = []
        for kind in ("json", "number"):
            got = Collector()
            spec = source(mqtt_broker, payload=kind, subscribe=[f"fuzz/{kind}/#"], max_payload=MAX_PAYLOAD,
                          clean_start=True, quality_path="quality")
            conn = MqttConnector(kind, spec, {f"{kind}.a": f"fuzz/{kind}/a", f"{kind}.b": f"fuzz/{kind}/b"},
                                 got)
            results[kind] = (got, conn)
            tasks.append(await start(conn))
        with publisher(mqtt_broker) as pub:
            assert pub.publish([(topic, payload) for _, topic, payload, _ in messages]) == len(messages)
        for kind, (_, conn) in results.items():
            n = sum(1 for m in messages if m[0] == kind)
            await until(lambda c=conn, n=n: accounted(c) == n and c.state == "connected", 15,
                        f"{n} {kind} messages accounted for")
        await asyncio.sleep(0.05)  # nothing more may arrive
        for (_, conn), task in zip(results.values(), tasks, strict=True):
            assert conn.state == "connected"
            await finish(conn, task)

    run(main())
    for kind, (got, conn) in results.items():
        mine = [m for m in messages if m[0] == kind]
        malformed = conn.stats.malformed
        nonfinite = sum(v for k, v in malformed.items() if k.endswith("non-finite value"))
        assert accounted(conn) == len(mine)
        assert len(got) == conn.stats.samples_in
        assert sum(1 for r in got.rows() if not math.isfinite(r[2])) == nonfinite
        assert all(r[3] == 2 for r in got.rows() if not math.isfinite(r[2]))  # NaN / inf: bad quality
        huge = sum(1 for m in mine if len(m[2]) > MAX_PAYLOAD)
        assert sum(v for k, v in malformed.items() if k.endswith("payload too large")) == huge
        unknown = sum(1 for m in mine if m[1] not in (f"fuzz/{kind}/a", f"fuzz/{kind}/b"))
        assert sum(v for k, v in malformed.items() if k.endswith("unknown topic")) == unknown
        for topic_end in ("a", "b"):
            want = [m[3] for m in mine if m[3] is not None and m[1].endswith(f"/{topic_end}")]
            have = [r[2] for r in got.rows() if r[0] == f"{kind}.{topic_end}"]
            it = iter(have)
            assert all(any(v == w for v in it) for w in want), "valid payloads arrive, in order, with their value"


def _decoder(**kw: Any) -> PayloadDecoder:
    return PayloadDecoder(MqttSettings(**kw))


@settings(max_examples=300, deadline=None)
@given(payload=st.binary(max_size=200) | JSON_VALUES.map(lambda d: json.dumps(d).encode()),
       kind=st.sampled_from(["json", "number"]), unit=st.sampled_from(["s", "ms", "iso"]))
def test_decoder_refuses_anything_malformed_with_a_reason_and_nothing_else(payload, kind, unit):
    dec = _decoder(payload=kind, time_unit=unit, max_payload=128)
    try:
        samples = dec.decode_many(payload, 1.0)
    except MalformedPayload as exc:
        assert exc.reason
        return
    assert samples
    for t, v, q, _, problem in samples:
        assert isinstance(t, float) and math.isfinite(t)
        assert q in (0, 1, 2)
        assert (problem is None) == math.isfinite(v)
        assert problem is None or q == 2


@settings(max_examples=200, deadline=None)
@given(value=st.floats(allow_nan=False, allow_infinity=False),
       when=st.datetimes(min_value=datetime(1971, 1, 1), max_value=datetime(2100, 1, 1)),
       offset_min=st.integers(-14 * 60, 14 * 60))
def test_decoder_round_trips_numbers_and_iso_8601_times(value, when, offset_min):
    """repr() of a float reads back exactly; an ISO 8601 time with any UTC offset gives the same instant.

    The expected instant is computed with calendar.timegm on the UTC fields (not with datetime parsing).
    """
    assert _decoder(payload="number").decode(repr(value).encode(), 5.0)[:2] == (5.0, value)
    aware = when.replace(tzinfo=timezone(timedelta(minutes=offset_min)))
    utc = aware.astimezone(UTC)
    expected = calendar.timegm(utc.timetuple()) + utc.microsecond / 1e6
    t, v, q, by_arrival, problem = _decoder(payload="json", time_unit="iso").decode(
        json.dumps({"value": value, "time": aware.isoformat()}).encode(), 5.0)
    assert (v, q, by_arrival, problem) == (value, 0, False, None)
    assert t == pytest.approx(expected, abs=1e-6)
    with pytest.raises(MalformedPayload, match="without offset"):
        _decoder(payload="json", time_unit="iso").decode(
            json.dumps({"value": 1, "time": when.isoformat()}).encode(), 5.0)


@pytest.mark.parametrize(("payload", "reason"), [
    (b"1_000", "not a number"), ("\u0661\u0662".encode(), "not a number"), (b"\xff\xfe", "not UTF-8"),
    (b"", "not a number"), (b"12 kN", "not a number")])
def test_number_payloads_that_python_would_read_but_are_not_decimal_text(payload, reason):
    with pytest.raises(MalformedPayload, match=reason):
        _decoder(payload="number").decode(payload, 0.0)


@pytest.mark.parametrize(("doc", "reason"), [
    ([1, 2], "not a JSON object"), ({"time": 1.0}, "missing value"), ({"value": True, "time": 1.0}, "wrong value type"),
    ({"value": "1.5", "time": 1.0}, "wrong value type"), ({"value": 1.5}, "missing time"),
    ({"value": 1.5, "time": "1.0"}, "wrong time type"), ({"value": 1.5, "time": 1.0, "quality": "fine"}, "bad quality"),
    ({"value": 1.5, "time": 1.0, "quality": 3}, "bad quality")])
def test_json_payloads_of_the_wrong_shape(doc, reason):
    with pytest.raises(MalformedPayload, match=reason):
        _decoder(payload="json").decode(json.dumps(doc).encode(), 0.0)


@settings(max_examples=200, deadline=None)
@given(rows=st.lists(st.tuples(st.floats(allow_nan=True, allow_infinity=True), st.integers(0, 10**12),
                               st.sampled_from(["good", "uncertain", "bad", 0, 1, 2])), min_size=1, max_size=40),
       shared_quality=st.booleans())
def test_an_array_payload_is_the_samples_its_elements_would_be_one_by_one(rows, shared_quality):
    # A message carrying a tag's samples of a while in arrays gives what the same samples give as single messages,
    # in their order (the single-message decoding is tested above against calendar and repr).
    dec = _decoder(payload="json", time_unit="ms", quality_path="q")
    values, times, quals = ([r[i] for r in rows] for i in range(3))
    if shared_quality:
        quals = [quals[0]] * len(rows)
    many = dec.decode_many(json.dumps({"value": values, "time": times,
                                       "q": quals[0] if shared_quality else quals}).encode(), 1.0)
    one = [dec.decode(json.dumps({"value": v, "time": t, "q": q}).encode(), 1.0)
           for v, t, q in zip(values, times, quals, strict=True)]
    assert len(many) == len(one)
    for a, b in zip(many, one, strict=True):
        assert a[0] == b[0] and a[2:] == b[2:]
        assert a[1] == b[1] or (math.isnan(a[1]) and math.isnan(b[1]))


@pytest.mark.parametrize(("doc", "reason"), [
    ({"value": [], "time": []}, "empty array"),
    ({"value": [1.0, 2.0], "time": [1.0]}, "array lengths differ"),
    ({"value": [1.0, 2.0], "time": 1.0}, "wrong time type"),
    ({"value": [1.0, 2.0]}, "missing time"),
    ({"value": [1.0, "2"], "time": [1.0, 2.0]}, "wrong value type"),
    ({"value": [1.0, None], "time": [1.0, 2.0]}, "wrong value type"),
    ({"value": [1.0, 2.0], "time": [1.0, "x"]}, "wrong time type"),
    ({"value": [1.0, 2.0], "time": [1.0, 2.0], "quality": ["good"]}, "array lengths differ"),
    ({"value": [1.0, 2.0], "time": [1.0, 2.0], "quality": ["good", "fine"]}, "bad quality"),
    ({"value": [[1.0], 2.0], "time": [1.0, 2.0]}, "wrong value type")])
def test_array_payloads_of_the_wrong_shape_are_refused_whole(doc, reason):
    with pytest.raises(MalformedPayload, match=reason):
        _decoder(payload="json").decode_many(json.dumps(doc).encode(), 0.0)
    with pytest.raises(MalformedPayload, match="array without times"):
        _decoder(payload="json", time_path="").decode_many(b'{"value": [1.0, 2.0]}', 0.0)


def test_array_payloads_through_a_real_broker_arrive_as_their_samples(mqtt_broker):
    """Three messages of 50 samples each (one with a NaN, one malformed): 100 samples, the NaN counted and bad."""
    n = 50
    t = [T0 + 0.002 * k for k in range(3 * n)]
    v = [float(k) for k in range(3 * n)]
    v[n + 7] = math.nan
    payloads = [("quillmere/q2/s5/tension", json.dumps({"value": v[:n], "time": t[:n], "seq": 1})),
                ("quillmere/q2/s5/tension", json.dumps({"value": v[n:2 * n], "time": t[n:2 * n], "seq": 2})),
                ("quillmere/q2/s5/tension", json.dumps({"value": v[2 * n:], "time": t[2 * n:-1], "seq": 3}))]
    got = Collector()

    async def main() -> MqttConnector:
        spec = source(mqtt_broker, payload="json", value_path="value", time_path="time", seq_path="seq",
                      time_unit="s")
        conn = MqttConnector("broker", spec, {"q2.s5.tension": "quillmere/q2/s5/tension"}, got)
        task = await start(conn)
        with publisher(mqtt_broker) as pub:
            pub.publish(payloads)
        await until(lambda: len(got) == 2 * n and conn.stats.malformed, 10, "100 samples and one refusal")
        await finish(conn, task)
        return conn

    conn = run(main())
    rows = got.rows()
    assert [r[1] for r in rows] == pytest.approx(t[:2 * n], abs=1e-6)
    assert [r[2] for r in rows if not math.isnan(r[2])] == [x for x in v[:2 * n] if not math.isnan(x)]
    assert [r[3] for r in rows].count(2) == 1 and math.isnan(rows[n + 7][2]) and rows[n + 7][3] == 2
    assert conn.stats.malformed == {"quillmere/q2/s5/tension: non-finite value": 1,
                                    "quillmere/q2/s5/tension: array lengths differ": 1}
    assert conn.stats.lost == {}, "sequence numbers count messages, not samples"


# --- overflow --------------------------------------------------------------------------------------


def _overflow_run(broker: MosquittoBroker, policy: str, n: int) -> tuple[Collector, MqttConnector, list[float]]:
    """A 100-sample queue and a sink that stalls the event loop on its first batch until the queue is full."""
    got = Collector()
    first: list[float] = []
    conn_box: list[MqttConnector] = []

    def sink(batch: SampleBatch) -> None:
        got(batch)
        if first:
            return
        first.extend(batch.value.tolist())
        c = conn_box[0]
        end = time.monotonic() + 20
        if policy == "drop_oldest":  # the network thread never waits: hold until all n are queued or dropped
            while len(first) + len(c.queue) + c.stats.overflow < n and time.monotonic() < end:
                time.sleep(0.005)
        else:  # block: hold until the network thread has had to wait for room
            while c.stats.overflow == 0 and time.monotonic() < end:
                time.sleep(0.005)
            time.sleep(0.2)

    async def main() -> MqttConnector:
        spec = source(broker, queue_size=100, overflow=policy)
        conn = MqttConnector("broker", spec, {"q2.s5.tension": "quillmere/q2/s5/tension"}, sink)
        conn_box.append(conn)
        task = await start(conn)
        with publisher(broker) as pub:
            await asyncio.to_thread(pub.publish, [("quillmere/q2/s5/tension", str(i)) for i in range(n)])
        await until(lambda: conn.stats.samples_in + (conn.stats.overflow if policy == "drop_oldest" else 0) == n,
                    20, f"{n} messages delivered or dropped")
        await finish(conn, task)
        return conn

    conn = run(main())
    return got, conn, first


def test_drop_oldest_keeps_the_newest_samples_and_counts_every_drop(mqtt_broker):
    n = 600
    got, conn, first = _overflow_run(mqtt_broker, "drop_oldest", n)
    assert conn.stats.overflow > 0
    assert conn.stats.samples_in + conn.stats.overflow == n
    kept = got.values()
    assert kept[: len(first)] == first
    assert kept[len(first):] == [float(i) for i in range(n - 100, n)]  # the queue held the newest 100


def test_block_holds_the_network_thread_and_loses_nothing(mqtt_broker):
    n = 600  # mosquitto queues at most 1000 messages per session by default (max_queued_messages)
    got, conn, _ = _overflow_run(mqtt_broker, "block", n)
    assert conn.stats.overflow >= 1  # it had to wait
    assert got.values() == [float(i) for i in range(n)]  # every message, in order


# --- alarms back to the broker ---------------------------------------------------------------------


def _point() -> AlarmPoint:
    return AlarmPoint(kind="traction", object_id="pull_1", level="alarm", limit=1.0, direction="high", deadband=0.05,
                      on_delay=2.0, off_delay=5.0, priority="high", unit="share of safe capacity",
                      cause="COF dropped", consequence="slip", action="reduce speed", response_time=60.0)


def test_alarm_publisher_sends_transitions_and_a_retained_active_list(mqtt_broker):
    """Transitions as JSON on alarm_topic; the active list retained on active_topic, so a late subscriber gets it.

    MQTT v5.0 section 3.3.1.3 (RETAIN: the server delivers the retained message to new subscriptions), from memory.
    """
    spec = source(mqtt_broker, alarm_topic="quillmere/q2/spanwatch/alarm", active_topic="quillmere/q2/spanwatch/active")
    p = _point()
    early = Subscriber(mqtt_broker, [spec.alarm_topic, spec.active_topic])  # type: ignore[list-item]
    pub = MqttAlarmPublisher(spec)
    try:
        pub.start()
        early.wait(lambda ms: any(t == spec.active_topic and m["count"] == 0 for t, m, _ in ms), "an empty list")
        pub.publish([Transition(T0, p, "raise", 1.12, 3)], [p])
        early.wait(lambda ms: any(t == spec.alarm_topic for t, _, _ in ms), "the raise")
        late = Subscriber(mqtt_broker, [spec.active_topic])  # type: ignore[list-item]
        late.wait(lambda ms: any(m["count"] == 1 for _, m, _ in ms), "the retained list with one alarm")
        pub.publish([Transition(T0 + 30.0, p, "clear", 0.9, 3, peak=1.31)], [])
        early.wait(lambda ms: sum(1 for t, _, _ in ms if t == spec.alarm_topic) == 2, "the clear")
        later = Subscriber(mqtt_broker, [spec.active_topic])  # type: ignore[list-item]
        later.wait(lambda ms: len(ms) >= 1, "the retained list after the clear")
        pub.stop()
        assert pub.acked == pub.sent == 5 and pub.refused == 0
    finally:
        pub.stop()
        for s in (early, late, later):
            s.close()

    raise_msg, clear_msg = [m for t, m, _ in early.messages if t == spec.alarm_topic]
    assert datetime.fromisoformat(raise_msg["time"]).timestamp() == pytest.approx(T0, abs=1e-3)
    assert raise_msg["time"].endswith("+00:00")  # UTC
    assert {k: raise_msg[k] for k in ("event", "check", "object", "level", "priority", "value", "limit", "unit",
                                      "line_state")} == {
        "event": "raise", "check": "traction", "object": "pull_1", "level": "alarm", "priority": "high",
        "value": 1.12, "limit": 1.0, "unit": "share of safe capacity", "line_state": "running"}
    assert clear_msg["event"] == "clear" and clear_msg["peak"] == 1.31 and clear_msg["value"] == 0.9
    retained = late.messages[0]  # what a subscriber gets on subscribing, before anything new is published
    assert retained[2] is True  # delivered as a retained message
    assert retained[1]["count"] == 1
    assert retained[1]["active"][0]["key"] == p.key and retained[1]["active"][0]["value"] == 1.12
    assert later.messages[0][1]["count"] == 0 and later.messages[0][2] is True


def test_alarm_publisher_holds_messages_while_the_broker_is_down(mqtt_broker):
    """publish() returns at once while the broker is away; paho sends the QoS 1 messages after reconnecting."""
    spec = source(mqtt_broker, active_topic="quillmere/q2/spanwatch/active", reconnect_min=0.1,
                  reconnect_max=0.5)
    p = _point()
    pub = MqttAlarmPublisher(spec)
    pub.start()
    try:
        end = time.monotonic() + 10
        while pub.state != "connected" and time.monotonic() < end:
            time.sleep(0.01)
        mqtt_broker.stop()
        while pub.state == "connected" and time.monotonic() < end + 5:
            time.sleep(0.01)
        pub.publish([Transition(T0, p, "raise", 1.2, 3)], [p])  # must not raise or wait for the broker
        mqtt_broker.restart()
        sub = Subscriber(mqtt_broker, [spec.active_topic])  # type: ignore[list-item]
        try:
            sub.wait(lambda ms: any(m["count"] == 1 for _, m, _ in ms), "the list sent after reconnecting", 15)
        finally:
            sub.close()
    finally:
        pub.stop()


# --- credentials and TLS ---------------------------------------------------------------------------

WRONG = "wrong-pw-4d1c9e"
RIGHT = "quillmere-pw-7f3a2b"


def test_a_wrong_password_is_refused_and_reported_without_the_password(mqtt_broker_factory, tmp_path, monkeypatch,
                                                                       caplog):
    """A broker with a password file refuses a wrong password (CONNACK reason code, MQTT v5.0 section 3.2.2.2);
    stats.last_error says so and never contains the password; the right password connects."""
    pw = make_password_file(tmp_path, "spanwatch", RIGHT)
    need("mosquitto_passwd (to make the broker's password file)", pw, "Debian: apt-get install mosquitto")
    broker = mqtt_broker_factory(password_file=pw)
    caplog.set_level(logging.DEBUG)
    tags = {"q2.s5.tension": "quillmere/q2/s5/tension"}

    async def refused() -> MqttConnector:
        monkeypatch.setenv("QUILLMERE_TEST_MQTT_PW", WRONG)
        conn = MqttConnector("broker", source(broker, username="spanwatch", password="env:QUILLMERE_TEST_MQTT_PW"),
                             tags, Collector())
        task = asyncio.create_task(conn.run())
        await until(lambda: conn.stats.reconnects >= 2, 10, "two refused attempts")
        assert conn.state != "connected"
        await finish(conn, task)
        return conn

    conn = run(refused())
    err = conn.stats.last_error
    assert "refused the connection" in err
    assert "password" in err.lower() or "not authorized" in err.lower()
    assert WRONG not in err and RIGHT not in err
    assert WRONG not in caplog.text

    got = Collector()

    async def accepted() -> None:
        monkeypatch.setenv("QUILLMERE_TEST_MQTT_PW", RIGHT)
        conn = MqttConnector("broker", source(broker, username="spanwatch", password="env:QUILLMERE_TEST_MQTT_PW"),
                             tags, got)
        task = await start(conn)
        p = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="pw-pub", protocol=mqtt.MQTTv5)
        p.username_pw_set("spanwatch", RIGHT)
        p.connect(broker.host, broker.port)
        p.loop_start()
        p.publish("quillmere/q2/s5/tension", "5", qos=1).wait_for_publish(10)
        p.disconnect()
        p.loop_stop()
        await until(lambda: len(got) == 1, 10, "the sample")
        await finish(conn, task)

    run(accepted())
    assert RIGHT not in caplog.text
    assert got.values() == [5.0]


def test_a_missing_secret_is_reported_by_name(mqtt_broker, monkeypatch):
    monkeypatch.delenv("QUILLMERE_TEST_UNSET_PW", raising=False)

    async def main() -> MqttConnector:
        conn = MqttConnector("broker", source(mqtt_broker, username="u", password="env:QUILLMERE_TEST_UNSET_PW"),
                             {"q2.s5.tension": "quillmere/q2/s5/tension"}, Collector())
        task = asyncio.create_task(conn.run())
        await until(lambda: conn.stats.last_error != "", 10, "an error")
        await finish(conn, task)
        return conn

    assert "QUILLMERE_TEST_UNSET_PW is not set" in run(main()).stats.last_error


def test_tls_with_a_client_certificate_and_a_wrong_ca(mqtt_broker_factory, tmp_path):
    """TLS listener that requires a client certificate: the connector verifies the server against its CA and
    presents its own certificate; with a CA that did not sign the server's certificate it refuses to connect,
    and without a client certificate the broker refuses it."""
    files = make_tls_files(tmp_path / "pki")
    need("the cryptography package or the openssl command (TLS test certificates)", files,
         "pip install cryptography, or Debian: apt-get install openssl")
    other = make_tls_files(tmp_path / "other-pki")
    assert files is not None and other is not None
    broker = mqtt_broker_factory(tls=files, require_certificate=True)
    tags = {"q2.s5.tension": "quillmere/q2/s5/tension"}
    got = Collector()

    async def good() -> None:
        spec = source(broker, tls=True, ca_file=str(files.ca_cert), cert_file=str(files.client_cert),
                      key_file=str(files.client_key))
        conn = MqttConnector("broker", spec, tags, got)
        task = await start(conn)
        with publisher(broker, tls=files) as pub:
            pub.publish([("quillmere/q2/s5/tension", "42")])
        await until(lambda: len(got) == 1, 10, "the sample over TLS")
        await finish(conn, task)

    run(good())
    assert got.values() == [42.0]

    async def wrong_ca() -> MqttConnector:
        spec = source(broker, tls=True, ca_file=str(other.ca_cert), cert_file=str(files.client_cert),
                      key_file=str(files.client_key))
        conn = MqttConnector("broker", spec, tags, Collector())
        task = asyncio.create_task(conn.run())
        await until(lambda: conn.stats.last_error != "", 10, "an error")
        assert conn.state != "connected"
        await finish(conn, task)
        return conn

    assert "certificate verify failed" in run(wrong_ca()).stats.last_error

    async def no_client_certificate() -> MqttConnector:
        conn = MqttConnector("broker", source(broker, tls=True, ca_file=str(files.ca_cert)), tags, Collector())
        task = asyncio.create_task(conn.run())
        await until(lambda: conn.stats.last_error != "", 15, "an error")
        assert conn.state != "connected"
        await finish(conn, task)
        return conn

    assert "cannot connect" in run(no_client_certificate()).stats.last_error  # the broker ends the handshake


# --- delivery ----------------------------------------------------------------------------------------


def test_samples_arrive_in_batches_on_the_event_loop_thread(mqtt_broker):
    """sink runs on the event loop's thread (never paho's), with many samples per call under load."""
    import threading

    loop_thread: list[int] = []
    sink_threads: set[int] = set()
    sizes: list[int] = []

    def sink(batch: SampleBatch) -> None:
        sink_threads.add(threading.get_ident())
        sizes.append(len(batch))

    async def main() -> None:
        loop_thread.append(threading.get_ident())
        conn = MqttConnector("broker", source(mqtt_broker), {"q2.s5.tension": "quillmere/q2/s5/tension"}, sink)
        task = await start(conn)
        with publisher(mqtt_broker) as pub:
            await asyncio.to_thread(pub.publish, [("quillmere/q2/s5/tension", str(i)) for i in range(2000)])
        await until(lambda: sum(sizes) == 2000, 15, "2000 samples")
        await finish(conn, task)

    run(main())
    assert sink_threads == set(loop_thread)
    assert len(sizes) < 2000 and max(sizes) > 1
    assert np.sum(sizes) == 2000


# --- broker-side loss --------------------------------------------------------------------------------
# mosquitto keeps at most max_queued_messages QoS 1 messages for a session whose client is away and drops the rest
# without telling anyone ("Outgoing messages are being dropped for client ..." in its own log only); the
# publisher got its PUBACK for every one. The connector cannot see what never reaches it, but the payload can
# tell: a per-topic sequence number that jumps by k means k - 1 messages lost; without one, a gap of more than
# 1.5 sample periods between consecutive source times of a periodic tag means messages lost (suspected).


class CutProxy:
    """A TCP relay between the connector and the broker that the test can cut and restore: a real network fault.

    :meth:`cut` aborts every relayed connection (both sides) and stops listening, so the connector's
    reconnections are refused until :meth:`restore` listens again on the same port.
    """

    def __init__(self, broker: MosquittoBroker) -> None:
        self.broker = broker
        self.host = broker.host
        self.port = 0
        self.server: asyncio.AbstractServer | None = None
        self.links: list[tuple[asyncio.StreamWriter, asyncio.StreamWriter]] = []

    async def open(self) -> CutProxy:
        self.server = await asyncio.start_server(self._serve, self.host, self.port)
        self.port = self.server.sockets[0].getsockname()[1]
        return self

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            up_r, up_w = await asyncio.open_connection(self.broker.host, self.broker.port)
        except OSError:
            writer.transport.abort()
            return
        self.links.append((writer, up_w))

        async def pump(src: asyncio.StreamReader, dst: asyncio.StreamWriter) -> None:
            try:
                while data := await src.read(65536):
                    dst.write(data)
                    await dst.drain()
            except (ConnectionError, OSError):
                pass
            finally:
                dst.transport.abort()

        await asyncio.gather(pump(reader, up_w), pump(up_r, writer))

    async def cut(self) -> None:
        assert self.server is not None
        self.server.close()
        for down, up in self.links:
            down.transport.abort()
            up.transport.abort()
        self.links.clear()

    async def restore(self) -> None:
        await self.open()

    async def close(self) -> None:
        await self.cut()


def _json(seq: int | None, t: float, value: float) -> str:
    doc: dict[str, Any] = {"value": value, "time": t}
    if seq is not None:
        doc["seq"] = seq
    return json.dumps(doc)


def _broker_side_loss_run(broker: MosquittoBroker, *, with_seq: bool) -> tuple[MqttConnector, int]:
    """5 messages, the link cut, 200 published while the connector is away (the broker keeps 10), the link back,
    5 more. Returns the connector and how many of the 205 after the first 5 never arrived."""
    topic, period = "quillmere/q2/s5/tension", 0.02
    client_id = f"spanwatch-loss-{uuid.uuid4().hex[:8]}"
    spec = source(broker, client_id=client_id, payload="json", seq_path="seq" if with_seq else None,
                  clean_start=False, session_expiry=3600.0, reconnect_min=0.2, reconnect_max=0.5)
    got = Collector()
    messages = [(topic, _json(k if with_seq else None, T0 + k * period, float(k))) for k in range(1, 211)]

    async def main() -> MqttConnector:
        proxy = await CutProxy(broker).open()
        conn = MqttConnector("broker", dataclasses.replace(spec, port=proxy.port), {"q2.s5.tension": topic}, got,
                             periods={"q2.s5.tension": period})
        task = await start(conn)
        try:
            with publisher(broker) as pub:
                assert pub.publish(messages[:5]) == 5
                await until(lambda: len(got) == 5, 10, "the first 5 samples")
                await proxy.cut()
                await until(lambda: conn.state == "reconnecting", 10, "the connector to see the cut")
                await until(lambda: f"{client_id} closed its connection" in broker.log_tail(200)
                            or f"error on client {client_id}" in broker.log_tail(200), 10,
                            "the broker to see the client gone")
                assert await asyncio.to_thread(pub.publish, messages[5:205]) == 200  # every one acknowledged
                await proxy.restore()
                await until(lambda: conn.state == "connected", 15, "the connector to come back")
                assert await asyncio.to_thread(pub.publish, messages[205:]) == 5
                await until(lambda: 210.0 in got.values(), 10, "the last message")
        finally:
            await finish(conn, task)
            await proxy.close()
        return conn

    conn = run(main())
    arrived = {int(v) for v in got.values()}
    return conn, 205 - len(arrived & set(range(6, 211)))


def test_broker_side_loss_is_counted_from_sequence_numbers(mqtt_broker_factory):
    broker = mqtt_broker_factory(extra=["max_queued_messages 10"])
    conn, missing = _broker_side_loss_run(broker, with_seq=True)
    assert "Outgoing messages are being dropped" in broker.log_tail(200), "the broker did drop messages"
    assert missing >= 150  # 200 published while away, at most 10 queued (+ the in-flight window)
    assert conn.stats.lost == {"sequence": missing}  # exactly the messages that never arrived
    assert conn.stats.publisher_restarts == 0


def test_broker_side_loss_without_sequence_numbers_is_counted_from_time_gaps(mqtt_broker_factory):
    broker = mqtt_broker_factory(extra=["max_queued_messages 10"])
    conn, missing = _broker_side_loss_run(broker, with_seq=False)
    assert missing >= 150
    assert conn.stats.lost == {"time gap": missing}


def test_sequence_numbers_count_jumps_restarts_and_duplicates(mqtt_broker):
    """Per topic: a jump of k is k - 1 lost; back to 0 or 1 is a publisher restart, not loss; a repeat (QoS 1
    redelivers at least once) or a slightly older number is neither; another topic has its own count."""
    a, b = "quillmere/q2/s5/tension", "quillmere/q2/s8/tension"
    seqs_a = [1, 2, 3, 7, 8, 8, 6, 9, 1, 2, 5, 0, 1, 2]  # lost 3 (4..6), 2 (3, 4) after the restart; 2 restarts
    seqs_b = [100, 101, 105]  # its own count: 3 lost (102..104)
    got = Collector()

    async def main() -> MqttConnector:
        conn = MqttConnector("broker", source(mqtt_broker, payload="json", seq_path="meta.seq", time_path=None),
                             {"q2.s5.tension": a, "q2.s8.tension": b}, got)
        task = await start(conn)
        with publisher(mqtt_broker) as pub:
            pub.publish([(a, json.dumps({"value": float(i), "meta": {"seq": s}})) for i, s in enumerate(seqs_a)])
            pub.publish([(b, json.dumps({"value": -1.0, "meta": {"seq": s}})) for s in seqs_b])
            pub.publish([(a, json.dumps({"value": 99.0, "meta": {"seq": "x"}}))])  # not a sequence number
        await until(lambda: len(got) == len(seqs_a) + len(seqs_b) + 1, 10, "every message")
        await finish(conn, task)
        return conn

    conn = run(main())
    assert conn.stats.lost == {"sequence": 3 + 2 + 3}
    assert conn.stats.publisher_restarts == 2
    assert conn.stats.malformed == {f"{a}: bad sequence number": 1}  # counted, the sample still delivered


def test_the_config_reads_seq_path_and_refuses_it_on_number_payloads():
    spec = MqttSource(kind="mqtt", payload="json", seq_path="meta.seq")
    assert mqtt_settings(spec).seq_path == "meta.seq"
    assert MqttSource(kind="mqtt").seq_path is None
    with pytest.raises(ValueError, match="seq_path"):
        MqttSource(kind="mqtt", payload="number", seq_path="seq")


def test_the_simulator_publishes_a_sequence_number_per_topic(mqtt_broker):
    from spanwatch.monitor.line import load_line
    from spanwatch.monitor.simline import SimulatedLine, load_scenario
    from spanwatch.monitor.simulate import publish_mqtt
    from spanwatch.monitor.simulate import tag_topic as topic_of

    sub = Subscriber(mqtt_broker, ["quillmere/#"])
    try:
        sc, base = load_scenario(ROOT / "config" / "scenarios" / "steady.toml")
        sim = SimulatedLine(load_line(base), sc)
        sent = run(publish_mqtt(sim, mqtt_broker.host, mqtt_broker.port, speedup=20.0, duration=1.0))
        sub.wait(lambda m: len(m) == sent, f"{sent} messages")
    finally:
        sub.close()
    by_topic: dict[str, list[int]] = {}
    for topic, doc, _ in sub.messages:
        by_topic.setdefault(topic, []).append(doc["seq"])
    assert set(by_topic) == {topic_of("quillmere", t) for t in sim.tag_names}
    for seqs in by_topic.values():
        assert seqs == list(range(1, len(seqs) + 1))


def test_the_simulator_publishes_batches_of_samples_that_are_the_single_messages_values(mqtt_broker):
    from spanwatch.monitor.line import load_line
    from spanwatch.monitor.simline import SimulatedLine, load_scenario
    from spanwatch.monitor.simulate import publish_mqtt

    got: dict[float, dict[str, list[float]]] = {}
    spans: list[float] = []
    for batch in (0.0, 0.3):
        sub = Subscriber(mqtt_broker, ["quillmere/#"])
        try:
            sc, base = load_scenario(ROOT / "config" / "scenarios" / "steady.toml")
            sim = SimulatedLine(load_line(base), sc)
            # the same steps of 0.3 s of the line's time either way (the simulator's noise follows its steps)
            sent = run(publish_mqtt(sim, mqtt_broker.host, mqtt_broker.port, speedup=20.0, duration=1.5,
                                    batch=batch, tick=0.3 / 20.0))
            sub.wait(lambda m, n=sent: len(m) == n, f"{sent} messages")
        finally:
            sub.close()
        mine = got[batch] = {}
        for topic, doc, _ in sub.messages:
            values = doc["value"] if batch else [doc["value"]]
            if batch:
                assert len(doc["time"]) == len(values) and doc["time"] == sorted(doc["time"])
                spans.append(doc["time"][-1] - doc["time"][0])
            mine.setdefault(topic, []).extend(values)
    assert got[0.3] == got[0.0], "the same samples, in the same order per topic"
    assert spans and max(spans) < 0.3, "a message holds the samples of one batch of 0.3 s at most"


def test_the_daemon_shows_lost_messages_in_healthz_and_metrics(mqtt_broker, tmp_path):
    from spanwatch.connectors.history import sqlite_url
    from spanwatch.monitor.daemon import Daemon
    from spanwatch.monitor.line import load_line

    cfg = tmp_path / "line.toml"
    cfg.write_text(f"""extends = "{ROOT / 'config' / 'quillmere-q2-mqtt.toml'}"

[sources.broker]
port = {mqtt_broker.port}
client_id = "spanwatch-test-{uuid.uuid4().hex[:8]}"
seq_path = "seq"
alarm_topic = "spanwatch-test/alarm"
active_topic = "spanwatch-test/active"

[daemon]
history = "{sqlite_url(str(tmp_path / 'h.db'))}"
http = "127.0.0.1:0"
""", encoding="utf-8")
    line = load_line(cfg)
    topic = "quillmere/q2/s5/tension"

    async def get(port: int, path: str) -> tuple[int, str]:
        reader, writer = await asyncio.open_connection("127.0.0.1", port)
        writer.write(f"GET {path} HTTP/1.1\r\nHost: x\r\n\r\n".encode())
        await writer.drain()
        raw = await reader.read()
        writer.close()
        head, _, body = raw.decode().partition("\r\n\r\n")
        return int(head.split()[1]), body

    async def main() -> tuple[dict, str]:
        daemon = Daemon(line)
        task = asyncio.create_task(daemon.run())
        try:
            conn = daemon.connectors[0]
            await until(lambda: conn.state == "connected" and daemon.http_port, 15, "the daemon to connect")
            now = time.time()
            with publisher(mqtt_broker) as pub:
                pub.publish([(topic, _json(s, now + 0.02 * s, 500.0)) for s in (1, 2, 3, 8, 9)])  # 4..7 lost
            await until(lambda: conn.stats.samples_in == 5, 10, "5 samples")
            _, health = await get(daemon.http_port, "/healthz")
            _, metrics = await get(daemon.http_port, "/metrics")
        finally:
            daemon.request_stop()
            await task
        return json.loads(health), metrics

    health, metrics = run(main())
    broker = health["connectors"]["broker"]
    assert broker["lost"] == {"sequence": 4}
    assert broker["publisher_restarts"] == 0
    assert 'spanwatch_samples_lost_total{how="sequence",source="broker"} 4.0' in metrics


def test_time_gaps_ignore_repeats_and_start_again_after_a_clock_glitch(mqtt_broker):
    """A repeated time (QoS 1 redelivery) is no gap; one sample a year ahead is no loss and does not blind the
    detector to the gaps after it; a gap of two periods is one sample lost."""
    topic, p = "quillmere/q2/s5/tension", 0.02
    times = [T0, T0 + p, T0 + p, T0 + 365 * 86_400.0, T0 + 2 * p, T0 + 3 * p, T0 + 5 * p]
    got = Collector()

    async def main() -> MqttConnector:
        conn = MqttConnector("broker", source(mqtt_broker, payload="json"), {"q2.s5.tension": topic}, got,
                             periods={"q2.s5.tension": p})
        task = await start(conn)
        with publisher(mqtt_broker) as pub:
            pub.publish([(topic, _json(None, t, 1.0)) for t in times])
        await until(lambda: len(got) == len(times), 10, "every message")
        await finish(conn, task)
        return conn

    assert run(main()).stats.lost == {"time gap": 1}
