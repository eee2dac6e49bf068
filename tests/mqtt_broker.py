"""A real mosquitto broker for the MQTT tests and the MQTT benchmark.

Each :class:`MosquittoBroker` runs the Debian ``mosquitto`` binary on a free port of
127.0.0.1 with its own configuration file, log and persistence database in a folder of
its own, so the system broker on port 1883 is never used or disturbed. Persistence is
on: a broker stopped with SIGTERM writes the sessions and queued messages to disk and a
:meth:`MosquittoBroker.restart` on the same port reloads them.

The helpers that need a program (``mosquitto``, ``mosquitto_passwd``, a TLS toolkit)
call :func:`need`: under ``CI=true`` a missing program fails the test, elsewhere the
test is skipped with the reason. Nothing here imports pytest until it has to skip or
fail, so the benchmark can use the broker without pytest.
"""

from __future__ import annotations

import datetime as dt
import ipaddress
import os
import shutil
import signal
import socket
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path

HOST = "127.0.0.1"


def in_ci() -> bool:
    return os.environ.get("CI") == "true"


def need(what: str, found: object, hint: str = "Debian: apt-get install mosquitto mosquitto-clients") -> None:
    """Fail (under CI=true) or skip (elsewhere) when ``found`` is falsy; ``what`` says what is missing."""
    if found:
        return
    import pytest

    if in_ci():
        pytest.fail(f"{what} is missing (CI=true: a test that needs a service must not skip)")
    pytest.skip(f"{what} is missing; install it ({hint})")


def find_mosquitto() -> str | None:
    """The mosquitto binary: on PATH, or where Debian installs it."""
    found = shutil.which("mosquitto")
    if found:
        return found
    return "/usr/sbin/mosquitto" if os.access("/usr/sbin/mosquitto", os.X_OK) else None


def find_mosquitto_passwd() -> str | None:
    return shutil.which("mosquitto_passwd") or (
        "/usr/bin/mosquitto_passwd" if os.access("/usr/bin/mosquitto_passwd", os.X_OK) else None)


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((HOST, 0))
        return int(s.getsockname()[1])


class _PortTaken(RuntimeError):
    """mosquitto could not bind its port."""


@dataclass(frozen=True)
class TlsFiles:
    """PEM files of a test CA, a server certificate for 127.0.0.1 / localhost and a client certificate."""

    ca_cert: Path
    server_cert: Path
    server_key: Path
    client_cert: Path
    client_key: Path


