"""The OPC UA connector against a real asyncua server in process (spanwatch.monitor.simserve.SimLineServer).

No protocol mocks: every test runs asyncua's Server on a loopback port and the connector's asyncua
Client against it. What the tests hold the connector to comes from outside the project:

* the OPC UA specification (Part 4, StatusCode, from memory): the severity is the top two bits of
  the 32-bit StatusCode, 00 Good, 01 Uncertain, 10 Bad; the InfoType bits 11-10 = 01 (DataValue)
  with bit 7 set flag an Overflow of the monitored item's queue; a Bad value carries no usable
  value (Part 4, DataValue: the server sets it to null);
* the asyncua server's own behaviour: its sessions, subscriptions, certificate validation
  (CertificateValidator with a TrustStore) and user check, and what it writes.

Each test runs its own event loop with an exception handler that records anything asyncio would
report as unhandled (exceptions never retrieved, callbacks that raised); the test fails if it saw any.
"""

from __future__ import annotations

import asyncio
import gc
import logging
import math
import time
import tomllib
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from asyncua import ua
from spanwatch.connectors.opcua import OpcUaConnector, browse
from spanwatch.connectors.opcua_server import make_test_pki
from spanwatch.monitor.config import OpcUaSource, TagSection, parse_config
from spanwatch.monitor.line import load_line
from spanwatch.monitor.simline import SimulatedLine, load_scenario
from spanwatch.monitor.simserve import SimLineServer, opcua_line_config
from spanwatch.monitor.sources import opcua_settings, opcua_tags
from spanwatch.rules.samples import SampleBatch

REPO = Path(__file__).resolve().parents[1]
STEADY = REPO / "config" / "scenarios" / "steady.toml"
BOUND = 10.0  # seconds allowed for detecting a loss or getting connected again (behaviour, not speed)
FAST = {"watchdog_interval": "0.5 s", "reconnect_min": "0.2 s", "reconnect_max": "1 s", "timeout": "2 s"}


# --- helpers ----------------------------------------------------------------------------------------


def run_loop(body: Callable[[], Awaitable[None]]) -> None:
    """Run ``body`` in a fresh event loop; fail if the loop's exception handler was called."""
    seen: list[dict[str, Any]] = []

    async def main() -> None:
        asyncio.get_running_loop().set_exception_handler(lambda _loop, ctx: seen.append(ctx))
        await body()
        await asyncio.sleep(0.05)
        gc.collect()  # exceptions never retrieved are reported when their future is collected
        await asyncio.sleep(0.05)

    asyncio.run(main())
    gc.collect()
    assert not seen, f"unhandled in the event loop: {[c.get('message') for c in seen]}"


async def until(cond: Callable[[], bool], timeout: float, what: str) -> float:
    """Wait until ``cond()`` holds; return the seconds it took, fail after ``timeout``."""
    t0 = time.monotonic()
    while not cond():
        if time.monotonic() - t0 > timeout:
            raise AssertionError(f"not within {timeout:g} s: {what}")
        await asyncio.sleep(0.02)
    return time.monotonic() - t0


def make_sim() -> SimulatedLine:
    sc, cfg = load_scenario(STEADY)
    return SimulatedLine(load_line(cfg), sc)


def line_source(endpoint: str, **options: Any) -> tuple[OpcUaSource, dict[str, TagSection]]:
    """The example line's OPC UA source and tags, as the shipped generator writes them."""
    cfg = parse_config(tomllib.loads(opcua_line_config(endpoint, **options)))
    spec = cfg.sources["plc"]
    assert isinstance(spec, OpcUaSource)
    return spec, {name: t for name, t in cfg.tags.items() if t.source == "plc"}


class Collector:
    """A sink that keeps every batch and checks it is called on the event loop's thread."""

    def __init__(self) -> None:
        self.batches: list[SampleBatch] = []

    def __call__(self, batch: SampleBatch) -> None:
        asyncio.get_running_loop()  # raises RuntimeError off the loop thread
        self.batches.append(batch)

    def rows(self) -> list[tuple[str, float, float, int, int]]:
        out = []
        for b in self.batches:
            for k in range(len(b)):
                out.append((b.tags[int(b.tag[k])], float(b.t[k]), float(b.value[k]), int(b.quality[k]),
                            int(b.ref[k])))
        return out

    def count(self) -> int:
        return sum(len(b) for b in self.batches)


async def start_connector(spec: OpcUaSource, tags: dict[str, TagSection],
                          sink: Collector) -> tuple[OpcUaConnector, asyncio.Task[None]]:
    conn = OpcUaConnector("plc", opcua_settings(spec), opcua_tags(tags), sink)
    return conn, asyncio.create_task(conn.run())


