"""The readers: opening a history to read it, alarm episodes with filters, the episodes active during a window
(what ``spanwatch kpi`` measures and ``spanwatch alarms`` lists), one episode in full and the signals kept around
it, the lifecycle journal, the configuration in force at a time or kept under a hash, the runs (``spanwatch runs``)
and the latest run; and the one deletion the history allows, of old context windows."""

from __future__ import annotations

import enum
import json
from pathlib import Path
from typing import Any

from spanwatch.connectors.history.database import make_engine
from spanwatch.connectors.history.errors import HistoryError, classify
from spanwatch.connectors.history.models import (
    AlarmAction,
    AlarmContext,
    AlarmEpisode,
    AlarmEvent,
    ConfigVersion,
    Level,
    Priority,
    Run,
)
from spanwatch.connectors.history.schema import check_readable
from spanwatch.connectors.history.store import shelve_end_of
from spanwatch.rules.values import iso
from sqlalchemy import delete, false, func, inspect, null, or_, select
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import Session, load_only

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


def _episode_filters(q: Any, kind: str | None, object_id: str | None, priority: str | None,
                     level: str | None) -> Any:
    """``q`` narrowed to one check kind, object, priority and level where given; a priority or level outside its
    closed set matches nothing."""
    if kind:
        q = q.where(AlarmEpisode.kind == kind)
    if object_id:
        q = q.where(AlarmEpisode.object_id == object_id)
    if priority:
        q = q.where(AlarmEpisode.priority == Priority(priority) if priority in _values(Priority) else false())
    if level:
        q = q.where(AlarmEpisode.level == Level(level) if level in _values(Level) else false())
    return q


def query_episodes(engine: Engine, *, run_id: int | None = None, kind: str | None = None,
                   object_id: str | None = None, priority: str | None = None, level: str | None = None,
                   since: float | None = None, until: float | None = None, active_only: bool = False
                   ) -> list[dict[str, Any]]:
    """Alarm episodes with filters, oldest first, as plain dicts (ISO times included).

    ``since`` is inclusive and ``until`` exclusive, on the raise time; a ``priority`` or ``level``
    outside its closed set matches nothing.
    """
    q = select(AlarmEpisode).options(load_only(*_BASE)).order_by(AlarmEpisode.raised_t, AlarmEpisode.id)
    if run_id is not None:
        q = q.where(AlarmEpisode.run_id == run_id)
    q = _episode_filters(q, kind, object_id, priority, level)
    if since is not None:
        q = q.where(AlarmEpisode.raised_t >= since)
    if until is not None:
        q = q.where(AlarmEpisode.raised_t < until)
    if active_only:
        q = q.where(AlarmEpisode.cleared_t.is_(None))
    with Session(engine) as s:
        return [_episode(e) for e in s.scalars(q).all()]


# the columns of an episode since revision 0001: a reader lists a history at an older revision as it is
_BASE = (AlarmEpisode.id, AlarmEpisode.run_id, AlarmEpisode.alarm_key, AlarmEpisode.kind, AlarmEpisode.object_id,
         AlarmEpisode.level, AlarmEpisode.priority, AlarmEpisode.unit, AlarmEpisode.raised_t, AlarmEpisode.cleared_t,
         AlarmEpisode.raise_value, AlarmEpisode.peak_value, AlarmEpisode.limit, AlarmEpisode.line_state,
         AlarmEpisode.config_hash)
_RATIONALE = ("cause", "consequence", "corrective_action", "response_time", "first_out", "chattering")


def _episode(e: AlarmEpisode) -> dict[str, Any]:
    return {
        "id": e.id, "run": e.run_id, "raised": iso(e.raised_t), "cleared": iso(e.cleared_t),
        "duration_s": None if e.cleared_t is None else round(e.cleared_t - e.raised_t, 3),
        "check": e.kind, "object": e.object_id, "level": str(e.level), "priority": str(e.priority),
        "value": e.raise_value, "peak": e.peak_value, "limit": e.limit, "unit": e.unit,
        "line_state": e.line_state, "config_hash": e.config_hash, "raised_t": e.raised_t,
        "cleared_t": e.cleared_t,
    }


def _action(a: AlarmAction) -> dict[str, Any]:
    return {"id": a.id, "run": a.run_id, "line": a.line_name, "episode": a.episode_id, "key": a.alarm_key,
            "t": a.t, "time": iso(a.t), "action": str(a.action), "origin": str(a.origin), "user": a.user,
            "comment": a.comment, "before": str(a.state_before), "after": str(a.state_after),
            "until": shelve_end_of(a.until, a.one_shot), "one_shot": bool(a.one_shot), "request": a.request_id}


