"""The MQTT source: :class:`MqttConnector` subscribes to a broker and turns every message into one tag sample.

**Connection.** :meth:`LiveConnector.run` owns the reconnect loop (capped exponential
backoff between ``reconnect_min`` and ``reconnect_max``, ``stats.reconnects``); each
:meth:`MqttConnector._session` is one connection: a fresh paho client
(:func:`~spanwatch.connectors.mqtt.client.new_client`) connects on its network thread
(TCP, TLS and CONNECT block), subscribes on CONNACK, and the session returns when the
connection is lost. ``state`` is ``connected`` once the broker granted the subscriptions
and ``reconnecting`` from the moment the connection is lost. ``clean_start = true``
discards the session on the first connection of a run only; reconnections within the run
resume it. Subscriptions are renewed on every connection with Retain Handling 1 (retained
messages only for a new subscription), so a reconnection does not replay retained values
as fresh samples.

**Threads.** ``on_message`` runs on the network thread and only maps the topic to a tag
(:class:`~spanwatch.connectors.mqtt.topics.TopicRouter`), decodes the payload
(:class:`~spanwatch.connectors.mqtt.payload.PayloadDecoder`) and appends a
``(tag, t, value, quality, ref)`` tuple to the bounded
:class:`~spanwatch.connectors.mqtt.queue.SampleQueue` (``overflow``: block or drop the
oldest). A task on the event loop drains the queue every few milliseconds and hands whole
batches to ``sink`` (a :class:`~spanwatch.rules.samples.SampleBatch` of many samples per
call), so the checks never run on the network thread and ``sink`` is always called on the
event loop's thread.

**Bad input.** Nothing raises out of ``on_message``. Every message that cannot become a
sample (an ``unknown topic``, or a payload the decoder refuses, with its reason) is counted
per topic and reason in ``stats.malformed`` and logged at most once per reason every 10 s
on the ``spanwatch.mqtt`` logger; a NaN or infinite value is delivered as a bad-quality
sample *and* counted. Counters are kept per topic for the first ``MAX_MALFORMED_KEYS``
topic / reason pairs, then under ``(other topics)``. ``ref`` is the connector's sequence
number of the message (malformed ones take a number too).

**Messages lost before they arrive.** A broker drops QoS 1 messages it cannot keep (mosquitto:
``max_queued_messages`` for a session whose client is away, ``max_inflight_messages``) and the
publisher never hears of it; so, where the payload allows, the connector counts what never came,
in ``stats.lost`` by how it was seen, logged at most once every 10 s. *Sequence numbers*
(``seq_path``): per topic, a jump of k is k - 1 messages lost; a number back at 0 or 1, or more
than :data:`REORDER_WINDOW` below the last, is a publisher restart (``stats.publisher_restarts``),
not loss; a repeat or a slightly older number (QoS 1 redelivers at least once) is neither. *Time
gaps*, for tags given a sample period and not carrying sequence numbers, with source times from the
payload: a gap of more than ``gap_factor`` sample periods between consecutive source times counts
round(gap / period) - 1 messages as lost (suspected: a publisher that paused looks the same); a gap
beyond ``gap_horizon`` is an outage or a clock step, not counted.

**Secrets.** The password is resolved (``env:NAME``, ``file:/path``) at each connection
and redacted from every error text; it never reaches a log line or ``stats``.
"""

from __future__ import annotations

import asyncio
import contextlib
import math
import time
from collections.abc import Callable
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
from paho.mqtt.enums import MQTTErrorCode
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode
from paho.mqtt.subscribeoptions import SubscribeOptions
from spanwatch.connectors.live import LiveConnector
from spanwatch.connectors.mqtt.client import (
    MqttConnectionError,
    NetworkThread,
    describe,
    log,
    new_client,
    refusal,
)
from spanwatch.connectors.mqtt.payload import MalformedPayload, PayloadDecoder
from spanwatch.connectors.mqtt.queue import SampleQueue
from spanwatch.connectors.mqtt.settings import MqttSettings
from spanwatch.connectors.mqtt.topics import TopicRouter, check_subscription
from spanwatch.connectors.ratelog import LOG_EVERY, RateLimitedLog
from spanwatch.connectors.secrets import SecretError, redact, resolve_secret
from spanwatch.rules.samples import SampleBatch

