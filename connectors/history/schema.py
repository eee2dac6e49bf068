"""The history's schema: Alembic revisions shipped inside the package, applied whenever a history opens.

The revisions live in ``migrations/versions/`` next to this module, so an installed wheel can upgrade a
database; Alembic is configured here in code (``script_location`` is the package folder), no
``alembic.ini`` is needed. :func:`upgrade` runs in one transaction that holds the database's write lock
(``BEGIN IMMEDIATE`` on SQLite, an advisory lock on PostgreSQL): a second process opening the same
history waits, then finds it at head; a crash half-way leaves the previous revision intact.

Revision ``0001`` creates the history tables. A database written by spanwatch before the migrations
(tables made by ``create_all``, no ``alembic_version`` table) is recognised by its tables, converted in
place to what ``0001`` creates (``migrations/legacy.py``: unbounded text, CHECK constraints, journal rows
linked to their episodes) and stamped ``0001``, in the same transaction; later revisions then upgrade it
like any other.

To write a new revision (a developer's step, against a scratch database)::

    from alembic import command
    from spanwatch.connectors.history.database import make_engine
    from spanwatch.connectors.history.schema import alembic_config, migration_connection, upgrade

    engine = make_engine("sqlite:////tmp/scratch.db")
    upgrade(engine)
    with migration_connection(engine) as conn:
        command.revision(alembic_config(conn), message="alarm lifecycle", rev_id="0002", autogenerate=True)

then read the generated file in ``migrations/versions/`` and make it right by hand.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.operations import Operations
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from spanwatch.connectors.history.errors import HistoryError, where
from spanwatch.connectors.history.migrations import legacy
from sqlalchemy import inspect, text
from sqlalchemy.engine import URL, Connection, Engine

MIGRATIONS = Path(__file__).resolve().parent / "migrations"
BASELINE = "0001"  # what a history from before the migrations is converted to
HISTORY_TABLES = ("runs", "alarm_events", "alarm_episodes", "alarm_context", "input_issues")


class SchemaError(HistoryError):
    """The database holds something the history cannot open: a partial, a newer or a foreign schema."""


def alembic_config(connection: Connection | None = None) -> Config:
    """Alembic's configuration for the history's revisions; the migrations run on ``connection``."""
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    cfg.set_main_option("file_template", "%%(rev)s_%%(slug)s")
    cfg.attributes["connection"] = connection
    return cfg


def head() -> str:
    """The newest revision this version of spanwatch knows."""
    rev = ScriptDirectory.from_config(alembic_config()).get_current_head()
    assert rev is not None, f"no revisions in {MIGRATIONS}"
    return rev


def current(engine: Engine) -> str | None:
    """The revision the database is at (None: not under migration control)."""
    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


@contextmanager
def migration_connection(engine: Engine) -> Iterator[Connection]:
    """One connection, in one transaction that holds the database's write lock, committed at the end.

    SQLite: the driver is put in autocommit mode so the transaction is ours (``BEGIN IMMEDIATE``, and
    every DDL statement inside it: the driver would otherwise run DDL outside any transaction), with foreign keys
    off while Alembic's batch mode re-creates tables that others refer to (:func:`upgrade` checks them).
    PostgreSQL: DDL is transactional; a transaction-level advisory lock per schema serialises openers (a second
    waits at most the engine's ``lock_timeout``), and the migration itself has no statement timeout.
    """
    if engine.dialect.name != "sqlite":
        with engine.connect() as conn, conn.begin():
            if engine.dialect.name == "postgresql":
                conn.execute(text("select pg_advisory_xact_lock(hashtext('spanwatch history '"
                                  " || coalesce(current_schema(), '')))"))
                conn.execute(text("SET LOCAL statement_timeout = 0"))  # a migration takes what it takes
            yield conn
        return
    with engine.connect() as base:
        conn = base.execution_options(isolation_level="AUTOCOMMIT")
        raw = conn.connection.dbapi_connection
        assert raw is not None
        conn.exec_driver_sql("PRAGMA foreign_keys=OFF")  # outside a transaction, or SQLite ignores it
        try:
            conn.exec_driver_sql("BEGIN IMMEDIATE")
            yield conn
            conn.exec_driver_sql("COMMIT")
        finally:
            if raw.in_transaction:  # type: ignore[attr-defined]
                conn.exec_driver_sql("ROLLBACK")
            conn.exec_driver_sql("PRAGMA foreign_keys=ON")


def upgrade(engine: Engine) -> str:
    """Bring the history behind ``engine`` to the newest revision (creating it if empty); return the revision.

    Raises :class:`SchemaError` for a database with only some of the history's tables and no revision, for
    one that holds other tables and no history (foreign: spanwatch does not add its tables to another
    program's database), and for one at a revision this version of spanwatch does not know (written by a
    newer one, or by another program that uses Alembic).
    """
    newest = head()
    if current(engine) == newest:  # the usual case: no lock taken
        return newest
    with migration_connection(engine) as conn:
        cfg = alembic_config(conn)
        db = where(engine.url)
        tables = set(inspect(conn).get_table_names())
        present = [t for t in HISTORY_TABLES if t in tables]
        converted = "alembic_version" not in tables and bool(present)
        if "alembic_version" not in tables and not present and tables:
            raise SchemaError(foreign(engine.url, tables))
        if converted:  # written by spanwatch before it had migrations
            if len(present) < len(HISTORY_TABLES):
                missing = [t for t in HISTORY_TABLES if t not in tables]
                raise SchemaError(f"{db}: has the history tables {present} but not {missing}, and no "
                                  "alembic_version table: not a spanwatch history this version can open")
            with Operations.context(MigrationContext.configure(conn)):
                legacy.upgrade()
            command.stamp(cfg, BASELINE)
        at = MigrationContext.configure(conn).get_current_revision()
        known = {s.revision for s in ScriptDirectory.from_config(cfg).walk_revisions()}
        if at is not None and at not in known:
            raise SchemaError(unknown_revision(db, at, newest))
        if at != newest:  # another process may have upgraded it while this one waited for the lock
            command.upgrade(cfg, "head")
        if converted and engine.dialect.name == "sqlite":  # batch mode ran with foreign keys off
            broken = conn.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
            if broken:
                raise SchemaError(f"{db}: the conversion left rows whose foreign key points nowhere: {broken[:5]}")
    return newest


def foreign(url: str | URL, tables: set[str] | list[str]) -> str:
    """The message for a database that holds other tables and no spanwatch history."""
    names = sorted(tables)
    shown = ", ".join(names[:5]) + (f" and {len(names) - 5} more" if len(names) > 5 else "")
    return (f"{where(url)}: holds other tables ({shown}) and no spanwatch history: not a spanwatch history; give "
            "spanwatch its own database file, or its own database or schema on a server")


def unknown_revision(db: str, at: str, newest: str) -> str:
    return (f"{db}: the history is at schema revision {at!r}, which this version of spanwatch does not know (it "
            f"knows up to {newest!r}): written by a newer spanwatch, or by another program")


def check_readable(engine: Engine) -> str | None:
    """Make sure the database behind ``engine`` is a spanwatch history this version can read; return its revision.

    Reads only (a reader never upgrades). Raises :class:`SchemaError` for an empty database, a foreign one
    (other tables, no history), one with only some of the history's tables, and one at a revision this
    version does not know; a history from before the migrations (all its tables, no revision) is read as
    it is. Driver errors (locked, corrupt, unreadable) propagate for the caller to classify.
    """
    db = where(engine.url)
    with engine.connect() as conn:
        tables = set(inspect(conn).get_table_names())
        at = MigrationContext.configure(conn).get_current_revision() if "alembic_version" in tables else None
    present = [t for t in HISTORY_TABLES if t in tables]
    if not tables:
        raise SchemaError(f"{db}: empty: no spanwatch history in it yet")
    if "alembic_version" not in tables and not present:
        raise SchemaError(foreign(engine.url, tables))
    if at is not None:
        known = {s.revision for s in ScriptDirectory.from_config(alembic_config()).walk_revisions()}
        if at not in known:
            raise SchemaError(unknown_revision(db, at, head()))
    if len(present) < len(HISTORY_TABLES):
        missing = [t for t in HISTORY_TABLES if t not in tables]
        raise SchemaError(f"{db}: has the history tables {present} but not {missing}: not a spanwatch history this "
                          "version can read")
    return at
