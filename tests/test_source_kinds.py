"""The source seam: each kind of live source is one registration (its config table, its builder, one line).

The config accepts exactly the registered kinds, and the daemon builds each source through its
registration, turning the config table into the adapter's plain parameters.
"""

from __future__ import annotations

from pathlib import Path
from typing import get_args

import pytest
from spanwatch.connectors.mqtt import MqttConnector, MqttSettings
from spanwatch.connectors.opcua import OpcUaConnector, OpcUaSettings
from spanwatch.monitor.config import ConfigError, load_config
from spanwatch.monitor.line import load_line
from spanwatch.monitor.sources import SOURCE_KINDS, build_connectors

ROOT = Path(__file__).resolve().parent.parent


def test_each_registration_names_its_own_kind():
    for kind, reg in SOURCE_KINDS.items():
        assert reg.kind == kind
        assert get_args(reg.schema.model_fields["kind"].annotation) == (kind,)


def test_the_config_accepts_exactly_the_registered_kinds(tmp_path):
    base = (ROOT / "config" / "quillmere-q2.toml").resolve()
    f = tmp_path / "line.toml"
    f.write_text(f'extends = "{base}"\n[sources.x]\nkind = "modbus"\n')
    with pytest.raises(ConfigError) as err:
        load_config(f)
    assert "sources.x" in str(err.value)
    for kind in SOURCE_KINDS:
        assert kind in str(err.value), f"the error should list the registered kind {kind!r}"


@pytest.mark.parametrize(("example", "cls", "settings"), [
    ("quillmere-q2-opcua.toml", OpcUaConnector, OpcUaSettings),
    ("quillmere-q2-mqtt.toml", MqttConnector, MqttSettings),
])
def test_build_connectors_goes_through_the_registration(example, cls, settings):
    line = load_line(ROOT / "config" / example)
    (conn,) = build_connectors(line, lambda batch: None)
    assert isinstance(conn, cls)
    assert isinstance(conn.spec if hasattr(conn, "spec") else conn.settings, settings)
    spec = next(iter(line.config.sources.values()))
    where = SOURCE_KINDS[spec.kind].where(spec)
    assert where and "password" not in where
