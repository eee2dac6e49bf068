"""Errors through the real command line: one line that says what went wrong and what to do, exit status 2.

Every case runs ``python -m spanwatch`` as a user would (a subprocess) and checks: exit 2, exactly one
line on stderr, no Python traceback, no validation dump with a web link (pydantic's or SQLAlchemy's
"Background on this error at" pages). The services are real: a port held by a listening socket, an
OPC UA server (``spanwatch simulate --serve-opcua``) for a node that does not exist, a port where
nothing listens for an unreachable server or broker.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
BASE = ROOT / "config" / "quillmere-q2.toml"
OPCUA = ROOT / "config" / "quillmere-q2-opcua.toml"
MQTT = ROOT / "config" / "quillmere-q2-mqtt.toml"
STEADY = ROOT / "config" / "scenarios" / "steady.toml"


def cli(*args: str, cwd: Path = ROOT, timeout: float = 120) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "spanwatch", *args], cwd=cwd, capture_output=True, text=True,
                          timeout=timeout, env={**os.environ, "COLUMNS": "100"})


def one_line_error(proc: subprocess.CompletedProcess[str]) -> str:
    """The single stderr line of a command that failed as it should; fails the test otherwise."""
    everything = proc.stdout + proc.stderr
    assert proc.returncode == 2, f"exit {proc.returncode}:\n{everything[-3000:]}"
    assert "Traceback" not in everything, everything[-3000:]
    for link in ("errors.pydantic.dev", "sqlalche.me", "For further information visit"):
        assert link not in everything, everything[-3000:]
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, proc.stderr
    return lines[0]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def held_port() -> Iterator[int]:
    """A port another program listens on."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen()
        yield s.getsockname()[1]


def variant(tmp: Path, text: str, base: Path = OPCUA) -> Path:
    p = tmp / "line.toml"
    p.write_text(f'extends = "{base}"\n{text}', encoding="utf-8")
    return p


def simulated(tmp: Path, daemon: str = "") -> Path:
    """The example line fed by the simulated line in process (no external server)."""
    p = tmp / "sim-line.toml"
    p.write_text(BASE.read_text(encoding="utf-8") + f'\n[sources.sim]\nkind = "simulated"\nscenario = "{STEADY}"\n'
                 f'\n[daemon]\nhistory = "sqlite:///{tmp / "h.db"}"\n{daemon}', encoding="utf-8")
    return p


# --- ports, endpoints and addresses ------------------------------------------------------------------------------


def test_serve_opcua_on_a_port_in_use(held_port):
    err = one_line_error(cli("simulate", str(STEADY), "--serve-opcua", f"opc.tcp://127.0.0.1:{held_port}/x"))
    assert f"127.0.0.1:{held_port} is already in use" in err


def test_serve_opcua_without_the_scheme():
    err = one_line_error(cli("simulate", str(STEADY), "--serve-opcua", "127.0.0.1:4840"))
    assert "--serve-opcua" in err and "opc.tcp://" in err


def test_run_http_port_in_use(tmp_path, held_port):
    err = one_line_error(cli("run", "--config", str(simulated(tmp_path)), "--http", f"127.0.0.1:{held_port}"))
    assert "the port is in use" in err and "--http" in err


@pytest.mark.parametrize("http", ["localhost", "127.0.0.1:99999", "127.0.0.1:nine", "::1:9108"])
def test_run_http_without_a_valid_port(tmp_path, http):
    err = one_line_error(cli("run", "--config", str(simulated(tmp_path)), "--http", http))
    assert err.startswith("--http: expected HOST:PORT")


def test_daemon_http_in_the_config_without_a_port(tmp_path):
    err = one_line_error(cli("run", "--config", str(simulated(tmp_path, 'http = "localhost"\n'))))
    assert "daemon.http: expected HOST:PORT" in err and err.startswith("configuration error")


def test_opcua_endpoint_without_the_scheme_in_the_config(tmp_path):
    cfg = variant(tmp_path, '[sources.plc]\nkind = "opcua"\nendpoint = "10.0.0.5:4840"\n')
    for cmd in (["check-config", str(cfg)], ["run", "--config", str(cfg)]):
        err = one_line_error(cli(*cmd))
        assert "sources.plc" in err and "endpoint" in err and "opc.tcp://" in err and "'10.0.0.5:4840'" in err


@pytest.mark.parametrize("args", [["--log-level", "verbose"]])
def test_run_bad_log_level(tmp_path, args):
    err = one_line_error(cli("run", "--config", str(simulated(tmp_path)), *args))
    assert "debug, info, warning, error" in err