MAX_MALFORMED_KEYS = 1000  # distinct "<topic>: <reason>" counters; later topics are counted as "(other topics)"
MAX_SEQ_TOPICS = 100_000  # topics whose last sequence number is kept
REORDER_WINDOW = 1000  # a sequence number this far below the last is a redelivery; further, a publisher restart


class MqttConnector(LiveConnector):
    """Live samples from an MQTT broker (see the module docstring for the design).

    ``tags`` maps each tag name the source delivers to its exact topic, or to None when a
    topic rule of ``settings.topic_map`` names it; ``periods`` gives the sample period (s) of
    the tags whose time gaps count as lost messages. Start with
    ``asyncio.create_task(connector.run())``; stop with ``await connector.stop()``, which
    disconnects (the broker keeps the session), joins the network thread and hands every
    sample still queued to ``sink`` before it returns.
    """

    kind = "mqtt"

    def __init__(self, name: str, settings: MqttSettings, tags: dict[str, str | None],
                 sink: Callable[[SampleBatch], None], *, batch_interval: float = 0.005,
                 max_batch: int = 20_000, periods: dict[str, float] | None = None, gap_factor: float = 1.5,
                 gap_horizon: float = 3600.0) -> None:
        super().__init__(name, sink, reconnect_min=settings.reconnect_min, reconnect_max=settings.reconnect_max)
        self.settings = settings
        self.tags = tuple(tags)
        exact = {n: topic for n, topic in tags.items() if topic}
        self.router = TopicRouter(self.tags, exact, settings.topic_map)
        self.decoder = PayloadDecoder(settings)
        self.filters = list(dict.fromkeys(settings.subscribe or [*exact.values(),
                                                                 *(r.pattern for r in settings.topic_map)]))
        for f in self.filters:
            check_subscription(f)
        self.queue = SampleQueue(settings.queue_size, settings.overflow, self.stats)
        self.batch_interval = batch_interval
        self.max_batch = max_batch
        self.session_present: bool | None = None  # CONNACK's Session Present flag of the latest connection
        self.granted: dict[str, str] = {}  # filter -> SUBACK reason of the latest connection
        self._ratelog = RateLimitedLog(log)
        self._seq = 0
        # loss detection (network thread): last sequence number per topic, last source time per tag
        self._check_seq = self.decoder.seq_path is not None
        self._last_seq: dict[str, int] = {}
        self._seq_tag = [False] * len(self.tags)  # the tag's messages carry sequence numbers: no time-gap guess
        self._period = [float((periods or {}).get(n, 0.0)) for n in self.tags]
        self._last_t = [-math.inf] * len(self.tags)
        self._check_gaps = self.decoder.json and self.decoder.time_path is not None and any(self._period)
        self.gap_factor, self.gap_horizon = gap_factor, gap_horizon
        self._loop: asyncio.AbstractEventLoop | None = None
        self._wake: asyncio.Event | None = None
        self._client: mqtt.Client | None = None
        self._net: NetworkThread | None = None
        self._connack: asyncio.Future[None] | None = None
        self._lost: asyncio.Future[str] | None = None
        self._connected_once = False
        self._stopping = False
        self._stopped = False
        self._secrets: tuple[str | None, ...] = (settings.password,)
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
        s = self.settings
        try:
            password = resolve_secret(s.password)
        except SecretError as exc:
            raise MqttConnectionError(f"password of source {self.name!r}: {exc}") from None
        self._secrets = (password, s.password)
        self._connack, self._lost = loop.create_future(), loop.create_future()
        try:  # MQTT 3.1.1: a persistent session is Clean Session off; no session expiry, no retain handling
            client = new_client(s, s.client_id, password, clean=s.clean_start and not self._connected_once,
                                reconnect_on_failure=False)
        except Exception as exc:  # TLS files that cannot be read, ...
            raise MqttConnectionError(self._redact(f"cannot set up the client: {describe(exc)}")) from None
        client.on_connect = self._on_connect
        client.on_subscribe = self._on_subscribe
        client.on_disconnect = self._on_disconnect
        client.on_message = self._on_message
        client.on_log = self._on_log_setup  # until CONNACK: paho formats every log line while on_log is set
        self._setup_error = ""
        self._client = client
        net = NetworkThread(client, self.name, self._net_failed, self._net_ended)
        self._net = net
        net.thread.start()
        stop_wait = asyncio.ensure_future(self._stop.wait())
        timeout = client.connect_timeout + max(5.0, 2.0 * s.keepalive)
        try:
            done, _ = await asyncio.wait({self._connack, stop_wait}, timeout=timeout,
                                         return_when=asyncio.FIRST_COMPLETED)
            if stop_wait in done:
                return
            if not done:
                raise MqttConnectionError(f"no CONNACK from {s.host}:{s.port} within {timeout:g} s")
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

    def _net_failed(self, text: str) -> None:
        """The network thread could not connect or failed (network thread)."""
        self._resolve(self._connack, exc=MqttConnectionError(self._redact(text)))

    def _net_ended(self) -> None:
        """The network thread ended: the connection failed if no CONNACK came, and it is lost (network thread)."""
        s = self.settings
        why = self._setup_error or "the connection was closed before CONNACK"
        self._net_failed(f"cannot connect to {s.host}:{s.port}: {why}")  # no effect after a CONNACK
        self._resolve(self._lost, f"connection to {s.host}:{s.port} ended")

    def _on_log_setup(self, _client: mqtt.Client, _userdata: Any, level: int, buf: str) -> None:
        """Keep paho's last error while connecting (a TLS alert, say), to say why a connection failed."""
        if level == mqtt.MQTT_LOG_ERR:
            self._setup_error = buf[:200]

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
                self._resolve(self._connack, exc=MqttConnectionError(self._redact(refusal(self.settings, reason_code))))
                return
            self._connected_once = True
            self.session_present = bool(flags.session_present)
            if self.filters:
                qos = self.settings.qos
                if self.settings.protocol == "5":
                    opts = SubscribeOptions(qos=qos, retainHandling=SubscribeOptions.RETAIN_SEND_IF_NEW_SUB)
                    rc, _ = client.subscribe([(f, opts) for f in self.filters])
                else:
                    rc, _ = client.subscribe([(f, qos) for f in self.filters])
                if rc != MQTTErrorCode.MQTT_ERR_SUCCESS:
                    self.stats.last_error = f"subscribe failed: {mqtt.error_string(rc)}"
            else:
                log.warning("mqtt %s: nothing to subscribe to (no subscribe filters, tag addresses or topic_map)",
                            self.name)
                self.state = "connected"
            self._resolve(self._connack)
        except Exception as exc:
            log.exception("mqtt %s: on_connect failed", self.name)
            self._resolve(self._connack, exc=MqttConnectionError(self._redact(describe(exc))))

    def _on_subscribe(self, client: mqtt.Client, _userdata: Any, _mid: int, reason_codes: list[ReasonCode],
                      _properties: Properties | None) -> None:
        try:
            if client is not self._client:
                return
            self.granted = {f: str(rc) for f, rc in zip(self.filters, reason_codes, strict=False)}
            denied = [f"{f} ({rc})" for f, rc in zip(self.filters, reason_codes, strict=False) if rc.is_failure]
            if denied:
                self.stats.last_error = f"broker refused subscription(s): {', '.join(denied)}"[:300]
                log.error("mqtt %s: %s", self.name, self.stats.last_error)
            if not self._stopping:
                self.state = "connected"
                s = self.settings
                log.info("mqtt %s: connected to %s:%s (session %s), %d subscription(s)", self.name, s.host, s.port,
                         "resumed" if self.session_present else "new", len(self.filters))
        except Exception:
            log.exception("mqtt %s: on_subscribe failed", self.name)

    def _on_disconnect(self, client: mqtt.Client, _userdata: Any, _flags: mqtt.DisconnectFlags,
                       reason_code: ReasonCode, _properties: Properties | None) -> None:
        try:
            if client is not self._client:
                return
            if not self._stopping:
                self.state = "reconnecting"
            s = self.settings
            self._resolve(self._lost, f"connection to {s.host}:{s.port} lost: {reason_code}")
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
            samples = self.decoder.decode_many(msg.payload, arrival)
            if self._check_seq:
                self._sequence(topic, idx)
            q = self.queue
            for t, value, quality, by_arrival, problem in samples:
                if by_arrival:
                    self.stats.server_timestamps += 1
                if problem is not None:
                    self._bad(topic, problem)
                if self._check_gaps:
                    self._time_gap(topic, idx, t)
                q.put((idx, t, value, quality, ref))
            self.stats.queue_depth = len(q)
        except MalformedPayload as exc:
            self._bad(topic, exc.reason)
        except UnicodeDecodeError:  # a topic that is not UTF-8 (a broker should refuse it)
            self._bad(repr(msg._topic)[:80], "topic not UTF-8")
        except Exception as exc:
            self._bad(topic, f"unexpected {type(exc).__name__}")

    def _sequence(self, topic: str, idx: int) -> None:
        """Compare the message's sequence number with the topic's last (see the module docstring)."""
        dec = self.decoder
        seq = dec.seq
        if seq is None:
            if dec.seq_bad:
                self._bad(topic, "bad sequence number")
            return
        self._seq_tag[idx] = True
        last = self._last_seq.get(topic)
        if last is None:
            if len(self._last_seq) < MAX_SEQ_TOPICS:
                self._last_seq[topic] = seq
        elif seq > last:
            if seq > last + 1:
                self._count_lost("sequence", seq - last - 1, topic)
            self._last_seq[topic] = seq
        elif seq < last and (seq <= 1 or last - seq > REORDER_WINDOW):
            self._last_seq[topic] = seq
            self.stats.publisher_restarts += 1
            if self._ratelog.tally("publisher restart"):
                log.warning("mqtt %s: the sequence numbers on topic %r started again at %d (after %d): a publisher "
                            "restart", self.name, topic, seq, last)

    def _time_gap(self, topic: str, idx: int, t: float) -> None:
        """Count the samples missing between this source time and the tag's last, for a periodic tag."""
        last = self._last_t[idx]
        if t <= last:  # a repeat or an older sample: no gap; far older: the clock stepped back (or the last was
            if last - t > self.gap_horizon:  # a glitch ahead): start again from here
                self._last_t[idx] = t
            return
        self._last_t[idx] = t
        period = self._period[idx]
        gap = t - last
        if period > 0.0 and gap > self.gap_factor * period and gap <= self.gap_horizon and not self._seq_tag[idx]:
            self._count_lost("time gap", round(gap / period) - 1, topic)

    def _count_lost(self, how: str, n: int, topic: str) -> None:
        if n <= 0:
            return
        self.stats.count_lost(how, n)
        since = self._ratelog.tally(f"lost: {how}", n)
        if since:
            why = "sequence numbers skipped" if how == "sequence" else "gaps in the source times"
            log.warning("mqtt %s: %d message(s) lost before they arrived (%s), latest on topic %r; see the broker's "
                        "queue limits (mosquitto: max_queued_messages, max_inflight_messages)", self.name, since,
                        why, topic)

    def _bad(self, topic: str, reason: str) -> None:
        malformed = self.stats.malformed
        if len(malformed) >= MAX_MALFORMED_KEYS and f"{topic}: {reason}" not in malformed:
            topic = "(other topics)"  # a flood of stray topics must not grow the counters without bound
        self.stats.count_malformed(topic, reason)
        n = self._ratelog.tally(reason)
        if n:
            log.warning("mqtt %s: %d message(s) with %s, latest on topic %r", self.name, n, reason, topic)

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
