"""The one place a paho client is made and connected, and the network thread that drives it.

**Session.** :func:`new_client` builds a paho-mqtt 2.x client for :class:`MqttSettings`:
MQTT v5 (or 3.1.1), the client id, user name and password, TLS (the server verified against
``ca_file``, the client certificate presented if given), the connect timeout, and stores the
connection parameters (keepalive; for v5 Clean Start and a Session Expiry Interval of
``session_expiry``). With Clean Start off (``clean_start = false``, the default) and a fixed
client id the broker keeps the subscriptions and queues QoS 1 messages while the client is
away: a short disconnection, or a restart of the daemon, loses nothing the broker accepted
(within the broker's own queue limit, mosquitto's ``max_queued_messages``). In MQTT 3.1.1 a
persistent session is Clean Session off; it has no session expiry and no retain handling.
The client then connects with ``reconnect()`` (blocking: on the connector's network thread)
or ``loop_start()`` (paho's own thread, as the alarm publisher does).

**Threads.** :class:`NetworkThread` drives one connection's client through paho's
external-loop API (``select``, ``loop_read``, ``loop_write``, ``loop_misc``); every paho call
of that connection happens on it, including the callbacks (``on_message`` among them).

**Secrets.** The password given here is the resolved one; callers resolve it (``env:NAME``,
``file:/path``) at each connection and redact it from every error text with
:func:`spanwatch.connectors.secrets.redact`; it never reaches a log line.
"""

from __future__ import annotations

import contextlib
import logging
import select
import socket
import ssl
import threading
from collections.abc import Callable

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode
from spanwatch.connectors.mqtt.settings import MqttSettings
from spanwatch.connectors.secrets import SecretError, redact, resolve_secret

log = logging.getLogger("spanwatch.mqtt")

AUTH_CODES = {0x86, 0x87, 0x8C}  # CONNACK: bad user name or password, not authorized, bad authentication method
MAX_SESSION_EXPIRY = 0xFFFFFFFF  # MQTT v5: a four-byte integer, seconds
FIRST_ONLY = mqtt.MQTT_CLEAN_START_FIRST_ONLY


class MqttConnectionError(ConnectionError):
    """A connection that failed or ended; the message is for people and never holds a secret."""


def describe(exc: BaseException) -> str:
    """``Type: message`` of an exception (the type once), for error texts."""
    text = str(exc) or type(exc).__name__
    return text if type(exc).__name__ in text else f"{type(exc).__name__}: {text}"


def refusal(settings: MqttSettings, reason_code: ReasonCode) -> str:
    """What to say when the broker refused the connection (CONNACK with a failure reason code)."""
    hint = " (check username and password)" if reason_code.value in AUTH_CODES else ""
    return f"broker {settings.host}:{settings.port} refused the connection: {reason_code}{hint}"


def new_client(settings: MqttSettings, client_id: str, password: str | None, *, clean: bool | int,
               reconnect_on_failure: bool, max_queued: int = 0) -> mqtt.Client:
    """A paho client for ``settings`` with its connection parameters stored; ``reconnect()`` or ``loop_start()``
    connects it.

    ``clean``: start this client's session clean (True), resume it (False), or with v5 clean
    on the first connection only and resume on paho's own reconnections (:data:`FIRST_ONLY`;
    MQTT 3.1.1 cannot say that and resumes). ``reconnect_on_failure``: whether paho's own
    loop reconnects. ``max_queued``: how many outgoing messages paho keeps while it cannot send
    them (0: no limit). Raises what paho raises for TLS files that cannot be read.
    """
    v5 = settings.protocol == "5"
    protocol = mqtt.MQTTv5 if v5 else mqtt.MQTTv311
    session = {} if v5 else {"clean_session": clean is True}  # 3.1.1: Clean Session is fixed with the client
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=protocol,
                         reconnect_on_failure=reconnect_on_failure, **session)
    client.connect_timeout = max(1.0, min(10.0, settings.keepalive))
    client.max_queued_messages_set(max_queued)  # paho takes it only before connect_async
    if settings.username is not None or password is not None:
        client.username_pw_set(settings.username or "", password)
    if settings.tls:
        client.tls_set(ca_certs=settings.ca_file, certfile=settings.cert_file, keyfile=settings.key_file,
                       cert_reqs=ssl.CERT_REQUIRED, tls_version=ssl.PROTOCOL_TLS_CLIENT)
    props = None
    if v5:
        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = int(min(settings.session_expiry, MAX_SESSION_EXPIRY))
    client.connect_async(settings.host, settings.port, max(1, round(settings.keepalive)),
                         clean_start=clean if v5 else FIRST_ONLY, properties=props)
    return client