# --- the history's folder ----------------------------------------------------------------------------------------


def test_run_with_a_history_folder_that_does_not_exist(tmp_path):
    cfg = variant(tmp_path, f'[daemon]\nhistory = "sqlite:///{tmp_path}/no/such/folder/q2.db"\n')
    err = one_line_error(cli("run", "--config", str(cfg)))
    assert "daemon.history" in err and "does not exist" in err and "--db" in err


@pytest.mark.parametrize("cmd", [["demo", "--db"], ["replay", str(STEADY), "--config", str(BASE), "--db"],
                                 ["run", "--config", str(OPCUA), "--db"]])
def test_db_in_a_folder_that_does_not_exist(tmp_path, cmd):
    err = one_line_error(cli(*cmd, str(tmp_path / "nowhere" / "h.db")))
    assert "--db" in err and "does not exist" in err


def test_unknown_database_kind(tmp_path):
    err = one_line_error(cli("alarms", "--db", "oracle+nosuchdriver://u@h/d"))
    assert "--db: expected a SQLite file path or an SQLAlchemy URL" in err


def test_the_shipped_opcua_example_starts_from_any_folder(tmp_path):
    """The example once pointed at /var/lib/spanwatch, which a fresh machine does not have: traceback. Its
    history is now relative to the working folder (the systemd unit's is /var/lib/spanwatch)."""
    err_file = tmp_path / "stderr.txt"
    with err_file.open("w") as err:
        proc = subprocess.Popen([sys.executable, "-m", "spanwatch", "run", "--config", str(OPCUA), "--http",
                                 "127.0.0.1:0"], cwd=tmp_path, stdout=subprocess.DEVNULL, stderr=err)
    try:
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline and " started: " not in err_file.read_text() and proc.poll() is None:
            time.sleep(0.2)
        assert " started: " in err_file.read_text(), err_file.read_text()
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=60) == 0, err_file.read_text()
    finally:
        if proc.poll() is None:
            proc.kill()
    assert (tmp_path / "q2.db").is_file()
    assert "Traceback" not in err_file.read_text()


# --- live sources that cannot be reached -------------------------------------------------------------------------


def test_publish_mqtt_to_a_broker_that_is_not_there():
    port = free_port()
    err = one_line_error(cli("simulate", str(STEADY), "--publish-mqtt", f"127.0.0.1:{port}"))
    assert f"cannot reach the MQTT broker at 127.0.0.1:{port}" in err


def test_opcua_browse_of_a_server_that_is_not_there():
    port = free_port()
    err = one_line_error(cli("opcua-browse", f"opc.tcp://127.0.0.1:{port}"))
    assert "connection refused" in err


@pytest.mark.parametrize(("args", "expected"), [
    (["127.0.0.1:4840"], "opc.tcp://"),
    (["opc.tcp://127.0.0.1:4840", "--depth", "0"], "--depth"),
    (["opc.tcp://127.0.0.1:4840", "--format", "xml"], "--format: expected one of table, toml"),
])
def test_opcua_browse_bad_arguments(args, expected):
    assert expected in one_line_error(cli("opcua-browse", *args))


