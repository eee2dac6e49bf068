"""MQTT source and alarm publisher (paho-mqtt 2.x, MQTT v5).

:class:`MqttConnector` subscribes to a broker and turns every message into one tag
sample; :class:`MqttAlarmPublisher` publishes alarm transitions and the list of active
alarms back to the broker.

**Session.** The connector connects with MQTT v5, a fixed client id, Clean Start off
(``clean_start = false``, the default) and a Session Expiry Interval
(``session_expiry``), so the broker keeps the subscriptions and queues QoS 1 messages
while the connector is away: a short disconnection, or a restart of the daemon, loses
nothing the broker accepted (within the broker's own queue limit, mosquitto's
``max_queued_messages``). ``clean_start = true`` discards the session on the first
connection of a run only; reconnections within the run resume it. Subscriptions are
renewed on every connection with Retain Handling 1 (retained messages only for a new
subscription), so a reconnection does not replay retained values as fresh samples.

**Threads.** One network thread per connection drives paho through its external-loop
API (``select``, ``loop_read``, ``loop_write``, ``loop_misc``); every paho call happens on
it. ``on_message`` runs there and only maps the topic to a tag, decodes the payload and
appends a ``(tag, t, value, quality, ref)`` tuple to a bounded queue. paho acknowledges a
QoS 1 message (PUBACK) when ``on_message`` returns, so with ``overflow = "block"`` a full
queue holds the network thread: the broker's in-flight window fills and it keeps the rest
queued for the session: backpressure instead of loss (up to the broker's own queue limit).
With ``"drop_oldest"`` the oldest queued sample makes room and is counted. A task on the
event loop drains the queue every few milliseconds and hands whole batches to ``sink``
(a :class:`~spanwatch.rules.samples.SampleBatch` of many samples per call), so the checks never
run on the network thread and ``sink`` is always called on the event loop's thread.

**Connection.** :meth:`LiveConnector.run` owns the reconnect loop (capped exponential
backoff between ``reconnect_min`` and ``reconnect_max``, ``stats.reconnects``); each
:meth:`MqttConnector._session` is one connection: a fresh paho client connects on its
network thread (TCP, TLS and CONNECT block), subscribes on CONNACK, and the session
returns when the connection is lost. ``state`` is ``connected`` once the broker granted the
subscriptions and ``reconnecting`` from the moment the connection is lost.

**Bad input.** Nothing raises out of ``on_message``. Every message that cannot become a
sample is counted per topic and reason in ``stats.malformed`` and logged at most once
per reason every 10 s on the ``spanwatch.mqtt`` logger; a NaN or infinite value is
delivered as a bad-quality sample *and* counted. Reasons: ``unknown topic``,
``payload too large``, ``not UTF-8``, ``not a number``, ``not JSON``,
``not a JSON object``, ``missing value``, ``wrong value type``, ``non-finite value``,
``missing time``, ``wrong time type``, ``bad time``, ``time without offset``,
``non-finite time``, ``bad quality``. Counters are kept per topic for the first
``MAX_MALFORMED_KEYS`` topic / reason pairs, then under ``(other topics)``. ``ref`` is
the connector's sequence number of the message (malformed ones take a number too).

**Secrets.** The password is resolved (``env:NAME``, ``file:/path``) at each connection
and redacted from every error text; it never reaches a log line or ``stats``.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import math
import re
import select
import socket
import ssl
import threading
import time
from collections import deque
from collections.abc import Callable, Sequence
from datetime import datetime
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode
from paho.mqtt.subscribeoptions import SubscribeOptions
from spanwatch.connectors.live import ConnectorStats, LiveConnector
from spanwatch.connectors.secrets import SecretError, redact, resolve_secret
from spanwatch.monitor.config import MqttSource, TagSection, TopicMap
from spanwatch.rules.alarms import AlarmPoint, Transition
from spanwatch.rules.base import state_name
from spanwatch.rules.samples import QUALITY_CODES, SampleBatch
from spanwatch.rules.values import finite_or_none, iso

log = logging.getLogger("spanwatch.mqtt")

LOG_EVERY = 10.0  # seconds between two log lines of one malformed-input reason
MAX_MALFORMED_KEYS = 1000  # distinct "<topic>: <reason>" counters; later topics are counted as "(other topics)"
_AUTH_CODES = {0x86, 0x87, 0x8C}  # bad user name or password, not authorized, bad authentication method
_MAX_SESSION_EXPIRY = 0xFFFFFFFF  # MQTT v5: a four-byte integer, seconds
Item = tuple[int, float, float, int, int]  # (tag index, t, value, quality, ref)


class MqttConnectionError(ConnectionError):
    """A connection that failed or ended; the message is for people and never holds a secret."""


class MalformedPayload(ValueError):
    """A message that cannot become a sample; ``reason`` is the short text it is counted under."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