async def finish(conn: OpcUaConnector, task: asyncio.Task[None]) -> None:
    await conn.stop()
    await asyncio.wait_for(task, BOUND)
    assert conn.state == "stopped"


# --- data path ----------------------------------------------------------------------------------------


def test_subscription_delivers_the_written_values_with_their_source_timestamps() -> None:
    """Every sample the server writes arrives once, with its value and SourceTimestamp, as good quality."""

    async def body() -> None:
        srv = SimLineServer(make_sim())
        await srv.start(pump=False)
        sink = Collector()
        conn, task = await start_connector(*line_source(srv.endpoint, **FAST), sink)
        try:
            await until(lambda: conn.state == "connected", BOUND, "connected")
            assert set(conn.subscribed) == set(srv.tag_names)
            # before any value the server says BadWaitingForInitialData: a Bad code, so quality 2, no value
            await until(lambda: sink.count() >= len(srv.tag_names), BOUND, "initial values")
            initial = sink.rows()
            assert {r[0] for r in initial} == set(srv.tag_names)
            assert all(r[3] == 2 and math.isnan(r[2]) for r in initial)
            written = await srv.step(0.5)  # 0.5 simulated seconds, every sample written
            await until(lambda: sink.count() >= len(initial) + len(written), BOUND, "all written samples")
            await asyncio.sleep(0.3)  # nothing more may come
            got = sink.rows()[len(initial):]
            assert len(got) == len(written)
            sent = sorted((written.tags[int(written.tag[k])], round(float(written.t[k]), 6), float(written.value[k]))
                          for k in range(len(written)))
            received = sorted((tag, round(t, 6), v) for tag, t, v, _, _ in got)
            assert received == sent  # source timestamps to the microsecond (Python datetime), values exact
            assert all(q == 0 for *_, q, _ in got)
            # the core-change flag repeats False with new timestamps: each repeat still arrives (not "stale")
            flag = [r for r in got if r[0] == "q2.rewind.core_change"]
            assert len(flag) == int(np.sum(written.tag == written.tags.index("q2.rewind.core_change"))) >= 2
            assert {r[2] for r in flag} == {0.0}
            refs = [r[4] for r in sink.rows()]
            assert refs == sorted(set(refs))  # a sequence number, strictly increasing
            assert max(len(b) for b in sink.batches) > len(srv.tag_names)  # many samples per sink call
            assert conn.stats.server_timestamps == 0 and conn.stats.malformed == {}
            assert conn.stats.samples_in == sink.count()
        finally:
            await finish(conn, task)
            await srv.stop()

    run_loop(body)


def test_status_codes_map_to_quality_by_their_severity_bits() -> None:
    """Uncertain -> 1 with its value, Bad -> 2 without one, Good subcodes -> 0; no SourceTimestamp: ServerTimestamp."""

    async def body() -> None:
        srv = SimLineServer(make_sim())
        await srv.start(pump=False)
        sink = Collector()
        conn, task = await start_connector(*line_source(srv.endpoint, **FAST), sink)
        try:
            await until(lambda: conn.state == "connected", BOUND, "connected")
            await until(lambda: sink.count() >= len(srv.tag_names), BOUND, "initial values")
            n0 = sink.count()
            t = srv.sim.t0 + 100.0
            # (tag, value, status, expected quality) -- severity from OPC UA Part 4 StatusCode (from memory)
            cases = [
                ("q2.s2.tension", 812.5, ua.StatusCodes.UncertainLastUsableValue, 1),  # 0x40900000
                ("q2.s5.tension", 640.0, ua.StatusCodes.BadSensorFailure, 2),  # 0x808C0000
                ("q2.pull_1.speed", 401.25, ua.StatusCodes.GoodLocalOverride, 0),  # 0x00960000, still Good
                ("q2.pull_2.speed", 402.5, 0x00000480, 0),  # Good, InfoType DataValue, Overflow bit
                ("q2.line.speed_ref", 400.0, ua.StatusCodes.Good, 0),
            ]
            for k, (tag, value, status, _) in enumerate(cases):
                await srv.write(tag, value, t=t + k, status=status)
            await srv.write("q2.s8.tension", 777.0, t=None, server_t=t + 10)  # no SourceTimestamp
            await until(lambda: sink.count() >= n0 + len(cases) + 1, BOUND, "status samples")
            got = {r[0]: r for r in sink.rows()[n0:]}
            for k, (tag, value, _, quality) in enumerate(cases):
                _, t_got, v_got, q_got, _ = got[tag]
                assert q_got == quality, tag
                assert t_got == pytest.approx(t + k, abs=1e-6)
                if quality == 2:
                    assert math.isnan(v_got)  # a bad value is never passed on as a number
                else:
                    assert v_got == value
            assert got["q2.s8.tension"][1] == pytest.approx(t + 10, abs=1e-6)
            assert got["q2.s8.tension"][2] == 777.0
            assert conn.stats.server_timestamps == 1
            assert conn.stats.overflow == 1
        finally:
            await finish(conn, task)
            await srv.stop()

    run_loop(body)


