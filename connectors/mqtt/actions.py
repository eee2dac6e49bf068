"""Operators' actions over MQTT: :class:`MqttActionListener` takes acknowledge, shelve, reset ... from a topic.

An operator's panel publishes one JSON object per action on the actions topic (e.g. ``<prefix>/actions``)::

    {"action": "shelve", "alarm": "traction:pull_1:alarm", "user": "j.operator",
     "comment": "roll change", "until": "2026-03-02T07:00:00+00:00", "one_shot": false, "id": "panel-7/42"}

=============  ======================  ==================================================================
field          type                    meaning
=============  ======================  ==================================================================
``action``     str, required           an operator's action of :data:`spanwatch.rules.lifecycle.OPERATOR_ACTIONS`:
                                       ``ack``, ``reset``, ``shelve``, ``unshelve``, ``comment``,
                                       ``out_of_service``, ``return_to_service``
``alarm``      str, required           the alarm key (``<check>:<object>:<level>``) or an episode id; the
                                       application resolves it
``user``       str, required           who acts (not empty)
``comment``    str                     reason or comment (a shelve and out of service need one)
``until``      number, str or null     end of a shelve: epoch s, or ISO 8601 with a UTC offset; only with
                                       ``shelve``
``one_shot``   bool                    shelve until the alarm next clears (then ``until`` must be null)
``id``         str or int              the panel's own request id, echoed in the result
=============  ======================  ==================================================================

Anything else (a field not in the table, a wrong type, an unknown action, an empty user, a payload that is not
a JSON object, a retained message) is refused: counted by reason in :attr:`MqttActionListener.refused`, logged at
most once per reason every 10 s (:class:`~spanwatch.connectors.ratelog.RateLimitedLog`), and answered on the
result topic. A valid action goes to ``on_action`` (:class:`ActionMessage`), which decides and answers with
:meth:`MqttActionListener.reply`.

**Result** (``<actions topic>/result``, QoS 1, not retained): ``version``, ``ok`` (bool), ``text`` (why, or what
was done), ``reason`` (the short refusal reason, null when the application answered), ``action``, ``alarm``,
``user``, ``id`` (as far as the request could be read), ``time`` (ISO 8601 UTC), ``time_epoch_s``, and what the
application adds (e.g. ``state``). With MQTT v5 the request's Correlation Data is copied onto the result.

**Who may act.** Authentication is the broker's: the listener connects with the user name, password (a secret
reference) and TLS of :class:`~spanwatch.connectors.mqtt.settings.MqttSettings`, as the source does, and trusts
every message on the actions topic. The broker's access control list must therefore allow publishing to the
actions topic only to the operators' panels (mosquitto: ``acl_file`` with ``topic write <prefix>/actions`` for
those users alone), and reading the result topic to them; ``user`` names who acted, it does not prove it.

**Stale actions.** The listener's session starts clean and retained messages are not delivered to it (MQTT v5
Retain Handling 2); a message published retained is refused in any case (MQTT v5 Retain As Published keeps its
flag; with 3.1.1 only the flag of a retained message delivered on subscribing tells): an action published while
spanwatch was away is not carried out hours later (MQTT Version 5.0 OASIS Standard, 3.8.3.1 Subscription
Options; from memory).

**Threads.** ``on_action`` runs on paho's network thread unless ``loop`` is given, when it is called on that
asyncio event loop (``call_soon_threadsafe``); it must not block. :meth:`reply` may be called from any thread.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import math
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode
from paho.mqtt.subscribeoptions import SubscribeOptions
from spanwatch.connectors.mqtt.client import background_client, describe, log, refusal
from spanwatch.connectors.mqtt.messages import stamp
from spanwatch.connectors.mqtt.settings import MqttSettings
from spanwatch.connectors.mqtt.topics import check_filter
from spanwatch.connectors.ratelog import RateLimitedLog
from spanwatch.rules.lifecycle import OPERATOR_ACTIONS, Action

RESULT_VERSION = 1
MAX_PAYLOAD = 4096  # bytes
MAX_TEXT = 1000  # characters of a comment; user and alarm: MAX_NAME
MAX_NAME = 200
_TYPES: dict[str, tuple[type, ...]] = {"action": (str,), "alarm": (str,), "user": (str,), "comment": (str,),
                                       "until": (int, float, str, type(None)), "one_shot": (bool,), "id": (str, int)}
REQUIRED = ("action", "alarm", "user")


@dataclass(frozen=True)
class ActionMessage:
    """One operator's action as received: valid in form (whether it applies is for the lifecycle to say).

    ``until``: end of a shelve, epoch s; ``inf`` for a one-shot shelve; None for other actions. ``received``:
    arrival time (epoch s). ``correlation``: the MQTT v5 Correlation Data of the request (copied onto the result).
    """

    action: Action
    alarm: str
    user: str
    comment: str = ""
    until: float | None = None
    one_shot: bool = False
    id: str | int | None = None
    received: float = 0.0
    correlation: bytes | None = None


class InvalidAction(ValueError):
    """A request refused for its form; ``reason`` is the short text it is counted under, ``request`` what was read."""

    def __init__(self, reason: str, detail: str, request: dict[str, Any] | None = None) -> None:
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason
        self.request = request or {}


def _until(value: object) -> float | None:
    """``until`` as epoch seconds: a finite number, or ISO 8601 text with a UTC offset; None for null."""
    if value is None:
        return None
    if isinstance(value, str):
        try:
            dt = datetime.fromisoformat(value)
        except ValueError:
            raise InvalidAction("bad until",
                                f"expected ISO 8601 such as 2026-03-02T07:00:00+00:00, got {value!r}") from None
        if dt.tzinfo is None:
            raise InvalidAction("bad until", f"expected a time with a UTC offset (+00:00 or Z), got {value!r}")
        return dt.timestamp()
    t = float(value)  # type: ignore[arg-type]
    if not math.isfinite(t) or t <= 0:
        raise InvalidAction("bad until", f"expected epoch seconds (a finite number above 0), got {value!r}")
    return t


def parse_action(payload: bytes, *, received: float = 0.0, correlation: bytes | None = None,
                 max_payload: int = MAX_PAYLOAD) -> ActionMessage:
    """Payload bytes -> :class:`ActionMessage`, or :class:`InvalidAction` with the reason (see the module docstring).

    >>> parse_action(b'{"action": "ack", "alarm": "slip:pull_1:alarm", "user": "op1"}').action
    <Action.ACK: 'ack'>
    >>> try:
    ...     parse_action(b'{"action": "ack", "alarm": "slip:pull_1:alarm"}')
    ... except InvalidAction as exc:
    ...     print(exc.reason)
    missing field
    """
    if len(payload) > max_payload:
        raise InvalidAction("payload too large", f"{len(payload)} bytes, at most {max_payload}")
    try:
        text = payload.decode("utf-8")
    except UnicodeDecodeError:
        raise InvalidAction("not UTF-8", "") from None
    try:
        doc = json.loads(text)
    except (ValueError, RecursionError):
        raise InvalidAction("not JSON", "") from None
    if type(doc) is not dict:
        raise InvalidAction("not a JSON object", f"got {type(doc).__name__}")
    seen = {k: doc[k] for k in ("action", "alarm", "user", "id") if type(doc.get(k)) in (str, int)}
    unknown = sorted(set(doc) - set(_TYPES))
    if unknown:
        raise InvalidAction("unknown field", f"{', '.join(map(repr, unknown))}; expected only "
                                             f"{', '.join(_TYPES)}", seen)
    missing = [k for k in REQUIRED if k not in doc]
    if missing:
        raise InvalidAction("missing field", ", ".join(missing), seen)
    for k, v in doc.items():
        ok = _TYPES[k]
        if not isinstance(v, ok) or (isinstance(v, bool) and bool not in ok):  # JSON true is no number
            names = " or ".join("null" if t is type(None) else {"str": "string", "int": "number", "float": "number",
                                                                 "bool": "true/false"}[t.__name__] for t in ok)
            raise InvalidAction("wrong type", f"{k}: expected {names}, got {json.dumps(v)[:40]}", seen)
    if doc["action"] not in {a.value for a in OPERATOR_ACTIONS}:
        raise InvalidAction("unknown action", f"expected one of {', '.join(sorted(a.value for a in OPERATOR_ACTIONS))}"
                                              f", got {doc['action']!r}", seen)
    action = Action(doc["action"])
    user, alarm, comment = doc["user"].strip(), doc["alarm"].strip(), doc.get("comment", "")
    if not user:
        raise InvalidAction("missing user", "user: expected the name of who acts, got an empty string", seen)
    if not alarm:
        raise InvalidAction("missing alarm", "alarm: expected an alarm key or episode id", seen)
    if len(user) > MAX_NAME or len(alarm) > MAX_NAME or len(comment) > MAX_TEXT:
        raise InvalidAction("text too long", f"user and alarm at most {MAX_NAME} characters, comment {MAX_TEXT}",
                            seen)
    one_shot = bool(doc.get("one_shot", False))
    try:
        until = _until(doc.get("until"))
    except InvalidAction as exc:
        exc.request = seen
        raise
    if action != Action.SHELVE and (until is not None or one_shot):
        raise InvalidAction("until without shelve", f"until and one_shot go with shelve only, not {action.value}",
                            seen)
    if action == Action.SHELVE:
        if one_shot and until is not None:
            raise InvalidAction("bad until", "a one-shot shelve ends when the alarm clears: until must be null",
                                seen)
        if not one_shot and until is None:
            raise InvalidAction("bad until", "a shelve needs until (epoch s or ISO 8601) or one_shot true", seen)
        if one_shot:
            until = math.inf
    ident = doc.get("id")
    return ActionMessage(action=action, alarm=alarm, user=user, comment=comment, until=until, one_shot=one_shot,
                         id=ident, received=received, correlation=correlation)


class MqttActionListener:
    """Subscribes to the actions topic, validates each request and hands the valid ones to ``on_action``.

    ``topic``: the actions topic (no wildcards); results go to ``<topic>/result``. Its own paho client (client id
    ``<client_id>-actions``), clean session, paho's network thread and reconnection. Counters: ``received``,
    ``accepted``, ``refused`` (reason -> count), ``replied``, ``callback_errors``. ``state``: ``stopped``,
    ``connecting``, ``connected`` (subscribed), ``reconnecting``.
    """

    def __init__(self, settings: MqttSettings, topic: str, on_action: Callable[[ActionMessage], None], *,
                 client_id: str | None = None, loop: asyncio.AbstractEventLoop | None = None,
                 max_payload: int = MAX_PAYLOAD) -> None:
        levels = check_filter(topic)
        if "+" in levels or "#" in levels:
            raise ValueError(f"expected an actions topic without wildcards, got {topic!r}")
        self.settings = settings
        self.topic = topic
        self.result_topic = f"{topic}/result"
        self.on_action = on_action
        self.client_id = client_id or f"{settings.client_id}-actions"
        self.loop = loop
        self.max_payload = max_payload
        self.state = "stopped"
        self.last_error = ""
        self.received = 0
        self.accepted = 0
        self.refused: Counter[str] = Counter()
        self.replied = 0
        self.callback_errors = 0
        self._ratelog = RateLimitedLog(log)
        self._client: mqtt.Client | None = None
        self._stopping = False
        self._secrets: tuple[str | None, ...] = (settings.password,)

    def start(self) -> None:
        """Connect and subscribe in the background; never blocks (``state`` turns ``connected`` once subscribed)."""
        client, error, self._secrets = background_client(
            self.settings, self.client_id, who="mqtt action listener",
            without="operators' actions will not be received", clean=True)
        if client is None:
            self.last_error = error
            return
        client.on_connect = self._on_connect
        client.on_subscribe = self._on_subscribe
        client.on_disconnect = self._on_disconnect
        client.on_message = self._on_message
        self._client = client
        self._stopping = False
        self.state = "connecting"
        client.loop_start()

    def stop(self) -> None:
        """Disconnect and join paho's thread."""
        client, self._client = self._client, None
        if client is None:
            return
        self._stopping = True
        with contextlib.suppress(Exception):
            client.disconnect()
        with contextlib.suppress(Exception):
            client.loop_stop()
        self.state = "stopped"

    def reply(self, msg: ActionMessage | None, ok: bool, text: str, *, reason: str | None = None,
              request: dict[str, Any] | None = None, correlation: bytes | None = None, **extra: Any) -> None:
        """Publish the outcome of a request on the result topic (QoS 1); ``extra`` fields are added as given.

        ``msg`` None: a request refused before it became a message; ``request`` then holds what could be read of
        it, ``correlation`` its MQTT v5 Correlation Data.
        """
        client = self._client
        if client is None:
            return
        req = request or {}
        out: dict[str, Any] = {
            "version": RESULT_VERSION, "ok": bool(ok), "text": text, "reason": reason,
            "action": msg.action.value if msg is not None else req.get("action"),
            "alarm": msg.alarm if msg is not None else req.get("alarm"),
            "user": msg.user if msg is not None else req.get("user"),
            "id": msg.id if msg is not None else req.get("id"), **stamp("time", time.time()), **extra}
        props = None
        if msg is not None:
            correlation = msg.correlation
        if correlation is not None and self.settings.protocol == "5":
            props = Properties(PacketTypes.PUBLISH)
            props.CorrelationData = correlation
        try:
            client.publish(self.result_topic, json.dumps(out, allow_nan=False, default=str), qos=1, properties=props)
            self.replied += 1
        except Exception as exc:
            self.last_error = f"cannot publish a result: {describe(exc)}"[:300]
            log.error("mqtt action listener: %s", self.last_error)

    # paho callbacks (paho's thread)

    def _on_connect(self, client: mqtt.Client, _userdata: Any, _flags: mqtt.ConnectFlags, reason_code: ReasonCode,
                    _properties: Properties | None) -> None:
        if reason_code.is_failure:
            self.last_error = refusal(self.settings, reason_code)
            self.state = "reconnecting"
            log.error("mqtt action listener: %s", self.last_error)
            return
        if self.settings.protocol == "5":  # no retained actions on subscribing; the retain flag kept to refuse them
            client.subscribe(self.topic, options=SubscribeOptions(qos=1, noLocal=True, retainAsPublished=True,
                                                                  retainHandling=2))
        else:
            client.subscribe(self.topic, qos=1)

    def _on_subscribe(self, _client: mqtt.Client, _userdata: Any, _mid: int, codes: list[ReasonCode],
                      _properties: Properties | None) -> None:
        if any(c.is_failure for c in codes):
            self.last_error = f"the broker refused the subscription to {self.topic!r}: {codes[0]}"
            log.error("mqtt action listener: %s", self.last_error)
            self.state = "refused"
        else:
            self.state = "connected"

    def _on_disconnect(self, _client: mqtt.Client, _userdata: Any, _flags: mqtt.DisconnectFlags,
                       reason_code: ReasonCode, _properties: Properties | None) -> None:
        if not self._stopping:
            self.state = "reconnecting"
            self.last_error = f"connection lost: {reason_code}"

    def _on_message(self, _client: mqtt.Client, _userdata: Any, m: mqtt.MQTTMessage) -> None:
        """Validate one request; never raises (a bad request is counted, logged rate-limited and answered)."""
        self.received += 1
        props = getattr(m, "properties", None)
        correlation = getattr(props, "CorrelationData", None) if props is not None else None
        try:
            if m.retain:
                raise InvalidAction("retained message", "an action must not be retained (it would be repeated)")
            msg = parse_action(m.payload, received=time.time(), correlation=correlation, max_payload=self.max_payload)
        except InvalidAction as exc:
            self.refused[exc.reason] += 1
            self._ratelog(exc.reason, f"mqtt action listener: refused a request on {m.topic}: {exc}")
            self.reply(None, False, str(exc), reason=exc.reason, request=exc.request,
                       correlation=correlation)
            return
        except Exception as exc:  # a bug here must not stop paho's thread
            self.refused["internal error"] += 1
            self._ratelog("internal error", f"mqtt action listener: {describe(exc)}")
            return
        self.accepted += 1
        if self.loop is not None:
            try:
                self.loop.call_soon_threadsafe(self._deliver, msg)
            except RuntimeError:  # the loop is closed: the application is stopping
                self.callback_errors += 1
        else:
            self._deliver(msg)

    def _deliver(self, msg: ActionMessage) -> None:
        try:
            self.on_action(msg)
        except Exception as exc:
            self.callback_errors += 1
            log.exception("mqtt action listener: on_action failed for %s %s", msg.action.value, msg.alarm)
            self.reply(msg, False, f"not done: {describe(exc)}"[:300], reason="internal error")
