"""Operator actions on the alarms of a running daemon: acknowledge, reset, shelve, unshelve, comment, out of
service, return to service.

An operator's command (``spanwatch ack 42 --user ...``) writes a request into the history's
``action_requests`` table and waits for its answer; the daemon of that line polls the table
(:class:`ActionInbox`, every ``[alarms] actions_poll`` seconds, 0.25 s by default), carries each request out
on its lifecycle (:func:`carry_out`) and commits the answer in the same transaction as the lifecycle
changes it caused, so the state the CLI reads back is the daemon's. Nothing state-changing listens on the
network: the database is the only way in (its own authentication: file permissions for SQLite, roles for
PostgreSQL), and optionally an MQTT topic the broker authenticates.

A request names its alarm by the episode's id (``42``, as ``spanwatch alarms`` lists it) or by its key:
``kind:object:level`` (``traction:R3:alarm``) or ``kind:object`` (every level of that check on that object).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

from spanwatch.rules.lifecycle import ActionRefused, Lifecycle, LifecycleEvent

# the command names (ISA-18.2 terms) and the lifecycle's action for each
COMMANDS = {"ack": "ack", "reset": "reset", "shelve": "shelve", "unshelve": "unshelve", "comment": "comment",
            "out-of-service": "out_of_service", "return-to-service": "return_to_service"}


def target_keys(keys: Iterable[str], target: str) -> list[str]:
    """The alarm keys ``target`` names: ``kind:object:level`` itself, ``kind:object`` every level of it.

    >>> target_keys(["traction:R3:warning", "traction:R3:alarm", "traction:R30:alarm"], "traction:R3")
    ['traction:R3:warning', 'traction:R3:alarm']
    >>> target_keys(["traction:R3:alarm"], "traction:R3:alarm")
    ['traction:R3:alarm']
    """
    keys = list(keys)
    if target in keys:
        return [target]
    return [k for k in keys if k.startswith(target + ":") and k.count(":") == target.count(":") + 1]


@dataclass(frozen=True)
class Outcome:
    """What became of a request: the lifecycle changes it caused, applied or refused, and the answer's text."""

    events: list[LifecycleEvent]
    status: str  # "applied" | "refused"
    answer: str


def carry_out(lifecycle: Lifecycle, *, t: float, target: str, action: str, user: str, comment: str = "",
              until: float | None = None, one_shot: bool = False, request: int | None = None) -> Outcome:
    """Carry out one operator's request on every alarm it names; refused when it applies to none of them.

    ``until``: a shelve's end (epoch s); ``one_shot``: shelved until the alarm next clears.
    """
    keys = target_keys(lifecycle.records, target)
    if not keys:
        return Outcome([], "refused", f"{target}: no such alarm on this line")
    if action == "shelve" and one_shot:
        until = math.inf
    events, refusals = [], []
    for key in keys:
        try:
            events.append(lifecycle.act(t, key, action, user=user, comment=comment, until=until, request=request))
        except ActionRefused as exc:
            refusals.append(str(exc))
    done = [f"{e.key}: {e.before.value} -> {e.after.value}" for e in events]
    return Outcome(events, "applied" if events else "refused", "; ".join(done + refusals))


@dataclass(frozen=True)
class Pending:
    """A request read from the inbox, its target resolved to an alarm key (or a key pattern)."""

    id: int
    target: str
    action: str
    user: str
    comment: str
    until: float | None
    one_shot: bool


