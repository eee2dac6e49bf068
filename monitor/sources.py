"""Source kinds: how a ``[sources.NAME]`` table of the config becomes a live connector.

One registration per kind in :data:`SOURCE_KINDS`: the function that builds the adapter from
the config (turning the application's config objects into the adapter's plain parameters) and
one line that says where the source is, for ``check-config``. The adapters themselves live in
``connectors/`` and know nothing of the config; the config schema of each kind is in
:mod:`spanwatch.monitor.config` (``Source``).

Adding a source kind: its adapter module in ``connectors/`` (a
:class:`~spanwatch.connectors.live.LiveConnector`), its schema class in the ``Source`` union,
and one :class:`SourceKind` entry here.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from spanwatch.rules.samples import SampleBatch

if TYPE_CHECKING:
    from spanwatch.connectors.live import LiveConnector
    from spanwatch.connectors.opcua import OpcUaSettings, OpcUaTag
    from spanwatch.monitor.config import MqttSource, OpcUaSource, TagSection
    from spanwatch.monitor.line import Line

Sink = Callable[[SampleBatch], None]


@dataclass(frozen=True)
class SourceKind:
    """One kind of live source: build its connector, say where it is."""

    kind: str
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

    tags = {n: t.address for n, t in line.tags_of_source(name).items()}
    return MqttConnector(name, mqtt_settings(spec), tags, sink)


def _simulated(name: str, spec: Any, line: Line, sink: Sink) -> LiveConnector:
    from spanwatch.monitor.simsource import SimulatedConnector

    scenario = Path(spec.scenario)
    if not scenario.is_absolute():
        scenario = Path(line.file).resolve().parent / scenario
    return SimulatedConnector(name, line, scenario, sink, speedup=spec.speedup)


SOURCE_KINDS: dict[str, SourceKind] = {
    k.kind: k for k in (
        SourceKind("opcua", _opcua, lambda s: f"{s.endpoint} ({s.security_policy}/{s.security_mode})"),
        SourceKind("mqtt", _mqtt, lambda s: f"{s.host}:{s.port} qos {s.qos}{' tls' if s.tls else ''}"),
        SourceKind("simulated", _simulated, lambda s: f"scenario {s.scenario}"),
    )
}


def build_connectors(line: Line, sink: Sink) -> list[LiveConnector]:
    """One connector per configured source."""
    return [SOURCE_KINDS[spec.kind].connect(name, spec, line, sink) for name, spec in line.config.sources.items()]
