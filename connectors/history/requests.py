"""Operators' requests to a running daemon, through the history: the inbox (``action_requests``).

An operator's command (another process, possibly on another machine sharing a PostgreSQL history) cannot call
into the daemon; it inserts a request (:func:`submit`) and waits for the answer (:func:`wait_answer`). The
daemon polls its line's pending requests (:func:`pending`), applies each to its alarm lifecycle
(:class:`spanwatch.rules.lifecycle.Lifecycle`) and writes the answer with the resulting lifecycle rows in one
transaction (:meth:`~spanwatch.connectors.history.store.History.record` with ``answers``), so a request is
answered exactly when its effect is stored.

A request targets an alarm by its episode (``episode_id``, the id a listing shows) or by its key
(``alarm_key``, stored as given: "kind:object" without a level means every level of that check on that
object; the daemon resolves it). A shelve's end ``until`` is epoch s, ``inf`` for a one-shot shelve (until
the alarm clears), stored as NULL with ``one_shot`` (see :mod:`.models`).

Every failure is a :class:`~spanwatch.connectors.history.errors.HistoryError` in one line.
"""

from __future__ import annotations

import functools
import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import ParamSpec, TypeVar

from spanwatch.connectors.history.errors import classify
from spanwatch.connectors.history.models import ActionRequest, RequestStatus
from spanwatch.rules.lifecycle import OPERATOR_ACTIONS, Action
from sqlalchemy import select
from sqlalchemy.engine import Engine
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import Session

P = ParamSpec("P")
R = TypeVar("R")


@dataclass(frozen=True)
class Request:
    """One row of ``action_requests``. ``status``: pending, applied or refused; ``answer``: what was done, or why
    it was refused (empty while pending)."""

    id: int
    line_name: str
    requested_at: float
    user: str
    action: str
    episode_id: int | None
    alarm_key: str | None
    comment: str
    until: float | None
    one_shot: bool
    status: str
    answer: str
    answered_at: float | None

    @property
    def shelve_until(self) -> float | None:
        """The shelve's end as :mod:`spanwatch.rules.lifecycle` takes it: ``inf`` for a one-shot shelve."""
        return math.inf if self.one_shot else self.until

    @property
    def answered(self) -> bool:
        return self.status != RequestStatus.PENDING


def _request(r: ActionRequest) -> Request:
    return Request(id=r.id, line_name=r.line_name, requested_at=r.requested_at, user=r.user, action=str(r.action),
                   episode_id=r.episode_id, alarm_key=r.alarm_key, comment=r.comment, until=r.until,
                   one_shot=bool(r.one_shot), status=str(r.status), answer=r.answer, answered_at=r.answered_at)


def _said(doing: str) -> Callable[[Callable[P, R]], Callable[P, R]]:
    """A database's failure as a one-line :class:`HistoryError` naming the database (the engine is the first
    argument)."""

    def wrap(fn: Callable[P, R]) -> Callable[P, R]:
        @functools.wraps(fn)
        def inner(*args: P.args, **kwargs: P.kwargs) -> R:
            try:
                return fn(*args, **kwargs)
            except (SQLAlchemyError, OSError) as exc:
                engine: Engine = args[0]  # type: ignore[assignment]
                raise classify(exc, engine.url, doing=doing) from exc

        return inner

    return wrap


@_said("writing a request into")
def submit(engine: Engine, *, line_name: str, action: str, user: str, comment: str = "", episode_id: int | None = None,
           alarm_key: str | None = None, until: float | None = None, one_shot: bool = False,
           at: float | None = None) -> int:
    """Insert a pending request and return its id.

    ``action``: an operator's action (ack, reset, shelve, unshelve, comment, out_of_service, return_to_service);
    ``until`` ``inf`` is the same as ``one_shot``. Raises :class:`ValueError` for another action, or for a
    request without a target; whether the action applies is the daemon's answer.
    """
    try:
        act = Action(action)
    except ValueError:
        act = None
    if act not in OPERATOR_ACTIONS:
        names = ", ".join(sorted(a.value for a in OPERATOR_ACTIONS))
        raise ValueError(f"action: expected one of {names}, got {action!r}")
    if episode_id is None and not alarm_key:
        raise ValueError("a request needs its target: an alarm id (episode_id) or an alarm key")
    if until is not None and math.isnan(until):
        raise ValueError("until: expected a time (epoch s) or inf, got NaN")
    if until == math.inf:
        until, one_shot = None, True
    when = at if at is not None else datetime.now(UTC).timestamp()
    with Session(engine) as s, s.begin():
        row = ActionRequest(line_name=line_name, requested_at=when, user=user, action=act, episode_id=episode_id,
                            alarm_key=alarm_key, comment=comment, until=None if one_shot else until,
                            one_shot=one_shot, status=RequestStatus.PENDING, answer="")
        s.add(row)
        s.flush()
        return int(row.id)


@_said("reading requests from")
def pending(engine: Engine, line_name: str, after_id: int = 0) -> list[Request]:
    """The pending requests of ``line_name`` with an id above ``after_id``, oldest first."""
    q = (select(ActionRequest).where(ActionRequest.line_name == line_name,
                                     ActionRequest.status == RequestStatus.PENDING, ActionRequest.id > after_id)
         .order_by(ActionRequest.id))
    with Session(engine) as s:
        return [_request(r) for r in s.scalars(q)]


@_said("reading a request from")
def answer_of(engine: Engine, request_id: int) -> Request:
    """The request ``request_id`` as it stands (:class:`LookupError` when there is none)."""
    with Session(engine) as s:
        row = s.get(ActionRequest, request_id)
        if row is None:
            raise LookupError(f"no request {request_id} in the history")
        return _request(row)


def wait_answer(engine: Engine, request_id: int, timeout: float, poll: float = 0.1) -> Request:
    """Poll the request until it is answered or ``timeout`` s have passed; return it (still pending then)."""
    end = time.monotonic() + timeout
    while True:
        req = answer_of(engine, request_id)
        if req.answered or time.monotonic() >= end:
            return req
        time.sleep(max(0.0, min(poll, end - time.monotonic())))
