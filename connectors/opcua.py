"""Live OPC UA source: a data-change subscription on the tags of one server, delivered as sample batches.

:class:`OpcUaConnector` is a :class:`~spanwatch.connectors.live.LiveConnector` built from plain
:class:`OpcUaSettings` (the application fills them from a ``[sources.NAME]`` table with ``kind = "opcua"``)
and the tags whose ``source`` is NAME; each tag's ``address`` is a node id (``ns=2;s=Q2.S5.Tension``,
``ns=3;i=1042``, or with the namespace URI instead of its index, ``nsu=urn:plc:q2;s=Q2.S5.Tension``, resolved at every
connect because a server may renumber its namespaces when it restarts).

What one connection does (:meth:`OpcUaConnector._session`, run in a loop with capped exponential
backoff by :meth:`LiveConnector.run`):

1. Connect with asyncua (https://github.com/FreeOpcUa/opcua-asyncio), security ``None`` or
   ``Basic256Sha256`` with ``Sign`` / ``SignAndEncrypt`` (client certificate and private key files;
   the server certificate pinned from ``server_certificate`` if given, otherwise taken from the
   server's endpoint description without verification), and a user name and password (the password
   resolved by :func:`spanwatch.connectors.secrets.resolve_secret` at every connect, never logged, redacted from
   every error text).
2. Create one subscription (publishing interval ``publishing_interval``) with one monitored item per
   tag: sampling interval ``sampling_interval`` or the tag's ``sample_period``, server queue
   ``queue_size``, and a DataChangeFilter with trigger StatusValueTimestamp, so a value that repeats
   with a new source timestamp (a frozen sensor) is still reported as an update and not mistaken for a
   stale tag. Servers that refuse the filter get the item without it.
3. Every Publish response becomes one :class:`~spanwatch.rules.samples.SampleBatch` handed to ``sink`` on the
   event loop (one call per publishing interval, split above ``max_batch`` samples): the value as a
   float (booleans 0/1), the SourceTimestamp in epoch seconds UTC, else the ServerTimestamp (counted in
   ``stats.server_timestamps``), else the arrival time (also counted there); the quality from the
   severity of the StatusCode (OPC UA Part 4, StatusCode: the top two bits, 00 Good, 01 Uncertain,
   10 Bad, 11 reserved and taken as bad): 0, 1, 2. A bad value arrives as NaN with quality 2, an
   uncertain one with its value and quality 1; neither is ever passed on as good. A StatusCode with
   the Overflow info bit (the server's queue for that item overflowed and dropped older values) is
   counted in ``stats.overflow``. ``ref`` is a sequence number over the connector's life.
4. Unusable notifications never raise: a value that is not a number (text, arrays, structures), a
   good value that is empty, or a NaN or infinite number is delivered as NaN with quality 2 (so the
   monitor sees the tag as bad, not stale) and counted in ``stats.malformed`` by node and reason;
   a tag whose node does not exist or whose address does not parse is counted there too (once per
   connection) and the others are subscribed. Log lines for these go to ``spanwatch.opcua`` at most
   once per reason every 10 s. A sample identical to the last one delivered for its tag (same
   source time, value and quality, which is what a server sends as the initial value after a
   reconnect) is not delivered again; ``repeats_skipped`` counts them.
5. Watch the connection: every ``watchdog_interval`` read the server's ServerStatus/CurrentTime
   (timeout ``timeout``; the server's clock offset is kept in ``server_clock_offset``) and check
   that the subscription has published data or a keep-alive recently; asyncua's own supervision
   (a closed socket is reported at once, its ServerState probe every ``watchdog_interval``) ends
   the connection too. A connection that was up and is lost returns from ``_session`` (the retry
   delay starts again at ``reconnect_min``); a failure to connect or subscribe raises
   :class:`OpcUaSessionError` (the delay doubles up to ``reconnect_max``). Subscriptions are
   created anew on every connection, so a restarted server gets them back.

``state`` is ``connected`` only while the subscription exists; ``stats.last_error`` says in words
why the last connection failed or ended, e.g. ``server refused the session: BadUserAccessDenied
(user 'operator')``. Threading: everything runs on the event loop of :meth:`run`; ``sink`` must
not block.

:func:`browse` lists the variables under a node with node id, browse path, data type and current
value, for filling in the ``address`` of each tag.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import math
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
from asyncua import Client, ua
from asyncua.client.ua_client import UaClientState
from asyncua.common.subscription import Subscription
from asyncua.crypto.security_policies import SecurityPolicyBasic256Sha256
from cryptography import x509
from cryptography.x509.oid import NameOID
from spanwatch.connectors.live import LiveConnector
from spanwatch.connectors.ratelog import RateLimitedLog
from spanwatch.connectors.secrets import SecretError, redact, redact_url, resolve_secret
from spanwatch.rules.samples import SampleBatch

log = logging.getLogger("spanwatch.opcua")

LOG_EVERY = 10.0  # seconds between two log lines of the same reason
CLIENT_HANDLE_BASE = 1000  # client handle of tag i is CLIENT_HANDLE_BASE + i
SESSION_TIMEOUT_MS = 60_000.0  # how long the server keeps our session after we vanish

# StatusCode layout (OPC UA Part 4, StatusCode; from memory): bits 31-30 severity, bits 11-10 InfoType
# (01 = DataValue), bit 7 Overflow (the server's queue for this item overflowed and dropped values).
_SEVERITY_SHIFT = 30
_INFOTYPE_DATAVALUE = 0x400
_INFOTYPE_MASK = 0xC00
_OVERFLOW_BIT = 0x80

# Status names that mean: the server does not accept this client, user or certificate.
_REFUSAL_PREFIXES = ("BadUser", "BadIdentity", "BadCertificate", "BadSecurity", "BadNoValidCertificates",
                     "BadApplicationSignatureInvalid", "BadNonceInvalid", "BadTooManySessions",
                     "BadMaxConnectionsReached", "BadLicense", "BadSessionNotActivated")

# Monitored-item results after which we try again without the DataChangeFilter.
_FILTER_REFUSED = {ua.StatusCodes.BadMonitoredItemFilterUnsupported, ua.StatusCodes.BadFilterNotAllowed,
                   ua.StatusCodes.BadMonitoredItemFilterInvalid, ua.StatusCodes.BadDeadbandFilterInvalid}


@dataclass(frozen=True)
class OpcUaSettings:
    """How to reach one OPC UA server and subscribe to it; durations in seconds.

    ``security_policy`` ``"None"`` or ``"Basic256Sha256"`` with ``security_mode`` ``"Sign"`` or
    ``"SignAndEncrypt"``, the client ``certificate`` and ``private_key`` files, optionally the pinned
    ``server_certificate``; ``password`` is a secret reference (``env:NAME``, ``file:/path`` or text),
    resolved at every connect. ``sampling_interval`` None: each tag's own sample period.
    """

    endpoint: str
    security_policy: str = "None"
    security_mode: str = "None"
    certificate: str | None = None
    private_key: str | None = None
    server_certificate: str | None = None
    username: str | None = None
    password: str | None = None
    publishing_interval: float = 0.1
    sampling_interval: float | None = None
    queue_size: int = 10
    timeout: float = 4.0
    watchdog_interval: float = 1.0
    reconnect_min: float = 0.5
    reconnect_max: float = 30.0


@dataclass(frozen=True)
class OpcUaTag:
    """One tag read from the server: its node id (``ns=2;s=...``, ``nsu=<uri>;s=...``) and sample period (s)."""

    address: str | None
    sample_period: float


class OpcUaSessionError(Exception):
    """A connection that could not be set up or did not last; the message is for people and holds no secret."""


def quality_of(status: int) -> int:
    """Quality code 0 good / 1 uncertain / 2 bad from a 32-bit OPC UA StatusCode (its top two bits).

    >>> quality_of(0), quality_of(0x00960000), quality_of(0x40900000), quality_of(0x808C0000), quality_of(0xC0000000)
    (0, 0, 1, 2, 2)
    """
    severity = (int(status) >> _SEVERITY_SHIFT) & 0x3
    return severity if severity < 2 else 2


def status_overflow(status: int) -> bool:
    """True when a DataValue's StatusCode carries the Overflow info bit (values were dropped before it)."""
    return (int(status) & _INFOTYPE_MASK) == _INFOTYPE_DATAVALUE and bool(int(status) & _OVERFLOW_BIT)