def episode_detail(engine: Engine, episode_id: int) -> dict[str, Any] | None:
    """One episode in full, or None: its row (as :func:`query_episodes`), its rationalization (``cause``,
    ``consequence``, ``corrective_action``, ``response_time`` in s; None on episodes from before they were kept),
    its flags (``first_out``, ``chattering``), what it names (``blames``) and the values it carried at the raise
    (``detail``: a drift's ``change_time`` (epoch s), ``shift``, ``mean`` and ``sigma`` in its residual's unit;
    empty before revision 0004), its transitions (``events``), its lifecycle changes and operator
    actions (``actions``, oldest first) and the names of the signals kept around its raise (``context``).

    A one-shot shelve's ``until`` is ``inf`` in ``actions`` (``one_shot`` says so too). A history at a revision
    before the lifecycle (read as it is) gives None for those and no actions.
    """
    with Session(engine) as s:
        insp = inspect(s.connection())
        lifecycle = insp.has_table("alarm_actions")
        detailed = "detail" in {c["name"] for c in insp.get_columns("alarm_episodes")}
        cols = (*_BASE, *(getattr(AlarmEpisode, c) for c in _RATIONALE)) if lifecycle else _BASE
        if detailed:
            cols = (*cols, AlarmEpisode.blames, AlarmEpisode.detail)
        e = s.scalar(select(AlarmEpisode).options(load_only(*cols)).where(AlarmEpisode.id == episode_id))
        if e is None:
            return None
        out = _episode(e)
        out.update({"key": e.alarm_key, **{c: getattr(e, c) if lifecycle else None for c in _RATIONALE}})
        out["blames"] = e.blames.split(",") if detailed and e.blames else []
        out["detail"] = json.loads(e.detail) if detailed and e.detail else {}
        out.update({
            "events": [{"id": ev.id, "run": ev.run_id, "t": ev.t, "time": iso(ev.t), "event": str(ev.event),
                        "value": ev.value, "limit": ev.limit, "line_state": ev.line_state} for ev in
                       s.scalars(select(AlarmEvent).where(AlarmEvent.episode_id == episode_id)
                                 .order_by(AlarmEvent.t, AlarmEvent.id))],
            "actions": [_action(a) for a in s.scalars(select(AlarmAction).where(AlarmAction.episode_id == episode_id)
                                                      .order_by(AlarmAction.t, AlarmAction.id))] if lifecycle else [],
            "context": list(s.scalars(select(AlarmContext.signal).where(AlarmContext.episode_id == episode_id)
                                      .order_by(AlarmContext.id))),
        })
        return out


def episode_extras(engine: Engine, ids: list[int]) -> dict[int, dict[str, Any]]:
    """For each episode id: its rationalization, flags and the lifecycle state it was last recorded in (``state``:
    the state after the newest lifecycle change tied to it). Empty on a history from before the lifecycle."""
    out: dict[int, dict[str, Any]] = {}
    if not ids:
        return out
    with Session(engine) as s:
        if not inspect(s.connection()).has_table("alarm_actions"):
            return out
        for chunk in range(0, len(ids), 500):
            part = ids[chunk:chunk + 500]
            for e in s.scalars(select(AlarmEpisode).options(load_only(*(getattr(AlarmEpisode, c) for c in _RATIONALE)))
                               .where(AlarmEpisode.id.in_(part))):
                out[e.id] = {c: getattr(e, c) for c in _RATIONALE}
                out[e.id]["state"] = None
            last = (select(AlarmAction.episode_id, func.max(AlarmAction.id).label("last"))
                    .where(AlarmAction.episode_id.in_(part)).group_by(AlarmAction.episode_id).subquery())
            for ep, state in s.execute(select(AlarmAction.episode_id, AlarmAction.state_after)
                                       .join(last, AlarmAction.id == last.c.last)):
                if ep in out:
                    out[ep]["state"] = str(state)
    return out


def actions_of(engine: Engine, *, line_name: str | None = None, alarm_key: str | None = None,
               since: float | None = None, until: float | None = None) -> list[dict[str, Any]]:
    """The lifecycle journal (``alarm_actions``) with filters, oldest first, as plain dicts.

    ``alarm_key``: a full key, or "kind:object" for every level of that check on that object; ``since``
    inclusive, ``until`` exclusive (epoch s).
    """
    q = select(AlarmAction).order_by(AlarmAction.t, AlarmAction.id)
    if line_name is not None:
        q = q.where(AlarmAction.line_name == line_name)
    if alarm_key:
        q = q.where(or_(AlarmAction.alarm_key == alarm_key,
                        AlarmAction.alarm_key.startswith(alarm_key + ":", autoescape=True)))
    if since is not None:
        q = q.where(AlarmAction.t >= since)
    if until is not None:
        q = q.where(AlarmAction.t < until)
    with Session(engine) as s:
        return [_action(a) for a in s.scalars(q)]