# --- topics -----------------------------------------------------------------------------


_PLACEHOLDER = re.compile(r"\{(\d+)\}")


def _check_filter(pattern: str) -> list[str]:
    """Split an MQTT topic filter into levels; raise ValueError if the wildcards are misplaced.

    The rules are those of MQTT v5.0 (OASIS standard, section 4.7.1, from memory): ``+``
    stands alone in one level, ``#`` stands alone in the last level.
    """
    levels = pattern.split("/")
    for i, level in enumerate(levels):
        if ("+" in level and level != "+") or ("#" in level and (level != "#" or i != len(levels) - 1)):
            raise ValueError(f"expected an MQTT topic filter ('+' alone in a level, '#' alone at the end), "
                             f"got {pattern!r}")
    return levels


def match_filter(levels: Sequence[str], topic: str) -> list[str] | None:
    """The levels the wildcards of a filter matched in ``topic``, in order; None if it does not match.

    ``+`` matches one level; ``#`` matches the parent level and any number of levels below
    it (its value is the rest of the topic, ``""`` for the parent itself). Topics starting
    with ``$`` are not matched by a filter starting with a wildcard.

    >>> match_filter("quillmere/q2/+/+".split("/"), "quillmere/q2/s5/tension")
    ['s5', 'tension']
    >>> match_filter("quillmere/#".split("/"), "quillmere/q2/s5/tension")
    ['q2/s5/tension']
    >>> match_filter("quillmere/q2/+".split("/"), "quillmere/q2/s5/tension") is None
    True
    """
    parts = topic.split("/")
    if topic.startswith("$") and levels and levels[0] in ("+", "#"):
        return None
    out: list[str] = []
    for i, level in enumerate(levels):
        if level == "#":
            out.append("/".join(parts[i:]))
            return out
        if i >= len(parts):
            return None
        if level == "+":
            out.append(parts[i])
        elif level != parts[i]:
            return None
    return out if len(parts) == len(levels) else None


class TopicRouter:
    """Topic -> tag index: a tag's ``address`` is its exact topic; then ``topic_map`` filters in order.

    A filter maps to the tag its template names, ``{1}``, ``{2}`` ... being the levels its
    wildcards matched; the first filter that yields a configured tag wins. Answers are
    cached per topic (the cache is cleared when it grows past ``cache_size``).
    """

    def __init__(self, tags: Sequence[str], addresses: dict[str, str], topic_map: Sequence[TopicMap],
                 cache_size: int = 100_000) -> None:
        self.index = {name: i for i, name in enumerate(tags)}
        self.exact = {topic: self.index[name] for name, topic in addresses.items()}
        self.maps: list[tuple[list[str], str]] = []
        for tm in topic_map:
            levels = _check_filter(tm.pattern)
            wild = sum(1 for lv in levels if lv in ("+", "#"))
            for m in _PLACEHOLDER.finditer(tm.tag):
                if not 1 <= int(m.group(1)) <= wild:
                    raise ValueError(f"topic_map {tm.pattern!r}: tag template {tm.tag!r} uses {m.group(0)} but the "
                                     f"filter has {wild} wildcard level(s)")
            self.maps.append((levels, tm.tag))
        self.cache: dict[str, int] = {}
        self.cache_size = cache_size

    def lookup(self, topic: str) -> int:
        """The tag index of ``topic``, -1 if it maps to no configured tag."""
        idx = self.cache.get(topic)
        if idx is None:
            idx = self._resolve(topic)
            if len(self.cache) >= self.cache_size:
                self.cache.clear()
            self.cache[topic] = idx
        return idx

    def _resolve(self, topic: str) -> int:
        idx = self.exact.get(topic)
        if idx is not None:
            return idx
        for levels, template in self.maps:
            caught = match_filter(levels, topic)
            if caught is not None:
                name = _PLACEHOLDER.sub(lambda m, c=caught: c[int(m.group(1)) - 1], template)
                idx = self.index.get(name)
                if idx is not None:
                    return idx
        return -1


# --- payloads ---------------------------------------------------------------------------


_MISSING = object()


def _get(doc: dict[str, Any], parts: Sequence[str]) -> Any:
    """Follow a dotted path (split into ``parts``) through objects and list indices; ``_MISSING`` if absent."""
    if len(parts) == 1:
        return doc.get(parts[0], _MISSING)
    cur: Any = doc
    for p in parts:
        if type(cur) is dict:
            cur = cur.get(p, _MISSING)
            if cur is _MISSING:
                return _MISSING
        elif type(cur) is list and p.isdigit() and int(p) < len(cur):
            cur = cur[int(p)]
        else:
            return _MISSING
    return cur


