"""The store: one run's transitions, episodes, context windows, checks' minutes, input issues and alarm lifecycle.

Every :meth:`History.record` is one transaction (journal rows, new episodes, completed episodes, lifecycle
changes and operator actions, the current lifecycle records, the answers to operators' requests), so a
crash or ``kill -9`` loses nothing committed and leaves nothing half-written. The store knows alarm
keys and episodes, not the alarm engine: carrying an alarm on across a restart is the application's
job, with :meth:`History.open_episodes`, :meth:`History.adopt` and :meth:`History.close_episodes`.

Every failure of a public method is a :class:`~spanwatch.connectors.history.errors.HistoryError` that says
in one line what is wrong (:func:`~spanwatch.connectors.history.errors.classify`). A write may carry the
number ``seq`` its writer gave it: the run's ``written_seq`` is set to it in the same transaction, so a
writer that replays writes from its spool (:mod:`.writer`) skips those the database already has.
:meth:`History.resume` and :meth:`History.resync` rebuild the store's memory of open episodes from the
database, for a writer that lost track (a failed commit) or replays the spool of a run a killed process
left behind.
"""

from __future__ import annotations

import functools
import json
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import ParamSpec, Protocol, TypeVar

from spanwatch.connectors.history.database import SQLITE_BUSY_TIMEOUT_S, make_engine
from spanwatch.connectors.history.errors import HistoryError, classify
from spanwatch.connectors.history.models import (
    ActionRequest,
    AlarmAction,
    AlarmContext,
    AlarmEpisode,
    AlarmEvent,
    AlarmStateRow,
    ConfigVersion,
    InputIssue,
    Origin,
    RequestStatus,
    Run,
    RunEnd,
    RunMode,
)
from spanwatch.connectors.history.schema import upgrade
from spanwatch.connectors.history.trends import CheckMinute, insert_statement, minute_tuples
from spanwatch.rules.alarms import Transition
from spanwatch.rules.base import state_name
from spanwatch.rules.lifecycle import LifecycleEvent, Record
from spanwatch.rules.values import finite_or_none
from sqlalchemy import and_, func, select, update
from sqlalchemy.exc import IntegrityError, SQLAlchemyError
from sqlalchemy.orm import Session

P = ParamSpec("P")
R = TypeVar("R")


@dataclass(frozen=True)
class Context:
    """A window of one signal around a raise: ``values[i]`` at ``t0 + i * dt`` (None where unusable)."""

    key: str
    raised_t: float
    signal: str
    t0: float
    dt: float
    values: list[float | None]


@dataclass(frozen=True)
class OpenEpisode:
    """An episode raised and not cleared, as an earlier run left it."""

    episode_id: int
    alarm_key: str
    raised_t: float
    run_id: int


@dataclass(frozen=True)
class RequestAnswer:
    """The daemon's answer to an operator's request (``action_requests``): ``status`` applied or refused, and
    ``answer``: what was done, or the refusal's message; ``answered_at``: epoch s."""

    request_id: int
    status: str
    answer: str
    answered_at: float


def shelve_end(until: float | None) -> tuple[float | None, bool]:
    """A shelve's end as stored: (time or None, one-shot). ``inf`` (until the alarm clears) is (None, True).

    >>> shelve_end(float("inf")), shelve_end(1.5), shelve_end(None)
    ((None, True), (1.5, False), (None, False))
    """
    if until is None or math.isnan(until):
        return None, False
    if until == math.inf:
        return None, True
    return float(until), False


def shelve_end_of(until: float | None, one_shot: bool) -> float | None:
    """The inverse of :func:`shelve_end`."""
    return math.inf if one_shot else until


class HistorySink(Protocol):
    """What the pipeline writes to: a :class:`History` (replay, demo) or a writer thread in front of one (daemon)."""

    def record(self, transitions: Iterable[Transition], *, lifecycle: Sequence[LifecycleEvent] = (),
               states: Mapping[str, Record] | None = None, answers: Sequence[RequestAnswer] = (),
               after: Callable[[], None] | None = None) -> None: ...

    def record_contexts(self, contexts: Iterable[Context]) -> None: ...

    def record_minutes(self, rows: Sequence[CheckMinute]) -> None: ...

    def finish_run(self, *, input_rows: Sequence[dict[str, object]], data_start: float | None = None,
                   data_end: float | None = None) -> None: ...


