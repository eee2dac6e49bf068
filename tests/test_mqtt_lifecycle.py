"""The MQTT alarm publisher with the ISA-18.2 lifecycle, and operators' actions over MQTT, on a real mosquitto.

States and actions: ANSI/ISA-18.2-2016, alarm state diagram (normal, unacknowledged, acknowledged, returned to normal
unacknowledged, shelved, suppressed, out of service), as rules/lifecycle.py implements it; from memory. Retained
messages reach a subscriber that connects later: MQTT Version 5.0 OASIS Standard, 3.3.1.3 RETAIN; Retain Handling
and Retain As Published: 3.8.3.1 Subscription Options; Correlation Data: 3.3.2.3.6; all from memory. Times are
checked against ISO 8601 texts written out by hand (2026-03-02T05:00:00.250Z is epoch 1772427600.25, computed
with calendar.timegm, which does not share code with the publisher's datetime formatting).
"""

from __future__ import annotations

import calendar
import json
import logging
import math
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from spanwatch.connectors.mqtt import MqttActionListener, MqttAlarmPublisher, MqttSettings
from spanwatch.connectors.mqtt.actions import ActionMessage, InvalidAction, parse_action
from spanwatch.connectors.mqtt.messages import VERSION, alarm_message, transition_message
from spanwatch.rules.alarms import AlarmPoint, Transition
from spanwatch.rules.lifecycle import Action, Lifecycle

T0 = calendar.timegm((2026, 3, 2, 5, 0, 0)) + 0.25  # 2026-03-02T05:00:00.250Z
ALARM, ACTIVE = "quillmere/q2/spanwatch/alarm", "quillmere/q2/spanwatch/active"
ACTIONS = "quillmere/q2/spanwatch/actions"

A = AlarmPoint(kind="traction", object_id="pull_1", level="alarm", limit=1.0, direction="high", deadband=0.05,
               on_delay=2.0, off_delay=5.0, priority="high", unit="share of safe capacity",
               cause="COF dropped", consequence="slip", action="reduce speed", response_time=60.0)
B = AlarmPoint(kind="slip", object_id="pull_1", level="warning", limit=0.005, direction="abs", deadband=0.001,
               on_delay=1.0, off_delay=5.0, priority="medium", unit="%", cause="air film", consequence="scratches",
               action="check covering", response_time=120.0)
POINTS = {A.key: A, B.key: B}


@dataclass(frozen=True)
class FlaggedTransition(Transition):
    """A transition as a condition engine that tells first-out and chattering would give it."""

    first_out: bool = False
    chattering: bool = False


def settings(broker: Any, **kw: Any) -> MqttSettings:
    base: dict[str, Any] = {"host": broker.host, "port": broker.port, "reconnect_min": 0.1, "reconnect_max": 1.0,
                            "client_id": f"spanwatch-test-{uuid.uuid4().hex[:8]}", "keepalive": 5.0}
    base.update(kw)
    return MqttSettings(**base)


def wait(pred: Callable[[], object], what: str, timeout: float = 15.0) -> None:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if pred():
            return
        time.sleep(0.01)
    pytest.fail(f"timed out after {timeout} s waiting for {what}")


class Client:
    """An independent paho v5 client: subscribes (waiting for SUBACK) and records (topic, JSON, retain, props)."""

    def __init__(self, broker: Any, topics: list[str]) -> None:
        self.messages: list[tuple[str, Any, bool, Any]] = []
        self.subacks = 0
        self.c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"t-{uuid.uuid4().hex[:8]}", protocol=mqtt.MQTTv5)
        self.c.on_message = lambda _c, _u, m: self.messages.append(
            (m.topic, json.loads(m.payload.decode()), bool(m.retain), m.properties))
        self.c.on_subscribe = lambda *_a: setattr(self, "subacks", self.subacks + 1)
        self.c.connect(broker.host, broker.port)
        self.c.loop_start()
        for t in topics:
            self.c.subscribe(t, qos=1)
        wait(lambda: self.subacks == len(topics), "SUBACK")

    def on(self, topic: str) -> list[Any]:
        return [m for t, m, _r, _p in list(self.messages) if t == topic]

    def send(self, topic: str, payload: bytes | str, *, retain: bool = False, correlation: bytes | None = None) -> None:
        props = None
        if correlation is not None:
            props = Properties(PacketTypes.PUBLISH)
            props.CorrelationData = correlation
        self.c.publish(topic, payload, qos=1, retain=retain, properties=props).wait_for_publish(15)

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


