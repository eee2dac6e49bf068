"""The daemon's history writer: a thread that owns the store, takes writes from a queue in order, and keeps
what the database cannot take in a spool on disk until it can.

The event loop only puts transitions (with the alarm lifecycle's changes, current records and answers to
operators' requests), context windows, the checks' minutes and the run's end into an in-memory queue
(:meth:`HistoryWriter.record`, :meth:`~HistoryWriter.record_contexts`, :meth:`~HistoryWriter.record_minutes`,
:meth:`~HistoryWriter.finish_run`:
the :class:`~spanwatch.connectors.history.store.HistorySink` the pipeline writes to), which never blocks.
The writer thread numbers each write and applies it to the database in one transaction that also stores
the number (``runs.written_seq``). When the database is unavailable (locked beyond the timeout, disk full,
read-only, server down) the write goes to the :class:`~spanwatch.connectors.history.spool.Spool`, and so
does every later one while the spool holds anything, so the order is kept. The writer retries with a
backoff (0.5 s doubling to ``retry_max``); when the database answers again it writes the spool's records
in order, skipping those whose number the database already has (a commit whose answer was lost with the
connection), and clears the spool.

Bounded: the queue holds ``queue_max`` writes and the spool its capacity; a write that finds no room is
lost, counted and logged (once when the condition starts). Context windows and the checks' minutes are kept
out of a spool more than half full, to leave the room for transitions (counted, ``lost_contexts`` and
``lost_minutes``). A write the database refuses whatever the retry (a
constraint) is counted and logged, and the writer goes on with the next.

State changes are logged once each: ``unavailable`` (buffering in the spool), ``recovered`` (with how many
records were written), ``spool full``, ``lock lost``. :meth:`HistoryWriter.status` is a snapshot for
``/healthz``.

:func:`open_writer` does what must happen before the daemon computes anything: open the history (upgrade
its schema), take the line's writer lock (:mod:`.lock`), open the spool, and write what a previous process
left in it (a daemon killed while the database was unavailable), so a restart replays the spool before
any new write and before it reads which alarms were left open.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import logging
import queue
import re
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

from spanwatch.connectors.history.errors import HistoryError, RecordRefused, where
from spanwatch.connectors.history.lock import LineLock, writer_lock
from spanwatch.connectors.history.spool import Spool, SpoolBusy, SpoolFull
from spanwatch.connectors.history.store import Context, History, RequestAnswer
from spanwatch.connectors.history.trends import CheckMinute
from spanwatch.rules.alarms import AlarmPoint, Transition
from spanwatch.rules.lifecycle import Action, AlarmState, LifecycleEvent, Record
from sqlalchemy.engine import make_url

log = logging.getLogger("spanwatch.history")

OK, UNAVAILABLE, SPOOL_FULL, LOCK_LOST = "ok", "unavailable", "spool full", "lock lost"
_STOP = object()


# --- where the spool lives, and what a record holds -------------------------------------------------------------


def spool_path(url: str, line_name: str, folder: str | Path | None = None,
               default_folder: str | Path = ".spanwatch-spool") -> Path:
    """The spool file of ``line_name`` writing into ``url``.

    In ``folder`` when given; else beside a SQLite database file, else in ``default_folder``. The name is the
    database's (a SQLite file's name, or the backend and a hash of the URL without password) and the line's.

    >>> spool_path("sqlite:////var/lib/spanwatch/q2.db", "Q2 film rewinder").name
    'q2.db.Q2-film-rewinder-78ff.spool'
    >>> str(spool_path("sqlite:////var/lib/spanwatch/q2.db", "Q2").parent)
    '/var/lib/spanwatch'
    """
    u = make_url(url)
    if u.get_backend_name() == "sqlite" and u.database and u.database != ":memory:":
        db = Path(u.database)
        base, home = db.name, db.parent
    else:
        base = f"{u.get_backend_name()}-{hashlib.sha256(where(url).encode()).hexdigest()[:10]}"
        home = Path(default_folder)
    slug = re.sub(r"[^A-Za-z0-9._-]+", "-", line_name).strip("-")[:40] or "line"
    tag = hashlib.sha256(line_name.encode()).hexdigest()[:4]
    return Path(folder if folder else home) / f"{base}.{slug}-{tag}.spool"


def _plain(o: object) -> object:
    item = getattr(o, "item", None)  # numpy scalars
    if callable(item):
        return item()
    raise TypeError(f"cannot store {type(o).__name__} in the spool")


_TR_FLAGS = ("first_out", "chattering")  # flags a Transition may carry (read with getattr: older cores lack them)


def _fields(cls: type) -> set[str]:
    return {f.name for f in dataclasses.fields(cls)}


def _transition(tr: Transition) -> dict[str, Any]:
    d = {"t": tr.t, "event": tr.event, "value": tr.value, "line_state": tr.line_state, "peak": tr.peak,
         "point": dataclasses.asdict(tr.point)}
    d.update({f: getattr(tr, f) for f in _TR_FLAGS if hasattr(tr, f)})
    return d


def _of_transition(d: dict[str, Any]) -> Transition:
    known = _fields(AlarmPoint)  # a field this core does not have is dropped; a list back to the tuple it was
    point = AlarmPoint(**{k: tuple(v) if isinstance(v, list) else v for k, v in d["point"].items() if k in known})
    flags = {f: d[f] for f in _TR_FLAGS if f in d and f in _fields(Transition)}
    return Transition(d["t"], point, d["event"], d["value"], d["line_state"], d["peak"], **flags)


def _of_event(d: dict[str, Any]) -> LifecycleEvent:
    return LifecycleEvent(t=d["t"], key=d["key"], action=Action(d["action"]), before=AlarmState(d["before"]),
                          after=AlarmState(d["after"]), user=d["user"], comment=d["comment"], until=d["until"],
                          request=d["request"])


def encode(run_id: int, seq: int, op: str, data: Any) -> bytes:
    """One spool record: the run, the write's number, what to do (record, contexts, finish) and its data.

    A record's data is ``{"transitions", "lifecycle", "states", "answers"}`` (a bare list: transitions only). JSON
    as Python writes it: a non-finite float (a NaN peak, an ``inf`` one-shot shelve) is ``NaN``/``Infinity``,
    which :func:`decode` reads back as it was.
    """
    if op == "record":
        rec = data if isinstance(data, dict) else {"transitions": data}
        data = {"transitions": [_transition(tr) for tr in rec.get("transitions", ())],
                "lifecycle": [dataclasses.asdict(e) for e in rec.get("lifecycle", ())],
                "states": {k: dataclasses.asdict(r) for k, r in (rec.get("states") or {}).items()},
                "answers": [dataclasses.asdict(a) for a in rec.get("answers", ())]}
    elif op == "contexts":
        data = [dataclasses.asdict(c) for c in data]
    elif op == "minutes":
        data = [dataclasses.astuple(r) for r in data]
    return json.dumps({"run": run_id, "seq": seq, "op": op, "data": data}, default=_plain).encode()


def decode(payload: bytes) -> tuple[int, int, str, Any]:
    """The inverse of :func:`encode` (a record's data always as the dict; a spool of an older version read too)."""
    rec = json.loads(payload)
    op, data = rec["op"], rec["data"]
    if op == "record":
        if isinstance(data, list):  # written before the lifecycle: transitions only
            data = {"transitions": data}
        data = {"transitions": [_of_transition(d) for d in data.get("transitions", [])],
                "lifecycle": [_of_event(d) for d in data.get("lifecycle", [])],
                "states": {k: Record(**r) for k, r in data.get("states", {}).items()},
                "answers": [RequestAnswer(**a) for a in data.get("answers", [])]}
    elif op == "contexts":
        data = [Context(**d) for d in data]
    elif op == "minutes":
        data = [CheckMinute(*r) for r in data]
    return int(rec["run"]), int(rec["seq"]), op, data


def _apply(history: History, op: str, data: Any, seq: int) -> None:
    if op == "record":
        rec = data if isinstance(data, dict) else {"transitions": data}
        history.record(rec.get("transitions", ()), lifecycle=rec.get("lifecycle", ()), states=rec.get("states"),
                       answers=rec.get("answers", ()), seq=seq)
    elif op == "contexts":
        history.record_contexts(data, seq=seq)
    elif op == "minutes":
        history.record_minutes(data, seq=seq)
    elif op == "finish":
        history.finish_run(**data, seq=seq)
    else:
        raise ValueError(f"unknown history write {op!r}")


def _count(op: str, data: Any) -> int:
    if op == "record" and isinstance(data, dict):
        return sum(len(data.get(k) or ()) for k in ("transitions", "lifecycle", "states", "answers"))
    return len(data) if op in ("record", "contexts", "minutes") else 1


def _call(after: Callable[[], None]) -> None:
    """Run a write's ``after`` (publishing): its failure is logged, never the writer's."""
    try:
        after()
    except Exception:
        log.exception("history writer: what follows a write failed")


# --- the writer -------------------------------------------------------------------------------------------------


class HistoryWriter:
    """A thread that owns ``history`` and writes what the event loop hands it, in order (see the module)."""

    def __init__(self, history: History, spool: Spool, lock: LineLock | None = None, *, retry_max: float = 10.0,
                 heartbeat: float = 15.0, queue_max: int = 10_000, clock: Callable[[], float] = time.monotonic) -> None:
        self.history, self.spool, self.lock = history, spool, lock
        self.retry_max, self.heartbeat, self.clock = retry_max, heartbeat, clock
        self.run_id: int | None = history.run_id
        self._q: queue.Queue[object] = queue.Queue(maxsize=queue_max)
        self._mu = threading.Lock()
        self._thread: threading.Thread | None = None
        self._seq = 0
        self._state, self._reason, self._since = OK, "", 0.0
        self._backoff, self._next_retry = 0.5, 0.0
        self._next_beat = clock() + heartbeat
        self._refused_seen: set[tuple[int, int]] = set()
        self.written = 0  # writes that reached the database (directly or from the spool)
        self.spooled = 0  # writes that went to the spool
        self.lost = 0  # transitions (or context windows, or run ends) lost: queue or spool full
        self.lost_contexts = 0
        self.lost_minutes = 0  # check-minute rows kept out of a spool more than half full
        self.refused = 0  # writes the database refused (constraint)
        self.last_error = ""
        self._queue_full = False

    # --- the event loop's side: never blocks --------------------------------------------------------------------------

    def record(self, transitions: Iterable[Transition], *, lifecycle: Sequence[LifecycleEvent] = (),
               states: Mapping[str, Record] | None = None, answers: Sequence[RequestAnswer] = (),
               after: Callable[[], None] | None = None) -> None:
        """Queue what :meth:`History.record` writes in one transaction (written, or spooled, in order).

        ``after`` runs on the writer's thread once the write is committed or in the spool (what may only go out
        then, such as publishing the alarms); also when the write had to be dropped (queue or spool full: counted,
        logged and shown on /healthz), so that the alarm still reaches the operator.
        """
        rec = {"transitions": list(transitions), "lifecycle": list(lifecycle), "states": dict(states or {}),
               "answers": list(answers)}
        if any(rec.values()):
            self._put(("record", rec), after)
        elif after is not None:
            _call(after)

    def record_contexts(self, contexts: Iterable[Context]) -> None:
        cs = list(contexts)
        if cs:
            self._put(("contexts", cs))

    def record_minutes(self, rows: Sequence[CheckMinute]) -> None:
        """Queue the checks' per-minute rows (written, or spooled while the spool is at most half full)."""
        rs = list(rows)
        if rs:
            self._put(("minutes", rs))

    def finish_run(self, *, input_rows: Sequence[dict[str, object]], data_start: float | None = None,
                   data_end: float | None = None, state: str = "finished") -> None:
        self._put(("finish", {"input_rows": [dict(r) for r in input_rows], "data_start": data_start,
                              "data_end": data_end, "state": state, "finished_at": time.time()}))

    def _put(self, item: tuple[str, Any], after: Callable[[], None] | None = None) -> None:
        try:
            self._q.put_nowait((*item, after))
            if self._queue_full:
                self._queue_full = False
                log.warning("history writer queue accepts writes again")
        except queue.Full:
            with self._mu:
                self.lost += _count(*item)
            if not self._queue_full:
                self._queue_full = True
                log.error("history writer queue full (%d writes waiting): alarm records are being LOST until it "
                          "drains", self._q.maxsize)
            if after is not None:
                _call(after)

    # --- life ---------------------------------------------------------------------------------------------------------

    def start(self) -> None:
        """Start the thread (after the run was started in the history)."""
        self.run_id = self.history.run_id
        assert self.run_id is not None, "start_run first"
        self._thread = threading.Thread(target=self._run, name="history writer", daemon=True)
        self._thread.start()

    def close(self) -> None:
        """Write what is queued (or spool it), try the spool once more, release the lock, close. Blocks: call it
        from a thread other than the event loop's (``asyncio.to_thread``)."""
        if self._thread is not None:
            self._q.put(_STOP)
            self._thread.join()
            self._thread = None
        self._release()

    def _release(self) -> None:
        if self.lock is not None:
            try:
                self.lock.release()
            except HistoryError as exc:
                log.warning("history: could not release the writer lock (%s); the next start takes it over once "
                            "its heartbeat is stale", exc)
        self.spool.close()
        self.history.close()

    # --- the thread ---------------------------------------------------------------------------------------------------

    def _run(self) -> None:
        while True:
            now = self.clock()
            wake = self._next_beat
            if self._state != OK or self.spool.count:
                wake = min(wake, self._next_retry)
            try:
                item = self._q.get(timeout=max(0.01, wake - now))
            except queue.Empty:
                item = None
            if item is _STOP:
                break
            try:
                if item is not None:
                    self._handle(*item)  # type: ignore[misc]
                self._tick()
            except Exception as exc:  # a defect must not stop the thread that keeps the alarms
                log.exception("history writer: unexpected error")
                self.last_error = f"{type(exc).__name__}: {exc}"
                self._retry_later()
        try:
            if self.spool.count:
                self._drain()
        except Exception:
            log.exception("history writer: unexpected error at shutdown")
        if self.spool.count:
            log.warning("history unavailable at shutdown: %d record(s) stay in the spool %s; the next start of this "
                        "line writes them first", self.spool.count, self.spool.path)

    def _handle(self, op: str, data: Any, after: Callable[[], None] | None = None) -> None:
        try:
            self._write(op, data)
        finally:
            if after is not None:
                _call(after)

    def _write(self, op: str, data: Any) -> None:
        self._seq += 1
        seq = self._seq
        if self._state == OK and not self.spool.count:
            try:
                _apply(self.history, op, data, seq)
                self.written += 1
                return
            except RecordRefused as exc:
                self._refuse(exc, _count(op, data))
                return
            except HistoryError as exc:
                self._unavailable(exc)
        self._to_spool(op, data, seq)

    def _to_spool(self, op: str, data: Any, seq: int) -> None:
        assert self.run_id is not None
        if op in ("contexts", "minutes") and self.spool.used > self.spool.capacity // 2:
            with self._mu:
                if op == "contexts":
                    self.lost_contexts += len(data)
                else:
                    self.lost_minutes += len(data)
            return
        payload = encode(self.run_id, seq, op, data)
        try:
            self.spool.append(payload)
        except (SpoolFull, OSError) as exc:
            with self._mu:
                self.lost += _count(op, data)
            if self._state != SPOOL_FULL:
                self._set(SPOOL_FULL, f"{exc}; the database: {self._reason}" if self._reason else str(exc))
                log.error("history spool full or refused (%s): alarm records are being LOST until the database "
                          "returns (%d lost so far)", exc, self.lost)
            return
        with self._mu:
            self.spooled += 1

    def _tick(self) -> None:
        now = self.clock()
        if (self._state != OK or self.spool.count) and now >= self._next_retry:
            self._drain()
        elif now >= self._next_beat and self.lock is not None:
            self._next_beat = now + self.heartbeat
            try:
                if not self.lock.refresh():
                    self._lock_lost()
            except HistoryError as exc:
                self._unavailable(exc)

    def _drain(self) -> None:
        """Write the spool's records in order, then clear it; on failure, back off."""
        self._next_beat = self.clock() + self.heartbeat
        try:
            if self.lock is not None and not self.lock.refresh():
                self._lock_lost()
                self._retry_later()
                return
            n = drain_spool(self.history, self.spool, refused=self._refuse_seq)
            if self.run_id is not None and (self.history.run_id != self.run_id or self._state != OK):
                self.history.resume(self.run_id)  # and what is open, as the database has it now
        except HistoryError as exc:
            self._unavailable(exc)
            self._retry_later()
            return
        self.written += n
        self._backoff = 0.5
        if self._state != OK:
            down = self.clock() - self._since
            log.warning("history recovered after %.0f s: wrote %d buffered record(s) (%d transition(s) lost so far)",
                        down, n, self.lost)
            self._set(OK, "")

    def _retry_later(self) -> None:
        self._next_retry = self.clock() + self._backoff
        self._backoff = min(self._backoff * 2, self.retry_max)

    def _unavailable(self, exc: HistoryError) -> None:
        self.last_error = str(exc)
        if self._state == OK:
            self._set(UNAVAILABLE, str(exc))
            self._since = self.clock()
            log.warning("history unavailable: %s; alarms are kept in the spool %s (up to %d bytes) and written when "
                        "it returns", exc, self.spool.path, self.spool.capacity)
            self._next_retry = self.clock() + self._backoff
        elif self._state == UNAVAILABLE:
            with self._mu:
                self._reason = str(exc)

    def _lock_lost(self) -> None:
        if self._state != LOCK_LOST:
            reason = (f"another process holds the writer lock of line {getattr(self.lock, 'line_name', '?')!r} "
                      "in this history now; buffering in the spool until it is released")
            if self._state == OK:
                self._since = self.clock()
            self._set(LOCK_LOST, reason)
            log.error("history: %s", reason)

    def _refuse(self, exc: RecordRefused, n: int) -> None:
        with self._mu:
            self.refused += n
        self.last_error = str(exc)
        log.error("history: a record was refused and is not stored (%d so far): %s", self.refused, exc)

    def _refuse_seq(self, run_id: int, seq: int, exc: RecordRefused, n: int) -> None:
        if (run_id, seq) not in self._refused_seen:
            self._refused_seen.add((run_id, seq))
            self._refuse(exc, n)

    def _set(self, state: str, reason: str) -> None:
        with self._mu:
            self._state, self._reason = state, reason

    # --- what /healthz shows ------------------------------------------------------------------------------------------

    @property
    def state(self) -> str:
        return self._state

    def status(self) -> dict[str, object]:
        """A snapshot: state (ok, unavailable, spool full, lock lost), reason, and the counts."""
        with self._mu:
            return {"state": self._state, "reason": self._reason, "spooled": self.spool.count,
                    "spool_bytes": self.spool.used, "spool_capacity": self.spool.capacity,
                    "spool_reserved": self.spool.reserved, "spool": str(self.spool.path), "pending": self._q.qsize(),
                    "written": self.written, "lost": self.lost, "lost_contexts": self.lost_contexts,
                    "lost_minutes": self.lost_minutes,
                    "refused": self.refused}


def drain_spool(history: History, spool: Spool,
                refused: Callable[[int, int, RecordRefused, int], None] | None = None) -> int:
    """Write the spool's records into ``history`` in order, skip those it already has, clear it; return how many.

    Raises :class:`HistoryError` when the database is unavailable; the spool is kept then (the records already
    written are skipped next time by their numbers). A record the database refuses is passed to ``refused``.
    """
    done: dict[int, int] = {}
    n = 0
    first = True
    for payload in spool.read():
        run_id, seq, op, data = decode(payload)
        if history.run_id != run_id:
            history.resume(run_id)
        elif first:
            history.resync()  # after a failure the store's memory of open episodes may be behind the database
        first = False
        if run_id not in done:
            done[run_id] = history.written_seq()
        if seq <= done[run_id]:
            continue
        try:
            _apply(history, op, data, seq)
        except RecordRefused as exc:
            if refused is not None:
                refused(run_id, seq, exc, _count(op, data))
            continue
        done[run_id] = seq
        n += 1
    spool.clear()
    return n


def open_writer(url: str, *, line_name: str, spool_folder: str | Path | None = None,
                default_spool_folder: str | Path = ".spanwatch-spool", spool_max: int = 16 * 2**20,
                timeout: float = 5.0, lock_timeout: float = 60.0, retry_max: float = 10.0) -> HistoryWriter:
    """Open the history for a daemon of ``line_name``: schema, writer lock, spool, and what the spool held.

    Raises :class:`HistoryError` (one line) when the history cannot be opened, another writer holds the line,
    the spool cannot be created, or what a previous process left in the spool cannot be written now.
    The returned writer's history has no run yet: start one, then :meth:`HistoryWriter.start`.
    """
    history = History(url, timeout=timeout)
    lock: LineLock | None = None
    spool: Spool | None = None
    try:
        lock = writer_lock(history.engine, line_name, stale_after=lock_timeout)
        lock.acquire()
        if lock.took_over:
            log.warning("took over the writer lock of line %r from %s", line_name, lock.took_over)
        path = spool_path(url, line_name, spool_folder, default_spool_folder)
        spool, others = _open_spools(path, spool_max)
        if not spool.reserved:
            log.warning("history spool %s: could not reserve its %d bytes (%s); a full disk can refuse it",
                        spool.path, spool.capacity, spool.reserve_error)
        for sp in [spool, *others]:  # what earlier runs could not write, before anything of this run
            if sp.count:
                left = sp.count
                try:
                    n = drain_spool(history, sp)
                except HistoryError as exc:
                    for o in others:
                        o.close()
                    raise HistoryError(f"{sp.path}: holds {left} record(s) a previous run could not write, and they "
                                       f"cannot be written now: {exc}") from None
                log.warning("wrote %d record(s) a previous run left in the history spool %s", n, sp.path)
                history.run_id = None
        for o in others:
            o.path.unlink(missing_ok=True)
            o.close()
        return HistoryWriter(history, spool, lock, retry_max=retry_max, heartbeat=max(0.2, lock_timeout / 4))
    except BaseException:
        if spool is not None:
            spool.close()
        if lock is not None:
            with contextlib.suppress(HistoryError):
                lock.release()
        history.close()
        raise


ALTERNATES = 8


def _open_spools(path: Path, capacity: int) -> tuple[Spool, list[Spool]]:
    """This writer's spool, and the other spools of the line that no process holds (to be written and removed).

    The spool is ``path``; while a hung writer whose lock was taken over still holds it, an alternate
    ``<name>.<n>.spool`` beside it. Every spool of the line that no process holds open is returned too, so a start
    writes what any earlier writer left.
    """
    mine: Spool | None = None
    others: list[Spool] = []
    stem = path.name.removesuffix(".spool")
    candidates = [path, *(path.with_name(f"{stem}.{k}.spool") for k in range(1, ALTERNATES + 1))]
    try:
        for p in candidates:
            if mine is not None and not p.exists():
                continue
            try:
                sp = Spool(p, capacity)
            except SpoolBusy:
                continue
            if mine is None:
                mine = sp
            else:
                others.append(sp)
    except OSError as exc:
        for sp in [*([mine] if mine else []), *others]:
            sp.close()
        raise HistoryError(f"{path}: cannot create the history spool ({exc.strerror or exc}); set [daemon] spool to "
                           "a folder this user can write") from None
    if mine is None:
        raise HistoryError(f"{path}: this spool and its {ALTERNATES} alternates are open in other processes (other "
                           "spanwatch daemons of this line and history, hung or stopped)")
    return mine, others