class _TagSubscription(Subscription):
    """An asyncua subscription that hands every Publish response, whole, to one callback.

    Overriding ``publish_callback`` (the method asyncua's publish loop calls) avoids asyncua's
    per-notification task or queue: a response with hundreds of changes is one function call.
    """

    def __init__(self, session: Any, params: ua.CreateSubscriptionParameters,
                 on_publish: Callable[[ua.PublishResult], None]) -> None:
        super().__init__(session, params, None, queue_maxsize=1)
        self._on_publish = on_publish

    async def publish_callback(self, publish_result: ua.PublishResult) -> None:
        self.last_publish_at = time.monotonic()
        self._on_publish(publish_result)


# --- client set-up shared by the connector and browse() ---------------------------------------


def _load_certificate(path: str) -> x509.Certificate:
    data = Path(path).read_bytes()
    if data.lstrip().startswith(b"-----BEGIN"):
        return x509.load_pem_x509_certificate(data)
    return x509.load_der_x509_certificate(data)


def _certificate_label(cert: x509.Certificate | None, path: str | None) -> str:
    if cert is not None:
        cn = cert.subject.get_attributes_for_oid(NameOID.COMMON_NAME)
        if cn:
            return str(cn[0].value)
    return Path(path).name if path else "?"


def _certificate_uri(cert: x509.Certificate) -> str | None:
    """The application URI of an OPC UA application certificate (its URI SubjectAltName)."""
    try:
        san = cert.extensions.get_extension_for_class(x509.SubjectAlternativeName).value
    except x509.ExtensionNotFound:
        return None
    uris = san.get_values_for_type(x509.UniformResourceIdentifier)
    return uris[0] if uris else None