@dataclass
class MosquittoBroker:
    """One mosquitto process; ``host`` and ``port`` stay the same across :meth:`restart`."""

    folder: Path
    port: int = 0
    host: str = HOST
    password_file: Path | None = None
    tls: TlsFiles | None = None
    require_certificate: bool = False
    extra: list[str] = field(default_factory=list)
    binary: str | None = None
    proc: subprocess.Popen[bytes] | None = None

    def __post_init__(self) -> None:
        self.folder.mkdir(parents=True, exist_ok=True)
        if self.binary is None:
            self.binary = find_mosquitto()
        self._auto_port = not self.port
        self._started = False
        if not self.port:
            self.port = free_port()

    @property
    def config_path(self) -> Path:
        return self.folder / "mosquitto.conf"

    @property
    def log_path(self) -> Path:
        return self.folder / "mosquitto.log"

    def write_config(self) -> None:
        lines = [
            f"listener {self.port} {self.host}",
            f"allow_anonymous {'false' if self.password_file else 'true'}",
            "persistence true",
            f"persistence_location {self.folder}/",
            "persistence_file mosquitto.db",
            "autosave_interval 1800",
            # mosquitto keeps at most 1000 QoS 1 messages per session by default and drops the rest silently;
            # a broker feeding spanwatch should hold more (as the README says), and so does this one
            "max_queued_messages 100000",
            f"log_dest file {self.log_path}",
            "log_type error",
            "log_type warning",
            "log_type notice",
            "log_type information",
            "connection_messages true",
        ]
        if os.geteuid() == 0:
            lines.append("user root")  # otherwise mosquitto drops to user 'mosquitto', who cannot write here
        if self.password_file:
            lines.append(f"password_file {self.password_file}")
        if self.tls:
            lines += [f"cafile {self.tls.ca_cert}", f"certfile {self.tls.server_cert}",
                      f"keyfile {self.tls.server_key}",
                      f"require_certificate {'true' if self.require_certificate else 'false'}"]
        lines += self.extra
        self.config_path.write_text("\n".join(lines) + "\n", encoding="utf-8")

    def start(self, timeout: float = 10.0) -> MosquittoBroker:
        """Start mosquitto and wait until it accepts TCP connections; raise RuntimeError if it does not.

        On the first start of a broker whose port was chosen here, a port taken meanwhile by another
        process (the gap between choosing a free port and mosquitto binding it) is replaced by a new one.
        """
        for attempt in range(3):
            try:
                return self._start_once(timeout)
            except _PortTaken:
                if self._started or not self._auto_port or attempt == 2:
                    raise
                self.port = free_port()
        raise AssertionError("unreachable")

    def _start_once(self, timeout: float) -> MosquittoBroker:
        if self.binary is None:
            raise RuntimeError("mosquitto is not installed")
        self.write_config()
        offset = self.log_path.stat().st_size if self.log_path.exists() else 0  # this start's lines begin here
        self.proc = subprocess.Popen([self.binary, "-c", str(self.config_path)], stdout=subprocess.DEVNULL,
                                     stderr=subprocess.PIPE, start_new_session=True)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                err = self.proc.stderr.read().decode(errors="replace") if self.proc.stderr else ""
                text = f"mosquitto exited with {self.proc.returncode}: {err.strip()} {self.log_tail()}"
                self.proc = None
                raise (_PortTaken if "in use" in text.lower() else RuntimeError)(text)
            # Ready when mosquitto says it runs (its listeners are open: a port taken by another process would
            # have stopped it) and the port accepts a connection.
            if " running" in self._log_since(offset):
                try:
                    with socket.create_connection((self.host, self.port), timeout=0.2):
                        self._started = True
                        return self
                except OSError:
                    pass
            time.sleep(0.02)
        self.stop()
        raise RuntimeError(f"mosquitto did not accept connections on {self.host}:{self.port} within {timeout} s")

    def stop(self, timeout: float = 10.0) -> None:
        """SIGTERM (mosquitto saves its persistence database) and wait; SIGKILL if it hangs."""
        proc, self.proc = self.proc, None
        if proc is None or proc.poll() is not None:
            return
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout)
        if proc.stderr:
            proc.stderr.close()

    def kill(self) -> None:
        """SIGKILL: no chance to save anything (what a power cut does)."""
        proc, self.proc = self.proc, None
        if proc is not None and proc.poll() is None:
            proc.kill()
            proc.wait(10)
        if proc is not None and proc.stderr:
            proc.stderr.close()

    def restart(self, timeout: float = 10.0) -> MosquittoBroker:
        """Stop and start again on the same port, with the same persistence database."""
        self.stop()
        return self.start(timeout)

    @property
    def running(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def _log_since(self, offset: int) -> str:
        try:
            with self.log_path.open("rb") as f:
                f.seek(offset)
                return f.read().decode(errors="replace")
        except OSError:
            return ""

    def log_tail(self, n: int = 20) -> str:
        try:
            return "\n".join(self.log_path.read_text(errors="replace").splitlines()[-n:])
        except OSError:
            return ""


def make_password_file(folder: Path, user: str, password: str) -> Path | None:
    """A mosquitto password file with one user (``mosquitto_passwd -b -c``); None if the tool is missing."""
    tool = find_mosquitto_passwd()
    if tool is None:
        return None
    path = folder / "passwd"
    subprocess.run([tool, "-b", "-c", str(path), user, password], check=True, capture_output=True)
    return path


def make_tls_files(folder: Path) -> TlsFiles | None:
    """A CA, a server certificate (SAN 127.0.0.1 and localhost) and a client certificate, as PEM files.

    Made with the ``cryptography`` package when it is installed, else with the ``openssl``
    command; None when neither is available.
    """
    folder.mkdir(parents=True, exist_ok=True)
    files = TlsFiles(folder / "ca.pem", folder / "server.pem", folder / "server.key", folder / "client.pem",
                     folder / "client.key")
    try:
        _tls_with_cryptography(files)
        return files
    except ImportError:
        pass
    if shutil.which("openssl"):
        _tls_with_openssl(files, folder)
        return files
    return None


def _tls_with_cryptography(files: TlsFiles) -> None:
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

    now = dt.datetime.now(dt.UTC)

    def name(cn: str) -> x509.Name:
        return x509.Name([x509.NameAttribute(NameOID.ORGANIZATION_NAME, "Quillmere Works test"),
                          x509.NameAttribute(NameOID.COMMON_NAME, cn)])

    def write_key(key: ec.EllipticCurvePrivateKey, path: Path) -> None:
        path.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                           serialization.NoEncryption()))

    ca_key = ec.generate_private_key(ec.SECP256R1())
    ca = (x509.CertificateBuilder().subject_name(name("Quillmere test CA")).issuer_name(name("Quillmere test CA"))
          .public_key(ca_key.public_key()).serial_number(x509.random_serial_number())
          .not_valid_before(now - dt.timedelta(minutes=5)).not_valid_after(now + dt.timedelta(days=2))
          .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
          .add_extension(x509.KeyUsage(digital_signature=True, content_commitment=False, key_encipherment=False,
                                       data_encipherment=False, key_agreement=False, key_cert_sign=True,
                                       crl_sign=True, encipher_only=False, decipher_only=False), critical=True)
          .add_extension(x509.SubjectKeyIdentifier.from_public_key(ca_key.public_key()), critical=False)
          .sign(ca_key, hashes.SHA256()))
    files.ca_cert.write_bytes(ca.public_bytes(serialization.Encoding.PEM))

    def leaf(cn: str, key_path: Path, cert_path: Path, server: bool) -> None:
        key = ec.generate_private_key(ec.SECP256R1())
        b = (x509.CertificateBuilder().subject_name(name(cn)).issuer_name(ca.subject).public_key(key.public_key())
             .serial_number(x509.random_serial_number()).not_valid_before(now - dt.timedelta(minutes=5))
             .not_valid_after(now + dt.timedelta(days=2))
             .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
             .add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.SERVER_AUTH if server
                                                   else ExtendedKeyUsageOID.CLIENT_AUTH]), critical=False)
             .add_extension(x509.AuthorityKeyIdentifier.from_issuer_public_key(ca_key.public_key()),
                            critical=False))
        if server:
            b = b.add_extension(x509.SubjectAlternativeName([x509.DNSName("localhost"),
                                                             x509.IPAddress(ipaddress.ip_address(HOST))]),
                                critical=False)
        cert_path.write_bytes(b.sign(ca_key, hashes.SHA256()).public_bytes(serialization.Encoding.PEM))
        write_key(key, key_path)

    leaf("localhost", files.server_key, files.server_cert, True)
    leaf("spanwatch-test-client", files.client_key, files.client_cert, False)


def _tls_with_openssl(files: TlsFiles, folder: Path) -> None:
    def run(*args: str) -> None:
        subprocess.run(["openssl", *args], check=True, capture_output=True, cwd=folder)

    ca_key = folder / "ca.key"
    run("req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:P-256", "-nodes", "-days", "2",
        "-subj", "/O=Quillmere Works test/CN=Quillmere test CA", "-keyout", str(ca_key), "-out", str(files.ca_cert))
    for cn, key, cert, ext in (
            ("localhost", files.server_key, files.server_cert, "subjectAltName=DNS:localhost,IP:127.0.0.1"),
            ("spanwatch-test-client", files.client_key, files.client_cert, "extendedKeyUsage=clientAuth")):
        csr = folder / f"{cn}.csr"
        extfile = folder / f"{cn}.ext"
        extfile.write_text(ext + "\n")
        run("req", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:P-256", "-nodes", "-subj",
            f"/O=Quillmere Works test/CN={cn}", "-keyout", str(key), "-out", str(csr))
        run("x509", "-req", "-in", str(csr), "-CA", str(files.ca_cert), "-CAkey", str(ca_key), "-CAcreateserial",
            "-days", "2", "-extfile", str(extfile), "-out", str(cert))