@pytest.fixture(scope="module")
def opcua_server(tmp_path_factory) -> Iterator[str]:
    """The simulated line served by ``spanwatch simulate --serve-opcua`` (a real asyncua server)."""
    tmp = tmp_path_factory.mktemp("server")
    scenario = tmp / "long.toml"
    scenario.write_text(f'[scenario]\nname = "long"\nconfig = "{BASE}"\nduration = "30 min"\n\n[[speed]]\n'
                        'at = "0 s"\nto = "300 m/min"\n', encoding="utf-8")
    endpoint = f"opc.tcp://127.0.0.1:{free_port()}/spanwatch/"
    server = subprocess.Popen([sys.executable, "-m", "spanwatch", "simulate", str(scenario), "--serve-opcua",
                               endpoint], cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline:
            if cli("opcua-browse", endpoint, "--depth", "2").returncode == 0:
                break
            time.sleep(1.0)
        else:
            pytest.fail("the served line never became browsable")
        yield endpoint
    finally:
        server.terminate()
        server.wait(timeout=30)


def test_opcua_browse_of_a_node_that_does_not_exist(opcua_server):
    err = one_line_error(cli("opcua-browse", opcua_server, "--node", "ns=2;s=q2.no_such_tag"))
    assert "node ns=2;s=q2.no_such_tag does not exist" in err


def test_opcua_browse_of_a_node_id_that_does_not_parse(opcua_server):
    err = one_line_error(cli("opcua-browse", opcua_server, "--node", "q2.s5.tension"))
    assert "expected a node id such as" in err


def test_opcua_browse_of_an_existing_node_lists_it(opcua_server):
    proc = cli("opcua-browse", opcua_server, "--format", "toml")
    assert proc.returncode == 0, proc.stderr
    assert 'address = "ns=2;s=q2.s5.tension"' in proc.stdout


# --- filters that would silently match nothing -------------------------------------------------------------------


@pytest.fixture(scope="module")
def history(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("hist")
    scenario = d / "short.toml"
    scenario.write_text(f'[scenario]\nname = "short"\nconfig = "{BASE}"\nduration = "10 s"\n\n[[speed]]\n'
                        'at = "0 s"\nto = "300 m/min"\n', encoding="utf-8")
    rec = d / "rec.csv"
    assert cli("simulate", str(scenario), "--out", str(rec), "--no-progress").returncode == 0
    db = d / "h.db"
    proc = cli("replay", str(rec), "--config", str(BASE), "--db", str(db), "--no-progress")
    assert proc.returncode == 0, proc.stderr
    return db


@pytest.mark.parametrize(("args", "expected"), [
    (["--priority", "critical"], "--priority: expected one of advisory, low, medium, high, urgent, got 'critical'"),
    (["--level", "alarms"], "--level: expected one of warning, alarm, got 'alarms' (did you mean alarm?)"),
    (["--check", "tracton"], "got 'tracton' (did you mean traction?)"),
    (["--format", "yaml"], "--format: expected one of table, csv, json"),
])
def test_alarms_filters_outside_their_values(history, args, expected):
    err = one_line_error(cli("alarms", "--db", str(history), *args))
    assert expected in err


def test_alarms_check_lists_every_check_kind(history):
    from spanwatch.rules.catalog import CHECK_KINDS

    err = one_line_error(cli("alarms", "--db", str(history), "--check", "bogus"))
    assert all(kind in err for kind in CHECK_KINDS)


# --- files -------------------------------------------------------------------------------------------------------


def test_simulate_into_a_folder_that_does_not_exist(tmp_path):
    err = one_line_error(cli("simulate", str(STEADY), "--out", str(tmp_path / "no" / "rec.csv")))
    assert "--out" in err and "does not exist" in err


def test_replay_of_a_folder(tmp_path):
    err = one_line_error(cli("replay", str(tmp_path), "--config", str(BASE), "--db", str(tmp_path / "h.db")))
    assert "a folder, not a recording" in err


@pytest.mark.parametrize("speedup", ["0", "-1", "nan"])
def test_simulate_live_with_a_speedup_that_is_not_positive(speedup):
    err = one_line_error(cli("simulate", str(STEADY), "--serve-opcua", "opc.tcp://127.0.0.1:4840",
                             "--speedup", speedup))
    assert "--speedup: expected a positive number" in err


# --- MQTT alarm topics inside what the source reads -------------------------------------------------------------


def test_the_shipped_mqtt_example_does_not_read_its_own_alarms():
    """Checked with paho-mqtt's own matcher (``topic_matches_sub``, MQTT 3.1.1 / 5.0 section 4.7) as the reference."""
    from paho.mqtt.client import topic_matches_sub
    from spanwatch.monitor.line import load_line

    spec = load_line(MQTT).config.sources["broker"]
    filters = [*spec.subscribe, *(m.pattern for m in spec.topic_map)]
    for topic in (spec.alarm_topic, spec.active_topic):
        assert topic and not any(topic_matches_sub(f, topic) for f in filters), (topic, filters)


@pytest.mark.parametrize(("text", "keys"), [
    ('subscribe = ["quillmere/q2/#"]\nalarm_topic = "quillmere/q2/spanwatch/alarm"\n',
     ("alarm_topic", "subscribe[0]")),
    ('subscribe = ["plant/#"]\nactive_topic = "quillmere/q2/spanwatch/active"\n',
     ("active_topic", "topic_map[0].pattern")),
    ('subscribe = ["plant/#"]\nalarm_topic = "quillmere/q2/+/alarm"\n', ("alarm_topic", "no + or #")),
])
def test_alarm_topics_the_source_reads_are_a_config_error(tmp_path, text, keys):
    cfg = variant(tmp_path, f"[sources.broker]\n{text}", base=MQTT)
    err = one_line_error(cli("check-config", str(cfg)))
    assert err.startswith("configuration error") and all(k in err for k in keys), err
