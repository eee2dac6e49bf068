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
* ``writer_locks`` — which daemon writes each line into this history, with its heartbeat.
* ``alarm_actions`` — the lifecycle journal: every acknowledge, reset, shelve, suppression, out of service,
  raise and clear as the lifecycle saw it, with who, why and the states before and after. Append-only.
* ``alarm_states`` — the current lifecycle record of each alarm of a line (restored at a daemon's start).
* ``action_requests`` — operators' requests to a running daemon, and its answers (:mod:`.requests`).
* ``config_versions`` — the text of each configuration a line ran with (secrets removed), once per hash.
* ``check_minutes`` — each check's value per object and minute: frames, valid frames, least, mean and greatest
  valid value, unit (:mod:`.trends`: :func:`query_check_minutes` reads them for a trend plot).

Times are epoch seconds (UTC) as floats; they are shown in ISO 8601.

Modules: :mod:`.models` (tables, relationships, closed sets), :mod:`.database` (engines and URLs),
:mod:`.schema` (Alembic revisions in ``migrations/``, applied when a history opens), :mod:`.store`
(the store, :class:`History`), :mod:`.queries` (the readers), :mod:`.trends` (the checks' minutes: rows, reader,
retention), :mod:`.requests` (operators' requests),
:mod:`.errors` (every failure as one line), :mod:`.lock` (one writer per line), :mod:`.spool` (the
store-and-forward file) and :mod:`.writer` (the daemon's writer thread in front of the store, with the spool).

The schema is created and changed only by Alembic migrations, shipped in ``migrations/`` and applied
when a history opens: revision ``0001`` creates the tables; ``0002`` adds how a run ended
(``runs.end_state``: finished, failed, interrupted), the last write of its writer applied
(``runs.written_seq``) and ``writer_locks``. A database from before the migrations (``create_all``, no
``alembic_version`` table) is converted in place to what ``0001`` creates and stamped with it. ``0003``
adds the ISA-18.2 alarm lifecycle: the rationalization and flags on episodes, five priorities, and the tables
``alarm_actions``, ``alarm_states``, ``action_requests``, ``config_versions``. ``0004`` adds what a raise blames
and carries (``alarm_episodes.blames``, ``detail``); ``0005`` the table ``check_minutes``.
"""

from spanwatch.connectors.history.database import make_engine, sqlite_url
from spanwatch.connectors.history.errors import HistoryError, HistoryUnavailable, WriterLockBusy
from spanwatch.connectors.history.queries import (
    actions_of,
    config_at,
    episode_detail,
    episodes_in_window,
    latest_run,
    open_reader,
    prune_context,
    query_episodes,
)
from spanwatch.connectors.history.schema import SchemaError, upgrade
from spanwatch.connectors.history.store import Context, History, HistorySink, OpenEpisode, RequestAnswer
from spanwatch.connectors.history.trends import CheckMinute, prune_check_minutes, query_check_minutes

__all__ = [
    "CheckMinute",
    "Context",
    "History",
    "HistoryError",
    "HistorySink",
    "HistoryUnavailable",
    "OpenEpisode",
    "RequestAnswer",
    "SchemaError",
    "WriterLockBusy",
    "actions_of",
    "config_at",
    "episode_detail",
    "episodes_in_window",
    "latest_run",
    "make_engine",
    "open_reader",
    "prune_check_minutes",
    "prune_context",
    "query_check_minutes",
    "query_episodes",
    "sqlite_url",
    "upgrade",
]
