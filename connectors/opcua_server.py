"""An OPC UA server in process that serves a sample feed: what a PLC would serve, for the demo, tests and benchmarks.

:class:`FeedServer` serves a :class:`SampleFeed` (the application's simulated line is one) with
asyncua's ``Server`` (https://github.com/FreeOpcUa/opcua-asyncio): one object for the line
(``ns=<idx>;s=line``, browse name the feed's name) and under it one variable per tag,
node id ``ns=<idx>;s=<tag name>`` (``ns=2;s=q2.s5.tension``: the namespace ``urn:spanwatch:simline``
is the first one registered, so its index is 2). Tags are Double variables; the ``boolean_tags``
(flags such as ``q2.rewind.core_change``) are Booleans, as a PLC would serve them. Until the
first value is written a variable holds the status BadWaitingForInitialData.

The data path. Every write carries the sample's time as SourceTimestamp (epoch of the
scenario, not the wall clock), the wall clock as ServerTimestamp, and the sample's quality as
StatusCode (0 Good, 1 Uncertain, 2 Bad). asyncua's server is event driven: each write becomes a
data-change notification for every subscribed client (there is no server-side sampling), queued
per monitored item and sent at the publishing interval. A pure-Python server cannot take every
sample of a fast speed-up: measured on the development machine (2 cores), asyncua 2.1 writes about
200 000 values/s into variables nobody watches, but about 13 000 values/s into variables with one
subscribed client, and 2 000 writes/s with an in-process client costs both ends together about
18 % of one core. So the paced mode writes at most ``max_write_rate`` values per second
(default 1500): with ``k = ceil(natural rate x speedup / max_write_rate)`` (the natural rate of
line Q2 is 710 samples/s: fourteen 50 Hz tags and one 10 Hz tag), only every k-th sample of each
tag is written (k = 1 up to about 2x, k = 8 at the demo's 16x, so each 50 Hz tag reaches the client
at 6.25 samples per simulated second). What is preserved: every written sample's exact value,
source time and quality, in order per tag; the newest value of each tag within one decimation step.
What is lost: the k-1 samples between two written ones (counted in ``stats['skipped']``), and every
sample produced while the server is stopped (the line runs on: after a restart the simulation catches
up with the wall clock and those samples are dropped, counted in ``stats['lost_while_down']``; an
outage longer than ``catch_up_limit`` simulated seconds counts as a pause for the rest).
A client's queue (``queue_size``) must hold what one publishing interval brings: at most
``max_write_rate x publishing interval / number of tags`` per tag when paced (10 with the defaults).
:meth:`FeedServer.step` writes every sample (no decimation), for tests.

Security: ``security`` lists the endpoints to offer (``"None"``, ``"Sign"``, ``"SignAndEncrypt"``,
the latter two with Basic256Sha256 and the ``certificate``/``private_key`` files); ``trusted`` names
folders of CA or client certificates: when given, a client certificate must chain to one of them
(asyncua's CertificateValidator with TRUSTED_VALIDATION, else BadCertificateUntrusted); ``users``
maps user names to passwords: when given, anonymous sessions are refused and a wrong password gets
BadUserAccessDenied. :func:`make_test_pki` writes a CA, a server and a client certificate issued
by it, and a self-signed "rogue" client certificate, for tests and demos.

:func:`opcua_line_config` turns ``config/quillmere-q2.toml`` into the same line read through an
OPC UA source ``[sources.plc]`` with the ``address`` of every tag (what
``config/quillmere-q2-opcua.toml`` holds).
"""

from __future__ import annotations

import asyncio
import contextlib
import hmac
import math
import socket
import time
from collections.abc import Collection, Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Protocol

from asyncua import Server, ua
from asyncua.crypto import cert_gen
from asyncua.crypto.permission_rules import User, UserRole
from asyncua.crypto.truststore import TrustStore
from asyncua.crypto.validator import CertificateValidator, CertificateValidatorOptions
from asyncua.server.user_managers import UserManager
from cryptography import x509
from cryptography.hazmat.primitives.serialization import Encoding
from cryptography.x509.oid import ExtendedKeyUsageOID
from spanwatch.rules.samples import SampleBatch

NAMESPACE_URI = "urn:spanwatch:simline"
SERVER_URI = "urn:spanwatch:simline-server"

_POLICIES = {
    "None": ua.SecurityPolicyType.NoSecurity,
    "Sign": ua.SecurityPolicyType.Basic256Sha256_Sign,
    "SignAndEncrypt": ua.SecurityPolicyType.Basic256Sha256_SignAndEncrypt,
}
_YIELD_EVERY = 100  # writes between two turns of the event loop (about 10 ms of writing)
_QUALITY_STATUS = (ua.StatusCodes.Good, ua.StatusCodes.Uncertain, ua.StatusCodes.Bad)


