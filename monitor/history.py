"""Alarm history in a relational database through SQLAlchemy 2.x.

SQLite by default (a file, in WAL mode so a reader never blocks the writer and a
crash never loses a committed transaction), PostgreSQL for a plant
(``postgresql+psycopg://user@host/db``). Tables:

* ``runs`` — one per replay, demo or daemon start: config file and hash, mode.
* ``alarm_events`` — the journal: every transition (raise, clear) with time, check,
  object, level, value, limit, priority, line state and config hash. Append-only.
* ``alarm_episodes`` — one row per raise, completed by its clear: what a listing or
  a shift report reads.
* ``alarm_context`` — the signals a check read, from shortly before to shortly after
  each raise.
* ``input_issues`` — per run, per tag and reason, how many samples were refused or
  flagged, with the first line numbers.

Times are epoch seconds (UTC) as floats; they are shown in ISO 8601.
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from spanwatch.rules.alarms import AlarmEngine, Transition
from spanwatch.rules.base import state_name
from spanwatch.rules.values import finite_or_none, iso
from sqlalchemy import (
    Float,
    ForeignKey,
    Index,
    Integer,
    String,
    Text,
    create_engine,
    event,
    select,
)
from sqlalchemy.engine import Engine
from sqlalchemy.orm import DeclarativeBase, Mapped, Session, mapped_column


class Base(DeclarativeBase):
    pass


class Run(Base):
    __tablename__ = "runs"
    id: Mapped[int] = mapped_column(primary_key=True)
    started_at: Mapped[float] = mapped_column(Float)
    finished_at: Mapped[float | None] = mapped_column(Float, nullable=True)
    mode: Mapped[str] = mapped_column(String(16))
    line_name: Mapped[str] = mapped_column(String(200))
    config_file: Mapped[str] = mapped_column(String(500))
    config_hash: Mapped[str] = mapped_column(String(64))
    source: Mapped[str] = mapped_column(String(500), default="")
    data_start: Mapped[float | None] = mapped_column(Float, nullable=True)
    data_end: Mapped[float | None] = mapped_column(Float, nullable=True)


class AlarmEvent(Base):
    __tablename__ = "alarm_events"
    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id"), index=True)
    t: Mapped[float] = mapped_column(Float, index=True)
    alarm_key: Mapped[str] = mapped_column(String(200), index=True)
    kind: Mapped[str] = mapped_column(String(40))
    object_id: Mapped[str] = mapped_column(String(200))
    level: Mapped[str] = mapped_column(String(16))
    event: Mapped[str] = mapped_column(String(16))
    value: Mapped[float | None] = mapped_column(Float, nullable=True)
    limit: Mapped[float] = mapped_column(Float)
    priority: Mapped[str] = mapped_column(String(16))
    line_state: Mapped[str] = mapped_column(String(16))
    config_hash: Mapped[str] = mapped_column(String(64))


class AlarmEpisode(Base):
    __tablename__ = "alarm_episodes"
    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id"), index=True)
    alarm_key: Mapped[str] = mapped_column(String(200))
    kind: Mapped[str] = mapped_column(String(40), index=True)
    object_id: Mapped[str] = mapped_column(String(200), index=True)
    level: Mapped[str] = mapped_column(String(16))
    priority: Mapped[str] = mapped_column(String(16))
    unit: Mapped[str] = mapped_column(String(40))
    raised_t: Mapped[float] = mapped_column(Float, index=True)
    cleared_t: Mapped[float | None] = mapped_column(Float, nullable=True)
    raise_value: Mapped[float | None] = mapped_column(Float, nullable=True)
    peak_value: Mapped[float | None] = mapped_column(Float, nullable=True)
    limit: Mapped[float] = mapped_column(Float)
    line_state: Mapped[str] = mapped_column(String(16))
    config_hash: Mapped[str] = mapped_column(String(64))
    __table_args__ = (Index("ix_episode_open", "alarm_key", "cleared_t"),)


class AlarmContext(Base):
    __tablename__ = "alarm_context"
    id: Mapped[int] = mapped_column(primary_key=True)
    episode_id: Mapped[int] = mapped_column(ForeignKey("alarm_episodes.id"), index=True)
    signal: Mapped[str] = mapped_column(String(200))
    t0: Mapped[float] = mapped_column(Float)
    dt: Mapped[float] = mapped_column(Float)
    values: Mapped[str] = mapped_column(Text)  # JSON list, null for unusable frames


class InputIssue(Base):
    __tablename__ = "input_issues"
    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id"), index=True)
    tag: Mapped[str] = mapped_column(String(200))
    reason: Mapped[str] = mapped_column(String(60))
    count: Mapped[int] = mapped_column(Integer)
    refs: Mapped[str] = mapped_column(Text)




def make_engine(url: str) -> Engine:
    """Create an engine; SQLite files get WAL journaling and a busy timeout."""
    if url.startswith("sqlite"):
        engine = create_engine(url, connect_args={"timeout": 30})

        @event.listens_for(engine, "connect")
        def _pragmas(conn: Any, _record: Any) -> None:
            cur = conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.close()

        return engine
    return create_engine(url, pool_pre_ping=True)


def sqlite_url(path: str) -> str:
    return f"sqlite:///{path}"


@dataclass(frozen=True)
class Context:
    """A window of one signal around a raise."""

    key: str
    raised_t: float
    signal: str
    t0: float
    dt: float
    values: list[float | None]


class History:
    """Writes transitions, episodes, contexts and input issues; reads episodes back."""

    def __init__(self, url: str) -> None:
        self.url = url
        self.engine = make_engine(url)
        Base.metadata.create_all(self.engine)
        self.run_id: int | None = None
        self.config_hash = ""
        self._open: dict[str, int] = {}  # alarm key -> open episode id
        self._raised: dict[tuple[str, float], int] = {}  # (alarm key, raise time) -> episode id, until its context

    def start_run(self, *, mode: str, line_name: str, config_file: str, config_hash: str, source: str = "",
                  started_at: float | None = None) -> int:
        self.config_hash = config_hash
        with Session(self.engine) as s, s.begin():
            run = Run(started_at=started_at if started_at is not None else datetime.now(UTC).timestamp(), mode=mode,
                      line_name=line_name, config_file=config_file, config_hash=config_hash, source=source)
            s.add(run)
            s.flush()
            self.run_id = run.id
        return self.run_id

    def restore_open(self, engine: AlarmEngine) -> int:
        """Carry on alarms a previous run left open: mark them active in ``engine`` and adopt their episodes.

        Open episodes whose alarm no longer exists in the current configuration are closed at the
        time of this run's start. Returns the number of alarms restored.
        """
        restored = 0
        with Session(self.engine) as s, s.begin():
            start = s.get(Run, self.run_id)
            if start is None:
                return 0
            same_kind = select(Run.id).where(Run.mode == start.mode, Run.line_name == start.line_name,
                                             Run.id != self.run_id)
            rows = s.scalars(select(AlarmEpisode).where(AlarmEpisode.cleared_t.is_(None),
                                                        AlarmEpisode.run_id.in_(same_kind))).all()
            for ep in rows:
                if ep.alarm_key in self._open:
                    continue
                if engine.restore(ep.alarm_key, ep.raised_t):
                    self._open[ep.alarm_key] = ep.id
                    restored += 1
                else:
                    ep.cleared_t = start.started_at
        return restored

    def record(self, transitions: Iterable[Transition]) -> None:
        """Write transitions in one transaction: journal rows, new episodes, completed episodes."""
        trs = list(transitions)
        if not trs:
            return
        assert self.run_id is not None, "start_run first"
        with Session(self.engine) as s, s.begin():
            for tr in trs:
                p = tr.point
                s.add(AlarmEvent(run_id=self.run_id, t=tr.t, alarm_key=p.key, kind=p.kind, object_id=p.object_id,
                                 level=p.level, event=tr.event, value=finite_or_none(tr.value), limit=p.limit,
                                 priority=p.priority, line_state=state_name(tr.line_state),
                                 config_hash=self.config_hash))
                if tr.event == "raise":
                    ep = AlarmEpisode(run_id=self.run_id, alarm_key=p.key, kind=p.kind, object_id=p.object_id,
                                      level=p.level, priority=p.priority, unit=p.unit, raised_t=tr.t,
                                      raise_value=finite_or_none(tr.value), limit=p.limit,
                                      line_state=state_name(tr.line_state), config_hash=self.config_hash)
                    s.add(ep)
                    s.flush()
                    self._open[p.key] = ep.id
                    self._raised[(p.key, tr.t)] = ep.id
                elif tr.event == "clear":
                    ep_id = self._open.pop(p.key, None)
                    if ep_id is not None:
                        ep2 = s.get(AlarmEpisode, ep_id)
                        if ep2 is not None:
                            ep2.cleared_t = tr.t
                            ep2.peak_value = finite_or_none(tr.peak)

    def record_contexts(self, contexts: Iterable[Context]) -> None:
        """Write context windows; each belongs to the episode raised at its ``raised_t``."""
        rows = []
        done = set()
        for c in contexts:
            ep_id = self._raised.get((c.key, c.raised_t))
            if ep_id is not None:
                rows.append(AlarmContext(episode_id=ep_id, signal=c.signal, t0=c.t0, dt=c.dt,
                                         values=json.dumps(c.values)))
                done.add((c.key, c.raised_t))
        for k in done:
            del self._raised[k]
        if rows:
            with Session(self.engine) as s, s.begin():
                s.add_all(rows)

    def finish_run(self, *, input_rows: list[dict[str, object]], data_start: float | None = None,
                   data_end: float | None = None) -> None:
        with Session(self.engine) as s, s.begin():
            run = s.get(Run, self.run_id)
            if run is not None:
                run.finished_at = datetime.now(UTC).timestamp()
                run.data_start, run.data_end = data_start, data_end
            for r in input_rows:
                s.add(InputIssue(run_id=self.run_id, tag=str(r["tag"]), reason=str(r["reason"]),
                                 count=int(r["count"]),  # type: ignore[call-overload]
                                 refs=json.dumps(r["refs"])))

    def close(self) -> None:
        self.engine.dispose()


def query_episodes(engine: Engine, *, run_id: int | None = None, kind: str | None = None,
                   object_id: str | None = None, priority: str | None = None, level: str | None = None,
                   since: float | None = None, until: float | None = None, active_only: bool = False
                   ) -> list[dict[str, Any]]:
    """Alarm episodes with filters, oldest first, as plain dicts (ISO times included)."""
    q = select(AlarmEpisode).order_by(AlarmEpisode.raised_t, AlarmEpisode.id)
    if run_id is not None:
        q = q.where(AlarmEpisode.run_id == run_id)
    if kind:
        q = q.where(AlarmEpisode.kind == kind)
    if object_id:
        q = q.where(AlarmEpisode.object_id == object_id)
    if priority:
        q = q.where(AlarmEpisode.priority == priority)
    if level:
        q = q.where(AlarmEpisode.level == level)
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
            "check": e.kind, "object": e.object_id, "level": e.level, "priority": e.priority,
            "value": e.raise_value, "peak": e.peak_value, "limit": e.limit, "unit": e.unit,
            "line_state": e.line_state, "config_hash": e.config_hash, "raised_t": e.raised_t,
            "cleared_t": e.cleared_t,
        } for e in rows]


def latest_run(engine: Engine) -> int | None:
    with Session(engine) as s:
        return s.scalar(select(Run.id).order_by(Run.id.desc()).limit(1))
