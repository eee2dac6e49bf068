"""The daemon's HTTP endpoint survives what a network sends it: oversized, malformed, slow and hostile requests.

A real endpoint (``serve_http`` on a real socket, in a thread of its own) is fed raw bytes over TCP; after
every attack it must still answer ``GET /healthz`` correctly, and nothing may log a traceback. The expected
answers are those of the HTTP standards: RFC 9112 (HTTP/1.1 message syntax) and RFC 9110 (HTTP semantics),
RFC 6585 section 5 for 431. The last test does the same to a running ``spanwatch run``.
"""

from __future__ import annotations

import asyncio
import json
import logging
import os
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from spanwatch.monitor.httpd import serve_http

ROOT = Path(__file__).resolve().parent.parent
HEALTH = {"status": "ok", "line": "Q2 film rewinder"}
READ_TIMEOUT = 1.0  # the endpoint's allowance for a request head in these tests (the daemon's default is 5 s)
CODES = {200, 400, 404, 405, 408, 413, 414, 431, 505}


class Records(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.records: list[logging.LogRecord] = []
        self._guard = threading.Lock()

    def emit(self, record: logging.LogRecord) -> None:
        with self._guard:
            self.records.append(record)

    def tracebacks(self) -> list[str]:
        with self._guard:
            return [r.getMessage() for r in self.records if r.exc_info or "Traceback" in r.getMessage()]


@dataclass
class Endpoint:
    port: int
    log: Records = field(default_factory=Records)

    def request(self, data: bytes, *, close_write: bool = True, timeout: float = 30.0) -> bytes:
        """Send raw bytes, optionally end the sending side, and return everything the endpoint answers."""
        with socket.create_connection(("127.0.0.1", self.port), timeout=timeout) as s:
            try:
                s.sendall(data)
                if close_write:
                    s.shutdown(socket.SHUT_WR)
            except (BrokenPipeError, ConnectionResetError):
                pass  # the endpoint answered and closed before taking everything: read what it said
            return _read_all(s)

    def healthz(self) -> None:
        """``GET /healthz`` answers 200 with the route's JSON, exactly (RFC 9112 section 6.2: Content-Length)."""
        raw = self.request(b"GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n")
        head, _, body = raw.partition(b"\r\n\r\n")
        lines = head.decode("latin-1").split("\r\n")
        assert lines[0] == "HTTP/1.1 200 OK", raw[:200]
        headers = dict(ln.split(": ", 1) for ln in lines[1:])
        assert int(headers["Content-Length"]) == len(body)
        assert json.loads(body) == HEALTH


def _read_all(s: socket.socket) -> bytes:
    out = b""
    while True:
        try:
            chunk = s.recv(65536)
        except (ConnectionResetError, TimeoutError):
            return out
        if not chunk:
            return out
        out += chunk


def status_of(raw: bytes) -> int | None:
    if not raw:
        return None
    assert raw.startswith(b"HTTP/1.1 "), raw[:100]
    return int(raw[9:12])


@pytest.fixture(scope="module")
def endpoint() -> Iterator[Endpoint]:
    records = Records()
    root = logging.getLogger()
    root.addHandler(records)
    old_level = root.level
    root.setLevel(logging.DEBUG)
    loop = asyncio.new_event_loop()
    started = threading.Event()
    box: dict[str, object] = {}

    def health() -> tuple[int, bytes, str]:
        return 200, json.dumps(HEALTH).encode(), "application/json"

    def broken() -> tuple[int, bytes, str]:
        raise RuntimeError("route failed")

    def run() -> None:
        asyncio.set_event_loop(loop)
        ep = loop.run_until_complete(serve_http("127.0.0.1:0", {"/healthz": health, "/broken": broken},
                                                read_timeout=READ_TIMEOUT, write_timeout=2.0, max_connections=16))
        box["ep"] = ep
        started.set()
        loop.run_forever()
        loop.run_until_complete(ep.close())

    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    assert started.wait(30)
    ep = box["ep"]
    try:
        yield Endpoint(ep.port, records)  # type: ignore[attr-defined]
    finally:
        loop.call_soon_threadsafe(loop.stop)
        thread.join(30)
        root.removeHandler(records)
        root.setLevel(old_level)
    assert records.tracebacks() == []


# --- what the standards say ------------------------------------------------------------------------------------

CASES = [
    # RFC 9112 section 3: request-line = method SP request-target SP HTTP-version
    (b"GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n", 200),
    (b"GET /nothing-here HTTP/1.1\r\n\r\n", 404),
    (b"GET /healthz?verbose=1 HTTP/1.0\r\n\r\n", 200),
    (b"\r\nGET /healthz HTTP/1.1\r\n\r\n", 200),  # section 2.2: an empty line before the request line is ignored
    (b"GET http://spanwatch.plant/healthz HTTP/1.1\r\n\r\n", 200),  # 3.2.2: a server MUST accept the absolute form
    (b"GET /healthz\r\n\r\n", 400),
    (b"GET  /healthz HTTP/1.1\r\n\r\n", 400),
    (b"GET healthz HTTP/1.1\r\n\r\n", 400),
    (b"\x16\x03\x01\x02\x00\x01\x00\x01\xfc\x03\x03" + bytes(range(40)) + b"\r\n\r\n", 400),  # a TLS ClientHello
    (b"GET /healthz HTTP/1.1\r\nHost x\r\n\r\n", 400),  # a header line without a colon
    (b"GET /healthz HTTP/1.1\r\nHost: x\r\n folded\r\n\r\n", 400),  # 5.2: obs-fold -> 400
    (b"GET /healthz HTTP/1.1\r\nContent-Length: -1\r\n\r\n", 400),
    (b"GET /healthz HTTP/2.0\r\n\r\n", 505),  # RFC 9110 section 15.6.6
    (b"POST /healthz HTTP/1.1\r\nContent-Length: 2\r\n\r\n{}", 405),  # RFC 9110 15.5.6 (with Allow, below)
    (b"DELETE /healthz HTTP/1.1\r\n\r\n", 405),
    (b"GET /healthz HTTP/1.1\r\nContent-Length: 5\r\n\r\nhello", 413),  # RFC 9110 15.5.14: content not taken
    (b"GET /healthz HTTP/1.1\r\nTransfer-Encoding: chunked\r\n\r\n0\r\n\r\n", 413),
    (b"GET /" + b"a" * 100_000 + b" HTTP/1.1\r\n\r\n", 414),  # RFC 9110 15.5.15
    (b"GET /healthz HTTP/1.1\r\nX-Big: " + b"b" * 100_000 + b"\r\n\r\n", 431),  # RFC 6585 section 5
    (b"GET /healthz HTTP/1.1\r\n" + b"".join(b"X-H%d: v\r\n" % i for i in range(500)) + b"\r\n", 431),
    (b"GET /healthz HTTP/1.1\r\nHost: x", 400),  # the head cut short by the end of the connection
]


@pytest.mark.parametrize(("data", "code"), CASES, ids=[f"{i}-{c}" for i, (_, c) in enumerate(CASES)])
def test_each_request_gets_the_standard_answer(endpoint, data, code):
    raw = endpoint.request(data)
    assert status_of(raw) == code, raw[:300]
    if code == 405:
        assert b"\r\nAllow: GET, HEAD\r\n" in raw  # RFC 9110 15.5.6: a 405 MUST carry Allow
    endpoint.healthz()


def test_head_gets_the_headers_without_the_body(endpoint):
    raw = endpoint.request(b"HEAD /healthz HTTP/1.1\r\n\r\n")
    head, sep, body = raw.partition(b"\r\n\r\n")
    assert head.startswith(b"HTTP/1.1 200") and sep and body == b""  # RFC 9110 section 9.3.2
    assert f"Content-Length: {len(json.dumps(HEALTH))}".encode() in head


def test_a_failing_route_answers_500_and_the_next_request_is_served(endpoint):
    assert status_of(endpoint.request(b"GET /broken HTTP/1.1\r\n\r\n")) == 500
    endpoint.healthz()


# --- fuzzing --------------------------------------------------------------------------------------------------


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=4096))
def test_random_bytes(endpoint, data):
    code = status_of(endpoint.request(data))
    assert code is None or code in CODES


