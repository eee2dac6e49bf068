"""Alarms back to the broker: :class:`MqttAlarmPublisher` publishes alarm messages and the retained list of alarms.

Messages are JSON, marked ``advisory``, built by :mod:`spanwatch.connectors.mqtt.messages` (whose docstring is
the payload's schema, with its version). Two ways to feed the publisher:

* :meth:`MqttAlarmPublisher.publish` (transitions, active points): the condition engine's raises and clears and
  the list of alarms whose condition is active, without lifecycle states;
* :meth:`MqttAlarmPublisher.publish_lifecycle` (lifecycle events, points, records, transitions): every raise,
  clear and operator or system action of the ISA-18.2 lifecycle (:mod:`spanwatch.rules.lifecycle`) with the
  states before and after, and the list of every alarm that is not normal.

The publisher works on the core types (:class:`~spanwatch.rules.alarms.Transition`,
:class:`~spanwatch.rules.alarms.AlarmPoint`, :class:`~spanwatch.rules.lifecycle.LifecycleEvent`,
:class:`~spanwatch.rules.lifecycle.Record`).
"""

from __future__ import annotations

import contextlib
import json
import time
from collections.abc import Mapping, Sequence
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import MQTTErrorCode
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode
from spanwatch.connectors.mqtt.client import FIRST_ONLY, background_client, describe, log, refusal
from spanwatch.connectors.mqtt.messages import (
    CONDITION_EVENTS,
    alarm_message,
    list_message,
    list_row,
    transition_message,
)
from spanwatch.connectors.mqtt.settings import MqttSettings
from spanwatch.rules.alarms import AlarmPoint, Transition
from spanwatch.rules.lifecycle import Action, AlarmState, LifecycleEvent, Record

__all__ = ["MqttAlarmPublisher", "transition_message"]


class MqttAlarmPublisher:
    """Publishes alarm messages (QoS 1) and the retained list of alarms to the broker.

    :meth:`publish` sends the condition engine's transitions and the alarms whose condition is active;
    :meth:`publish_lifecycle` the lifecycle's events (raises and clears with their transitions, operators'
    actions, shelve expiry, suppression) and every alarm that is not normal. Use one or the other for a line.

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
        self.unknown = 0  # lifecycle events of keys the publisher was given no point for
        self._episode: dict[str, dict[str, float]] = {}  # alarm key -> raised, value, cleared, peak (epoch s, value)
        self._client: mqtt.Client | None = None
        self._stopping = False
        self._secrets: tuple[str | None, ...] = (settings.password,)

    def start(self, active: list[AlarmPoint] | None = None) -> None:
        """Connect in the background and publish the (empty or given) active list; never blocks."""
        s = self.settings
        # clean_start: the first connection only; paho's own reconnections resume the session
        client, error, self._secrets = background_client(
            s, self.client_id, who="mqtt alarm publisher", without="alarms will not be published",
            clean=FIRST_ONLY if s.clean_start else False, max_queued=self.max_queued)
        if client is None:
            self.last_error = error
            return
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_publish = self._on_publish
        client.on_connect_fail = self._on_connect_fail
        self._client = client
        self.state = "connecting"
        client.loop_start()
        self._publish_active(active or [])

    def publish(self, transitions: list[Transition], active: list[AlarmPoint]) -> None:
        """Queue one message per transition and, if anything changed, the retained list of active alarms."""
        if self._client is None or not transitions:
            return
        for tr in transitions:
            self._track(tr.key, tr.event, tr.t, tr)
            if self.settings.alarm_topic:
                self._send(self.settings.alarm_topic, transition_message(tr, self.line), retain=False)
        self._publish_active(active)

    def publish_lifecycle(self, events: Sequence[LifecycleEvent], points: Mapping[str, AlarmPoint],
                          records: Mapping[str, Record], transitions: Sequence[Transition] = ()) -> None:
        """Queue one message per lifecycle event and, if anything changed, the retained list of alarms not normal.

        ``events``: what :class:`~spanwatch.rules.lifecycle.Lifecycle` returned (raises, clears, operator and
        system actions), in order; ``points``: alarm key -> point; ``records``: the lifecycle's records after
        the events. ``transitions``: the condition engine's raises and clears behind the raise and clear events,
        matched by key and event in order, for their value, peak, line state and first-out / chattering flags; a
        transition no event matches is published on its own (its key has no lifecycle). Events of keys not in
        ``points`` are skipped (counted in ``unknown``).
        """
        if self._client is None or not (events or transitions):
            return
        pending: dict[tuple[str, str], list[Transition]] = {}
        for tr in transitions:
            pending.setdefault((tr.key, tr.event), []).append(tr)
        out: list[tuple[float, dict[str, Any]]] = []
        for ev in events:
            p = points.get(ev.key)
            if p is None:
                self.unknown += 1
                continue
            tr = None
            if ev.action in CONDITION_EVENTS:
                queue = pending.get((ev.key, ev.action.value))
                tr = queue.pop(0) if queue else None
                self._track(ev.key, ev.action.value, ev.t, tr)
            out.append((ev.t, alarm_message(p, t=ev.t, event=ev.action.value, tr=tr, ev=ev, line=self.line)))
        for left in pending.values():
            for tr in left:
                self._track(tr.key, tr.event, tr.t, tr)
                out.append((tr.t, transition_message(tr, self.line)))
        if self.settings.alarm_topic:
            for _t, msg in sorted(out, key=lambda x: x[0]):
                self._send(self.settings.alarm_topic, msg, retain=False)
        self.publish_list(points, records)

    def publish_list(self, points: Mapping[str, AlarmPoint], records: Mapping[str, Record]) -> None:
        """Queue the retained list of every alarm whose lifecycle state is not normal (after a restart, say)."""
        if self.settings.active_topic:
            self._send(self.settings.active_topic, self.lifecycle_list_message(points, records), retain=True)

    def _track(self, key: str, event: str, t: float, tr: Transition | None) -> None:
        """Keep the raise time and value, and the clear time and peak, of each alarm's latest episode."""
        if event == Action.RAISE:
            self._episode[key] = {"raised": t, "value": tr.value if tr is not None else float("nan")}
        elif event == Action.CLEAR:
            ep = self._episode.setdefault(key, {})
            ep["cleared"] = t
            ep["peak"] = tr.peak if tr is not None else float("nan")

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
        """The retained JSON object listing the alarms whose condition is active (no lifecycle states)."""
        rows = [list_row(p, None, self._episode.get(p.key)) for p in active]
        return list_message(rows, time.time(), self.line)

    def lifecycle_list_message(self, points: Mapping[str, AlarmPoint], records: Mapping[str, Record]) -> dict[str, Any]:
        """The retained JSON object listing every alarm of ``points`` whose lifecycle state is not normal."""
        rows = []
        for key, p in points.items():
            rec = records.get(key)
            if rec is None or rec.state == AlarmState.NORMAL:
                self._episode.pop(key, None)  # the episode is over: acknowledged and returned to normal
                continue
            rows.append(list_row(p, rec, self._episode.get(key)))
        return list_message(rows, time.time(), self.line)

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
