"""Real storage faults for the tests, and a daemon in a process of its own to suffer them.

* :func:`small_filesystem` mounts a tmpfs of a few MiB (root only; elsewhere the test is skipped, and fails
  under CI=true) that a test fills up with :func:`fill`;
* :class:`Locker` is a second Python process that holds a SQLite write lock (``BEGIN EXCLUSIVE``) until told
  to let go, or a lock in exclusive locking mode that keeps readers out too;
* :class:`Proxy` is a TCP proxy process in front of the shared PostgreSQL server: killing it (SIGKILL) is
  the database going away for the daemon behind it, without stopping a server other tests use;
* :class:`DaemonProcess` runs ``spanwatch run`` with the simulated source, and :class:`HealthWatch` polls its
  ``/healthz`` in a thread, recording every answer.

Nothing here fakes the fault: the file system is really full, the lock is really held by another process,
the TCP connections are really cut.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import socket
import subprocess
import sys
import textwrap
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from pgtest import PG_CONNINFO, schema_url

REPO = Path(__file__).resolve().parents[1]
CONFIG = REPO / "config" / "quillmere-q2.toml"
ENV = {**os.environ, "PYTHONUNBUFFERED": "1"}


def in_ci() -> bool:
    return os.environ.get("CI") == "true"


def need(what: str, ok: bool) -> None:
    """Skip (fail under CI=true) when ``ok`` is False."""
    if ok:
        return
    import pytest

    if in_ci():
        pytest.fail(f"{what} (CI=true: a test that needs it must not skip)")
    pytest.skip(what)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_for(pred, timeout: float, what: str, every: float = 0.2):
    """Poll ``pred`` until it returns something true (returned), or fail after ``timeout`` s (a behaviour bound)."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        got = pred()
        if got:
            return got
        time.sleep(every)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")


# --- a small file system that fills up ----------------------------------------------------------------------------


@contextlib.contextmanager
def small_filesystem(path: Path, size: str = "2m") -> Iterator[Path]:
    """A tmpfs of ``size`` mounted at ``path`` for the duration."""
    path.mkdir(parents=True, exist_ok=True)
    need("mounting a tmpfs needs root", os.geteuid() == 0)
    res = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size},mode=0755", "tmpfs", str(path)],
                         capture_output=True, text=True)
    need(f"cannot mount a tmpfs here: {res.stderr.strip()}", res.returncode == 0)
    try:
        yield path
    finally:
        subprocess.run(["umount", "-l", str(path)], capture_output=True)


def fill(folder: Path) -> Path:
    """Write a file into ``folder`` until its file system refuses more (ENOSPC); return the file."""
    filler = folder / "filler"
    block = b"\0" * 65536
    with open(filler, "wb", buffering=0) as f:
        try:
            while True:
                f.write(block)
        except OSError as exc:
            assert exc.errno == 28, exc  # ENOSPC: the file system is full
    with open(folder / "filler-tail", "wb", buffering=0) as f, contextlib.suppress(OSError):  # the last partial block
        while True:
            f.write(b"\0" * 512)
    return filler


def free(folder: Path) -> None:
    for name in ("filler", "filler-tail"):
        (folder / name).unlink(missing_ok=True)


# --- a second process that holds a lock ---------------------------------------------------------------------------

LOCKER = textwrap.dedent("""
    import sqlite3, sys, time
    con = sqlite3.connect(sys.argv[1], timeout=60, isolation_level=None)
    if sys.argv[2] == "exclusive-mode":  # readers are kept out too (SQLite documentation, PRAGMA locking_mode)
        con.execute("PRAGMA locking_mode=EXCLUSIVE")
    con.execute("BEGIN EXCLUSIVE")
    if sys.argv[2] == "exclusive-mode":
        con.execute("create table if not exists locker_was_here (x)")
    print("locked", time.time(), flush=True)
    sys.stdin.readline()
    con.execute("ROLLBACK")
    con.close()
    print("released", time.time(), flush=True)
""")