_BAD = QUALITY_CODES["bad"]


class PayloadDecoder:
    """Payload bytes -> ``(t, value, quality, used_arrival_time, problem)`` or :class:`MalformedPayload`.

    ``payload = "number"``: the UTF-8 text of a decimal number (``"12.5"``, ``"-3e2"``;
    Python's digit-group underscores are refused); the timestamp is the arrival time.
    ``payload = "json"``: an object; ``value_path``, ``time_path``, ``quality_path`` are
    dotted paths; time in ``time_unit`` (``s`` / ``ms`` since the epoch, ``iso``: ISO 8601
    with a UTC offset); quality ``good`` / ``uncertain`` / ``bad`` or 0 / 1 / 2, missing
    means good; without ``time_path`` the arrival time is used. A NaN or infinite value
    comes back as a bad-quality sample with ``problem = "non-finite value"``.
    """

    def __init__(self, spec: MqttSource) -> None:
        self.json = spec.payload == "json"
        self.max_payload = spec.max_payload
        self.value_path = tuple(spec.value_path.split("."))
        self.time_path = tuple(spec.time_path.split(".")) if spec.time_path else None
        self.quality_path = tuple(spec.quality_path.split(".")) if spec.quality_path else None
        self.time_unit = spec.time_unit
        self.ms = spec.time_unit == "ms"

    def decode(self, payload: bytes, arrival: float) -> tuple[float, float, int, bool, str | None]:
        if len(payload) > self.max_payload:
            raise MalformedPayload("payload too large")
        try:
            text = payload.decode("utf-8")
        except UnicodeDecodeError:
            raise MalformedPayload("not UTF-8") from None
        if not self.json:
            if "_" in text or not text.isascii():  # Python also reads "1_000" and non-ASCII digits
                raise MalformedPayload("not a number")
            try:
                value = float(text)
            except ValueError:
                raise MalformedPayload("not a number") from None
            return self._finish(arrival, value, 0, True)
        try:
            doc = json.loads(text)
        except (ValueError, RecursionError):
            raise MalformedPayload("not JSON") from None
        if type(doc) is not dict:
            raise MalformedPayload("not a JSON object")
        raw = _get(doc, self.value_path)
        if raw is _MISSING:
            raise MalformedPayload("missing value")
        if type(raw) is not float:
            if type(raw) is not int:  # bool, str, list, object, null
                raise MalformedPayload("wrong value type")
            try:
                raw = float(raw)
            except OverflowError:  # an integer beyond the float range
                raw = math.inf if raw > 0 else -math.inf
        quality = 0
        if self.quality_path is not None:
            q = _get(doc, self.quality_path)
            if q is not _MISSING:
                quality = self._quality(q)
        if self.time_path is None:
            return self._finish(arrival, raw, quality, True)
        traw = _get(doc, self.time_path)
        if traw is _MISSING:
            raise MalformedPayload("missing time")
        return self._finish(self._time(traw), raw, quality, False)

    @staticmethod
    def _finish(t: float, value: float, quality: int, arrival: bool) -> tuple[float, float, int, bool, str | None]:
        if value - value == 0.0:  # finite (NaN - NaN and inf - inf are NaN)
            return t, value, quality, arrival, None
        return t, value, _BAD, arrival, "non-finite value"

    @staticmethod
    def _quality(q: Any) -> int:
        if isinstance(q, str):
            code = QUALITY_CODES.get(q.strip().lower())
            if code is not None:
                return code
        elif type(q) in (int, float) and q in (0, 1, 2):
            return int(q)
        raise MalformedPayload("bad quality")

    def _time(self, raw: Any) -> float:
        if self.time_unit == "iso":
            if not isinstance(raw, str):
                raise MalformedPayload("wrong time type")
            try:
                dt = datetime.fromisoformat(raw)
            except ValueError:
                raise MalformedPayload("bad time") from None
            if dt.tzinfo is None or dt.utcoffset() is None:
                raise MalformedPayload("time without offset")
            try:
                return dt.timestamp()
            except (OverflowError, ValueError, OSError):
                raise MalformedPayload("bad time") from None
        if type(raw) is not float and type(raw) is not int:
            raise MalformedPayload("wrong time type")
        try:
            t = float(raw)
        except OverflowError:
            raise MalformedPayload("non-finite time") from None
        if self.ms:
            t /= 1000.0
        if t - t != 0.0:
            raise MalformedPayload("non-finite time")
        return t


# --- the queue between the network thread and the event loop ---------------------------


