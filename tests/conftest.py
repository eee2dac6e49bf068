"""Shared fixtures for the spanwatch tests."""

from __future__ import annotations

from pathlib import Path

import pytest

# --- physics and config test fixtures (example line) ----------------------------------------
# Used by test_config.py and test_physics_runout.py. Other fixtures go in their own section below.

REPO = Path(__file__).resolve().parents[1]
EXAMPLE_CONFIG = REPO / "config" / "quillmere-q2.toml"


@pytest.fixture(scope="session")
def example_config_path() -> Path:
    """Path of the example line configuration shipped in config/."""
    return EXAMPLE_CONFIG


@pytest.fixture(scope="session")
def example_line():
    """The derived line of the example configuration (spanwatch.monitor.line.load_line)."""
    from spanwatch.monitor.line import load_line

    return load_line(EXAMPLE_CONFIG)


# --- end of physics and config test fixtures ------------------------------------------------


# --- MQTT broker fixtures (tests/mqtt_broker.py) ----------------------------------------------
# A real mosquitto per test on a free port of 127.0.0.1 (never the system broker on 1883). Missing mosquitto:
# the test fails under CI=true and is skipped elsewhere, with the reason.


@pytest.fixture
def mqtt_broker(tmp_path: Path):
    """A running mosquitto (anonymous, persistence on) with ``.host``, ``.port``, ``.stop()``, ``.restart()``."""
    from mqtt_broker import MosquittoBroker, find_mosquitto, need

    need("the mosquitto broker (mosquitto or /usr/sbin/mosquitto)", find_mosquitto())
    broker = MosquittoBroker(tmp_path / "mosquitto").start()
    try:
        yield broker
    finally:
        broker.stop()


@pytest.fixture
def mqtt_broker_factory(tmp_path: Path):
    """Make more brokers with options (``password_file``, ``tls``, ``require_certificate``); all stopped at the end."""
    from mqtt_broker import MosquittoBroker, find_mosquitto, need

    need("the mosquitto broker (mosquitto or /usr/sbin/mosquitto)", find_mosquitto())
    made: list[MosquittoBroker] = []

    def make(**options: object) -> MosquittoBroker:
        broker = MosquittoBroker(tmp_path / f"mosquitto-{len(made)}", **options)  # type: ignore[arg-type]
        made.append(broker)
        return broker.start()

    try:
        yield make
    finally:
        for b in made:
            b.stop()


# --- end of MQTT broker fixtures -------------------------------------------------------------


# --- PostgreSQL fixtures (tests/pgtest.py) ----------------------------------------------------------------


@pytest.fixture(scope="session")
def postgres_available() -> None:
    """Fail under CI=true, skip elsewhere, when PostgreSQL cannot be reached."""
    from pgtest import require_postgres

    require_postgres()


@pytest.fixture
def pg_schema(postgres_available):
    """A fresh, empty schema on the shared PostgreSQL server (dropped afterwards): its name."""
    from pgtest import fresh_schema

    with fresh_schema() as schema:
        yield schema


@pytest.fixture
def pg_url(pg_schema) -> str:
    """A URL whose connections work in a fresh, empty schema."""
    from pgtest import schema_url

    return schema_url(pg_schema)