def config_at(engine: Engine, line_name: str, t: float, *, last_used: bool = False) -> dict[str, Any] | None:
    """The configuration ``line_name`` ran with at ``t`` (epoch s), as saved in ``config_versions``, or None.

    The run of the line covering ``t`` is the latest started at or before ``t`` that had not finished before it
    (a run killed without a finish time covers up to the next run's start); None when no run covers ``t`` or its
    configuration's text was not saved. ``last_used``: when no run covers ``t``, the configuration of the latest
    run before it (``covering`` in the result says which).
    """
    with Session(engine) as s:
        run = s.execute(select(Run.id, Run.config_hash, Run.finished_at)
                        .where(Run.line_name == line_name, Run.started_at <= t)
                        .order_by(Run.started_at.desc(), Run.id.desc()).limit(1)).first()
        covering = run is not None and (run.finished_at is None or run.finished_at >= t)
        if run is None or (not covering and not last_used):
            return None
        v = s.scalar(select(ConfigVersion).where(ConfigVersion.line_name == line_name,
                                                 ConfigVersion.config_hash == run.config_hash))
        if v is None:
            return None
        return {"id": v.id, "line": v.line_name, "config_hash": v.config_hash, "config_file": v.config_file,
                "content": v.content, "saved_at": v.saved_at, "saved": iso(v.saved_at), "saved_by": v.saved_by,
                "run": run.id, "covering": covering}


def prune_context(engine: Engine, *, older_than: float | None = None, max_rows: int | None = None) -> int:
    """Delete context windows (``alarm_context`` only) and return how many; the journal, the lifecycle journal and
    the episodes are never deleted.

    ``older_than``: those of episodes raised before it (epoch s); ``max_rows``: then, of what is left, those of the
    oldest episodes (by raise time) beyond the newest ``max_rows`` windows. One transaction.
    """
    if max_rows is not None and max_rows < 0:
        raise ValueError(f"max_rows: expected 0 or more, got {max_rows}")
    order = (AlarmEpisode.raised_t, AlarmEpisode.id, AlarmContext.id)
    with Session(engine) as s, s.begin():
        gone = 0
        if older_than is not None:
            old = select(AlarmEpisode.id).where(AlarmEpisode.raised_t < older_than)
            res = s.execute(delete(AlarmContext).where(AlarmContext.episode_id.in_(old))
                            .execution_options(synchronize_session=False))
            gone += res.rowcount  # type: ignore[attr-defined]
        if max_rows is not None:
            left = int(s.scalar(select(func.count()).select_from(AlarmContext)) or 0)
            if left > max_rows:
                ids = list(s.scalars(select(AlarmContext.id).join(AlarmEpisode, AlarmContext.episode_id
                                                                  == AlarmEpisode.id)
                                     .order_by(*order).limit(left - max_rows)))
                for i in range(0, len(ids), 500):
                    res = s.execute(delete(AlarmContext).where(AlarmContext.id.in_(ids[i:i + 500]))
                                    .execution_options(synchronize_session=False))
                    gone += res.rowcount  # type: ignore[attr-defined]
        return gone


def episodes_in_window(engine: Engine, start: float, end: float, line_name: str | None = None
                       ) -> list[dict[str, Any]]:
    """Every episode active during ``[start, end)``: raised before ``end`` and cleared after ``start`` or not
    cleared; of the runs of ``line_name`` only if given. Oldest raise first, as plain dicts (alarm_key, kind,
    object_id, level, priority, raised_t, cleared_t — None while active)."""
    q = (select(AlarmEpisode.id, AlarmEpisode.alarm_key, AlarmEpisode.kind, AlarmEpisode.object_id, AlarmEpisode.level,
                AlarmEpisode.priority, AlarmEpisode.raised_t, AlarmEpisode.cleared_t)
         .where(AlarmEpisode.raised_t < end,
                or_(AlarmEpisode.cleared_t.is_(None), AlarmEpisode.cleared_t > start))
         .order_by(AlarmEpisode.raised_t, AlarmEpisode.id))
    if line_name is not None:
        q = q.join(Run, Run.id == AlarmEpisode.run_id).where(Run.line_name == line_name)
    with Session(engine) as s:
        return [{"id": i, "alarm_key": k, "kind": kind, "object_id": o, "level": str(lv), "priority": str(p),
                 "raised_t": r, "cleared_t": c} for i, k, kind, o, lv, p, r, c in s.execute(q).all()]


HIDDEN_STATES = ("shelved", "suppressed", "out_of_service")