_method = st.sampled_from([b"GET", b"HEAD", b"POST", b"PUT", b"G\x00T", b"", b"get", b"OPTIONS"])
_target = st.one_of(st.sampled_from([b"/healthz", b"/", b"*", b"/healthz?x=1"]), st.binary(max_size=300))
_version = st.sampled_from([b"HTTP/1.1", b"HTTP/1.0", b"HTTP/2", b"HTTP/1.1 extra", b"", b"http/1.1"])
_header = st.tuples(st.binary(max_size=40), st.sampled_from([b": ", b":", b" ", b""]), st.binary(max_size=200))
_eol = st.sampled_from([b"\r\n", b"\n", b"\r"])


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(method=_method, target=_target, version=_version, headers=st.lists(_header, max_size=30), eol=_eol,
       huge=st.sampled_from([0, 0, 0, 9_000, 70_000]))
def test_requests_that_almost_parse(endpoint, method, target, version, headers, eol, huge):
    data = method + b" " + target + b"x" * huge + b" " + version + eol
    data += b"".join(k + sep + v + eol for k, sep, v in headers) + eol
    code = status_of(endpoint.request(data))
    assert code is None or code in CODES


def test_endpoint_still_healthy_after_the_fuzzing(endpoint):
    endpoint.healthz()
    assert endpoint.log.tracebacks() == []