# --- connection loss ------------------------------------------------------------------------------------


def test_server_restart_is_detected_and_the_subscription_comes_back() -> None:
    """Stop the server mid-stream: the loss shows in ``state``; after the restart samples flow again."""

    async def body() -> None:
        srv = SimLineServer(make_sim(), speedup=1.0)
        await srv.start()  # paced: the line runs in real time
        sink = Collector()
        conn, task = await start_connector(*line_source(srv.endpoint, **FAST), sink)
        try:
            await until(lambda: conn.state == "connected", BOUND, "connected")
            await until(lambda: sink.count() > 200, BOUND, "samples flowing")
            await srv.stop()
            await until(lambda: conn.state != "connected", BOUND, "loss detected")
            assert conn.state in ("reconnecting", "connecting")
            assert conn.subscribed == ()
            assert conn.stats.last_error  # says why
            last_t = max(r[1] for r in sink.rows())
            await asyncio.sleep(1.5)  # the connector keeps trying meanwhile
            assert conn.state != "connected"
            tries = conn.stats.reconnects
            assert tries >= 1
            n_down = sink.count()
            await srv.start()  # a fresh server: it knows nothing of the old subscription
            await until(lambda: conn.state == "connected", BOUND, "reconnected")
            assert set(conn.subscribed) == set(srv.tag_names)
            await until(lambda: sink.count() > n_down + 200, BOUND, "samples flowing again")
            after = sink.rows()[n_down:]
            good = [r for r in after if r[3] == 0]
            assert good and min(r[1] for r in good) > last_t  # new data, from the restarted server
            assert {r[0] for r in good} == set(srv.tag_names)
            assert conn.stats.reconnects >= tries
        finally:
            await finish(conn, task)
            await srv.stop()

    run_loop(body)