class _ClientSetup:
    """Builds a configured asyncua Client for one connection and explains its failures in words."""

    def __init__(self, spec: OpcUaSettings, password: str | None) -> None:
        self.spec, self.password = spec, password
        self.cert: x509.Certificate | None = None

    async def client(self) -> Client:
        spec = self.spec
        client = Client(spec.endpoint, timeout=spec.timeout, watchdog_intervall=spec.watchdog_interval)
        client.name = client.description = "spanwatch"
        client.application_uri = "urn:spanwatch:client"
        client.product_uri = "urn:spanwatch"
        client.session_timeout = SESSION_TIMEOUT_MS
        if spec.username:
            client.set_user(spec.username)
            if self.password is not None:
                client.set_password(self.password)
        if spec.security_policy != "None":
            assert spec.certificate and spec.private_key  # the schema requires them with a policy
            for what, path in (("certificate", spec.certificate), ("private_key", spec.private_key),
                               ("server_certificate", spec.server_certificate)):
                if path and not Path(path).is_file():
                    raise OpcUaSessionError(f"{what} file not found: {path}")
            try:
                self.cert = _load_certificate(spec.certificate)
            except ValueError as exc:
                raise OpcUaSessionError(f"certificate file {spec.certificate} is not a certificate: {exc}") from None
            uri = _certificate_uri(self.cert)
            if uri:
                client.application_uri = uri  # servers check it against the certificate
            mode = (ua.MessageSecurityMode.Sign if spec.security_mode == "Sign"
                    else ua.MessageSecurityMode.SignAndEncrypt)
            if spec.server_certificate is None:
                log.info("%s: no server_certificate configured: the server's certificate is taken from its "
                         "endpoint description without verification", redact_url(spec.endpoint))
            await client.set_security(SecurityPolicyBasic256Sha256, certificate=spec.certificate,
                                      private_key=spec.private_key, server_certificate=spec.server_certificate,
                                      mode=mode)
        return client

    def who(self) -> str:
        parts = [f"user '{self.spec.username}'" if self.spec.username else "anonymous"]
        if self.spec.security_policy != "None":
            parts.append(f"certificate '{_certificate_label(self.cert, self.spec.certificate)}'")
        return ", ".join(parts)

    def describe(self, exc: BaseException, phase: str) -> str:
        """One line for people: what failed, with the OPC UA status name, never the password."""
        spec = self.spec
        ep = redact_url(spec.endpoint)
        if isinstance(exc, OpcUaSessionError):
            text = str(exc)
        elif isinstance(exc, ua.UaStatusCodeError):
            name = ua.StatusCode(exc.code).name
            if name.startswith(_REFUSAL_PREFIXES):
                text = f"server refused the session: {name} ({self.who()})"
            else:
                text = f"{phase} failed: {name}"
        elif isinstance(exc, ConnectionRefusedError):
            text = f"cannot reach {ep}: connection refused"
        elif isinstance(exc, TimeoutError | asyncio.TimeoutError):
            text = f"no answer from {ep} within {spec.timeout:g} s ({phase})"
        elif isinstance(exc, OSError) and not isinstance(exc, ConnectionError):
            text = f"cannot reach {ep}: {exc.strerror or exc}"
        elif isinstance(exc, ConnectionError):
            text = f"connection to {ep} closed during {phase}" + (f": {exc}" if str(exc) else "")
        elif isinstance(exc, ua.UaError) and "No matching endpoints" in str(exc):
            text = (f"server offers no endpoint with security {spec.security_policy} {spec.security_mode} "
                    f"({phase})")
        elif isinstance(exc, ua.UaError) and "certificate mismatch" in str(exc).lower():
            text = (f"server refused: its certificate does not match server_certificate "
                    f"{spec.server_certificate}")
        else:
            text = f"{phase} failed: {type(exc).__name__}: {exc}"
        return redact(text, self.password)[:300]