class SampleQueue:
    """Bounded FIFO of decoded samples, written by one network thread and read on the event loop.

    ``put`` counts overflow in ``stats.overflow``: with ``"drop_oldest"`` every sample
    dropped to make room, with ``"block"`` every time it has to wait for room (it waits
    until the reader makes room or :meth:`close` is called; after close it never waits
    and keeps everything, so a stopping connector loses nothing). One writer and
    one reader: appends and pops are atomic deque operations; the lock only orders a drop
    or a wait against the reader.
    """

    def __init__(self, maxsize: int, policy: str, stats: ConnectorStats | None = None) -> None:
        if policy not in ("block", "drop_oldest"):
            raise ValueError(f"expected overflow 'block' or 'drop_oldest', got {policy!r}")
        self.maxsize = maxsize
        self.block = policy == "block"
        self._items: deque[Item] = deque()
        self._lock = threading.Lock()
        self._room = threading.Condition(self._lock)
        self._waiting = False
        self.closed = False
        self.on_first: Callable[[], None] | None = None  # called when the queue stops being empty
        self.stats = stats if stats is not None else ConnectorStats()  # overflow is counted as it happens

    def __len__(self) -> int:
        return len(self._items)

    def put(self, item: Item) -> None:
        items = self._items
        if len(items) >= self.maxsize and not self.closed:
            if self.block:
                with self._room:
                    if len(items) >= self.maxsize and not self.closed:
                        self.stats.overflow += 1  # counted before waiting, so the wait is visible while it lasts
                        self._waiting = True
                        while len(items) >= self.maxsize and not self.closed:
                            self._room.wait(0.25)
                        self._waiting = False
            else:
                with self._lock:
                    if len(items) >= self.maxsize:
                        items.popleft()
                        self.stats.overflow += 1
        items.append(item)
        if len(items) == 1 and self.on_first is not None:
            self.on_first()

    def take(self, limit: int) -> list[Item]:
        with self._lock:
            items = self._items
            n = min(limit, len(items))
            if n == 0:
                return []
            pop = items.popleft
            out = [pop() for _ in range(n)]
            if self._waiting:
                self._room.notify_all()
        return out

    def close(self) -> None:
        with self._lock:
            self.closed = True
            self._room.notify_all()


class _RateLimitedLog:
    """At most one warning per reason every ``every`` seconds, with the count since the last line."""

    def __init__(self, logger: logging.Logger, every: float = LOG_EVERY) -> None:
        self.logger = logger
        self.every = every
        self.last: dict[str, float] = {}
        self.since: dict[str, int] = {}
        self.lock = threading.Lock()

    def __call__(self, reason: str, source: str, where: str) -> None:
        now = time.monotonic()
        with self.lock:
            n = self.since.get(reason, 0) + 1
            if now - self.last.get(reason, -math.inf) < self.every:
                self.since[reason] = n
                return
            self.last[reason], self.since[reason] = now, 0
        self.logger.warning("mqtt %s: %d message(s) with %s, latest on topic %r", source, n, reason, where)


# --- the connector ------------------------------------------------------------------------


class _Network:
    """The thread that drives one paho client through paho's external-loop API.

    It connects (TCP, TLS and CONNECT block, so not on the event loop), then runs
    ``select`` on the socket and calls ``loop_read`` / ``loop_write`` / ``loop_misc``
    (keepalive) until the connection ends or :meth:`request_stop`, when it sends
    DISCONNECT. Every call into paho happens on this one thread, so paho needs no locking
    across threads; and unlike ``loop_start`` it does not wake itself through a socket
    pair for every acknowledgement, which roughly doubles the messages per second.
    """

    def __init__(self, owner: MqttConnector, client: mqtt.Client) -> None:
        self.owner = owner
        self.client = client
        self.stopping = threading.Event()
        self._wake_r, self._wake_w = socket.socketpair()
        self._wake_r.setblocking(False)
        self.thread = threading.Thread(target=self._main, name=f"spanwatch-mqtt-{owner.name}", daemon=True)

    def request_stop(self) -> None:
        if not self.stopping.is_set():
            self.stopping.set()
            with contextlib.suppress(OSError):
                self._wake_w.send(b"x")

    def _main(self) -> None:
        owner, client, spec = self.owner, self.client, self.owner.spec
        try:
            keepalive, clean, props = owner._connect_args()
            try:
                if spec.protocol == "5":
                    client.connect(spec.host, spec.port, keepalive, clean_start=clean, properties=props)
                else:  # MQTT 3.1.1: Clean Session was set when the client was made
                    client.connect(spec.host, spec.port, keepalive)
            except Exception as exc:
                owner._resolve(owner._connack, exc=MqttConnectionError(owner._redact(
                    f"cannot connect to {spec.host}:{spec.port}: {_describe(exc)}")))
                return
            self._loop(client)
        except Exception as exc:  # a bug here must end the session, not the daemon
            log.exception("mqtt %s: network thread failed", owner.name)
            owner._resolve(owner._connack, exc=MqttConnectionError(owner._redact(_describe(exc))))
        finally:
            why = owner._setup_error or "the connection was closed before CONNACK"
            owner._resolve(owner._connack, exc=MqttConnectionError(owner._redact(
                f"cannot connect to {spec.host}:{spec.port}: {why}")))  # no effect after a CONNACK
            owner._resolve(owner._lost, f"connection to {spec.host}:{spec.port} ended")
            with contextlib.suppress(Exception):
                sock = client.socket()
                if sock is not None:
                    sock.close()
            self._wake_r.close()
            self._wake_w.close()

    def _loop(self, client: mqtt.Client) -> None:
        wake = self._wake_r
        ok = MQTTErrorCode.MQTT_ERR_SUCCESS
        while True:
            sock = client.socket()
            if sock is None:
                return
            if self.stopping.is_set():
                if client.is_connected():
                    client.disconnect()  # normal disconnection: the broker keeps the session
                    with contextlib.suppress(Exception):
                        client.loop_write()
                return
            pending = sock.pending() if hasattr(sock, "pending") else 0  # TLS: bytes already decrypted
            try:
                if pending:
                    readable, writable = [sock], ([sock] if client.want_write() else [])
                else:
                    readable, writable, _ = select.select([sock, wake], [sock] if client.want_write() else [],
                                                          [], 1.0)
            except (OSError, ValueError):  # the socket was closed under us
                return
            if wake in readable:
                with contextlib.suppress(OSError):
                    wake.recv(4096)
            if sock in readable and client.loop_read() != ok:
                return
            if sock in writable and client.loop_write() != ok:
                return
            if client.loop_misc() != ok:
                return