class ActionInbox:
    """The daemon's reader of the operators' requests for its line (on its own connection; never the writer's).

    :meth:`poll` returns the requests not seen yet, oldest first (each once per run); a request that was
    carried out but whose answer never reached the database (the daemon killed before the commit) is still
    pending at the next start and is carried out then, on the state restored from the same transaction.
    """

    def __init__(self, url: str, line_name: str, *, timeout: float = 2.0) -> None:
        from spanwatch.connectors.history.database import make_engine

        self.engine = make_engine(url, timeout=timeout)
        self.line_name = line_name
        self.after = 0
        self.errors = 0
        self.last_error = ""

    def poll(self) -> list[Pending]:
        from spanwatch.connectors.history.requests import pending

        try:
            reqs = pending(self.engine, self.line_name, after_id=self.after)
            out = []
            key_of = self._keys_of([r.episode_id for r in reqs if r.episode_id is not None])
        except Exception as exc:  # the database unavailable: try again at the next poll
            self.errors += 1
            self.last_error = f"{type(exc).__name__}: {exc}"
            return []
        for r in reqs:
            self.after = max(self.after, r.id)
            target = key_of.get(r.episode_id, f"episode {r.episode_id}") if r.episode_id is not None \
                else (r.alarm_key or "")
            out.append(Pending(r.id, target, r.action, r.user, r.comment or "", r.until, bool(r.one_shot)))
        return out

    def _keys_of(self, episode_ids: list[int]) -> dict[int, str]:
        """Episode id -> its alarm key, for the ids the history has."""
        from spanwatch.connectors.history.models import AlarmEpisode
        from sqlalchemy import select
        from sqlalchemy.orm import Session

        if not episode_ids:
            return {}
        with Session(self.engine) as s:
            return dict(s.execute(select(AlarmEpisode.id, AlarmEpisode.alarm_key)
                                  .where(AlarmEpisode.id.in_(episode_ids))).tuples().all())

    def key_of_episode(self, episode_id: int) -> str | None:
        """The alarm key of an episode (an action that names the alarm by its id), None when unknown."""
        try:
            return self._keys_of([episode_id]).get(episode_id)
        except Exception:  # the database unavailable: the action is refused as naming no alarm
            return None

    def close(self) -> None:
        self.engine.dispose()


# --- the operator's side: send a request, wait for the daemon's answer -------------------------------------------


def login_name() -> str:
    """Who runs this process (the default user of an operator's action, who saved a config), or "" if unknown."""
    import getpass

    try:
        return getpass.getuser()
    except Exception:  # no user name in the environment or the password database
        return ""


class NoLine(ValueError):
    """The request cannot name the line it is for (the message says what to give)."""


def line_for(engine: object, *, line_name: str | None, episode_id: int | None) -> str:
    """The line a request is for: ``line_name`` when given, else the line of the episode's run, else the only
    line a daemon has run in this history."""
    from spanwatch.connectors.history.models import AlarmEpisode, Run, RunMode
    from sqlalchemy import select
    from sqlalchemy.orm import Session

    if line_name:
        return line_name
    with Session(engine) as s:  # type: ignore[call-overload]
        if episode_id is not None:
            name = s.scalar(select(Run.line_name).join(AlarmEpisode, AlarmEpisode.run_id == Run.id)
                            .where(AlarmEpisode.id == episode_id))
            if name is None:
                raise NoLine(f"alarm {episode_id} is not in this history (spanwatch alarms lists the ids)")
            return str(name)
        lines = sorted(set(s.scalars(select(Run.line_name).where(Run.mode == RunMode.DAEMON))))
    if len(lines) == 1:
        return lines[0]
    if not lines:
        raise NoLine("no daemon has run in this history: give --line or --config")
    raise NoLine(f"this history holds the lines {', '.join(lines)}: give --line")


def parse_target(target: str) -> tuple[int | None, str | None]:
    """An alarm id (``42``) or an alarm key (``traction:R3`` or ``traction:R3:alarm``); ValueError otherwise.

    >>> parse_target("42"), parse_target("traction:R3")
    ((42, None), (None, 'traction:R3'))
    """
    t = target.strip()
    if t.isdigit():
        return int(t), None
    if t.count(":") in (1, 2) and all(t.split(":")):
        return None, t
    raise ValueError(f"expected an alarm id (a number, as spanwatch alarms lists it) or kind:object[:level] "
                     f"such as traction:R3:alarm, got {target!r}")
