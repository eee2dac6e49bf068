"""Source kinds: the ``[sources.NAME]`` tables of the config, and how each becomes a live connector.

One registration per kind in :data:`SOURCE_KINDS`: the schema of its config table, the
function that builds the adapter from it (turning the application's config objects into the
adapter's plain parameters), and one line that says where the source is, for
``check-config``. The adapters themselves live in ``connectors/`` and know nothing of the
config. The config's ``Source`` type is the union of the registered schemas.

Adding a source kind: its adapter module in ``connectors/`` (a
:class:`~spanwatch.connectors.live.LiveConnector` taking plain parameters) and one
:class:`SourceKind` entry here with its schema and builder.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import reduce
from operator import or_
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, Literal

from pydantic import AfterValidator, Field, model_validator
from spanwatch.monitor.schema import Duration, PosDuration, PosNumber, Secret, Strict
from spanwatch.rules.samples import SampleBatch

if TYPE_CHECKING:
    from spanwatch.connectors.live import LiveConnector
    from spanwatch.connectors.mqtt.settings import MqttSettings
    from spanwatch.connectors.opcua import OpcUaSettings, OpcUaTag
    from spanwatch.monitor.config import TagSection
    from spanwatch.monitor.line import Line

Sink = Callable[[SampleBatch], None]


# --- the config table of each kind ------------------------------------------------------------


def opc_endpoint(value: str) -> str:
    """An OPC UA endpoint URL ``opc.tcp://HOST[:PORT][/path]``; ValueError (without any password) otherwise."""
    from urllib.parse import urlsplit

    from spanwatch.connectors.secrets import redact_url

    ok = value.startswith("opc.tcp://")
    try:
        url = urlsplit(value)
        ok = ok and bool(url.hostname) and (url.port is None or url.port > 0)
    except ValueError:  # a port that is not a number or beyond 65535
        ok = False
    if not ok:
        raise ValueError(f"expected an endpoint such as \"opc.tcp://10.0.0.5:4840\" (opc.tcp://HOST[:PORT][/path]), "
                         f"got {redact_url(value)!r}")
    return value


class OpcUaSource(Strict):
    """An OPC UA server; tags with ``source = NAME`` give their node id in ``address``."""

    kind: Literal["opcua"]
    endpoint: Annotated[str, AfterValidator(lambda v: opc_endpoint(v))]
    security_policy: Literal["None", "Basic256Sha256"] = "None"
    security_mode: Literal["None", "Sign", "SignAndEncrypt"] = "None"
    certificate: str | None = None
    private_key: str | None = None
    server_certificate: str | None = None
    username: str | None = None
    password: Secret | None = None
    publishing_interval: PosDuration = 0.1
    sampling_interval: Duration | None = None  # default: each tag's sample period
    queue_size: int = Field(default=10, ge=1, le=100_000)
    timeout: PosDuration = 4.0
    watchdog_interval: PosDuration = 1.0
    reconnect_min: PosDuration = 0.5
    reconnect_max: PosDuration = 30.0

    @model_validator(mode="after")
    def _security(self) -> OpcUaSource:
        if (self.security_policy == "None") != (self.security_mode == "None"):
            raise ValueError("expected security_policy and security_mode both \"None\" or both set "
                             f"(got {self.security_policy!r} and {self.security_mode!r})")
        if self.security_policy != "None" and not (self.certificate and self.private_key):
            raise ValueError("expected certificate and private_key files with a security policy")
        return self


class TopicMap(Strict):
    """Map topics matching an MQTT filter to tag names: ``{1}``, ``{2}`` are the wildcard levels."""

    pattern: str
    tag: str

    @model_validator(mode="after")
    def _wildcards(self) -> TopicMap:
        from spanwatch.connectors.mqtt.topics import check_rule

        check_rule(self.pattern, self.tag)  # the MQTT filter rules, and placeholders only for its wildcard levels
        return self


class MqttSource(Strict):
    """An MQTT broker; tags with ``source = NAME`` give their topic in ``address`` (or match ``topic_map``)."""

    kind: Literal["mqtt"]
    host: str = "127.0.0.1"
    port: int = Field(default=1883, ge=1, le=65535)
    client_id: str = "spanwatch"
    tls: bool = False
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    username: str | None = None
    password: Secret | None = None
    protocol: Literal["5", "3.1.1"] = Field(
        default="5", description="MQTT version; 3.1.1 decodes faster in paho but has no session expiry or "
                                 "retain handling")
    qos: int = Field(default=1, ge=0, le=2)
    clean_start: bool = False
    session_expiry: PosDuration = 3600.0
    keepalive: PosDuration = 10.0
    subscribe: list[str] = Field(default_factory=list)
    topic_map: list[TopicMap] = Field(default_factory=list)
    payload: Literal["number", "json"] = "number"
    value_path: str = "value"
    time_path: str | None = "time"
    quality_path: str | None = "quality"
    seq_path: str | None = Field(
        default=None, description="where a JSON payload carries its publisher's sequence number for the topic, e.g. "
                                  "\"seq\": lost messages are counted from its jumps")
    time_unit: Literal["s", "ms", "iso"] = "s"
    max_payload: int = Field(default=65536, ge=16)
    queue_size: int = Field(default=100_000, ge=100)
    overflow: Literal["block", "drop_oldest"] = "block"
    alarm_topic: str | None = None
    active_topic: str | None = None
    actions_topic: str | None = Field(
        default=None, description="where operators' panels publish actions (ack, shelve, ...) as JSON; the broker's "
                                  "access control must allow only them to publish there")
    reconnect_min: PosDuration = 0.5
    reconnect_max: PosDuration = 30.0

    @model_validator(mode="after")
    def _own_topics(self) -> MqttSource:
        """The alarm topics are topic names outside what this source reads: spanwatch would read its own
        alarms back (counted as unknown topics, or worse, as a tag a topic_map pattern makes of them)."""
        from spanwatch.connectors.mqtt.topics import check_filter, check_subscription, match_filter

        for key in ("alarm_topic", "active_topic", "actions_topic"):
            topic = getattr(self, key)
            if topic is None:
                continue
            if not topic or "+" in topic or "#" in topic or "\x00" in topic:
                raise ValueError(f"expected {key} to be a topic name (no + or # wildcards), got {topic!r}")
            readers = [(f"subscribe[{i}]", f, check_subscription(f)) for i, f in enumerate(self.subscribe)]
            readers += [(f"topic_map[{i}].pattern", r.pattern, check_filter(r.pattern))
                        for i, r in enumerate(self.topic_map)]
            for where, pattern, levels in readers:
                if match_filter(levels, topic) is not None:
                    raise ValueError(f"expected {key} outside the topics this source reads: {topic!r} matches "
                                     f"{where} {pattern!r}, so spanwatch would read its own alarms back; publish "
                                     f"them under another prefix (e.g. \"spanwatch/...\") or narrow {where}")
        return self

    @model_validator(mode="after")
    def _seq_path(self) -> MqttSource:
        if self.seq_path is not None and self.payload != "json":
            raise ValueError("expected seq_path only with payload = \"json\" (a number payload has no sequence "
                             "number)")
        return self