class MqttConnector(LiveConnector):
    """Live samples from an MQTT broker (see the module docstring for the design).

    ``tags`` are the config tags whose ``source`` is ``name``. Start with
    ``asyncio.create_task(connector.run())``; stop with ``await connector.stop()``, which
    disconnects (the broker keeps the session), joins the network thread and hands every
    sample still queued to ``sink`` before it returns.
    """

    kind = "mqtt"

    def __init__(self, name: str, spec: MqttSource, tags: dict[str, TagSection],
                 sink: Callable[[SampleBatch], None], *, batch_interval: float = 0.005,
                 max_batch: int = 20_000) -> None:
        super().__init__(name, sink, reconnect_min=spec.reconnect_min, reconnect_max=spec.reconnect_max)
        self.spec = spec
        self.tags = tuple(tags)
        addresses = {n: t.address for n, t in tags.items() if t.address}
        self.router = TopicRouter(self.tags, addresses, spec.topic_map)
        self.decoder = PayloadDecoder(spec)
        self.filters = list(dict.fromkeys(spec.subscribe or [*addresses.values(),
                                                             *(tm.pattern for tm in spec.topic_map)]))
        for f in self.filters:
            _check_filter(f.split("/", 2)[2] if f.startswith("$share/") and f.count("/") >= 2 else f)
        self.queue = SampleQueue(spec.queue_size, spec.overflow, self.stats)
        self.batch_interval = batch_interval
        self.max_batch = max_batch
        self.session_present: bool | None = None  # CONNACK's Session Present flag of the latest connection
        self.granted: dict[str, str] = {}  # filter -> SUBACK reason of the latest connection
        self._log_bad = _RateLimitedLog(log)
        self._seq = 0
        self._loop: asyncio.AbstractEventLoop | None = None
        self._wake: asyncio.Event | None = None
        self._client: mqtt.Client | None = None
        self._net: _Network | None = None
        self._connack: asyncio.Future[None] | None = None
        self._lost: asyncio.Future[str] | None = None
        self._connected_once = False
        self._stopping = False
        self._stopped = False
        self._secrets: tuple[str | None, ...] = (spec.password,)
        self._setup_error = ""
        self._sink_logged = -math.inf

    # --- lifecycle ---------------------------------------------------------------------------

    async def run(self) -> None:
        """Connect, stay connected (reconnecting with backoff) and deliver samples until :meth:`stop`."""
        self._loop = asyncio.get_running_loop()
        self._wake = asyncio.Event()
        self.queue.on_first = self._on_first_item
        drain = asyncio.create_task(self._drain(), name=f"mqtt {self.name} drain")
        try:
            await super().run()
        finally:
            self.queue.close()
            await self._end_network()
            drain.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await drain
            self._flush()
            self.state = "stopped"

    async def stop(self) -> None:
        """Disconnect cleanly (the broker keeps the session), join the network thread, deliver what is queued."""
        if self._stopped:
            return
        self._stopping = True
        await super().stop()
        self.queue.close()
        await self._end_network()
        self._flush()
        self._stopped = True

    async def _session(self) -> None:
        """One connection: start the network thread, wait for CONNACK (it subscribes), wait until it ends."""
        loop = asyncio.get_running_loop()
        spec = self.spec
        try:
            password = resolve_secret(spec.password)
        except SecretError as exc:
            raise MqttConnectionError(f"password of source {self.name!r}: {exc}") from None
        self._secrets = (password, spec.password)
        self._connack, self._lost = loop.create_future(), loop.create_future()
        try:
            client = self._new_client(password)
        except Exception as exc:  # TLS files that cannot be read, ...
            raise MqttConnectionError(self._redact(f"cannot set up the client: {_describe(exc)}")) from None
        self._client = client
        net = _Network(self, client)
        self._net = net
        net.thread.start()
        stop_wait = asyncio.ensure_future(self._stop.wait())
        timeout = client.connect_timeout + max(5.0, 2.0 * spec.keepalive)
        try:
            done, _ = await asyncio.wait({self._connack, stop_wait}, timeout=timeout,
                                         return_when=asyncio.FIRST_COMPLETED)
            if stop_wait in done:
                return
            if not done:
                raise MqttConnectionError(f"no CONNACK from {spec.host}:{spec.port} within {timeout:g} s")
            self._connack.result()  # raises MqttConnectionError when the connection failed or was refused
            await asyncio.wait({self._lost, stop_wait}, return_when=asyncio.FIRST_COMPLETED)
            if self._lost.done() and not self._stop.is_set():
                raise MqttConnectionError(self._lost.result())
        finally:
            stop_wait.cancel()
            await self._end_network()

    async def _end_network(self) -> None:
        """Ask the network thread to send DISCONNECT and end, and wait for it (idempotent)."""
        net = self._net
        if net is not None:
            net.request_stop()
            await asyncio.to_thread(net.thread.join)

    def _new_client(self, password: str | None) -> mqtt.Client:
        spec = self.spec
        if spec.protocol == "5":
            client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=spec.client_id, protocol=mqtt.MQTTv5,
                                 reconnect_on_failure=False)
        else:  # MQTT 3.1.1: a persistent session is Clean Session off; no session expiry, no retain handling
            client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=spec.client_id, protocol=mqtt.MQTTv311,
                                 clean_session=spec.clean_start and not self._connected_once,
                                 reconnect_on_failure=False)
        client.connect_timeout = max(1.0, min(10.0, spec.keepalive))
        if spec.username is not None or password is not None:
            client.username_pw_set(spec.username or "", password)
        if spec.tls:
            client.tls_set(ca_certs=spec.ca_file, certfile=spec.cert_file, keyfile=spec.key_file,
                           cert_reqs=ssl.CERT_REQUIRED, tls_version=ssl.PROTOCOL_TLS_CLIENT)
        client.on_connect = self._on_connect
        client.on_subscribe = self._on_subscribe
        client.on_disconnect = self._on_disconnect
        client.on_message = self._on_message
        client.on_log = self._on_log_setup  # until CONNACK: paho formats every log line while on_log is set
        self._setup_error = ""
        return client

    def _on_log_setup(self, _client: mqtt.Client, _userdata: Any, level: int, buf: str) -> None:
        """Keep paho's last error while connecting (a TLS alert, say), to say why a connection failed."""
        if level == mqtt.MQTT_LOG_ERR:
            self._setup_error = buf[:200]

    def _connect_args(self) -> tuple[int, bool, Properties]:
        """Keepalive, Clean Start and the CONNECT properties (Session Expiry Interval) of the next connection."""
        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = int(min(self.spec.session_expiry, _MAX_SESSION_EXPIRY))
        return max(1, round(self.spec.keepalive)), self.spec.clean_start and not self._connected_once, props

    def _redact(self, text: str) -> str:
        return redact(text, *self._secrets)[:300]

    # --- paho callbacks (network thread; never raise) ------------------------------------------

    def _resolve(self, fut: asyncio.Future[Any] | None, value: Any = None, exc: BaseException | None = None) -> None:
        loop = self._loop
        if fut is None or loop is None:
            return

        def settle() -> None:
            if not fut.done():
                if exc is not None:
                    fut.set_exception(exc)
                    fut.exception()  # retrieved: a session that already ended must not log it as unhandled
                else:
                    fut.set_result(value)

        with contextlib.suppress(RuntimeError):  # the loop is closed
            loop.call_soon_threadsafe(settle)

    def _on_connect(self, client: mqtt.Client, _userdata: Any, flags: mqtt.ConnectFlags, reason_code: ReasonCode,
                    _properties: Properties | None) -> None:
        try:
            if client is not self._client:
                return
            client.on_log = None
            if reason_code.is_failure:
                hint = " (check username and password)" if reason_code.value in _AUTH_CODES else ""
                msg = f"broker {self.spec.host}:{self.spec.port} refused the connection: {reason_code}{hint}"
                self._resolve(self._connack, exc=MqttConnectionError(self._redact(msg)))
                return
            self._connected_once = True
            self.session_present = bool(flags.session_present)
            if self.filters:
                if self.spec.protocol == "5":
                    opts = SubscribeOptions(qos=self.spec.qos, retainHandling=SubscribeOptions.RETAIN_SEND_IF_NEW_SUB)
                    rc, _ = client.subscribe([(f, opts) for f in self.filters])
                else:
                    rc, _ = client.subscribe([(f, self.spec.qos) for f in self.filters])
                if rc != MQTTErrorCode.MQTT_ERR_SUCCESS:
                    self.stats.last_error = f"subscribe failed: {mqtt.error_string(rc)}"
            else:
                log.warning("mqtt %s: nothing to subscribe to (no subscribe filters, tag addresses or topic_map)",
                            self.name)
                self.state = "connected"
            self._resolve(self._connack)
        except Exception as exc:
            log.exception("mqtt %s: on_connect failed", self.name)
            self._resolve(self._connack, exc=MqttConnectionError(self._redact(_describe(exc))))

    def _on_subscribe(self, client: mqtt.Client, _userdata: Any, _mid: int, reason_codes: list[ReasonCode],
                      _properties: Properties | None) -> None:
        try:
            if client is not self._client:
                return
            self.granted = {f: str(rc) for f, rc in zip(self.filters, reason_codes, strict=False)}
            refused = [f"{f} ({rc})" for f, rc in zip(self.filters, reason_codes, strict=False) if rc.is_failure]
            if refused:
                self.stats.last_error = f"broker refused subscription(s): {', '.join(refused)}"[:300]
                log.error("mqtt %s: %s", self.name, self.stats.last_error)
            if not self._stopping:
                self.state = "connected"
                log.info("mqtt %s: connected to %s:%s (session %s), %d subscription(s)", self.name, self.spec.host,
                         self.spec.port, "resumed" if self.session_present else "new", len(self.filters))
        except Exception:
            log.exception("mqtt %s: on_subscribe failed", self.name)

    def _on_disconnect(self, client: mqtt.Client, _userdata: Any, _flags: mqtt.DisconnectFlags,
                       reason_code: ReasonCode, _properties: Properties | None) -> None:
        try:
            if client is not self._client:
                return
            if not self._stopping:
                self.state = "reconnecting"
            self._resolve(self._lost, f"connection to {self.spec.host}:{self.spec.port} lost: {reason_code}")
        except Exception:
            log.exception("mqtt %s: on_disconnect failed", self.name)

    def _on_message(self, _client: mqtt.Client, _userdata: Any, msg: mqtt.MQTTMessage) -> None:
        """Decode one message and queue its sample; count and log whatever is wrong with it. Never raises."""
        topic = "?"
        try:
            self._seq += 1
            ref = self._seq
            arrival = time.time()
            topic = msg.topic
            idx = self.router.lookup(topic)
            if idx < 0:
                self._bad(topic, "unknown topic")
                return
            t, value, quality, by_arrival, problem = self.decoder.decode(msg.payload, arrival)
            if by_arrival:
                self.stats.server_timestamps += 1
            if problem is not None:
                self._bad(topic, problem)
            q = self.queue
            q.put((idx, t, value, quality, ref))
            self.stats.queue_depth = len(q)
        except MalformedPayload as exc:
            self._bad(topic, exc.reason)
        except UnicodeDecodeError:  # a topic that is not UTF-8 (a broker should refuse it)
            self._bad(repr(msg._topic)[:80], "topic not UTF-8")
        except Exception as exc:
            self._bad(topic, f"unexpected {type(exc).__name__}")

    def _bad(self, topic: str, reason: str) -> None:
        malformed = self.stats.malformed
        if len(malformed) >= MAX_MALFORMED_KEYS and f"{topic}: {reason}" not in malformed:
            topic = "(other topics)"  # a flood of stray topics must not grow the counters without bound
        self.stats.count_malformed(topic, reason)
        self._log_bad(reason, self.name, topic)

    # --- delivery on the event loop ----------------------------------------------------------------

    def _on_first_item(self) -> None:
        loop, wake = self._loop, self._wake
        if loop is not None and wake is not None:
            with contextlib.suppress(RuntimeError):
                loop.call_soon_threadsafe(wake.set)

    async def _drain(self) -> None:
        """Hand queued samples to ``sink`` in batches; pause ``batch_interval`` between batches to let them grow."""
        assert self._wake is not None
        while True:
            await self._wake.wait()
            self._wake.clear()
            while self._deliver():
                await asyncio.sleep(self.batch_interval)

    def _deliver(self) -> int:
        items = self.queue.take(self.max_batch)
        self.stats.queue_depth = len(self.queue)
        if not items:
            return 0
        tag, t, value, quality, ref = zip(*items, strict=True)
        batch = SampleBatch(self.tags, np.array(tag, np.int32), np.array(t, np.float64), np.array(value, np.float64),
                            np.array(quality, np.int8), np.array(ref, np.int64))
        self.stats.samples_in += len(items)
        try:
            self.sink(batch)
        except Exception as exc:  # a bug downstream must not stop the connector; say so, at most every 10 s
            self.stats.last_error = f"sink failed: {type(exc).__name__}: {exc}"[:300]
            now = time.monotonic()
            if now - self._sink_logged >= LOG_EVERY:
                self._sink_logged = now
                log.exception("mqtt %s: sink failed on a batch of %d sample(s)", self.name, len(items))
        return len(items)

    def _flush(self) -> None:
        while self._deliver():
            pass