def background_client(settings: MqttSettings, client_id: str, *, who: str, without: str, clean: bool | int,
                      max_queued: int = 0) -> tuple[mqtt.Client | None, str, tuple[str | None, ...]]:
    """A client that paho's own loop keeps connected (the alarm publisher, the action listener), or None.

    Returns ``(client, error, secrets)``: the client (None when its password reference cannot be resolved or its
    TLS files cannot be read: ``error`` says which, once in the log as "``who``: error; ``without``"), and the
    secrets to hide in later messages.
    """
    try:
        password = resolve_secret(settings.password)
    except SecretError as exc:
        error = f"password: {exc}"
        log.error("%s: %s; %s", who, error, without)
        return None, error, (settings.password,)
    secrets = (password, settings.password)
    try:
        client = new_client(settings, client_id, password, clean=clean, reconnect_on_failure=True,
                            max_queued=max_queued)
    except Exception as exc:  # TLS files that cannot be read, ...
        error = redact(f"cannot set up the client: {describe(exc)}", *secrets)
        log.error("%s: %s; %s", who, error, without)
        return None, error, secrets
    client.reconnect_delay_set(settings.reconnect_min, settings.reconnect_max)  # type: ignore[arg-type]
    return client, "", secrets


class NetworkThread:
    """The thread that connects one paho client and drives it through paho's external-loop API.

    It connects (TCP, TLS and CONNECT block, so not on the event loop), then runs ``select``
    on the socket and calls ``loop_read`` / ``loop_write`` / ``loop_misc`` (keepalive) until
    the connection ends or :meth:`request_stop`, when it sends DISCONNECT (the broker keeps
    the session). Every call into paho happens on this one thread, so paho needs no locking
    across threads; and unlike ``loop_start`` it does not wake itself through a socket pair
    for every acknowledgement, which roughly doubles the messages per second.

    ``on_failure(text)`` is called when the connection cannot be made or the thread fails;
    ``on_end()`` always, last, when the thread ends. Neither may raise.
    """

    def __init__(self, client: mqtt.Client, name: str, on_failure: Callable[[str], None],
                 on_end: Callable[[], None]) -> None:
        self.client = client
        self.name = name
        self.on_failure = on_failure
        self.on_end = on_end
        self.stopping = threading.Event()
        self._wake_r, self._wake_w = socket.socketpair()
        self._wake_r.setblocking(False)
        self.thread = threading.Thread(target=self._main, name=f"spanwatch-mqtt-{name}", daemon=True)

    def request_stop(self) -> None:
        if not self.stopping.is_set():
            self.stopping.set()
            with contextlib.suppress(OSError):
                self._wake_w.send(b"x")

    def _main(self) -> None:
        client = self.client
        try:
            try:
                client.reconnect()  # with the parameters new_client stored
            except Exception as exc:
                self.on_failure(f"cannot connect to {client.host}:{client.port}: {describe(exc)}")
                return
            self._loop(client)
        except Exception as exc:  # a bug here must end the session, not the daemon
            log.exception("mqtt %s: network thread failed", self.name)
            self.on_failure(describe(exc))
        finally:
            self.on_end()
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
