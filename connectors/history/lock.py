"""One writer per history and line: a second daemon of the same line refuses to start instead of taking over.

Two daemons of one line writing into one history would each carry on and then close the other's open
episodes. :func:`writer_lock` gives the lock that fits the database:

* :class:`RowLock` (SQLite, and any other database): a row of ``writer_locks`` per line with its holder's
  random token and a heartbeat the holder refreshes. A row whose heartbeat is older than ``stale_after``
  belongs to a writer that died without releasing it (power lost, another machine) or hangs, and is taken
  over; so is a row whose process is gone from this machine (``kill -9``: same boot id and process id
  namespace, no such process id, or a zombie), at once. Taking over is a compare-and-set on the old
  token and heartbeat, so two starters cannot both take it.
* :class:`AdvisoryLock` (PostgreSQL): a session-level advisory lock (``pg_try_advisory_lock``) keyed on the
  schema and the line name, held by a connection of its own for the daemon's life. The server releases it
  the moment that connection ends, killed process included (PostgreSQL documentation, "Explicit Locking",
  section "Advisory Locks"), so no heartbeat timeout is needed.

Both refresh as :meth:`refresh`: True while the lock is this writer's (re-taken if it was released in
between, e.g. a database restart), False when another writer holds it now; an unreachable database raises
:class:`~spanwatch.connectors.history.errors.HistoryError`.
"""

from __future__ import annotations

import os
import socket
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Protocol

from spanwatch.connectors.history.errors import WriterLockBusy, classify, where
from spanwatch.connectors.history.models import WriterLock
from sqlalchemy import delete, text, update
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import IntegrityError, SQLAlchemyError
from sqlalchemy.orm import Session


class LineLock(Protocol):
    """What a writer needs of its lock."""

    line_name: str
    took_over: str | None  # whose stale lock was taken over at acquire (for the log), or None

    def acquire(self) -> None: ...

    def refresh(self) -> bool: ...

    def release(self) -> None: ...


def owner_name() -> str:
    """This process, as another one reads it in a refusal: host and process id."""
    return f"{socket.gethostname()} pid {os.getpid()}"


def _machine() -> str:
    """This boot of this machine and this process id namespace (empty where /proc does not say)."""
    try:
        boot = Path("/proc/sys/kernel/random/boot_id").read_text(encoding="ascii").strip()
        return f"{boot}/{os.stat('/proc/self/ns/pid').st_ino}"
    except OSError:
        return ""


def process_key() -> str:
    """``<boot id>/<pid namespace>/<pid>``: lets a writer on the same machine tell whether this process is gone."""
    m = _machine()
    return f"{m}/{os.getpid()}" if m else ""


def gone(key: str) -> bool:
    """Whether the process ``key`` (:func:`process_key`) ran on this machine since its boot and has ended.

    False when it cannot be told (another machine or boot, another pid namespace, no /proc): then only the
    heartbeat says. A zombie (ended, not yet reaped by its parent) has ended.
    """
    machine, _, pid = key.rpartition("/")
    if not machine or machine != _machine() or not pid.isdigit():
        return False
    try:
        stat = Path(f"/proc/{pid}/stat").read_text(encoding="ascii", errors="replace")
    except FileNotFoundError:
        return True
    except OSError:
        return False
    return stat.rpartition(")")[2].split()[:1] in (["Z"], ["X"])


def writer_lock(engine: Engine, line_name: str, *, stale_after: float = 60.0,
                clock: Callable[[], float] = time.time) -> LineLock:
    """The lock of ``line_name`` in the history behind ``engine``: advisory on PostgreSQL, a row elsewhere."""
    if engine.dialect.name == "postgresql":
        return AdvisoryLock(engine, line_name)
    return RowLock(engine, line_name, stale_after=stale_after, clock=clock)