def _parse_address(address: str, namespaces: list[str]) -> ua.NodeId:
    """A node id from ``ns=..;s=..``, ``i=..``, or ``nsu=<uri>;s=..`` (resolved against the server's namespaces)."""
    node = ua.NodeId.from_string(address)
    uri = getattr(node, "NamespaceUri", None)
    if uri:
        if uri not in namespaces:
            raise KeyError(f"namespace {uri!r} is not on the server")
        return ua.NodeId(node.Identifier, namespaces.index(uri), node.NodeIdType)
    return ua.NodeId(node.Identifier, node.NamespaceIndex, node.NodeIdType)


# --- the connector -----------------------------------------------------------------------------


class OpcUaConnector(LiveConnector):
    """Subscribe to the tags of one OPC UA server and hand their samples to ``sink`` (see the module docstring).

    ``tags`` are the tags of this source by name; the batches' ``tags`` tuple is their
    names in that order. Run it with ``await connector.run()`` (or as a task) and end it with
    ``await connector.stop()``.
    """

    kind = "opcua"

    def __init__(self, name: str, spec: OpcUaSettings, tags: Mapping[str, OpcUaTag],
                 sink: Callable[[SampleBatch], None], *, max_batch: int = 20_000) -> None:
        super().__init__(name, sink, reconnect_min=spec.reconnect_min, reconnect_max=spec.reconnect_max)
        self.spec = spec
        self.tag_names: tuple[str, ...] = tuple(tags)
        self.addresses: tuple[str | None, ...] = tuple(t.address for t in tags.values())
        self.sampling: tuple[float, ...] = tuple(
            spec.sampling_interval if spec.sampling_interval is not None else t.sample_period for t in tags.values())
        self.max_batch = max_batch
        self.repeats_skipped = 0
        self.subscribed: tuple[str, ...] = ()  # tags with a monitored item in the current connection
        self.server_clock_offset: float | None = None  # server clock minus ours, seconds, from the watchdog
        self.connect_seconds: float | None = None  # connect + subscribe time of the last connection
        self.connected_since: float | None = None  # epoch seconds
        self._seq = 0
        self._handles: dict[int, int] = {}
        self._where: tuple[str, ...] = tuple(a or n for n, a in zip(self.tag_names, self.addresses, strict=True))
        self._last: list[tuple[float, float, int] | None] = [None] * len(self.tag_names)
        self._buf_tag: list[int] = []
        self._buf_t: list[float] = []
        self._buf_v: list[float] = []
        self._buf_q: list[int] = []
        self._lost: str | None = None
        self._wake = asyncio.Event()
        self._ratelog = RateLimitedLog(log, LOG_EVERY)
        self._password: str | None = None
        self._setup_problem = ""

    async def stop(self) -> None:
        """Ask :meth:`run` to end: the subscription is deleted and the session closed."""
        await super().stop()
        self._wake.set()

    # --- one connection ------------------------------------------------------------------------

    async def _session(self) -> None:
        spec = self.spec
        self._lost = None
        self._wake.clear()
        try:
            self._password = resolve_secret(spec.password)
        except SecretError as exc:
            raise OpcUaSessionError(f"cannot resolve the password: {exc}") from None
        setup = _ClientSetup(spec, self._password)
        started = time.monotonic()
        client: Client | None = None
        phase = "connect"
        opened = False
        try:
            try:
                client = await setup.client()
                client.connection_lost_callback = self._on_connection_lost
                await client.connect()
                opened = True
                phase = "subscribe"
                sub, keepalive = await self._subscribe(client)
            except asyncio.CancelledError:
                raise
            except Exception as exc:
                raise OpcUaSessionError(setup.describe(exc, phase)) from None
            if self._lost is not None:  # lost while subscribing
                raise OpcUaSessionError(self._lost)
            if self._stop.is_set():
                return
            self.connect_seconds = time.monotonic() - started
            self.connected_since = time.time()
            self.state = "connected"
            log.info("%s: connected to %s, %d of %d tag(s) subscribed in %.2f s", self.name,
                     redact_url(spec.endpoint), len(self.subscribed), len(self.tag_names), self.connect_seconds)
            await self._supervise(client, sub, keepalive, setup)
        finally:
            self._flush()
            if self.state == "connected":
                self.state = "reconnecting"
            self.subscribed = ()
            if client is not None:
                await self._teardown(client, opened=opened)

    async def _on_connection_lost(self, exc: Exception) -> None:
        """asyncua's supervisor saw the transport close or its ServerState probe fail."""
        if isinstance(exc, TimeoutError | asyncio.TimeoutError):
            why = f"no answer to the server-state probe within {self.spec.watchdog_interval:g} s"
        elif isinstance(exc, ua.UaStatusCodeError):
            why = f"server-state probe refused: {ua.StatusCode(exc.code).name}"
        else:
            why = f"transport closed ({type(exc).__name__}{': ' + str(exc) if str(exc) else ''})"
        self._mark_lost(f"connection lost: {why}")

    def _mark_lost(self, reason: str) -> None:
        if self._lost is None:
            self._lost = reason
            self.stats.last_error = redact(reason, self._password)[:300]
            if self.state == "connected":
                self.state = "reconnecting"
        self._wake.set()

    async def _subscribe(self, client: Client) -> tuple[_TagSubscription, float]:
        """Create the subscription and one monitored item per tag; returns it and its keep-alive period (s)."""
        spec = self.spec
        publishing_ms = spec.publishing_interval * 1000.0
        keepalive = max(1, math.ceil(max(1.0, spec.watchdog_interval) / spec.publishing_interval))
        params = ua.CreateSubscriptionParameters(
            RequestedPublishingInterval=publishing_ms, RequestedLifetimeCount=30 * keepalive,
            RequestedMaxKeepAliveCount=keepalive, MaxNotificationsPerPublish=0, PublishingEnabled=True, Priority=0)
        sub = _TagSubscription(client.uaclient.session, params, self._on_publish)
        result = await sub.init()
        namespaces = await client.get_namespace_array()
        self._setup_problem = ""
        requests: dict[int, ua.MonitoredItemCreateRequest] = {}
        for i, address in enumerate(self.addresses):
            if not address:
                self._bad(i, "no address configured", once=True)
                continue
            try:
                node = _parse_address(address, namespaces)
            except (ua.UaStringParsingError, ValueError, KeyError) as exc:
                self._bad(i, f"invalid node id ({exc})", once=True)
                continue
            requests[i] = self._item_request(i, node, with_filter=True)
        self._handles = {}
        ok = await self._create_items(sub, requests, retry_without_filter=True)
        self.subscribed = tuple(self.tag_names[i] for i in sorted(ok))
        if not ok:
            raise OpcUaSessionError(f"none of the {len(self.tag_names)} tag(s) could be subscribed (first: "
                                    f"{self._setup_problem or 'no tags configured'})")
        revised_s = (result.RevisedPublishingInterval or publishing_ms) / 1000.0
        return sub, revised_s * max(1, int(result.RevisedMaxKeepAliveCount or keepalive))

    def _item_request(self, i: int, node: ua.NodeId, *, with_filter: bool) -> ua.MonitoredItemCreateRequest:
        mparams = ua.MonitoringParameters()
        mparams.ClientHandle = CLIENT_HANDLE_BASE + i
        mparams.SamplingInterval = self.sampling[i] * 1000.0
        mparams.QueueSize = self.spec.queue_size
        mparams.DiscardOldest = True
        if with_filter:
            mparams.Filter = ua.DataChangeFilter(Trigger=ua.DataChangeTrigger.StatusValueTimestamp,
                                                 DeadbandType=ua.DeadbandType.None_, DeadbandValue=0.0)
        rv = ua.ReadValueId()
        rv.NodeId = node
        rv.AttributeId = ua.AttributeIds.Value
        mir = ua.MonitoredItemCreateRequest()
        mir.ItemToMonitor = rv
        mir.MonitoringMode = ua.MonitoringMode.Reporting
        mir.RequestedParameters = mparams
        return mir

    async def _create_items(self, sub: _TagSubscription, requests: dict[int, ua.MonitoredItemCreateRequest],
                            retry_without_filter: bool) -> set[int]:
        ok: set[int] = set()
        retry: dict[int, ua.MonitoredItemCreateRequest] = {}
        order = list(requests)
        for start in range(0, len(order), 500):
            chunk = order[start:start + 500]
            for i in chunk:  # register before the call: the first notifications may beat the response
                self._handles[CLIENT_HANDLE_BASE + i] = i
            results = await sub.create_monitored_items([requests[i] for i in chunk])
            for i, res in zip(chunk, results, strict=True):
                if not isinstance(res, ua.StatusCode):
                    ok.add(i)
                    continue
                self._handles.pop(CLIENT_HANDLE_BASE + i, None)
                if retry_without_filter and res.value in _FILTER_REFUSED:
                    retry[i] = self._item_request(i, requests[i].ItemToMonitor.NodeId, with_filter=False)
                elif res.value == ua.StatusCodes.BadNodeIdUnknown:
                    self._bad(i, "unknown node (BadNodeIdUnknown)", once=True)
                else:
                    self._bad(i, f"cannot monitor ({res.name})", once=True)
        if retry:
            log.info("%s: the server refused the data-change filter on %d item(s); subscribed without it (a "
                     "repeated value with a new timestamp is then not reported)", self.name, len(retry))
            ok |= await self._create_items(sub, retry, retry_without_filter=False)
        return ok

    async def _supervise(self, client: Client, sub: _TagSubscription, keepalive: float,
                         setup: _ClientSetup) -> None:
        """Wait for stop or loss; every watchdog interval read the server clock and check the subscription."""
        spec = self.spec
        clock = client.get_node(ua.NodeId(ua.ObjectIds.Server_ServerStatus_CurrentTime))
        stale_after = max(3.0 * keepalive, 2.0 * spec.watchdog_interval, 2.0)
        sub.last_publish_at = time.monotonic()
        while True:
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._wake.wait(), timeout=spec.watchdog_interval)
            if self._stop.is_set():
                return
            if self._lost is None:
                try:
                    server_now = await asyncio.wait_for(clock.read_value(), timeout=spec.timeout)
                    if hasattr(server_now, "timestamp"):
                        self.server_clock_offset = server_now.timestamp() - time.time()
                except asyncio.CancelledError:
                    raise
                except Exception as exc:
                    self._mark_lost(f"watchdog read of the server clock failed: {setup.describe(exc, 'watchdog')}")
            if self._lost is None and sub.last_publish_at is not None and \
                    time.monotonic() - sub.last_publish_at > stale_after:
                self._mark_lost(f"subscription silent for more than {stale_after:.1f} s (no data, no keep-alive)")
            if self._lost is not None:
                log.warning("%s: %s; reconnecting", self.name, self.stats.last_error)
                return

    async def _teardown(self, client: Client, *, opened: bool) -> None:
        """Close session, channel and socket, bounded in time; never raises. asyncua's own tasks end here."""
        try:
            if opened and client.uaclient.state is UaClientState.CONNECTED:
                # orderly: the server deletes our subscription with the session
                await asyncio.wait_for(client.disconnect(), timeout=self.spec.timeout)
            elif opened:  # transport gone: only stop asyncua's supervisor, renew and watchdog tasks
                await asyncio.wait_for(client.close_session(), timeout=1.0)
        except asyncio.CancelledError:
            raise
        except Exception:  # the connection is gone either way
            log.debug("%s: disconnect raised", self.name, exc_info=True)
        finally:
            client.uaclient.request_disconnect()
            client.disconnect_socket()

    # --- notifications -----------------------------------------------------------------------------

    def _on_publish(self, result: ua.PublishResult) -> None:
        """One Publish response: every data change becomes a sample; the batch goes to ``sink``."""
        arrival = time.time()
        for data in result.NotificationMessage.NotificationData or ():
            if isinstance(data, ua.DataChangeNotification):
                for item in data.MonitoredItems:
                    self._take(item.ClientHandle, item.Value, arrival)
                    if len(self._buf_t) >= self.max_batch:
                        self._flush()
            elif isinstance(data, ua.StatusChangeNotification):
                status = data.Status.value if data.Status is not None else 0
                if quality_of(status) == 2:
                    self._mark_lost(f"subscription ended by the server ({ua.StatusCode(status).name})")
        self._flush()

    def _take(self, handle: int, dv: ua.DataValue | None, arrival: float) -> None:
        i = self._handles.get(handle)
        if i is None:
            self.stats.count_malformed(f"client handle {handle}", "notification for an unknown item")
            self._ratelog("unknown item", f"{self.name}: notification for an unknown monitored item {handle}")
            return
        if dv is None:
            dv = ua.DataValue(StatusCode=ua.StatusCode(ua.StatusCodes.BadNoData))
        status = dv.StatusCode.value if dv.StatusCode is not None else 0
        quality = quality_of(status)
        if status_overflow(status):
            self.stats.overflow += 1
        # time: source, else server (counted), else arrival (counted)
        t = _epoch(dv.SourceTimestamp)
        if t is None:
            self.stats.server_timestamps += 1
            t = _epoch(dv.ServerTimestamp)
            if t is None:
                t = arrival
                self._ratelog("no timestamp", f"{self.name}: {self._where[i]}: value without any timestamp; "
                                              "using the arrival time")
        raw = dv.Value.Value if dv.Value is not None else None
        value = math.nan
        if isinstance(raw, bool):
            value = 1.0 if raw else 0.0
        elif isinstance(raw, int | float):
            try:
                value = float(raw)
            except OverflowError:
                value = math.inf
            if not math.isfinite(value):
                self._bad(i, "non-finite value")
                value, quality = math.nan, 2
        elif raw is None:
            if quality != 2:  # a good or uncertain value must have one
                self._bad(i, "no value")
                quality = 2
        else:
            vtype = dv.Value.VariantType.name if dv.Value is not None else type(raw).__name__
            self._bad(i, f"non-numeric value ({vtype})")
            quality = 2
        if quality == 2:
            value = math.nan
        last = self._last[i]
        if last is not None and last[0] == t and last[2] == quality and (
                last[1] == value or (math.isnan(last[1]) and math.isnan(value))):
            self.repeats_skipped += 1
            return
        self._last[i] = (t, value, quality)
        self._buf_tag.append(i)
        self._buf_t.append(t)
        self._buf_v.append(value)
        self._buf_q.append(quality)

    def _bad(self, i: int, reason: str, *, once: bool = False) -> None:
        """Count (and log, rate-limited) an unusable notification or tag of tag ``i``."""
        self.stats.count_malformed(self._where[i], reason)
        if once and not self._setup_problem:
            self._setup_problem = f"{self._where[i]}: {reason}"
        self._ratelog(reason if not once else f"setup: {reason}",
                      f"{self.name}: tag {self.tag_names[i]} ({self._where[i]}): {reason}")

    def _flush(self) -> None:
        n = len(self._buf_t)
        if n == 0:
            return
        batch = SampleBatch(self.tag_names, np.asarray(self._buf_tag, np.int32), np.asarray(self._buf_t, np.float64),
                            np.asarray(self._buf_v, np.float64), np.asarray(self._buf_q, np.int8),
                            np.arange(self._seq, self._seq + n, dtype=np.int64))
        self._seq += n
        self._buf_tag, self._buf_t, self._buf_v, self._buf_q = [], [], [], []
        self.stats.samples_in += n
        try:
            self.sink(batch)
        except Exception:
            log.exception("%s: the sink raised on a batch of %d sample(s); they are lost", self.name, n)