def free_port(host: str = "127.0.0.1") -> int:
    """A TCP port nobody listens on right now (the OS picks it)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((host, 0))
        return int(s.getsockname()[1])


class _PasswordUsers(UserManager):
    """asyncua user manager: user name and password from a table (compared in constant time)."""

    def __init__(self, users: Mapping[str, str]) -> None:
        self._users = dict(users)

    def get_user(self, iserver: Any, username: str | None = None, password: Any = None,
                 certificate: Any = None) -> User | None:
        expected = self._users.get(username or "")
        if expected is None or password is None:
            return None
        given = password if isinstance(password, bytes) else str(password).encode()
        if hmac.compare_digest(given, expected.encode()):
            return User(role=UserRole.User, name=username)
        return None


class SampleFeed(Protocol):
    """What :class:`FeedServer` serves: samples that advance in steps of ``dt`` seconds.

    ``t0`` is the epoch of the feed's time zero and ``t`` its current time (seconds since ``t0``);
    ``advance(seconds)`` returns the samples of the next ``seconds`` (whole steps). The simulated
    line of the application is one.
    """

    name: str
    t0: float
    t: float
    dt: float
    tag_names: Sequence[str]

    def advance(self, seconds: float) -> SampleBatch: ...


class FeedServer:
    """Serve a sample feed over OPC UA on ``endpoint`` (loopback, a free port by default); see the module docstring.

    ``await start()`` listens and (by default) starts the paced pump: the simulation advances with the
    wall clock times ``speedup`` every ``tick`` seconds. ``await stop()`` stops listening (clients see
    the connection drop); ``start()`` again serves a fresh address space on the same port, like a PLC
    that restarted. ``await run(duration)`` serves until the simulation has advanced ``duration``
    seconds and stops. ``await step(seconds)`` advances unpaced and writes every sample.
    """

    def __init__(self, sim: SampleFeed, *, sample_periods: Mapping[str, float], boolean_tags: Collection[str] = (),
                 host: str = "127.0.0.1", port: int = 0, speedup: float = 1.0,
                 tick: float = 0.1, max_write_rate: float = 1500.0, security: Sequence[str] = ("None",),
                 certificate: str | Path | None = None, private_key: str | Path | None = None,
                 trusted: Sequence[str | Path] | None = None, users: Mapping[str, str] | None = None,
                 namespace: str = NAMESPACE_URI, application_uri: str = SERVER_URI,
                 catch_up_limit: float = 30.0, start_time: float | None = None) -> None:
        unknown = [s for s in security if s not in _POLICIES]
        if unknown or not security:
            raise ValueError(f"expected security among {list(_POLICIES)}, got {list(security)!r}")
        if any(s != "None" for s in security) and not (certificate and private_key):
            raise ValueError("a Sign or SignAndEncrypt endpoint needs certificate and private_key")
        if speedup <= 0 or tick <= 0 or max_write_rate <= 0:
            raise ValueError("speedup, tick and max_write_rate must be positive")
        self.sim = sim
        if start_time is not None:  # sample times from this epoch on (e.g. time.time(): real times at 1x)
            sim.t0 = start_time - sim.t
        self._follow_wall = start_time is not None
        self.host = host
        self.port = port or free_port(host)
        self.speedup, self.tick, self.max_write_rate = float(speedup), float(tick), float(max_write_rate)
        self.catch_up_limit = float(catch_up_limit)
        self.security = tuple(security)
        self.certificate, self.private_key = certificate, private_key
        self.trusted = [Path(p) for p in trusted] if trusted else None
        self.users = dict(users) if users else None
        self.namespace, self.application_uri = namespace, application_uri
        self.tag_names: tuple[str, ...] = tuple(sim.tag_names)
        self._boolean = tuple(n in boolean_tags for n in self.tag_names)
        self.natural_rate = sum(1.0 / sample_periods[n] for n in self.tag_names)
        self.stats: dict[str, int] = {"writes": 0, "skipped": 0, "lost_while_down": 0, "refused": 0,
                                      "late_ticks": 0, "starts": 0}
        self._server: Server | None = None
        self._object: Any = None
        self._idx = 0
        self._nodes: dict[str, ua.NodeId] = {}
        self._vtypes: dict[str, ua.VariantType] = {}
        self._extra: list[tuple[str, Any, ua.VariantType | None, ua.NodeId | None]] = []
        self._counter = [0] * len(self.tag_names)
        self._pump_task: asyncio.Task[None] | None = None
        self._anchor: tuple[float, float] | None = None  # (monotonic time, sim time) of the first paced start

    # --- properties -------------------------------------------------------------------------

    @property
    def endpoint(self) -> str:
        return f"opc.tcp://{self.host}:{self.port}/spanwatch/"

    @property
    def running(self) -> bool:
        return self._server is not None

    @property
    def namespace_index(self) -> int:
        return self._idx

    @property
    def stride(self) -> int:
        """Paced mode writes every k-th sample of each tag; k from the natural rate, speed-up and write budget."""
        return max(1, math.ceil(self.natural_rate * self.speedup / self.max_write_rate - 1e-9))

    @property
    def server(self) -> Server:
        """The asyncua Server while running (for tests that need its API)."""
        if self._server is None:
            raise RuntimeError("the server is not running")
        return self._server

    def clock(self) -> float:
        """The simulated time now (epoch seconds): what a consumer should use as "now" when ``speedup != 1``.

        While pumping it runs smoothly with the wall clock times ``speedup``; otherwise it is the time of
        the newest simulated step.
        """
        if self._pump_task is not None and self._anchor is not None:
            wall0, sim0 = self._anchor
            return self.sim.t0 + sim0 + (time.monotonic() - wall0) * self.speedup
        return self.sim.t0 + self.sim.t

    def node_id(self, name: str) -> str:
        """Node id string of a tag or extra variable, e.g. ``ns=2;s=q2.s5.tension``."""
        return f"ns={self._idx or 2};s={name}"

    # --- life cycle -------------------------------------------------------------------------

    async def start(self, *, pump: bool = True) -> None:
        """Listen on :attr:`endpoint` with a fresh address space; with ``pump``, advance the line paced."""
        if self._server is not None:
            return
        srv = Server(user_manager=_PasswordUsers(self.users) if self.users else None)
        await srv.init()
        srv.set_endpoint(self.endpoint)
        srv.set_server_name(f"spanwatch simulated line: {self.sim.name}")
        await srv.set_application_uri(self.application_uri)
        srv.set_security_policy([_POLICIES[s] for s in self.security])
        if self.certificate and self.private_key:
            await srv.load_certificate(str(self.certificate))
            await srv.load_private_key(str(self.private_key))
        if self.users:
            srv.set_identity_tokens([ua.UserNameIdentityToken])
        if self.trusted:
            store = TrustStore(self.trusted, [])
            await store.load()
            srv.set_certificate_validator(CertificateValidator(
                CertificateValidatorOptions.TRUSTED_VALIDATION | CertificateValidatorOptions.PEER_CLIENT, store))
        self._idx = await srv.register_namespace(self.namespace)
        idx = self._idx
        obj = await srv.nodes.objects.add_object(ua.NodeId("line", idx), ua.QualifiedName(self.sim.name, idx))
        stamp = datetime.fromtimestamp(self.sim.t0 + self.sim.t, UTC)
        waiting = ua.StatusCode(ua.StatusCodes.BadWaitingForInitialData)
        self._nodes, self._vtypes = {}, {}
        for name, boolean in zip(self.tag_names, self._boolean, strict=True):
            vtype = ua.VariantType.Boolean if boolean else ua.VariantType.Double
            var = await obj.add_variable(ua.NodeId(name, idx), ua.QualifiedName(name, idx),
                                         False if boolean else 0.0, varianttype=vtype)
            self._nodes[name], self._vtypes[name] = var.nodeid, vtype
            await srv.write_attribute_value(var.nodeid, ua.DataValue(StatusCode=waiting, SourceTimestamp=stamp))
        for name, value, vtype, dtype in self._extra:
            await self._add_extra(srv, obj, name, value, vtype, dtype)
        await srv.start()
        self._server, self._object = srv, obj
        self.stats["starts"] += 1
        if pump:
            self._pump_task = asyncio.create_task(self._pump(), name=f"simline-server-pump:{self.port}")

    async def stop(self) -> None:
        """Stop the pump and the server; connected clients lose their connection. ``start()`` serves again."""
        task, self._pump_task = self._pump_task, None
        if task is not None:
            task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await task
        srv, self._server = self._server, None
        if srv is not None:
            await srv.stop()

    async def run(self, duration: float | None = None) -> None:
        """Serve paced until the simulation has advanced ``duration`` seconds (forever when None), then stop."""
        if self._server is None:
            await self.start()
        elif self._pump_task is None:
            self._pump_task = asyncio.create_task(self._pump(), name=f"simline-server-pump:{self.port}")
        end = None if duration is None else self.sim.t + duration
        try:
            while end is None or self.sim.t < end - 1e-9:
                await asyncio.sleep(self.tick)
        finally:
            await self.stop()

    async def __aenter__(self) -> FeedServer:
        await self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.stop()

    # --- data ---------------------------------------------------------------------------------

    async def step(self, seconds: float) -> SampleBatch:
        """Advance the simulation ``seconds`` unpaced and write every sample; returns the batch written."""
        batch = self.sim.advance(seconds)
        await self._write_batch(batch, stride=1)
        return batch

    async def write(self, name: str, value: Any, *, t: float | None = None, status: int = ua.StatusCodes.Good,
                    server_t: float | None = None, variant_type: ua.VariantType | None = None) -> None:
        """Write one value to a tag or extra variable: ``t`` the SourceTimestamp (None: no source timestamp),
        ``server_t`` the ServerTimestamp (default now), ``status`` the StatusCode. Raises ValueError if the
        server refuses it (a value of the wrong type)."""
        node = self._nodes.get(name)
        if node is None:
            raise KeyError(f"no variable {name!r} on this server")
        vtype = variant_type or self._vtypes.get(name)
        variant = ua.Variant(value, vtype) if vtype is not None and value is not None else ua.Variant(value)
        dv = ua.DataValue(Value=variant, StatusCode=ua.StatusCode(status),
                          SourceTimestamp=None if t is None else datetime.fromtimestamp(t, UTC),
                          ServerTimestamp=datetime.fromtimestamp(server_t, UTC) if server_t is not None
                          else datetime.now(UTC))
        result = await self._write(node, dv)
        if not result.is_good():
            raise ValueError(f"the server refused the write to {name}: {result.name}")

    async def add_variable(self, name: str, value: Any, variant_type: ua.VariantType | None = None, *,
                           data_type: ua.NodeId | None = None) -> str:
        """Add a variable ``ns=<idx>;s=<name>`` under the line object (kept across restarts); returns its node id."""
        self._extra.append((name, value, variant_type, data_type))
        if self._server is not None:
            await self._add_extra(self._server, self._object, name, value, variant_type, data_type)
        return self.node_id(name)

    async def _add_extra(self, srv: Server, obj: Any, name: str, value: Any, vtype: ua.VariantType | None,
                         dtype: ua.NodeId | None) -> None:
        var = await obj.add_variable(ua.NodeId(name, self._idx), ua.QualifiedName(name, self._idx), value,
                                     varianttype=vtype, datatype=dtype)
        self._nodes[name] = var.nodeid
        if vtype is not None:
            self._vtypes[name] = vtype

    async def _write(self, node: ua.NodeId, dv: ua.DataValue) -> ua.StatusCode:
        if self._server is None:
            raise RuntimeError("the server is not running")
        # the address space's own write returns the StatusCode (Server.write_attribute_value drops it)
        result = await self._server.iserver.aspace.write_attribute_value(node, ua.AttributeIds.Value, dv)
        if result.is_good():
            self.stats["writes"] += 1
        else:
            self.stats["refused"] += 1
        return result

    async def _write_batch(self, batch: SampleBatch, stride: int) -> int:
        """Write the samples of a batch (every ``stride``-th per tag), oldest first; returns the number written."""
        if self._server is None or len(batch) == 0:
            return 0
        now = datetime.now(UTC)
        index = {name: k for k, name in enumerate(self.tag_names)}
        cols = [index.get(name, -1) for name in batch.tags]
        written = 0
        for tag_i, t, v, q in _rows(batch):
            k = cols[tag_i]
            if k < 0:
                continue
            c = self._counter[k]
            self._counter[k] = c + 1
            if c % stride:
                self.stats["skipped"] += 1
                continue
            name = self.tag_names[k]
            if self._boolean[k]:
                variant = ua.Variant(bool(v >= 0.5), ua.VariantType.Boolean)
            else:
                variant = ua.Variant(float(v), ua.VariantType.Double)
            dv = ua.DataValue(Value=variant, StatusCode=ua.StatusCode(_QUALITY_STATUS[min(max(int(q), 0), 2)]),
                              SourceTimestamp=datetime.fromtimestamp(t, UTC), ServerTimestamp=now)
            await self._write(self._nodes[name], dv)
            written += 1
            if written % _YIELD_EVERY == 0:
                # the address space's write never suspends: a batch that catches up after a stall would hold the
                # event loop for seconds, and a client in the same loop (the demo's daemon) would see its source
                # silent; let the loop run between slices of the batch
                await asyncio.sleep(0)
        return written

    async def _pump(self) -> None:
        sim = self.sim
        if self._anchor is None:
            if self._follow_wall:  # starting the server takes seconds: sample times follow the wall from here
                sim.t0 = time.time() - sim.t
            self._anchor = (time.monotonic(), sim.t)
        else:  # restarted: the line ran on while the server was down; what it produced then is lost
            lost = self._due(time.monotonic())
            if lost > self.catch_up_limit:  # beyond the limit the line is taken as paused
                wall0, sim0 = self._anchor
                self._anchor = (wall0, sim0 - (lost - self.catch_up_limit))
                lost = self._due(time.monotonic())
            while lost > 0:
                chunk = min(lost, 1.0)
                self.stats["lost_while_down"] += len(sim.advance(chunk))
                lost -= chunk
                await asyncio.sleep(0)
        next_tick = time.monotonic()
        while True:
            due = self._due(time.monotonic())
            if due > 0:
                await self._write_batch(sim.advance(due), self.stride)
            next_tick += self.tick
            delay = next_tick - time.monotonic()
            if delay < 0:
                self.stats["late_ticks"] += 1
                next_tick = time.monotonic()
            await asyncio.sleep(max(delay, 0.0))

    def _due(self, now: float) -> float:
        """Simulated seconds (whole simulation steps) the line is behind the paced clock."""
        assert self._anchor is not None
        wall0, sim0 = self._anchor
        behind = sim0 + (now - wall0) * self.speedup - self.sim.t
        steps = int(behind / self.sim.dt + 1e-9)
        return steps * self.sim.dt if steps > 0 else 0.0


def _rows(batch: SampleBatch) -> Any:
    b = batch.sorted_by_time()
    return zip(b.tag.tolist(), b.t.tolist(), b.value.tolist(), b.quality.tolist(), strict=True)


# --- certificates for tests and demos --------------------------------------------------------------


def make_test_pki(folder: str | Path, *, host: str | None = None, days: int = 30) -> dict[str, Path]:
    """Write a small PKI into ``folder`` with asyncua's certificate helpers; returns the paths.

    ``ca/ca.der`` (a CA in a folder of its own, to pass as ``trusted``), ``server.der`` /
    ``server.key.pem`` (application URI ``urn:spanwatch:simline-server``), ``client.der`` /
    ``client.key.pem`` (``urn:spanwatch:client``), both issued by the CA, and ``rogue.der`` /
    ``rogue.key.pem``, a self-signed client certificate with the same URI that no CA vouches for.
    """
    folder = Path(folder)
    (folder / "ca").mkdir(parents=True, exist_ok=True)
    host = host or socket.gethostname()
    out: dict[str, Path] = {}

    def save(name: str, key: Any, cert: x509.Certificate) -> None:
        out[f"{name}_key"] = folder / f"{name}.key.pem"
        out[f"{name}_cert"] = folder / f"{name}.der"
        out[f"{name}_key"].write_bytes(cert_gen.dump_private_key_as_pem(key))
        out[f"{name}_cert"].write_bytes(cert.public_bytes(Encoding.DER))

    ca_key = cert_gen.generate_private_key()
    ca = cert_gen.generate_self_signed_app_certificate(
        ca_key, "spanwatch test CA", {}, [x509.UniformResourceIdentifier("urn:spanwatch:test-ca")], extended=[],
        days=days)
    out["ca_cert"] = folder / "ca" / "ca.der"
    out["ca_cert"].write_bytes(ca.public_bytes(Encoding.DER))
    out["ca_dir"] = folder / "ca"
    for name, uri, use in (("server", SERVER_URI, ExtendedKeyUsageOID.SERVER_AUTH),
                           ("client", "urn:spanwatch:client", ExtendedKeyUsageOID.CLIENT_AUTH)):
        key = cert_gen.generate_private_key()
        csr = cert_gen.generate_app_certificate_signing_request(
            key, f"spanwatch {name}", {}, [x509.UniformResourceIdentifier(uri), x509.DNSName(host)], [use])
        save(name, key, cert_gen.sign_certificate_request(csr, ca, ca_key, days=days))
    rogue_key = cert_gen.generate_private_key()
    rogue = cert_gen.generate_self_signed_app_certificate(
        rogue_key, "spanwatch rogue client", {},
        [x509.UniformResourceIdentifier("urn:spanwatch:client"), x509.DNSName(host)],
        [ExtendedKeyUsageOID.CLIENT_AUTH], days=days)
    save("rogue", rogue_key, rogue)
    return out
