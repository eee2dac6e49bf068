"""Connections to the history database: SQLite files in WAL mode, PostgreSQL with connection checks and timeouts."""

from __future__ import annotations

import contextlib
import os
import sqlite3
from typing import Any
from urllib.parse import quote

from sqlalchemy import create_engine, event
from sqlalchemy.engine import Engine, make_url

SQLITE_BUSY_TIMEOUT_S = 30.0  # the default wait for a database another process holds locked


def make_engine(url: str, *, timeout: float = SQLITE_BUSY_TIMEOUT_S, read_only: bool = False) -> Engine:
    """An engine for ``url``; a statement waits at most ``timeout`` seconds for a lock another process holds.

    SQLite files get WAL journaling (a reader never blocks the writer, a committed transaction survives
    a crash; not a database that holds other tables and no history, which is left as it is; a file spanwatch
    creates is created with mode 0600),
    ``synchronous=NORMAL``, foreign keys enforced and ``timeout`` as the busy timeout. PostgreSQL
    gets ``pool_pre_ping`` (a connection the server dropped is replaced instead of failing a write),
    ``connect_timeout``, TCP keepalives, and ``lock_timeout`` and ``statement_timeout`` of ``timeout``
    (PostgreSQL documentation, "Client Connection Defaults"), so a locked table or a server that stopped
    answering fails a write instead of holding it.

    ``read_only``: SQLite opens the file with ``mode=ro`` and changes nothing, not even the journal mode
    (a history on a read-only file or folder can still be listed); PostgreSQL sets
    ``default_transaction_read_only``.
    """
    u = make_url(url)
    if u.get_backend_name() == "sqlite":
        if read_only:
            path = u.database or ""

            def connect() -> sqlite3.Connection:
                uri = f"file:{quote(path)}?mode=ro"
                conn = sqlite3.connect(uri, uri=True, timeout=timeout, check_same_thread=False)
                try:
                    conn.execute("SELECT count(*) FROM sqlite_master").fetchone()
                except sqlite3.OperationalError as exc:
                    # a WAL database in a folder this user cannot write, with no -shm file beside it (no writer has
                    # it open): read it as a file nobody changes (SQLite documentation, "WAL mode", read-only
                    # databases; URI parameter "immutable")
                    if getattr(exc, "sqlite_errorname", "") not in ("SQLITE_READONLY_DIRECTORY", "SQLITE_CANTOPEN"):
                        raise
                    conn.close()
                    conn = sqlite3.connect(uri + "&immutable=1", uri=True, timeout=timeout, check_same_thread=False)
                return conn

            return create_engine(url, creator=connect)
        _create_private(url)
        engine = create_engine(url, connect_args={"timeout": timeout})

        @event.listens_for(engine, "connect")
        def _pragmas(conn: Any, _record: Any) -> None:
            cur = conn.cursor()
            # WAL only for a new database or a history: another program's database keeps its journal mode (the
            # history refuses it when it opens; switching to WAL would have changed the file)
            mine = cur.execute("SELECT count(*) = 0 OR sum(name IN ('alembic_version', 'runs')) > 0 "
                               "FROM sqlite_master WHERE type = 'table'").fetchone()[0]
            if mine:
                cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.close()

        return engine
    if u.get_backend_name() != "postgresql":
        return create_engine(url, pool_pre_ping=True)
    ms = max(1, int(timeout * 1000))
    connect_args: dict[str, Any] = {"connect_timeout": max(2, round(timeout)), "keepalives": 1,
                                    "keepalives_idle": 10, "keepalives_interval": 5, "keepalives_count": 3}
    engine = create_engine(url, pool_pre_ping=True, connect_args=connect_args)

    @event.listens_for(engine, "connect")
    def _timeouts(conn: Any, _record: Any) -> None:
        cur = conn.cursor()
        cur.execute(f"SET lock_timeout = {ms}")
        cur.execute(f"SET statement_timeout = {ms}")
        if read_only:
            cur.execute("SET default_transaction_read_only = on")
        cur.close()
        conn.commit()  # SET inside the driver's implicit transaction would be undone by the pool's rollback

    return engine


def _create_private(url: str) -> None:
    """Create a SQLite file that does not exist yet with mode 0600 (owner only; SQLite gives its -wal and -shm
    files the mode of the database file), so the alarm history is not readable by every user of the machine.

    A missing folder is left to SQLite's own error; an existing file keeps its mode.
    """
    database = make_url(url).database
    if not database or database == ":memory:" or database.startswith("file:"):
        return
    with contextlib.suppress(FileExistsError, FileNotFoundError, NotADirectoryError, PermissionError):
        os.close(os.open(database, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))


def sqlite_url(path: str) -> str:
    """The SQLAlchemy URL of a SQLite file.

    >>> sqlite_url("/var/lib/spanwatch/q2.db")
    'sqlite:////var/lib/spanwatch/q2.db'
    """
    return f"sqlite:///{path}"