class RowLock:
    """A ``writer_locks`` row with a heartbeat; stale after ``stale_after`` seconds without one."""

    def __init__(self, engine: Engine, line_name: str, *, stale_after: float,
                 clock: Callable[[], float] = time.time) -> None:
        self.engine, self.line_name, self.stale_after, self.clock = engine, line_name, stale_after, clock
        self.token = uuid.uuid4().hex
        self.owner = owner_name()
        self.process = process_key()
        self.took_over: str | None = None

    def acquire(self) -> None:
        """Take the line's row, or take over a stale one; raise :class:`WriterLockBusy` when another writer is alive."""
        try:
            busy = self._try()
        except SQLAlchemyError as exc:
            raise classify(exc, self.engine.url, doing="locking the line in") from exc
        if busy is not None:
            raise WriterLockBusy(busy)

    def _try(self) -> str | None:
        """None when this writer holds the row now; else why not."""
        now = self.clock()
        try:
            with Session(self.engine) as s, s.begin():
                s.add(self._row(now))
            return None
        except IntegrityError:
            pass  # a row is there: whose, and is it alive?
        try:
            return self._take(now)
        except IntegrityError:
            return self._raced()

    def _raced(self) -> str:
        return (f"{where(self.engine.url)}: another spanwatch took the writer lock of line {self.line_name!r} at the "
                "same moment; only one writes a line")

    def _take(self, now: float) -> str | None:
        with Session(self.engine) as s, s.begin():
            row = s.get(WriterLock, self.line_name)
            if row is None:  # released in between: try once more from the start
                s.add(self._row(now))
                return None
            if row.token == self.token:
                return None
            age = now - row.heartbeat_at
            dead = gone(row.process)
            if age < self.stale_after and not dead:
                return (f"{where(self.engine.url)}: another spanwatch ({row.owner}) is writing line "
                        f"{self.line_name!r} into this history (last heartbeat {max(age, 0.0):.1f} s ago); stop it "
                        "first, or give this one another history. The lock of a writer whose process has ended on "
                        "this machine is taken over at once; of one elsewhere, or hung, once its heartbeat is "
                        f"{self.stale_after:g} s old ([daemon] lock_timeout).")
            res = s.execute(update(WriterLock)
                            .where(WriterLock.line_name == self.line_name, WriterLock.token == row.token,
                                   WriterLock.heartbeat_at == row.heartbeat_at)
                            .values(token=self.token, owner=self.owner, process=self.process, acquired_at=now,
                                    heartbeat_at=now)
                            .execution_options(synchronize_session=False))
            if res.rowcount != 1:  # type: ignore[attr-defined]
                return self._raced()
            self.took_over = f"{row.owner} ({'its process is gone' if dead else 'its heartbeat is stale'}: last " \
                             f"heartbeat {age:.1f} s ago)"
            return None

    def _row(self, now: float) -> WriterLock:
        return WriterLock(line_name=self.line_name, token=self.token, owner=self.owner, process=self.process,
                          acquired_at=now, heartbeat_at=now)

    def refresh(self) -> bool:
        """Heartbeat: True while the row is this writer's (re-taken if it was released and is free)."""
        try:
            with Session(self.engine) as s, s.begin():
                res = s.execute(update(WriterLock)
                                .where(WriterLock.line_name == self.line_name, WriterLock.token == self.token)
                                .values(heartbeat_at=self.clock()).execution_options(synchronize_session=False))
            if res.rowcount == 1:  # type: ignore[attr-defined]
                return True
            return self._try() is None
        except SQLAlchemyError as exc:
            raise classify(exc, self.engine.url, doing="refreshing the writer lock in") from exc

    def release(self) -> None:
        """Delete the row if it is still this writer's."""
        try:
            with Session(self.engine) as s, s.begin():
                s.execute(delete(WriterLock).where(WriterLock.line_name == self.line_name,
                                                   WriterLock.token == self.token))
        except SQLAlchemyError as exc:
            raise classify(exc, self.engine.url, doing="releasing the writer lock in") from exc


# two int4 keys: a key space apart from the single bigint key the schema migration locks with
_KEY1 = "hashtext('spanwatch writer')"
_KEY2 = "hashtext(coalesce(current_schema(), '') || '/' || :line)"
_ADVISORY = f"{_KEY1}, {_KEY2}"


class AdvisoryLock:
    """A PostgreSQL session-level advisory lock on a connection held for the writer's life."""

    def __init__(self, engine: Engine, line_name: str) -> None:
        self.engine, self.line_name = engine, line_name
        self.owner = owner_name()
        self.took_over: str | None = None
        self.holder = "another session"
        self._conn: Connection | None = None

    def _connect(self) -> Connection:
        conn = self.engine.connect().execution_options(isolation_level="AUTOCOMMIT")
        conn.execute(text("select set_config('application_name', :name, false)"),
                     {"name": f"spanwatch writer {self.owner}"[:63]})
        return conn

    def _try(self) -> bool:
        self._drop()
        conn = self._connect()
        try:
            got = bool(conn.execute(text(f"select pg_try_advisory_lock({_ADVISORY})"), {"line": self.line_name})
                       .scalar())
        except BaseException:
            conn.close()
            raise
        if got:
            self._conn = conn
            return True
        holder = conn.execute(text(
            "select a.application_name, a.client_addr, a.backend_start from pg_locks l join pg_stat_activity a "
            "on a.pid = l.pid where l.locktype = 'advisory' and l.granted and l.objsubid = 2 "
            f"and l.classid = (({_KEY1})::bigint & 4294967295)::oid "
            f"and l.objid = (({_KEY2})::bigint & 4294967295)::oid"),
            {"line": self.line_name}).first()
        conn.close()
        self.holder = (f"{holder[0] or 'a client'} from {holder[1] or 'local'}, connected {holder[2]:%Y-%m-%d %H:%M:%S}"
                       if holder is not None else "another session")
        return False

    def acquire(self) -> None:
        try:
            got = self._try()
        except SQLAlchemyError as exc:
            raise classify(exc, self.engine.url, doing="locking the line in") from exc
        if not got:
            raise WriterLockBusy(f"{where(self.engine.url)}: another spanwatch ({self.holder}) is writing line "
                                 f"{self.line_name!r} into this history (PostgreSQL advisory lock); stop it first, or "
                                 "give this one another database or schema")

    def refresh(self) -> bool:
        try:
            if self._conn is not None:
                try:
                    self._conn.execute(text("select 1"))
                    return True
                except SQLAlchemyError:
                    self._drop()  # the connection, and with it the lock, is gone: take it again below
            return self._try()
        except SQLAlchemyError as exc:
            raise classify(exc, self.engine.url, doing="refreshing the writer lock in") from exc

    def _drop(self) -> None:
        if self._conn is not None:
            try:
                self._conn.invalidate()
                self._conn.close()
            except SQLAlchemyError:
                pass
            self._conn = None

    def release(self) -> None:
        if self._conn is None:
            return
        try:
            self._conn.execute(text(f"select pg_advisory_unlock({_ADVISORY})"), {"line": self.line_name})
            self._conn.close()
        except SQLAlchemyError:
            self._drop()  # the server releases a session lock when the session ends
        self._conn = None