def _epoch(stamp: Any) -> float | None:
    """Epoch seconds of an OPC UA DateTime, None when absent (or the null/min DateTime, before 1970)."""
    if stamp is None:
        return None
    try:
        t = stamp.timestamp()
    except (AttributeError, ValueError, OverflowError, OSError):
        return None
    return t if t > 0.0 and math.isfinite(t) else None


# --- browse ------------------------------------------------------------------------------------


async def browse(endpoint: str, node: str | None = None, depth: int = 3,
                 settings: OpcUaSettings | None = None) -> list[dict[str, Any]]:
    """List the variables under ``node`` (default: the Objects folder), ``depth`` levels down.

    ``settings`` give the security, user and timeout (default: anonymous, no security; their
    ``endpoint`` is replaced by ``endpoint``). Standard
    nodes of namespace 0 (the Server object and its diagnostics) are skipped. Each row: ``node_id`` (what goes into a
    tag's ``address``), ``path`` (browse names from the start node, ``/``-separated), ``data_type``,
    ``value`` (the current value, or None), ``status`` (its StatusCode name) and ``numeric``
    (whether spanwatch can use it as a tag).
    """
    spec = replace(settings, endpoint=endpoint) if settings is not None else OpcUaSettings(endpoint)
    if node:
        try:
            ua.NodeId.from_string(node)
        except Exception:
            raise OpcUaSessionError(f"expected a node id such as ns=2;s=Q2.S5.Tension, i=85 or nsu=URI;s=NAME, "
                                    f"got {node!r}") from None
    try:
        password = resolve_secret(spec.password)
    except SecretError as exc:
        raise OpcUaSessionError(f"cannot resolve the password: {exc}") from None
    setup = _ClientSetup(spec, password)
    client: Client | None = None
    phase = "connect"
    try:
        client = await setup.client()
        await client.connect()
        phase = "browse"
        start = client.get_node(node) if node else client.nodes.objects
        if node:
            try:
                await start.read_node_class()
            except ua.UaStatusCodeError as exc:
                if exc.code == ua.StatusCodes.BadNodeIdUnknown:
                    raise OpcUaSessionError(f"node {node} does not exist on {redact_url(endpoint)}; browse without a "
                                            "start node to list the server's variables") from None
                raise
        return await _walk(client, start, depth)
    except Exception as exc:
        raise OpcUaSessionError(setup.describe(exc, phase)) from None
    finally:
        if client is not None:
            with contextlib.suppress(Exception):
                await asyncio.wait_for(client.disconnect(), timeout=spec.timeout)
            client.uaclient.request_disconnect()
            client.disconnect_socket()