class SilentLink:
    """A TCP relay to the server that can stop passing bytes without closing anything: a pulled cable.

    Not a protocol mock: both ends speak real OPC UA through it; it only drops bytes while ``silent``.
    """

    def __init__(self, target_port: int) -> None:
        self.target_port = target_port
        self.silent = False
        self._server: asyncio.Server | None = None
        self._writers: list[asyncio.StreamWriter] = []
        self._tasks: set[asyncio.Task[Any]] = set()

    async def start(self) -> int:
        self._server = await asyncio.start_server(self._accept, "127.0.0.1", 0)
        return int(self._server.sockets[0].getsockname()[1])

    def _accept(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        task = asyncio.create_task(self._relay(reader, writer))
        self._tasks.add(task)
        task.add_done_callback(self._tasks.discard)

    async def _relay(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self._writers.append(writer)
        try:
            up_reader, up_writer = await asyncio.open_connection("127.0.0.1", self.target_port)
        except OSError:
            writer.close()
            return
        self._writers.append(up_writer)
        await asyncio.gather(self._pipe(reader, up_writer), self._pipe(up_reader, writer), return_exceptions=True)
        for w in (writer, up_writer):
            w.close()

    async def _pipe(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            while data := await reader.read(65536):
                if not self.silent:
                    writer.write(data)
                    await writer.drain()
        finally:
            writer.close()

    async def close(self) -> None:
        for w in self._writers:
            w.close()
        if self._server is not None:
            self._server.close()
            await self._server.wait_closed()
        for task in list(self._tasks):
            task.cancel()
        await asyncio.gather(*self._tasks, return_exceptions=True)


def test_a_silent_connection_is_detected_by_the_watchdog() -> None:
    """No bytes and no close (a cable pulled, a stalled server): only the watchdog can see it; then it heals."""

    async def body() -> None:
        srv = SimLineServer(make_sim(), speedup=1.0)
        await srv.start()
        link = SilentLink(srv.port)
        port = await link.start()
        sink = Collector()
        conn, task = await start_connector(*line_source(f"opc.tcp://127.0.0.1:{port}/spanwatch/", **FAST), sink)
        try:
            await until(lambda: conn.state == "connected", BOUND, "connected through the link")
            await until(lambda: sink.count() > 100, BOUND, "samples flowing")
            link.silent = True
            await until(lambda: conn.state != "connected", BOUND, "silent connection detected")
            assert conn.stats.last_error
            await asyncio.sleep(1.0)
            assert conn.state != "connected"  # no attempt gets through while the link is silent
            last_t = max(r[1] for r in sink.rows())
            n_silent = sink.count()
            link.silent = False
            await until(lambda: conn.state == "connected", BOUND, "connected again")
            await until(lambda: sink.count() > n_silent + 100, BOUND, "samples flowing again")
            assert max(r[1] for r in sink.rows()[n_silent:]) > last_t
        finally:
            await finish(conn, task)
            await link.close()
            await srv.stop()

    run_loop(body)


# --- security ------------------------------------------------------------------------------------------


def test_basic256sha256_with_certificates_and_password(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                       caplog: pytest.LogCaptureFixture) -> None:
    """A trusted certificate with the right password gets data; a wrong password or an untrusted certificate is
    refused, and the reason is in ``last_error`` without the password."""
    pki = make_test_pki(tmp_path)
    password = "Quill-mere#42"
    wrong = "Quill-mere#43"
    monkeypatch.setenv("SPANWATCH_TEST_OPCUA_PW", password)
    caplog.set_level(logging.INFO, logger="spanwatch")

    def secured(srv: SimLineServer, mode: str, cert: str, pw: str) -> tuple[OpcUaSource, dict[str, TagSection]]:
        return line_source(srv.endpoint, **FAST, security_policy="Basic256Sha256", security_mode=mode,
                           certificate=str(pki[f"{cert}_cert"]), private_key=str(pki[f"{cert}_key"]),
                           server_certificate=str(pki["server_cert"]), username="operator", password=pw)

    async def body() -> None:
        srv = SimLineServer(make_sim(), security=("Sign", "SignAndEncrypt"), certificate=pki["server_cert"],
                            private_key=pki["server_key"], trusted=[pki["ca_dir"]], users={"operator": password})
        await srv.start(pump=False)
        try:
            # the right certificate and password (from the environment), both security modes
            for mode in ("SignAndEncrypt", "Sign"):
                sink = Collector()
                conn, task = await start_connector(*secured(srv, mode, "client", "env:SPANWATCH_TEST_OPCUA_PW"),
                                                   sink)
                await until(lambda c=conn: c.state == "connected", BOUND, f"connected with {mode}")
                expected = sink.count() + len(await srv.step(0.1))
                await until(lambda s=sink, n=expected: s.count() >= n, BOUND, "samples over " + mode)
                await finish(conn, task)
            # a wrong password, and an untrusted (self-signed, no CA) certificate with the right one
            for cert, pw, status in (("client", wrong, "BadUserAccessDenied"),
                                     ("rogue", password, "BadCertificateUntrusted")):
                sink = Collector()
                conn, task = await start_connector(*secured(srv, "SignAndEncrypt", cert, pw), sink)
                await until(lambda c=conn: bool(c.stats.last_error), BOUND, f"refusal of {cert}")
                error = conn.stats.last_error
                assert "refused" in error and status in error, error
                assert password not in error and wrong not in error
                assert conn.state != "connected" and sink.count() == 0
                await finish(conn, task)
            assert "user 'operator'" in error  # says who was refused
        finally:
            await srv.stop()

    run_loop(body)
    spanwatch_logs = "\n".join(r.getMessage() for r in caplog.records if r.name.startswith("spanwatch"))
    assert password not in spanwatch_logs and wrong not in spanwatch_logs


# --- browse ------------------------------------------------------------------------------------------------


def test_browse_lists_the_served_variables() -> None:
    async def body() -> None:
        srv = SimLineServer(make_sim())
        await srv.start(pump=False)
        try:
            written = await srv.step(0.2)
            rows = await browse(srv.endpoint, depth=3)
            by_id = {r["node_id"]: r for r in rows}
            for name in srv.tag_names:
                row = by_id[f"ns=2;s={name}"]
                assert row["path"] == f"{srv.sim.line.name}/{name}"
                assert row["data_type"] == ("Boolean" if name == "q2.rewind.core_change" else "Double")
                assert row["numeric"]
                last = written.value[written.tag == written.tags.index(name)][-1]
                assert float(row["value"]) == float(last)
            assert not any(r["node_id"].startswith("i=") for r in rows)  # standard nodes left out
            under = await browse(srv.endpoint, node="ns=2;s=line", depth=1)
            assert {r["node_id"] for r in under} == {f"ns=2;s={n}" for n in srv.tag_names}
        finally:
            await srv.stop()

    run_loop(body)


# --- hostile input -----------------------------------------------------------------------------------------


def test_hostile_values_and_unknown_nodes_are_counted_and_do_not_stop_the_connector() -> None:
    async def body() -> None:
        srv = SimLineServer(make_sim())
        await srv.add_variable("hostile.text", "idle", ua.VariantType.String)
        await srv.add_variable("hostile.nan", 0.0, ua.VariantType.Double)
        # a variable of the abstract type Number (ns=0;i=26) may hold an empty (null) value
        await srv.add_variable("hostile.null", None, data_type=ua.NodeId(ua.ObjectIds.Number))
        await srv.start(pump=False)
        t = srv.sim.t0 + 50.0
        for name in ("hostile.text", "hostile.nan", "hostile.null"):  # start from a Bad status: not malformed
            await srv.write(name, None, t=t, status=ua.StatusCodes.BadWaitingForInitialData)
        spec, tags = line_source(srv.endpoint, **FAST)
        extra = {
            "x.text": "ns=2;s=hostile.text", "x.nan": "ns=2;s=hostile.nan", "x.null": "ns=2;s=hostile.null",
            "x.missing": "ns=2;s=q2.no.such.tag", "x.garbled": "ns=2;x=oops",
            # by namespace URI instead of index (resolved against the server's NamespaceArray)
            "x.by_uri": "nsu=urn:spanwatch:simline;s=q2.s5.tension", "x.no_ns": "nsu=urn:nowhere;s=q2.s5.tension",
        }
        for name, address in extra.items():
            tags[name] = TagSection(unit="", source="plc", address=address)
        sink = Collector()
        conn, task = await start_connector(spec, tags, sink)
        try:
            await until(lambda: conn.state == "connected", BOUND, "connected despite bad addresses")
            assert not {"x.missing", "x.garbled", "x.no_ns"} & set(conn.subscribed)
            assert "x.by_uri" in conn.subscribed
            await until(lambda: sink.count() >= len(srv.tag_names) + 4, BOUND, "initial values")
            n0 = sink.count()
            await srv.write("hostile.text", "jammed", t=t + 1)
            await srv.write("hostile.text", "E-STOP", t=t + 2)
            for k, bad in enumerate((math.nan, math.inf, -math.inf)):
                await srv.write("hostile.nan", bad, t=t + 3 + k)
            await srv.write("hostile.null", None, t=t + 6)  # Good status, no value
            await srv.write("q2.s5.tension", 650.0, t=t + 7)  # and the line's tags still get through
            await until(lambda: sink.count() >= n0 + 8, BOUND, "hostile samples")
            m = conn.stats.malformed
            assert m["ns=2;s=hostile.text: non-numeric value (String)"] == 2
            assert m["ns=2;s=hostile.nan: non-finite value"] == 3
            assert m["ns=2;s=hostile.null: no value"] == 1
            assert m["ns=2;s=q2.no.such.tag: unknown node (BadNodeIdUnknown)"] == 1
            assert sum(v for k, v in m.items() if k.startswith("ns=2;x=oops: invalid node id")) == 1
            assert sum(v for k, v in m.items() if k.startswith("nsu=urn:nowhere;s=q2.s5.tension: invalid")) == 1
            assert conn.stats.malformed_total == 9
            got = sink.rows()[n0:]
            hostile = [r for r in got if r[0] in ("x.text", "x.nan", "x.null")]
            assert len(hostile) == 6 and all(r[3] == 2 and math.isnan(r[2]) for r in hostile)  # bad, not good
            for name in ("q2.s5.tension", "x.by_uri"):
                assert (name, pytest.approx(t + 7, abs=1e-6), 650.0, 0) in [r[:4] for r in got]
            assert conn.state == "connected"
        finally:
            await finish(conn, task)
            await srv.stop()

    run_loop(body)


def test_generated_opcua_config_addresses_every_tag_of_the_example_line() -> None:
    """Every tag of config/quillmere-q2.toml gets the OPC UA source and a node id of the served form."""
    base = tomllib.loads((REPO / "config" / "quillmere-q2.toml").read_text())
    text = opcua_line_config("opc.tcp://127.0.0.1:4840/spanwatch/")
    cfg = parse_config(tomllib.loads(text))
    assert set(cfg.tags) == set(base["tags"])
    for name, tag in cfg.tags.items():
        assert tag.source == "plc" and tag.address == f"ns=2;s={name}"
        assert tag.unit == base["tags"][name]["unit"]
    src = cfg.sources["plc"]
    assert isinstance(src, OpcUaSource) and src.endpoint == "opc.tcp://127.0.0.1:4840/spanwatch/"
    assert np.isclose(src.publishing_interval, 0.1)
