"""Alarms back to the broker: :class:`MqttAlarmPublisher` publishes alarm transitions and the list of active alarms.

Messages are JSON (:func:`transition_message`, :meth:`MqttAlarmPublisher.active_message`),
marked ``advisory``; the publisher works on the core alarm types
(:class:`~spanwatch.rules.alarms.Transition`, :class:`~spanwatch.rules.alarms.AlarmPoint`).
"""

from __future__ import annotations

import contextlib
import json
import time
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import MQTTErrorCode
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode
from spanwatch.connectors.mqtt.client import FIRST_ONLY, describe, log, new_client, refusal
from spanwatch.connectors.mqtt.settings import MqttSettings
from spanwatch.connectors.secrets import SecretError, redact, resolve_secret
from spanwatch.rules.alarms import AlarmPoint, Transition
from spanwatch.rules.base import state_name
from spanwatch.rules.values import finite_or_none, iso


def transition_message(tr: Transition, line: str = "") -> dict[str, Any]:
    """The JSON object published for one alarm transition (non-finite numbers become null)."""
    p = tr.point
    msg: dict[str, Any] = {
        "time": iso(tr.t), "event": tr.event, "check": p.kind, "object": p.object_id, "level": p.level,
        "priority": p.priority, "value": finite_or_none(tr.value), "limit": finite_or_none(p.limit), "unit": p.unit,
        "line_state": state_name(tr.line_state), "key": p.key, "advisory": True,
    }
    if tr.event == "clear":
        msg["peak"] = finite_or_none(tr.peak)
    if line:
        msg["line"] = line
    return msg