# --- slow and many clients --------------------------------------------------------------------------------------


def _slowloris(port: int, stop: threading.Event, result: list[bytes]) -> None:
    """Send a request head one byte at a time, never finishing; keep what the endpoint answers."""
    with socket.create_connection(("127.0.0.1", port), timeout=60) as s:
        s.settimeout(0.2)
        payload = b"GET /healthz HTTP/1.1\r\n" + b"X-Slow: " + b"z" * 10_000
        got = b""
        for byte in payload:
            if stop.is_set():
                break
            try:
                s.send(bytes([byte]))
            except OSError:
                break
            try:
                chunk = s.recv(65536)
            except TimeoutError:
                continue
            except OSError:
                break
            got += chunk
            if not chunk:
                break
        result.append(got)


def test_slow_clients_are_cut_off_and_others_served_meanwhile(endpoint):
    stop = threading.Event()
    results: list[bytes] = []
    threads = [threading.Thread(target=_slowloris, args=(endpoint.port, stop, results)) for _ in range(8)]
    for t in threads:
        t.start()
    try:
        for _ in range(5):  # while they dribble, others get answers (8 slow clients, room for 16)
            endpoint.healthz()
        for t in threads:
            t.join(timeout=120)  # each is cut off by the endpoint: a behaviour bound, not a timing check
        assert not any(t.is_alive() for t in threads)
    finally:
        stop.set()
    assert len(results) == 8
    for got in results:  # RFC 9110 section 15.5.9: 408 for a request not completed in time (or a plain close)
        assert got == b"" or status_of(got) == 408, got[:200]
    endpoint.healthz()


def test_a_flood_of_idle_connections_does_not_stop_the_endpoint_for_good(endpoint):
    idle = [socket.create_connection(("127.0.0.1", endpoint.port), timeout=30) for _ in range(64)]
    try:
        for s in idle:  # the endpoint closes each: the slots over the limit at once, the others after the timeout
            s.settimeout(60)
            _read_all(s)
    finally:
        for s in idle:
            s.close()
    endpoint.healthz()


# --- the daemon itself ------------------------------------------------------------------------------------------


def test_the_running_daemon_survives_hostile_requests(tmp_path):
    scenario = ROOT / "config" / "scenarios" / "steady.toml"
    cfg = tmp_path / "line.toml"
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    cfg.write_text((ROOT / "config" / "quillmere-q2.toml").read_text(encoding="utf-8")
                   + f'\n[sources.sim]\nkind = "simulated"\nscenario = "{scenario}"\n\n[daemon]\n'
                   f'history = "sqlite:///{tmp_path / "h.db"}"\nhttp = "127.0.0.1:{port}"\n', encoding="utf-8")
    err_path = tmp_path / "stderr.txt"
    with err_path.open("w") as err:
        proc = subprocess.Popen([sys.executable, "-m", "spanwatch", "run", "--config", str(cfg)], cwd=ROOT,
                                stdout=subprocess.DEVNULL, stderr=err, env={**os.environ, "PYTHONUNBUFFERED": "1"})
    ep = Endpoint(port)

    def health() -> dict:
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=10) as r:
                return json.loads(r.read())
        except urllib.error.HTTPError as exc:  # 503 while degraded: the body is the same status document
            return json.loads(exc.read())

    try:
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline:
            try:
                health()
                break
            except OSError:
                time.sleep(0.3)
        for data, _ in CASES:
            ep.request(data)
        for data in (os.urandom(5000), b"GET /" + b"a" * 1_000_000, b"\xff" * 70_000 + b"\n"):
            ep.request(data)
        with socket.create_connection(("127.0.0.1", port)) as half:  # a partial request left open, then dropped
            half.sendall(b"GET /metr")
        st_ = health()
        assert st_["line"] == "Q2 film rewinder" and "connectors" in st_
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=60)
        finally:
            if proc.poll() is None:
                proc.kill()
    log = err_path.read_text()
    assert proc.returncode == 0, log[-3000:]
    assert "Traceback" not in log, log[-3000:]
    assert "http: refused a request" in log  # said in the log, without a traceback