# --- messages (no broker) -------------------------------------------------------------------------


def test_a_raise_carries_state_rationalization_and_times_in_iso_and_epoch_seconds():
    lc = Lifecycle([A.key])
    tr = FlaggedTransition(T0, A, "raise", 1.12, 3, first_out=True)
    ev = lc.condition(T0, A.key, "raise")
    msg = transition_message(tr, "Q2", ev)
    assert msg["version"] == VERSION == 2
    assert (msg["type"], msg["event"], msg["origin"]) == ("condition", "raise", "system")
    assert msg["time"] == "2026-03-02T05:00:00.250+00:00" and msg["time_epoch_s"] == 1772427600.25
    assert (msg["state"], msg["state_text"]) == ("unack", "unacknowledged alarm")
    assert (msg["state_before"], msg["state_before_text"]) == ("normal", "normal")
    assert msg["rationalization"] == {"cause": "COF dropped", "consequence": "slip", "action": "reduce speed",
                                      "response_time_s": 60.0}
    assert (msg["value"], msg["limit"], msg["unit"], msg["priority"]) == (1.12, 1.0, "share of safe capacity", "high")
    assert msg["first_out"] is True and msg["chattering"] is False
    assert msg["line_state"] == "running" and msg["line"] == "Q2" and msg["advisory"] is True
    assert "user" not in msg  # a condition message has no operator fields
    json.dumps(msg, allow_nan=False)


def test_a_transition_without_flags_or_lifecycle_has_them_false_and_null():
    msg = transition_message(Transition(T0 + 30, A, "clear", float("nan"), 3, peak=1.31))
    assert msg["first_out"] is False and msg["chattering"] is False
    assert msg["state"] is None and msg["state_before"] is None
    assert msg["value"] is None and msg["peak"] == 1.31  # NaN becomes null: JSON has no NaN
    json.dumps(msg, allow_nan=False)


def test_operator_actions_give_messages_with_who_when_why_and_the_states_around():
    lc = Lifecycle([A.key])
    lc.condition(T0, A.key, "raise")
    shelve = lc.act(T0 + 10, A.key, "shelve", user="op1", comment="roll change", until=T0 + 10 + 3600, request=7)
    msg = alarm_message(A, t=shelve.t, event=shelve.action, ev=shelve)
    assert (msg["type"], msg["event"], msg["origin"]) == ("lifecycle", "shelve", "operator")
    assert (msg["state_before"], msg["state"], msg["state_text"]) == ("unack", "shelved", "shelved")
    assert (msg["user"], msg["comment"], msg["request"]) == ("op1", "roll change", 7)
    assert msg["time"] == "2026-03-02T05:00:10.250+00:00"
    assert msg["until"] == "2026-03-02T06:00:10.250+00:00" and msg["until_epoch_s"] == 1772427610.25 + 3600
    assert msg["one_shot"] is False
    assert "value" not in msg
    unshelve = lc.act(T0 + 20, A.key, "unshelve", user="op1")
    one = lc.act(T0 + 30, A.key, "shelve", user="op2", comment="sensor swap", until=math.inf)
    msg = alarm_message(A, t=one.t, event=one.action, ev=one)
    assert msg["one_shot"] is True and msg["until"] is None and msg["until_epoch_s"] is None
    json.dumps(msg, allow_nan=False)
    msg = alarm_message(A, t=unshelve.t, event=unshelve.action, ev=unshelve)
    assert (msg["state_before"], msg["state"]) == ("shelved", "unack")  # revealed: the condition still holds


# --- the publisher on a broker ---------------------------------------------------------------------