async def _walk(client: Client, start: Any, depth: int) -> list[dict[str, Any]]:
    rows: list[dict[str, Any]] = []
    frontier: list[tuple[Any, str]] = [(start, "")]
    seen: set[str] = set()
    dtype_names: dict[str, str] = {}
    for _ in range(max(0, depth)):
        next_frontier: list[tuple[Any, str]] = []
        variables: list[tuple[Any, str]] = []
        for parent, path in frontier:
            for ref in await parent.get_children_descriptions():
                nid = ref.NodeId
                key = nid.to_string()
                if nid.NamespaceIndex == 0 or key in seen:
                    continue
                seen.add(key)
                child = client.get_node(nid)
                child_path = f"{path}/{ref.BrowseName.Name}" if path else ref.BrowseName.Name
                if ref.NodeClass == ua.NodeClass.Variable:
                    variables.append((child, child_path))
                if ref.NodeClass in (ua.NodeClass.Object, ua.NodeClass.Variable):
                    next_frontier.append((child, child_path))
        for start_i in range(0, len(variables), 200):
            chunk = variables[start_i:start_i + 200]
            nodes = [v for v, _ in chunk]
            values = await client.read_attributes(nodes, ua.AttributeIds.Value)
            dtypes = await client.read_attributes(nodes, ua.AttributeIds.DataType)
            for (v, path), dv, dt in zip(chunk, values, dtypes, strict=True):
                dtype = await _dtype_name(client, dt.Value.Value if dt.Value is not None else None, dtype_names)
                raw = dv.Value.Value if dv.Value is not None else None
                numeric = isinstance(raw, bool | int | float) or (raw is None and dtype in _NUMERIC_TYPES)
                rows.append({"node_id": v.nodeid.to_string(), "path": path, "data_type": dtype, "value": raw,
                             "status": dv.StatusCode.name if dv.StatusCode is not None else "Good",
                             "numeric": numeric})
        frontier = next_frontier
    return rows


_NUMERIC_TYPES = {"Boolean", "SByte", "Byte", "Int16", "UInt16", "Int32", "UInt32", "Int64", "UInt64", "Float",
                  "Double", "Number", "Integer", "UInteger"}


async def _dtype_name(client: Client, dtype: Any, cache: dict[str, str]) -> str:
    if not isinstance(dtype, ua.NodeId):
        return "?"
    if dtype.NamespaceIndex == 0 and isinstance(dtype.Identifier, int) and dtype.Identifier in ua.ObjectIdNames:
        return ua.ObjectIdNames[dtype.Identifier]
    key = dtype.to_string()
    if key not in cache:
        try:
            cache[key] = (await client.get_node(dtype).read_browse_name()).Name
        except Exception:
            cache[key] = key
    return cache[key]