def _said(doing: str) -> Callable[[Callable[P, R]], Callable[P, R]]:
    """Turn a database's failure in a store method into a one-line :class:`HistoryError` (the original as cause)."""

    def wrap(fn: Callable[P, R]) -> Callable[P, R]:
        @functools.wraps(fn)
        def inner(*args: P.args, **kwargs: P.kwargs) -> R:
            try:
                return fn(*args, **kwargs)
            except HistoryError:
                raise
            except (SQLAlchemyError, OSError) as exc:
                self: History = args[0]  # type: ignore[assignment]
                raise classify(exc, self.engine.url, timeout=self.timeout, doing=doing) from exc

        return inner

    return wrap


class History:
    """Writes one run into the history at ``url`` (upgraded to the newest schema on opening).

    ``timeout``: how long a statement waits for a database another process holds locked before it fails.
    """

    def __init__(self, url: str, *, timeout: float = SQLITE_BUSY_TIMEOUT_S) -> None:
        self.url = url
        self.timeout = timeout
        self.engine = make_engine(url, timeout=timeout)
        try:
            upgrade(self.engine)
        except BaseException as exc:
            self.engine.dispose()
            if isinstance(exc, SQLAlchemyError | OSError):
                raise classify(exc, self.engine.url, timeout=timeout, doing="opening") from exc
            raise
        self.run_id: int | None = None
        self.started_at: float | None = None
        self.mode: RunMode | None = None
        self.line_name = ""
        self.config_hash = ""
        self._open: dict[str, int] = {}  # alarm key -> id of its open episode (raised here or adopted)
        self._raised: dict[tuple[str, float], int] = {}  # (alarm key, raise time) -> episode id, until its context
        self._latest: dict[str, int] = {}  # alarm key -> id of its latest episode (raised here, or read)
        self._insert_minutes = insert_statement(self.engine.dialect.paramstyle)

    @_said("starting a run in")
    def start_run(self, *, mode: str, line_name: str, config_file: str, config_hash: str, source: str = "",
                  started_at: float | None = None) -> int:
        """Open a run (``mode``: replay, demo or daemon) and return its id."""
        try:
            run_mode = RunMode(mode)
        except ValueError:
            raise ValueError(f"run mode: expected one of {[m.value for m in RunMode]}, got {mode!r}") from None
        at = started_at if started_at is not None else datetime.now(UTC).timestamp()
        with Session(self.engine) as s, s.begin():
            run = Run(started_at=at, mode=run_mode, line_name=line_name, config_file=config_file,
                      config_hash=config_hash, source=source)
            s.add(run)
            s.flush()
            self.run_id = run.id
        self.started_at, self.mode, self.line_name, self.config_hash = at, run_mode, line_name, config_hash
        self._open, self._raised, self._latest = {}, {}, {}
        return self.run_id

    # --- alarms an earlier run left open ---------------------------------------------------------------------------

    @_said("reading")
    def open_episodes(self, *, line_name: str, mode: str) -> list[OpenEpisode]:
        """Episodes not cleared, of the runs of ``line_name`` in ``mode`` other than this one, oldest first."""
        runs = select(Run.id).where(Run.line_name == line_name, Run.mode == RunMode(mode))
        if self.run_id is not None:
            runs = runs.where(Run.id != self.run_id)
        q = (select(AlarmEpisode.id, AlarmEpisode.alarm_key, AlarmEpisode.raised_t, AlarmEpisode.run_id)
             .where(AlarmEpisode.cleared_t.is_(None), AlarmEpisode.run_id.in_(runs))
             .order_by(AlarmEpisode.raised_t, AlarmEpisode.id))
        with Session(self.engine) as s:
            return [OpenEpisode(*row) for row in s.execute(q).all()]

    def adopt(self, episode: OpenEpisode) -> None:
        """This run carries ``episode`` on: the next clear of its alarm key completes it."""
        self._open[episode.alarm_key] = episode.episode_id

    @_said("writing")
    def close_episodes(self, ids: Iterable[int], at: float) -> int:
        """Mark open episodes cleared at ``at`` (epoch s) without a clear event; returns how many were open."""
        ids = list(ids)
        if not ids:
            return 0
        with Session(self.engine) as s, s.begin():
            res = s.execute(update(AlarmEpisode).where(AlarmEpisode.id.in_(ids), AlarmEpisode.cleared_t.is_(None))
                            .values(cleared_t=at).execution_options(synchronize_session=False))
            closed = res.rowcount  # type: ignore[attr-defined]
        gone = set(ids)
        for key in [k for k, v in self._open.items() if v in gone]:
            del self._open[key]
        return closed

    # --- this run --------------------------------------------------------------------------------------------------

    @_said("writing")
    def record(self, transitions: Iterable[Transition], *, lifecycle: Sequence[LifecycleEvent] = (),
               states: Mapping[str, Record] | None = None, answers: Sequence[RequestAnswer] = (),
               seq: int | None = None, after: Callable[[], None] | None = None) -> None:
        """Write in one transaction: journal rows, new and completed episodes, lifecycle rows, states, answers;
        then call ``after`` (what may only go out once it is committed, such as publishing the alarms).

        ``lifecycle``: the changes of alarms' lifecycles and the operators' actions (``alarm_actions``), each tied to
        the episode of its alarm key open at that moment (raised in this call at or before its time, else the one
        the store knows open, else the key's latest episode of this line); ``states``: the current lifecycle record
        of each alarm key given (upserted into ``alarm_states`` for this run's line); ``answers``: the daemon's
        answers to operators' requests. All or nothing: a refused row (a constraint) leaves none of them written.
        """
        trs = list(transitions)
        events = list(lifecycle)
        recs = dict(states or {})
        replies = list(answers)
        if not (trs or events or recs or replies):
            return
        assert self.run_id is not None or not trs, "start_run first"
        opened: dict[str, AlarmEpisode] = {}  # raised in this call, still open
        raised: list[AlarmEpisode] = []
        seen: dict[str, list[tuple[float, AlarmEpisode]]] = {}  # key -> (raise time, episode) of this call
        closed: dict[str, int] = {}  # alarm key -> episode id cleared in this call (opened earlier)
        completed: list[dict[str, object]] = []
        with Session(self.engine, expire_on_commit=False) as s, s.begin():
            latest = self._latest_episodes(s, {e.key for e in events})  # before this write adds any
            for tr in trs:
                p = tr.point
                ev = AlarmEvent(run_id=self.run_id, t=tr.t, alarm_key=p.key, kind=p.kind, object_id=p.object_id,
                                level=p.level, event=tr.event, value=finite_or_none(tr.value), limit=p.limit,
                                priority=p.priority, line_state=state_name(tr.line_state),
                                config_hash=self.config_hash)
                if tr.event == "raise":
                    ep = AlarmEpisode(run_id=self.run_id, alarm_key=p.key, kind=p.kind, object_id=p.object_id,
                                      level=p.level, priority=p.priority, unit=p.unit, raised_t=tr.t,
                                      raise_value=finite_or_none(tr.value), limit=p.limit,
                                      line_state=ev.line_state, config_hash=self.config_hash,
                                      cause=p.cause, consequence=p.consequence, corrective_action=p.action,
                                      response_time=finite_or_none(p.response_time),
                                      first_out=bool(getattr(tr, "first_out", False)),
                                      chattering=bool(getattr(tr, "chattering", False)),
                                      blames=",".join(p.blames) or None, detail=_detail(tr))
                    ev.episode = ep  # the unit of work inserts the episode first and links the event to it
                    opened[p.key] = ep
                    raised.append(ep)
                    seen.setdefault(p.key, []).append((tr.t, ep))
                elif tr.event == "clear":
                    if p.key in opened:
                        ep = opened.pop(p.key)
                        ep.cleared_t, ep.peak_value = tr.t, finite_or_none(tr.peak)
                        ev.episode = ep
                    elif p.key in self._open and p.key not in closed:
                        ev.episode_id = closed[p.key] = self._open[p.key]
                        completed.append({"id": ev.episode_id, "cleared_t": tr.t,
                                          "peak_value": finite_or_none(tr.peak)})
                s.add(ev)
            s.flush()  # one INSERT per table (batched), then the completed episodes in one UPDATE
            if completed:
                s.execute(update(AlarmEpisode), completed)
            for e in events:
                until, one_shot = shelve_end(e.until)
                s.add(AlarmAction(run_id=self.run_id, line_name=self.line_name,
                                  episode_id=self._episode_at(e.key, e.t, seen, latest), alarm_key=e.key,
                                  t=e.t, action=e.action, origin=Origin(e.origin), user=e.user, comment=e.comment,
                                  state_before=e.before, state_after=e.after, until=until, one_shot=one_shot,
                                  request_id=e.request))
            if recs:
                self._put_states(s, recs, {e.key: e.t for e in events})
            for a in replies:
                s.execute(update(ActionRequest).where(ActionRequest.id == a.request_id)
                          .values(status=RequestStatus(a.status), answer=a.answer, answered_at=a.answered_at)
                          .execution_options(synchronize_session=False))
            s.flush()
            self._mark(s, seq)
        for key in closed:  # committed: now the state follows
            del self._open[key]
        for key, ep in opened.items():
            self._open[key] = ep.id
        for ep in raised:
            self._raised[(ep.alarm_key, ep.raised_t)] = ep.id
            self._latest[ep.alarm_key] = ep.id
        if after is not None:
            after()

    def _latest_episodes(self, s: Session, keys: set[str]) -> dict[str, int]:
        """The episode of each key the store knows open, else its latest of this line in the database (if any)."""
        out = {k: self._open[k] for k in keys if k in self._open}
        out.update({k: self._latest[k] for k in keys if k not in out and k in self._latest})
        missing = sorted(keys - out.keys())
        if missing:
            runs = select(Run.id).where(Run.line_name == self.line_name)
            ranked = (select(AlarmEpisode.alarm_key, func.max(AlarmEpisode.id))
                      .where(AlarmEpisode.alarm_key.in_(missing), AlarmEpisode.run_id.in_(runs))
                      .group_by(AlarmEpisode.alarm_key))
            out.update({k: int(i) for k, i in s.execute(ranked).all()})
        return out

    @staticmethod
    def _episode_at(key: str, t: float, seen: Mapping[str, list[tuple[float, AlarmEpisode]]],
                    latest: Mapping[str, int]) -> int | None:
        """The episode of ``key`` at ``t``: raised in this write at or before ``t``, else the one open or latest
        before this write."""
        here = [ep for raised_t, ep in seen.get(key, ()) if raised_t <= t]
        return here[-1].id if here else latest.get(key)

    def _put_states(self, s: Session, recs: Mapping[str, Record], changed: Mapping[str, float]) -> None:
        """Upsert the lifecycle records of this run's line: read the rows there are, update them, add the others.

        Portable (no dialect's ON CONFLICT); safe because one writer per line writes its states (:mod:`.lock`).
        ``updated_at``: the time of the key's last lifecycle event in this write, else the wall clock.
        """
        now = datetime.now(UTC).timestamp()
        have = {r.alarm_key: r for r in s.scalars(select(AlarmStateRow).where(
            AlarmStateRow.line_name == self.line_name, AlarmStateRow.alarm_key.in_(list(recs))))}
        for key, rec in recs.items():
            until, one_shot = shelve_end(rec.shelved_until)
            values = {"state": rec.state, "active": rec.active, "acked": rec.acked, "held": rec.held,
                      "shelved_until": until, "shelved_one_shot": one_shot, "shelved_by": rec.shelved_by,
                      "shelve_reason": rec.shelve_reason, "out_of_service": rec.out_of_service, "oos_by": rec.oos_by,
                      "oos_reason": rec.oos_reason, "suppressed_by": rec.suppressed_by,
                      "updated_at": changed.get(key, now)}
            row = have.get(key)
            if row is None:
                s.add(AlarmStateRow(line_name=self.line_name, alarm_key=key, **values))
            else:
                for name, value in values.items():
                    setattr(row, name, value)

    @_said("reading")
    def load_states(self, line_name: str) -> dict[str, Record]:
        """The lifecycle records of ``line_name`` as last written (alarm key -> record), to restore at a start."""
        with Session(self.engine) as s:
            rows = s.scalars(select(AlarmStateRow).where(AlarmStateRow.line_name == line_name)
                             .order_by(AlarmStateRow.alarm_key)).all()
            return {r.alarm_key: Record(active=r.active, acked=r.acked, held=r.held,
                                        shelved_until=shelve_end_of(r.shelved_until, r.shelved_one_shot),
                                        shelved_by=r.shelved_by, shelve_reason=r.shelve_reason,
                                        out_of_service=r.out_of_service, oos_by=r.oos_by, oos_reason=r.oos_reason,
                                        suppressed_by=r.suppressed_by) for r in rows}

    @_said("writing")
    def save_config_version(self, *, line_name: str, config_hash: str, config_file: str, content: str,
                            saved_by: str) -> None:
        """Keep the text of a configuration ``line_name`` runs with (``content``: secrets already removed).

        Idempotent: a version already stored for this line and hash is left as it is (the first save wins, also
        when two processes save it at once: the unique constraint refuses the second, which then finds it).
        """
        known = select(ConfigVersion.id).where(and_(ConfigVersion.line_name == line_name,
                                                    ConfigVersion.config_hash == config_hash))
        try:
            with Session(self.engine) as s, s.begin():
                if s.scalar(known) is None:
                    s.add(ConfigVersion(line_name=line_name, config_hash=config_hash, config_file=config_file,
                                        content=content, saved_at=datetime.now(UTC).timestamp(), saved_by=saved_by))
        except IntegrityError:
            with Session(self.engine) as s:
                if s.scalar(known) is None:
                    raise

    @_said("writing")
    def record_contexts(self, contexts: Iterable[Context], *, seq: int | None = None) -> None:
        """Write context windows; each belongs to the episode raised at its ``raised_t``."""
        rows = []
        done = set()
        with Session(self.engine) as s, s.begin():
            for c in contexts:
                ep_id = self._raised.get((c.key, c.raised_t))
                if ep_id is None:  # raised before a resync, or by a write replayed from a spool
                    ep_id = s.scalar(select(AlarmEpisode.id).where(
                        AlarmEpisode.run_id == self.run_id, AlarmEpisode.alarm_key == c.key,
                        AlarmEpisode.raised_t == c.raised_t).order_by(AlarmEpisode.id).limit(1))
                if ep_id is not None:
                    rows.append(AlarmContext(episode_id=ep_id, signal=c.signal, t0=c.t0, dt=c.dt,
                                             values=json.dumps(c.values)))
                    done.add((c.key, c.raised_t))
            s.add_all(rows)
            self._mark(s, seq)
        for k in done:
            self._raised.pop(k, None)

    @_said("writing")
    def record_minutes(self, rows: Sequence[CheckMinute], *, seq: int | None = None) -> None:
        """Write the per-minute summaries of the checks' values (``check_minutes``) of this run, in one INSERT."""
        assert self.run_id is not None, "start_run first"
        with Session(self.engine) as s, s.begin():
            if rows:
                # the driver's executemany: a replay writes about 5,400 rows an hour, and this costs a third of the
                # ORM's bulk insert per row
                s.connection().exec_driver_sql(self._insert_minutes, minute_tuples(self.run_id, rows))
            self._mark(s, seq)

    @_said("closing the run in")
    def finish_run(self, *, input_rows: Sequence[dict[str, object]], data_start: float | None = None,
                   data_end: float | None = None, state: str = RunEnd.FINISHED, finished_at: float | None = None,
                   seq: int | None = None) -> None:
        """Close the run: how it ended (finished, failed, interrupted), when, the span of data seen, and the
        input issues per tag and reason."""
        end = RunEnd(state)
        at = finished_at if finished_at is not None else datetime.now(UTC).timestamp()
        with Session(self.engine) as s, s.begin():
            s.execute(update(Run).where(Run.id == self.run_id)
                      .values(finished_at=at, data_start=data_start, data_end=data_end, end_state=end)
                      .execution_options(synchronize_session=False))
            s.add_all([InputIssue(run_id=self.run_id, tag=str(r["tag"]), reason=str(r["reason"]),
                                  count=int(r["count"]),  # type: ignore[call-overload]
                                  refs=json.dumps(r["refs"])) for r in input_rows])
            self._mark(s, seq)

    def _mark(self, s: Session, seq: int | None) -> None:
        if seq is not None:
            s.execute(update(Run).where(Run.id == self.run_id).values(written_seq=seq)
                      .execution_options(synchronize_session=False))

    # --- a writer that lost track, or replays another run's writes --------------------------------------------------

    @_said("reading")
    def written_seq(self) -> int:
        """The number of the last write of this run that reached the database (0: none numbered)."""
        with Session(self.engine) as s:
            return int(s.scalar(select(Run.written_seq).where(Run.id == self.run_id)) or 0)

    @_said("reading")
    def resume(self, run_id: int) -> None:
        """Write into the existing run ``run_id`` (e.g. the spool a killed daemon left), its open episodes reloaded."""
        with Session(self.engine) as s:
            run = s.get(Run, run_id)
            if run is None:
                raise HistoryError(f"run {run_id} is not in the history: its buffered writes cannot be applied")
            self.run_id, self.started_at, self.mode = run.id, run.started_at, run.mode
            self.line_name, self.config_hash = run.line_name, run.config_hash
        self.resync()

    @_said("reading")
    def resync(self) -> None:
        """Reload which episode each alarm key has open, from the database.

        The open episode of a key is the oldest not cleared among the runs of this line and mode up to this one
        (what :meth:`adopt` took on at the start, or what this run raised since): the same choice as carrying
        alarms on across a restart.
        """
        assert self.run_id is not None and self.mode is not None, "start_run or resume first"
        runs = select(Run.id).where(Run.line_name == self.line_name, Run.mode == self.mode, Run.id <= self.run_id)
        q = (select(AlarmEpisode.alarm_key, func.min(AlarmEpisode.id))
             .where(AlarmEpisode.cleared_t.is_(None), AlarmEpisode.run_id.in_(runs))
             .group_by(AlarmEpisode.alarm_key))
        with Session(self.engine) as s:
            self._open = {key: int(ep) for key, ep in s.execute(q).all()}
        self._raised.clear()
        self._latest.clear()

    @_said("writing")
    def interrupt_dead_runs(self) -> list[int]:
        """Mark the runs of this line and mode that never ended (killed) as interrupted; return their ids.

        Only for a writer that holds the line's writer lock (:mod:`.lock`): then no other run of the line is alive.
        """
        assert self.run_id is not None and self.mode is not None, "start_run first"
        with Session(self.engine) as s, s.begin():
            ids = list(s.scalars(select(Run.id).where(Run.line_name == self.line_name, Run.mode == self.mode,
                                                     Run.id != self.run_id, Run.end_state.is_(None))))
            if ids:
                s.execute(update(Run).where(Run.id.in_(ids)).values(end_state=RunEnd.INTERRUPTED)
                          .execution_options(synchronize_session=False))
        return ids

    def close(self) -> None:
        self.engine.dispose()


def _detail(tr: Transition) -> str | None:
    """The raise's detail as a JSON object (non-finite values as null), or None when it carries none."""
    items = getattr(tr, "detail", ())
    if not items:
        return None
    return json.dumps({k: finite_or_none(v) for k, v in items}, sort_keys=True)