class MqttAlarmPublisher:
    """Publishes alarm transitions (QoS 1) and the retained list of active alarms to the broker.

    Its own paho client (client id ``<client_id>-alarms``, so it never takes over the
    connector's session) with paho's network thread and paho's own reconnection (capped
    exponential backoff between ``reconnect_min`` and ``reconnect_max``). :meth:`publish`
    only queues packets for that thread, so it never blocks the event loop; while the
    broker is away paho keeps up to ``max_queued`` QoS 1 messages and sends them after
    reconnecting. The active list is published retained on ``active_topic`` after every
    change (and, empty, at :meth:`start`): a subscriber that connects later gets the
    current list at once (MQTT v5.0 OASIS standard, section 3.3.1.3, from memory).
    """

    def __init__(self, settings: MqttSettings, *, client_id: str | None = None, line: str = "",
                 max_queued: int = 10_000) -> None:
        self.settings = settings
        self.client_id = client_id or f"{settings.client_id}-alarms"
        self.line = line
        self.max_queued = max_queued
        self.state = "stopped"
        self.last_error = ""
        self.sent = 0  # messages handed to paho (written by the caller's thread only)
        self.acked = 0  # PUBACKs received (written by paho's thread only)
        self.refused = 0  # messages paho could not queue or the broker refused
        self._raised: dict[str, tuple[float, float]] = {}  # alarm key -> (raise time, value)
        self._client: mqtt.Client | None = None
        self._stopping = False
        self._secrets: tuple[str | None, ...] = (settings.password,)

    def start(self, active: list[AlarmPoint] | None = None) -> None:
        """Connect in the background and publish the (empty or given) active list; never blocks."""
        s = self.settings
        try:
            password = resolve_secret(s.password)
        except SecretError as exc:
            self.last_error = f"password: {exc}"
            log.error("mqtt alarm publisher: %s; alarms will not be published", self.last_error)
            return
        self._secrets = (password, s.password)
        try:  # clean_start: the first connection only; paho's own reconnections resume the session
            client = new_client(s, self.client_id, password, clean=FIRST_ONLY if s.clean_start else False,
                                reconnect_on_failure=True, max_queued=self.max_queued)
        except Exception as exc:  # TLS files that cannot be read, ...
            self.last_error = redact(f"cannot set up the client: {describe(exc)}", *self._secrets)
            log.error("mqtt alarm publisher: %s; alarms will not be published", self.last_error)
            return
        client.reconnect_delay_set(s.reconnect_min, s.reconnect_max)  # type: ignore[arg-type]
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_publish = self._on_publish
        client.on_connect_fail = self._on_connect_fail
        self._client = client
        self.state = "connecting"
        client.loop_start()
        self._publish_active(active or [])

    def publish(self, transitions: list[Transition], active: list[AlarmPoint]) -> None:
        """Queue one message per transition and, if anything changed, the retained active list."""
        if self._client is None or not transitions:
            return
        for tr in transitions:
            if tr.event == "raise":
                self._raised[tr.point.key] = (tr.t, tr.value)
            else:
                self._raised.pop(tr.point.key, None)
            if self.settings.alarm_topic:
                self._send(self.settings.alarm_topic, transition_message(tr, self.line), retain=False)
        self._publish_active(active)

    def stop(self, timeout: float = 2.0) -> None:
        """Wait up to ``timeout`` s for outstanding PUBACKs, then disconnect and join paho's thread."""
        client = self._client
        if client is None:
            return
        deadline = time.monotonic() + timeout
        while self.acked < self.sent and client.is_connected() and time.monotonic() < deadline:
            time.sleep(0.01)
        if self.acked < self.sent:
            log.warning("mqtt alarm publisher: %d message(s) not acknowledged at stop", self.sent - self.acked)
        self._stopping = True
        with contextlib.suppress(Exception):
            client.disconnect()
        with contextlib.suppress(Exception):
            client.loop_stop()
        self._client = None
        self.state = "stopped"

    def active_message(self, active: list[AlarmPoint]) -> dict[str, Any]:
        """The retained JSON object listing the active alarms."""
        rows = []
        for p in active:
            raised = self._raised.get(p.key)
            rows.append({"key": p.key, "check": p.kind, "object": p.object_id, "level": p.level,
                         "priority": p.priority, "limit": finite_or_none(p.limit), "unit": p.unit,
                         "raised": iso(raised[0]) if raised else None,
                         "value": finite_or_none(raised[1]) if raised else None})
        msg: dict[str, Any] = {"time": iso(time.time()), "count": len(rows), "active": rows, "advisory": True}
        if self.line:
            msg["line"] = self.line
        return msg

    def _publish_active(self, active: list[AlarmPoint]) -> None:
        if self.settings.active_topic:
            self._send(self.settings.active_topic, self.active_message(active), retain=True)

    def _send(self, topic: str, obj: dict[str, Any], *, retain: bool) -> None:
        client = self._client
        if client is None:
            return
        try:
            info = client.publish(topic, json.dumps(obj, allow_nan=False), qos=1, retain=retain)
        except Exception as exc:  # an invalid topic, ...
            self.refused += 1
            self.last_error = f"publish to {topic!r} failed: {describe(exc)}"[:300]
            log.error("mqtt alarm publisher: %s", self.last_error)
            return
        if info.rc == MQTTErrorCode.MQTT_ERR_QUEUE_SIZE:
            self.refused += 1
            self.last_error = f"outgoing queue full ({self.max_queued} messages): alarm message dropped"
            log.error("mqtt alarm publisher: %s", self.last_error)
        else:
            self.sent += 1  # queued; sent now or after reconnecting

    # paho callbacks (paho's thread)

    def _on_connect(self, _client: mqtt.Client, _userdata: Any, _flags: mqtt.ConnectFlags,
                    reason_code: ReasonCode, _properties: Properties | None) -> None:
        if reason_code.is_failure:
            self.last_error = refusal(self.settings, reason_code)
            self.state = "reconnecting"
            log.error("mqtt alarm publisher: %s", self.last_error)
        else:
            self.state = "connected"

    def _on_connect_fail(self, _client: mqtt.Client, _userdata: Any) -> None:
        self.state = "reconnecting"
        self.last_error = f"cannot connect to {self.settings.host}:{self.settings.port}"

    def _on_disconnect(self, _client: mqtt.Client, _userdata: Any, _flags: mqtt.DisconnectFlags,
                       reason_code: ReasonCode, _properties: Properties | None) -> None:
        if not self._stopping:
            self.state = "reconnecting"
            self.last_error = f"connection lost: {reason_code}"

    def _on_publish(self, _client: mqtt.Client, _userdata: Any, _mid: int, reason_code: ReasonCode,
                    _properties: Properties | None) -> None:
        self.acked += 1
        if reason_code.is_failure:
            self.refused += 1
            self.last_error = f"broker refused an alarm message: {reason_code}"
            log.error("mqtt alarm publisher: %s", self.last_error)