def test_lifecycle_messages_and_a_retained_list_of_every_alarm_not_normal(mqtt_broker):
    spec = settings(mqtt_broker, alarm_topic=ALARM, active_topic=ACTIVE)
    lc = Lifecycle(POINTS)
    watch = Client(mqtt_broker, [ALARM, ACTIVE])
    pub = MqttAlarmPublisher(spec, line="Q2")
    late: list[Client] = []

    def latest_list() -> dict[str, Any]:
        c = Client(mqtt_broker, [ACTIVE])
        late.append(c)
        wait(lambda: c.on(ACTIVE), "the retained list")
        assert c.messages[0][2] is True  # delivered as retained
        return c.on(ACTIVE)[0]

    def lists_seen(n: int) -> None:
        wait(lambda: len(watch.on(ACTIVE)) >= n, f"alarm list number {n}")

    try:
        pub.start()
        lists_seen(1)
        tr_a, tr_b = Transition(T0, A, "raise", 1.12, 3), Transition(T0 + 1, B, "raise", -0.007, 3)
        evs = [lc.condition(T0, A.key, "raise"), lc.condition(T0 + 1, B.key, "raise")]
        pub.publish_lifecycle(evs, POINTS, lc.records, [tr_a, tr_b])
        lists_seen(2)
        first = latest_list()
        assert first["count"] == 2 and first["counts"] == {"unack": 2} and first["version"] == 2
        row = {r["key"]: r for r in first["active"]}[A.key]
        assert (row["state"], row["condition_active"], row["acked"]) == ("unack", True, False)
        assert row["raised"] == "2026-03-02T05:00:00.250+00:00" and row["value"] == 1.12
        assert row["rationalization"]["action"] == "reduce speed"

        pub.publish_lifecycle([lc.act(T0 + 5, B.key, "shelve", user="op1", comment="roll change",
                                      until=T0 + 5 + 1800)], POINTS, lc.records)
        lists_seen(3)
        pub.publish_lifecycle([lc.condition(T0 + 40, A.key, "clear")], POINTS, lc.records,
                              [Transition(T0 + 40, A, "clear", 0.9, 3, peak=1.31)])
        lists_seen(4)
        second = latest_list()
        rows = {r["key"]: r for r in second["active"]}
        assert second["counts"] == {"shelved": 1, "rtn_unack": 1}
        assert (rows[A.key]["state"], rows[A.key]["state_text"]) == ("rtn_unack", "returned to normal, unacknowledged")
        assert rows[A.key]["cleared"] == "2026-03-02T05:00:40.250+00:00" and rows[A.key]["peak"] == 1.31
        assert rows[B.key]["state"] == "shelved" and rows[B.key]["shelved_by"] == "op1"
        assert rows[B.key]["shelved_until"] == "2026-03-02T05:30:05.250+00:00"
        assert rows[B.key]["condition_active"] is True  # shelved, still abnormal underneath

        pub.publish_lifecycle([lc.act(T0 + 50, A.key, "ack", user="op1", comment="seen")], POINTS, lc.records)
        lists_seen(5)
        third = latest_list()
        assert [r["key"] for r in third["active"]] == [B.key]  # A acknowledged after it returned: normal, gone
        wait(lambda: len(watch.on(ALARM)) == 5, "five alarm messages")
        pub.stop()
        assert pub.sent == pub.acked == 10 and pub.refused == 0 and pub.unknown == 0
    finally:
        pub.stop()
        for c in (watch, *late):
            c.close()

    msgs = watch.on(ALARM)
    assert [(m["event"], m["key"], m["state"]) for m in msgs] == [
        ("raise", A.key, "unack"), ("raise", B.key, "unack"), ("shelve", B.key, "shelved"),
        ("clear", A.key, "rtn_unack"), ("ack", A.key, "normal")]
    assert msgs[1]["value"] == -0.007 and msgs[3]["peak"] == 1.31
    assert (msgs[4]["user"], msgs[4]["comment"], msgs[4]["state_before"]) == ("op1", "seen", "rtn_unack")
    assert all(m["rationalization"]["cause"] for m in msgs)


# --- operators' actions over MQTT -------------------------------------------------------------------


def test_parse_action_reads_until_as_epoch_seconds_iso_or_one_shot():
    m = parse_action(b'{"action": "shelve", "alarm": "slip:pull_1:warning", "user": "op1", "comment": "roll change",'
                     b' "until": "2026-03-02T06:00:00.250+00:00"}')
    assert m.until == T0 + 3600
    m = parse_action(b'{"action": "shelve", "alarm": "k", "user": "op1", "until": 1772431200.25}')
    assert m.until == T0 + 3600
    m = parse_action(b'{"action": "shelve", "alarm": "k", "user": "op1", "until": null, "one_shot": true}')
    assert m.until == math.inf and m.one_shot
    for bad, reason in [(b'{"action": "shelve", "alarm": "k", "user": "u", "until": "2026-03-02T06:00:00"}',
                         "bad until"),  # no UTC offset
                        (b'{"action": "shelve", "alarm": "k", "user": "u"}', "bad until"),
                        (b'{"action": "ack", "alarm": "k", "user": "u", "until": 1772431200}', "until without shelve"),
                        (b'{"action": "ack", "alarm": "k", "user": "u", "until": true}', "wrong type"),
                        (b'{"action": "ack", "alarm": "k", "user": 5}', "wrong type"),
                        (b'[1, 2]', "not a JSON object"), (b'\xff\xfe', "not UTF-8"),
                        (b'{"action": "ack", "alarm": "k", "user": "u", "priority": "low"}', "unknown field")]:
        with pytest.raises(InvalidAction) as exc:
            parse_action(bad)
        assert exc.value.reason == reason, bad