def hidden_raises(engine: Engine, ids: list[int]) -> set[int]:
    """The episodes among ``ids`` raised while their alarm was shelved, suppressed by design or out of service (the
    state after their raise in ``alarm_actions``): recorded, never shown to the operator. Empty before the lifecycle."""
    out: set[int] = set()
    with Session(engine) as s:
        if not ids or not inspect(s.connection()).has_table("alarm_actions"):
            return out
        for i in range(0, len(ids), 500):
            part = ids[i:i + 500]
            out.update(s.scalars(select(AlarmAction.episode_id).where(
                AlarmAction.episode_id.in_(part), AlarmAction.action == "raise",
                AlarmAction.state_after.in_(HIDDEN_STATES))))
    return out


def _values(cls: type[enum.StrEnum]) -> set[str]:
    return {m.value for m in cls}


def latest_run(engine: Engine) -> int | None:
    """The id of the newest run, or None for an empty history."""
    with Session(engine) as s:
        return s.scalar(select(Run.id).order_by(Run.id.desc()).limit(1))


# --- the review (spanwatch alarms, runs) ---------------------------------------------------------------------------


def list_runs(engine: Engine, line_name: str | None = None) -> list[dict[str, Any]]:
    """Every run (of ``line_name`` if given), oldest first, as plain dicts: id, line, mode, source, config file and
    hash, started/finished and the span of data (epoch s; None where not known), how it ended (``end``: finished,
    failed, interrupted, or None while it runs or was never found so) and its number of alarm episodes."""
    counts = (select(AlarmEpisode.run_id, func.count().label("n")).group_by(AlarmEpisode.run_id).subquery())
    with Session(engine) as s:
        # how a run ended is kept since revision 0002: a history at 0001 is listed as it is, without it
        ended = "end_state" in {c["name"] for c in inspect(s.connection()).get_columns("runs")}
        q = (select(Run.id, Run.line_name, Run.mode, Run.source, Run.config_file, Run.config_hash, Run.started_at,
                    Run.finished_at, Run.data_start, Run.data_end, Run.end_state if ended else null(), counts.c.n)
             .outerjoin(counts, counts.c.run_id == Run.id).order_by(Run.id))
        if line_name is not None:
            q = q.where(Run.line_name == line_name)
        return [{"id": i, "line": ln, "mode": str(m), "source": src, "config_file": cf, "config_hash": ch,
                 "started_t": st, "finished_t": ft, "data_start_t": ds, "data_end_t": de,
                 "end": None if end is None else str(end), "alarms": int(n or 0)}
                for i, ln, m, src, cf, ch, st, ft, ds, de, end, n in s.execute(q).all()]


def review_episodes(engine: Engine, *, run_ids: list[int] | None = None, kind: str | None = None,
                    object_id: str | None = None, priority: str | None = None, level: str | None = None,
                    start: float | None = None, end: float | None = None, active_only: bool = False
                    ) -> list[dict[str, Any]]:
    """Alarm episodes as :func:`query_episodes` gives them, of the runs ``run_ids`` (all if None), ACTIVE during the
    window ``[start, end)``: raised before ``end`` and not cleared at or before ``start`` (an alarm standing since
    before the window is in it). Each row adds ``line`` (its run's line). Oldest raise first."""
    q = (select(AlarmEpisode, Run.line_name).join(Run, Run.id == AlarmEpisode.run_id)
         .options(load_only(*_BASE)).order_by(AlarmEpisode.raised_t, AlarmEpisode.id))
    if run_ids is not None:
        q = q.where(AlarmEpisode.run_id.in_(run_ids) if run_ids else false())
    q = _episode_filters(q, kind, object_id, priority, level)
    if end is not None:
        q = q.where(AlarmEpisode.raised_t < end)
    if start is not None:
        q = q.where(or_(AlarmEpisode.cleared_t.is_(None), AlarmEpisode.cleared_t > start))
    if active_only:
        q = q.where(AlarmEpisode.cleared_t.is_(None))
    with Session(engine) as s:
        return [{**_episode(e), "line": line} for e, line in s.execute(q).all()]


def episode_context(engine: Engine, episode_id: int) -> list[dict[str, Any]]:
    """The signals kept around one raise (``alarm_context``): name, ``t0``, ``dt`` (s) and the values (None where
    unusable), in the order they were kept."""
    with Session(engine) as s:
        rows = s.execute(select(AlarmContext.signal, AlarmContext.t0, AlarmContext.dt, AlarmContext.values)
                         .where(AlarmContext.episode_id == episode_id).order_by(AlarmContext.id)).all()
    return [{"signal": sig, "t0": t0, "dt": dt, "values": json.loads(vals)} for sig, t0, dt, vals in rows]


def kept_config(engine: Engine, line_name: str, config_hash: str) -> str | None:
    """The text of the configuration ``line_name`` ran with under ``config_hash`` (``config_versions``), or None."""
    with Session(engine) as s:
        if not inspect(s.connection()).has_table("config_versions"):
            return None
        return s.scalar(select(ConfigVersion.content).where(ConfigVersion.line_name == line_name,
                                                            ConfigVersion.config_hash == config_hash))
