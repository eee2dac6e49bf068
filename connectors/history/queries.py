"""The readers: opening a history to read it, alarm episodes with filters (what ``spanwatch alarms`` lists), the
episodes active during a window (what ``spanwatch kpi`` measures) and the latest run."""

from __future__ import annotations

import enum
from pathlib import Path
from typing import Any

from spanwatch.connectors.history.database import make_engine
from spanwatch.connectors.history.errors import HistoryError, classify
from spanwatch.connectors.history.models import AlarmEpisode, Level, Priority, Run
from spanwatch.connectors.history.schema import check_readable
from spanwatch.rules.values import iso
from sqlalchemy import false, or_, select
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import Session

READ_TIMEOUT_S = 10.0


def open_reader(url: str, *, timeout: float = READ_TIMEOUT_S) -> Engine:
    """An engine that reads the history at ``url`` and changes nothing (no upgrade, no journal mode), checked first.

    Raises :class:`HistoryError` (one line) for a missing SQLite file, a database that cannot be opened or read
    (permissions, locked beyond ``timeout`` seconds, corrupt, not a database) and one that is not a spanwatch
    history this version can read (empty, foreign tables, an unknown schema revision). A read-only file or
    folder can be read.
    """
    u = make_url(url)
    if u.get_backend_name() == "sqlite":
        path = Path(u.database or "")
        if not u.database or not path.exists():
            raise HistoryError(f"{u.database or url}: no such database")
        if path.is_dir():
            raise HistoryError(f"{path}: a folder, not a database file")
    engine = make_engine(url, timeout=timeout, read_only=True)
    try:
        check_readable(engine)
    except HistoryError:
        engine.dispose()
        raise
    except (SQLAlchemyError, OSError) as exc:
        engine.dispose()
        raise classify(exc, url, timeout=timeout, doing="reading") from exc
    return engine


def query_episodes(engine: Engine, *, run_id: int | None = None, kind: str | None = None,
                   object_id: str | None = None, priority: str | None = None, level: str | None = None,
                   since: float | None = None, until: float | None = None, active_only: bool = False
                   ) -> list[dict[str, Any]]:
    """Alarm episodes with filters, oldest first, as plain dicts (ISO times included).

    ``since`` is inclusive and ``until`` exclusive, on the raise time; a ``priority`` or ``level``
    outside its closed set matches nothing.
    """
    q = select(AlarmEpisode).order_by(AlarmEpisode.raised_t, AlarmEpisode.id)
    if run_id is not None:
        q = q.where(AlarmEpisode.run_id == run_id)
    if kind:
        q = q.where(AlarmEpisode.kind == kind)
    if object_id:
        q = q.where(AlarmEpisode.object_id == object_id)
    if priority:
        q = q.where(AlarmEpisode.priority == Priority(priority) if priority in _values(Priority) else false())
    if level:
        q = q.where(AlarmEpisode.level == Level(level) if level in _values(Level) else false())
    if since is not None:
        q = q.where(AlarmEpisode.raised_t >= since)
    if until is not None:
        q = q.where(AlarmEpisode.raised_t < until)
    if active_only:
        q = q.where(AlarmEpisode.cleared_t.is_(None))
    with Session(engine) as s:
        rows = s.scalars(q).all()
        return [{
            "id": e.id, "run": e.run_id, "raised": iso(e.raised_t), "cleared": iso(e.cleared_t),
            "duration_s": None if e.cleared_t is None else round(e.cleared_t - e.raised_t, 3),
            "check": e.kind, "object": e.object_id, "level": str(e.level), "priority": str(e.priority),
            "value": e.raise_value, "peak": e.peak_value, "limit": e.limit, "unit": e.unit,
            "line_state": e.line_state, "config_hash": e.config_hash, "raised_t": e.raised_t,
            "cleared_t": e.cleared_t,
        } for e in rows]


def episodes_in_window(engine: Engine, start: float, end: float, line_name: str | None = None
                       ) -> list[dict[str, Any]]:
    """Every episode active during ``[start, end)``: raised before ``end`` and cleared after ``start`` or not
    cleared; of the runs of ``line_name`` only if given. Oldest raise first, as plain dicts (alarm_key, kind,
    object_id, level, priority, raised_t, cleared_t — None while active)."""
    q = (select(AlarmEpisode.alarm_key, AlarmEpisode.kind, AlarmEpisode.object_id, AlarmEpisode.level,
                AlarmEpisode.priority, AlarmEpisode.raised_t, AlarmEpisode.cleared_t)
         .where(AlarmEpisode.raised_t < end,
                or_(AlarmEpisode.cleared_t.is_(None), AlarmEpisode.cleared_t > start))
         .order_by(AlarmEpisode.raised_t, AlarmEpisode.id))
    if line_name is not None:
        q = q.join(Run, Run.id == AlarmEpisode.run_id).where(Run.line_name == line_name)
    with Session(engine) as s:
        return [{"alarm_key": k, "kind": kind, "object_id": o, "level": str(lv), "priority": str(p), "raised_t": r,
                 "cleared_t": c} for k, kind, o, lv, p, r, c in s.execute(q).all()]


def _values(cls: type[enum.StrEnum]) -> set[str]:
    return {m.value for m in cls}


def latest_run(engine: Engine) -> int | None:
    """The id of the newest run, or None for an empty history."""
    with Session(engine) as s:
        return s.scalar(select(Run.id).order_by(Run.id.desc()).limit(1))
