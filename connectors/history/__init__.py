"""Alarm history in a relational database through SQLAlchemy 2.x: an adapter that knows only ``spanwatch.rules``.

SQLite by default (a file in WAL mode, so a reader never blocks the writer and a crash never loses a
committed transaction), PostgreSQL for a plant (``postgresql+psycopg://user@host/db``). Tables:

* ``runs`` — one per replay, demo or daemon start: config file and hash, mode, span of data.
* ``alarm_events`` — the journal: every transition (raise, clear) with time, check, object, level, value,
  limit, priority, line state, config hash, and the episode it raised or cleared. Append-only.
* ``alarm_episodes`` — one row per raise, completed by its clear: what a listing or a shift report reads.
* ``alarm_context`` — the signals a check read, from shortly before to shortly after each raise.
* ``input_issues`` — per run, per tag and reason, how many samples were refused or flagged, with the
  first line numbers.

Times are epoch seconds (UTC) as floats; they are shown in ISO 8601.

Modules: :mod:`.models` (tables, relationships, closed sets), :mod:`.database` (engines and URLs),
:mod:`.schema` (Alembic revisions in ``migrations/``, applied when a history opens), :mod:`.store`
(the writer, :class:`History`), :mod:`.queries` (the readers).

The schema is created and changed only by Alembic migrations, shipped in ``migrations/`` and applied
when a history opens: revision ``0001`` creates today's tables; a database from before the migrations
(``create_all``, no ``alembic_version`` table) is converted in place to what ``0001`` creates and
stamped with it. The next issue, the ISA-18.2 alarm lifecycle (acknowledge, shelve, suppress), adds
its tables through new revisions (``0002``, ...) in ``migrations/versions/``.
"""

from spanwatch.connectors.history.database import make_engine, sqlite_url
from spanwatch.connectors.history.queries import latest_run, query_episodes
from spanwatch.connectors.history.schema import SchemaError, upgrade
from spanwatch.connectors.history.store import Context, History, OpenEpisode

__all__ = ["Context", "History", "OpenEpisode", "SchemaError", "latest_run", "make_engine", "query_episodes",
           "sqlite_url", "upgrade"]
