"""The plain parameters of an MQTT source and alarm publisher: what an application fills in.

:class:`MqttSettings` holds, in SI (seconds, bytes), everything the connector and the
publisher need: the broker and how to reach it (TLS files, user name, the password as a
secret reference ``env:NAME`` / ``file:/path`` resolved at each connection), the session
(protocol, client id, Clean Start, Session Expiry Interval, keepalive), what to subscribe
to and how topics map to tags (:class:`TopicRule`), how payloads are decoded, the queue
between the network thread and the event loop, the alarm topics and the reconnection
backoff. It imports nothing from the application; an application converts its own
configuration into it (spanwatch's own config module does so with its ``mqtt_settings``).
"""

from __future__ import annotations

from dataclasses import dataclass

# The values a field with a fixed set of choices may take.
CHOICES: dict[str, tuple[str, ...]] = {
    "protocol": ("5", "3.1.1"),
    "payload": ("number", "json"),
    "time_unit": ("s", "ms", "iso"),
    "overflow": ("block", "drop_oldest"),
}


@dataclass(frozen=True)
class TopicRule:
    """Topics matching the MQTT filter ``pattern`` belong to the tag named by ``tag``.

    ``tag`` is a template: ``{1}``, ``{2}`` ... are the levels the filter's wildcards
    matched, in order (``quillmere/q2/+/+`` with ``q2.{1}.{2}`` maps ``quillmere/q2/s5/tension``
    to ``q2.s5.tension``). Checked by :func:`spanwatch.connectors.mqtt.topics.check_rule`.
    """

    pattern: str
    tag: str


@dataclass(frozen=True)
class MqttSettings:
    """One broker connection: the source's subscriptions, payload decoding and queue, and the alarm topics.

    Times are seconds. ``password`` is a secret reference (``env:NAME``, ``file:/path``, or
    inline), resolved at every connection and never logged. ``subscribe`` empty means: the
    tags' exact topics and the ``topic_map`` filters. ``time_path`` / ``quality_path`` None:
    the arrival time / good quality. ``seq_path``: where a JSON payload carries its publisher's
    sequence number for the topic (None: none), by which lost messages are counted.
    ``alarm_topic`` / ``active_topic`` None: not published.
    """

    host: str = "127.0.0.1"
    port: int = 1883
    client_id: str = "spanwatch"
    tls: bool = False
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    username: str | None = None
    password: str | None = None
    protocol: str = "5"  # "5" or "3.1.1"
    qos: int = 1
    clean_start: bool = False
    session_expiry: float = 3600.0
    keepalive: float = 10.0
    subscribe: tuple[str, ...] = ()
    topic_map: tuple[TopicRule, ...] = ()
    payload: str = "number"  # "number" or "json"
    value_path: str = "value"
    time_path: str | None = "time"
    quality_path: str | None = "quality"
    seq_path: str | None = None
    time_unit: str = "s"  # "s", "ms" (since the epoch) or "iso" (ISO 8601 with a UTC offset)
    max_payload: int = 65536
    queue_size: int = 100_000
    overflow: str = "block"  # "block" or "drop_oldest"
    alarm_topic: str | None = None
    active_topic: str | None = None
    actions_topic: str | None = None  # operators' actions (connectors/mqtt/actions.py); None: not listened to
    reconnect_min: float = 0.5
    reconnect_max: float = 30.0

    def __post_init__(self) -> None:
        for name, allowed in CHOICES.items():
            if getattr(self, name) not in allowed:
                raise ValueError(f"expected {name} one of {', '.join(map(repr, allowed))}, got {getattr(self, name)!r}")
        if self.seq_path is not None and self.payload != "json":
            raise ValueError("expected seq_path only with payload \"json\" (a number payload has no sequence number)")
        object.__setattr__(self, "subscribe", tuple(self.subscribe))  # a list given by the caller becomes a tuple
        object.__setattr__(self, "topic_map", tuple(self.topic_map))