def mqtt_settings(spec: MqttSource) -> MqttSettings:
    """The MQTT adapter's plain parameters from a ``[sources.NAME]`` table with ``kind = "mqtt"`` (already SI)."""
    from spanwatch.connectors.mqtt.settings import MqttSettings, TopicRule

    fields = spec.model_dump(exclude={"kind", "topic_map"})
    return MqttSettings(**fields, topic_map=tuple(TopicRule(tm.pattern, tm.tag) for tm in spec.topic_map))


class SimulatedSource(Strict):
    """The simulated line of a scenario file, in process (demo, tests)."""

    kind: Literal["simulated"]
    scenario: str
    speedup: PosNumber = 1.0


# --- the registry ----------------------------------------------------------------------------


@dataclass(frozen=True)
class SourceKind:
    """One kind of live source: its config table, how to build its connector, where it is (one line)."""

    kind: str
    schema: type[Strict]
    connect: Callable[[str, Any, Line, Sink], LiveConnector]
    where: Callable[[Any], str]


def opcua_settings(spec: OpcUaSource) -> OpcUaSettings:
    """The OPC UA adapter's settings from a ``kind = "opcua"`` table (durations already in seconds)."""
    from spanwatch.connectors.opcua import OpcUaSettings

    return OpcUaSettings(**spec.model_dump(exclude={"kind"}))


def opcua_tags(tags: dict[str, TagSection]) -> dict[str, OpcUaTag]:
    """Each tag's node id and sample period, for the OPC UA adapter."""
    from spanwatch.connectors.opcua import OpcUaTag

    return {name: OpcUaTag(t.address, t.sample_period) for name, t in tags.items()}


def _opcua(name: str, spec: OpcUaSource, line: Line, sink: Sink) -> LiveConnector:
    from spanwatch.connectors.opcua import OpcUaConnector

    return OpcUaConnector(name, opcua_settings(spec), opcua_tags(line.tags_of_source(name)), sink)


def _mqtt(name: str, spec: MqttSource, line: Line, sink: Sink) -> LiveConnector:
    from spanwatch.connectors.mqtt import MqttConnector
    from spanwatch.monitor.config import mqtt_settings

    mine = line.tags_of_source(name)
    tags = {n: t.address for n, t in mine.items()}
    # time gaps count as lost messages only for tags whose sample period the config states
    periods = {n: t.sample_period for n, t in mine.items() if "sample_period" in t.model_fields_set}
    return MqttConnector(name, mqtt_settings(spec), tags, sink, periods=periods)


def _simulated(name: str, spec: SimulatedSource, line: Line, sink: Sink) -> LiveConnector:
    from spanwatch.monitor.simsource import SimulatedConnector

    scenario = Path(spec.scenario)
    if not scenario.is_absolute():
        scenario = Path(line.file).resolve().parent / scenario
    return SimulatedConnector(name, line, scenario, sink, speedup=spec.speedup)


def _shown_url(url: str) -> str:
    from spanwatch.connectors.secrets import redact_url

    return redact_url(url)


SOURCE_KINDS: dict[str, SourceKind] = {
    k.kind: k for k in (
        SourceKind("opcua", OpcUaSource, _opcua,
                   lambda s: f"{_shown_url(s.endpoint)} ({s.security_policy}/{s.security_mode})"),
        SourceKind("mqtt", MqttSource, _mqtt, lambda s: f"{s.host}:{s.port} qos {s.qos}{' tls' if s.tls else ''}"),
        SourceKind("simulated", SimulatedSource, _simulated, lambda s: f"scenario {s.scenario}"),
    )
}

# The config's [sources.NAME] table: one of the registered schemas, chosen by its ``kind``.
Source = Annotated[reduce(or_, (k.schema for k in SOURCE_KINDS.values())), Field(discriminator="kind")]


def build_connectors(line: Line, sink: Sink) -> list[LiveConnector]:
    """One connector per configured source."""
    return [SOURCE_KINDS[spec.kind].connect(name, spec, line, sink) for name, spec in line.config.sources.items()]