def _describe(exc: BaseException) -> str:
    text = str(exc) or type(exc).__name__
    return text if type(exc).__name__ in text else f"{type(exc).__name__}: {text}"


# --- alarms back to the broker ----------------------------------------------------------------



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

    def __init__(self, spec: MqttSource, *, client_id: str | None = None, line: str = "",
                 max_queued: int = 10_000) -> None:
        self.spec = spec
        self.client_id = client_id or f"{spec.client_id}-alarms"
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
        self._secrets: tuple[str | None, ...] = (spec.password,)

    def start(self, active: list[AlarmPoint] | None = None) -> None:
        """Connect in the background and publish the (empty or given) active list; never blocks."""
        spec = self.spec
        try:
            password = resolve_secret(spec.password)
        except SecretError as exc:
            self.last_error = f"password: {exc}"
            log.error("mqtt alarm publisher: %s; alarms will not be published", self.last_error)
            return
        self._secrets = (password, spec.password)
        v5 = spec.protocol == "5"
        client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=self.client_id,
                             protocol=mqtt.MQTTv5 if v5 else mqtt.MQTTv311, **({} if v5 else {"clean_session": False}))
        if spec.username is not None or password is not None:
            client.username_pw_set(spec.username or "", password)
        if spec.tls:
            try:
                client.tls_set(ca_certs=spec.ca_file, certfile=spec.cert_file, keyfile=spec.key_file,
                               cert_reqs=ssl.CERT_REQUIRED, tls_version=ssl.PROTOCOL_TLS_CLIENT)
            except Exception as exc:
                self.last_error = redact(f"TLS setup: {_describe(exc)}", *self._secrets)
                log.error("mqtt alarm publisher: %s; alarms will not be published", self.last_error)
                return
        client.max_queued_messages_set(self.max_queued)
        client.reconnect_delay_set(spec.reconnect_min, spec.reconnect_max)  # type: ignore[arg-type]
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_publish = self._on_publish
        client.on_connect_fail = self._on_connect_fail
        if v5:
            props = Properties(PacketTypes.CONNECT)
            props.SessionExpiryInterval = int(min(spec.session_expiry, _MAX_SESSION_EXPIRY))
            clean: bool | int = mqtt.MQTT_CLEAN_START_FIRST_ONLY if spec.clean_start else False
            client.connect_async(spec.host, spec.port, max(1, round(spec.keepalive)), clean_start=clean,
                                 properties=props)
        else:
            client.connect_async(spec.host, spec.port, max(1, round(spec.keepalive)))
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
            if self.spec.alarm_topic:
                self._send(self.spec.alarm_topic, transition_message(tr, self.line), retain=False)
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
        if self.spec.active_topic:
            self._send(self.spec.active_topic, self.active_message(active), retain=True)

    def _send(self, topic: str, obj: dict[str, Any], *, retain: bool) -> None:
        client = self._client
        if client is None:
            return
        try:
            info = client.publish(topic, json.dumps(obj, allow_nan=False), qos=1, retain=retain)
        except Exception as exc:  # an invalid topic, ...
            self.refused += 1
            self.last_error = f"publish to {topic!r} failed: {_describe(exc)}"[:300]
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
            hint = " (check username and password)" if reason_code.value in _AUTH_CODES else ""
            self.last_error = f"broker {self.spec.host}:{self.spec.port} refused the connection: {reason_code}{hint}"
            self.state = "reconnecting"
            log.error("mqtt alarm publisher: %s", self.last_error)
        else:
            self.state = "connected"

    def _on_connect_fail(self, _client: mqtt.Client, _userdata: Any) -> None:
        self.state = "reconnecting"
        self.last_error = f"cannot connect to {self.spec.host}:{self.spec.port}"

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
