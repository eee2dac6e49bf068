"""Connections to the history database: SQLite files in WAL mode, PostgreSQL with connection checks."""

from __future__ import annotations

import contextlib
import os
from typing import Any

from sqlalchemy import create_engine, event
from sqlalchemy.engine import Engine, make_url

SQLITE_BUSY_TIMEOUT_S = 30.0


def make_engine(url: str) -> Engine:
    """An engine for ``url``.

    SQLite files get WAL journaling (a reader never blocks the writer, a committed transaction survives
    a crash), ``synchronous=NORMAL``, foreign keys enforced and a busy timeout, and a file spanwatch creates
    is created with mode 0600; other databases get
    ``pool_pre_ping`` so a connection the server dropped is replaced instead of failing a write.
    """
    if url.startswith("sqlite"):
        _create_private(url)
        engine = create_engine(url, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_S})

        @event.listens_for(engine, "connect")
        def _pragmas(conn: Any, _record: Any) -> None:
            cur = conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.close()

        return engine
    return create_engine(url, pool_pre_ping=True)


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