class Locker:
    """A Python process holding a write lock on a SQLite database (``BEGIN EXCLUSIVE``) until :meth:`release`."""

    def __init__(self, db: Path, mode: str = "write") -> None:
        self.proc = subprocess.Popen([sys.executable, "-c", LOCKER, str(db), mode], stdin=subprocess.PIPE,
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        first = self.proc.stdout.readline().split()
        assert first[:1] == ["locked"], f"the locker did not lock: {first} {self.proc.stderr.read()}"
        self.locked_at = float(first[1])
        self.released_at: float | None = None

    def release(self) -> float:
        self.proc.stdin.write("go\n")
        self.proc.stdin.flush()
        line = self.proc.stdout.readline().split()
        self.proc.wait(timeout=30)
        assert line[:1] == ["released"], line
        self.released_at = float(line[1])
        return self.released_at

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait()


# --- a TCP proxy in front of PostgreSQL ---------------------------------------------------------------------------

PROXY = textwrap.dedent("""
    import socket, sys, threading
    listen = socket.socket()
    listen.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    listen.bind(("127.0.0.1", int(sys.argv[1])))
    listen.listen(64)
    print("listening", flush=True)

    def pipe(a, b):
        try:
            while data := a.recv(65536):
                b.sendall(data)
        except OSError:
            pass
        for s in (a, b):
            try:
                s.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass

    while True:
        client, _ = listen.accept()
        server = socket.create_connection(("127.0.0.1", int(sys.argv[2])))
        for a, b in ((client, server), (server, client)):
            threading.Thread(target=pipe, args=(a, b), daemon=True).start()
""")


class Proxy:
    """A TCP proxy process on ``port`` in front of 127.0.0.1:``target``; :meth:`kill` cuts every connection."""

    def __init__(self, port: int, target: int = 5432) -> None:
        self.port, self.target = port, target
        self.proc: subprocess.Popen | None = None

    def start(self) -> Proxy:
        self.proc = subprocess.Popen([sys.executable, "-c", PROXY, str(self.port), str(self.target)],
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        line = self.proc.stdout.readline().strip()
        assert line == "listening", f"proxy did not start: {line} {self.proc.stderr.read()}"
        return self

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait()


def pg_url(schema: str, port: int = 5432) -> str:
    return schema_url(schema, port=port)


def pg_rows(schema: str, sql: str) -> list[tuple]:
    import psycopg

    with psycopg.connect(PG_CONNINFO, autocommit=True) as conn:
        conn.execute(f'set search_path to "{schema}"')
        return conn.execute(sql).fetchall()


# --- the daemon in its own process --------------------------------------------------------------------------------


def line_config(tmp: Path, history: str, dropouts: list[tuple[str, float, float]], *, port: int,
                daemon: str = "", name: str = "line.toml", duration: str = "10 min") -> Path:
    """The example line fed by the simulated line, whose tags in ``dropouts`` stop reporting from start to end
    (seconds after the daemon starts): each raises a ``tag_stale`` alarm and clears it when the tag returns."""
    scenario = tmp / f"{Path(name).stem}-scenario.toml"
    faults = "".join(f'\n[[fault]]\nkind = "tag_dropout"\ntarget = "{tag}"\nstart = "{a:g} s"\nend = "{b:g} s"\n'
                     for tag, a, b in dropouts)
    scenario.write_text(f'[scenario]\nname = "storage-faults"\nconfig = "{CONFIG}"\nduration = "{duration}"\n'
                        f'seed = 9\n\n[[speed]]\nat = "0 s"\nto = "400 m/min"\n{faults}', encoding="utf-8")
    cfg = tmp / name
    cfg.write_text(CONFIG.read_text(encoding="utf-8") + f"""
[sources.sim]
kind = "simulated"
scenario = "{scenario}"

[daemon]
history = "{history}"
http = "127.0.0.1:{port}"
startup_grace = "1 s"
{daemon}
""", encoding="utf-8")
    return cfg


def get_health(port: int, timeout: float = 5.0) -> dict | None:
    """``/healthz`` of the daemon on ``port`` (its JSON, also for a 503), or None when nothing answers."""
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=timeout) as r:
            return json.loads(r.read())
    except urllib.error.HTTPError as exc:
        return json.loads(exc.read())
    except OSError:
        return None


@dataclass
class DaemonProcess:
    """``spanwatch run --config cfg`` in a process of its own, its output in a log file."""

    cfg: Path
    port: int
    log: Path

    def __post_init__(self) -> None:
        self.out = open(self.log, "ab")  # noqa: SIM115 - closed in stop()/kill()
        self.proc = subprocess.Popen([sys.executable, "-m", "spanwatch", "run", "--config", str(self.cfg)],
                                     cwd=REPO, env=ENV, stdout=self.out, stderr=subprocess.STDOUT)

    def health(self, timeout: float = 5.0) -> dict | None:
        return get_health(self.port, timeout)

    def wait_up(self, timeout: float = 60.0) -> dict:
        def up() -> dict | None:
            if self.proc.poll() is not None:
                raise AssertionError(f"the daemon exited {self.proc.returncode}:\n{self.text()}")
            return self.health()

        return wait_for(up, timeout, "the daemon's /healthz")

    def text(self) -> str:
        return self.log.read_text(encoding="utf-8", errors="replace")

    def stop(self, timeout: float = 60.0) -> int:
        """SIGTERM, wait for the exit; its status."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        try:
            return self.proc.wait(timeout=timeout)
        finally:
            self.out.close()

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
        self.proc.wait()
        self.out.close()


class HealthWatch:
    """Polls ``/healthz`` every ``every`` s in a thread; keeps (time, seconds to answer, JSON or None) per poll."""

    def __init__(self, port: int, every: float = 0.25, timeout: float = 30.0) -> None:
        self.port, self.every, self.timeout = port, every, timeout
        self.polls: list[tuple[float, float, dict | None]] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.is_set():
            t0 = time.monotonic()
            st = get_health(self.port, self.timeout)
            self.polls.append((time.time(), time.monotonic() - t0, st))
            self._stop.wait(self.every)

    def stop(self) -> list[tuple[float, float, dict | None]]:
        self._stop.set()
        self._thread.join()
        return self.polls

    def seen(self, pred) -> list[dict]:
        return [st for _, _, st in list(self.polls) if st is not None and pred(st)]


# --- the command line as an unprivileged user ----------------------------------------------------------------------

NOBODY = 65534


def as_nobody() -> list[str]:
    """The prefix that runs a command as an unprivileged user when this is root (file modes do not stop root)."""
    if os.geteuid() != 0:
        return []
    import shutil

    setpriv = shutil.which("setpriv")
    need("running as an unprivileged user needs setpriv (util-linux) when the tests run as root", bool(setpriv))
    return [str(setpriv), f"--reuid={NOBODY}", f"--regid={NOBODY}", "--clear-groups"]


def spanwatch(*args: str, unprivileged: bool = False, timeout: float = 120.0) -> subprocess.CompletedProcess:
    """``spanwatch ARGS`` in a fresh interpreter (as an unprivileged user when asked); its exit status and output."""
    prefix = as_nobody() if unprivileged else []
    return subprocess.run([*prefix, sys.executable, "-m", "spanwatch", *args], cwd="/", env=ENV, capture_output=True,
                          text=True, timeout=timeout)