def test_actions_reach_the_callback_and_bad_requests_are_refused_answered_and_counted(mqtt_broker, caplog):
    caplog.set_level(logging.WARNING, logger="spanwatch.mqtt")
    got: list[ActionMessage] = []
    listener: MqttActionListener

    def on_action(msg: ActionMessage) -> None:
        if msg.alarm == "boom":
            raise RuntimeError("the application failed")
        got.append(msg)
        listener.reply(msg, True, f"{msg.action.value} done", state="acked")

    listener = MqttActionListener(settings(mqtt_broker), ACTIONS, on_action)
    panel = Client(mqtt_broker, [f"{ACTIONS}/result"])
    try:
        listener.start()
        wait(lambda: listener.state == "connected", "the listener to subscribe")
        panel.send(ACTIONS, json.dumps({"action": "ack", "alarm": A.key, "user": "op1", "comment": "seen",
                                        "id": "panel-7/1"}), correlation=b"req-1")
        bad = [b"{not json", b"{also not json",
               json.dumps({"action": "raise", "alarm": A.key, "user": "op1"}),
               json.dumps({"action": "ack", "alarm": A.key}),
               json.dumps({"action": "ack", "alarm": A.key, "user": "   "}),
               json.dumps({"action": "ack", "alarm": A.key, "user": "op1", "colour": "red"}),
               json.dumps({"action": "shelve", "alarm": A.key, "user": "op1", "until": None, "one_shot": "yes"})]
        for payload in bad:
            panel.send(ACTIONS, payload)
        panel.send(ACTIONS, json.dumps({"action": "ack", "alarm": B.key, "user": "op1"}), retain=True)
        panel.send(ACTIONS, json.dumps({"action": "ack", "alarm": "boom", "user": "op1"}))
        panel.send(ACTIONS, json.dumps({"action": "shelve", "alarm": B.key, "user": "op2", "comment": "roll change",
                                        "until": "2026-03-02T06:00:00.250+00:00", "id": 2}))
        wait(lambda: len(panel.on(f"{ACTIONS}/result")) == 11, "eleven results")
        assert listener.state == "connected"  # nothing stopped the listener
    finally:
        listener.stop()
        panel.close()

    assert [(m.action, m.alarm, m.user, m.id) for m in got] == [(Action.ACK, A.key, "op1", "panel-7/1"),
                                                                 (Action.SHELVE, B.key, "op2", 2)]
    assert got[0].comment == "seen" and got[0].correlation == b"req-1"
    assert got[1].until == T0 + 3600
    assert dict(listener.refused) == {"not JSON": 2, "unknown action": 1, "missing field": 1, "missing user": 1,
                                      "unknown field": 1, "wrong type": 1, "retained message": 1}
    assert listener.received == 11 and listener.accepted == 3 and listener.callback_errors == 1
    results = [(m, props) for t, m, _r, props in panel.messages if t == f"{ACTIONS}/result"]
    ok = [m for m, _p in results if m["ok"]]
    assert [(m["action"], m["alarm"], m["id"], m["state"]) for m in ok] == [("ack", A.key, "panel-7/1", "acked"),
                                                                           ("shelve", B.key, 2, "acked")]
    first_props = next(p for m, p in results if m.get("id") == "panel-7/1")
    assert first_props.CorrelationData == b"req-1"
    refused = [m for m, _p in results if not m["ok"]]
    assert sorted(m["reason"] for m in refused) == sorted(
        ["not JSON", "not JSON", "unknown action", "missing field", "missing user", "unknown field", "wrong type",
         "retained message", "internal error"])
    unknown = next(m for m in refused if m["reason"] == "unknown action")
    assert unknown["action"] == "raise" and unknown["user"] == "op1" and "ack" in unknown["text"]
    assert next(m for m in refused if m["reason"] == "internal error")["alarm"] == "boom"
    assert "not JSON" in caplog.text and "refused a request" in caplog.text


def test_the_actions_topic_may_not_hold_wildcards(mqtt_broker):
    with pytest.raises(ValueError, match="without wildcards"):
        MqttActionListener(settings(mqtt_broker), "quillmere/+/actions", lambda _m: None)
