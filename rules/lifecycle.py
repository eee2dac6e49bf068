"""The alarm lifecycle: acknowledge, reset, shelve, suppress by design, out of service.

The condition engine (:mod:`spanwatch.rules.alarms`) says when an alarm's condition is raised and cleared;
this module keeps what an operator sees and does with it, as the alarm state diagram of ANSI/ISA-18.2-2016
(*Management of Alarm Systems for the Process Industries*, clause on alarm states) and IEC 62682:2014 draw
it (the clause numbers were not checked: from memory; the states agree with OPC UA Part 9, *Alarms and
Conditions*, and its acknowledge, reset, shelving and out-of-service methods).

States (:class:`AlarmState`), from the process condition and the acknowledgement:

============================  =========  ============  ==========================================
state                         condition  acknowledged  name in the standard
============================  =========  ============  ==========================================
``normal``                    normal     yes           normal (A)
``unack``                     abnormal   no            unacknowledged alarm (B)
``acked``                     abnormal   yes           acknowledged alarm (C)
``rtn_unack``                 normal     no            returned to normal unacknowledged (D)
``latched_unack``             normal     no            latched (E), not yet acknowledged
``latched``                   normal     yes           latched (E), acknowledged, awaiting reset
``shelved``                   any        —             shelved (F)
``suppressed``                any        —             suppressed by design (G)
``out_of_service``            any        —             out of service (H)
============================  =========  ============  ==========================================

Transitions: a raise takes any of A-E to B; acknowledge takes B to C, D to A and E-unacknowledged to E;
a clear takes C to A and B to D (a latched alarm: to E, where only an operator's reset, once acknowledged,
returns it to A). Shelving (timed, or one-shot: until the alarm next clears, as OPC UA Part 9 has it),
suppression by design and out of service can be entered from any state; the condition is still tracked
and recorded underneath, and when the last of them ends the alarm takes the state its condition has
then: B if the condition is abnormal (announced again), A if not. Out of service hides more than
shelving, shelving more than suppression: a shelved alarm that goes out of service shows as out of
service, and shows as shelved again on return to service if its shelf time has not run out.

Every change is a :class:`LifecycleEvent` with the state before and after; an action that does not apply
(acknowledging an acknowledged alarm, unshelving an alarm that is not shelved) raises
:class:`ActionRefused` with a message that says why, and changes nothing.
"""

from __future__ import annotations

import enum
import math
from collections.abc import Iterable
from dataclasses import dataclass, replace


class AlarmState(enum.StrEnum):
    """What the operator sees of one alarm (ANSI/ISA-18.2-2016 alarm state diagram; from memory)."""

    NORMAL = "normal"
    UNACK = "unack"
    ACKED = "acked"
    RTN_UNACK = "rtn_unack"
    LATCHED_UNACK = "latched_unack"
    LATCHED = "latched"
    SHELVED = "shelved"
    SUPPRESSED = "suppressed"
    OUT_OF_SERVICE = "out_of_service"


STATE_TEXT = {
    AlarmState.NORMAL: "normal",
    AlarmState.UNACK: "unacknowledged alarm",
    AlarmState.ACKED: "acknowledged alarm",
    AlarmState.RTN_UNACK: "returned to normal, unacknowledged",
    AlarmState.LATCHED_UNACK: "latched, unacknowledged",
    AlarmState.LATCHED: "latched, awaiting reset",
    AlarmState.SHELVED: "shelved",
    AlarmState.SUPPRESSED: "suppressed by design",
    AlarmState.OUT_OF_SERVICE: "out of service",
}


class Action(enum.StrEnum):
    """What changes an alarm's lifecycle: the process, an operator, or the design."""

    RAISE = "raise"  # the condition engine
    CLEAR = "clear"
    ACK = "ack"  # an operator
    RESET = "reset"
    SHELVE = "shelve"
    UNSHELVE = "unshelve"
    COMMENT = "comment"
    OUT_OF_SERVICE = "out_of_service"
    RETURN_TO_SERVICE = "return_to_service"
    SUPPRESS = "suppress"  # suppression by design
    UNSUPPRESS = "unsuppress"
    SHELVE_EXPIRED = "shelve_expired"  # the shelf time ran out


OPERATOR_ACTIONS = frozenset({Action.ACK, Action.RESET, Action.SHELVE, Action.UNSHELVE, Action.COMMENT,
                              Action.OUT_OF_SERVICE, Action.RETURN_TO_SERVICE})


class ActionRefused(ValueError):
    """An action that does not apply to the alarm's state; the message says why."""


@dataclass(frozen=True)
class Record:
    """The lifecycle of one alarm: its condition, acknowledgement, latch and what hides it.

    ``held``: a latched alarm whose condition returned to normal, awaiting reset. ``shelved_until``: end of a
    timed shelve (epoch s), ``inf`` for a one-shot shelve that ends when the alarm clears, None when not
    shelved. ``suppressed_by``: why it is suppressed by design (empty when it is not).
    """

    active: bool = False
    acked: bool = True
    held: bool = False
    shelved_until: float | None = None
    shelved_by: str = ""
    shelve_reason: str = ""
    out_of_service: bool = False
    oos_by: str = ""
    oos_reason: str = ""
    suppressed_by: str = ""

    @property
    def shelved(self) -> bool:
        return self.shelved_until is not None

    @property
    def hidden(self) -> bool:
        """Shelved, suppressed by design or out of service: recorded, not announced."""
        return self.out_of_service or self.shelved or bool(self.suppressed_by)

    @property
    def tracked(self) -> AlarmState:
        """The state from the condition and the acknowledgement alone (what shows when nothing hides it)."""
        if self.active:
            return AlarmState.ACKED if self.acked else AlarmState.UNACK
        if self.held:
            return AlarmState.LATCHED if self.acked else AlarmState.LATCHED_UNACK
        return AlarmState.NORMAL if self.acked else AlarmState.RTN_UNACK

    @property
    def state(self) -> AlarmState:
        if self.out_of_service:
            return AlarmState.OUT_OF_SERVICE
        if self.shelved:
            return AlarmState.SHELVED
        if self.suppressed_by:
            return AlarmState.SUPPRESSED
        return self.tracked

    @property
    def annunciated(self) -> bool:
        """Shown to the operator as needing attention: not hidden, and not normal."""
        return not self.hidden and self.tracked != AlarmState.NORMAL


@dataclass(frozen=True)
class LifecycleEvent:
    """One change of one alarm's lifecycle (or an operator's comment on it), with the states around it.

    ``t``: when (epoch s; the frame time for a raise or clear, the wall clock for an action); ``user``: who
    (empty for the process and the design); ``comment``: the operator's reason or comment, or what
    suppresses the alarm; ``until``: the end of a shelve; ``request``: the id of the operator's request.
    """

    t: float
    key: str
    action: Action
    before: AlarmState
    after: AlarmState
    user: str = ""
    comment: str = ""
    until: float | None = None
    request: int | None = None

    @property
    def origin(self) -> str:
        return "operator" if self.action in OPERATOR_ACTIONS else "system"


def _refuse(key: str, rec: Record, why: str) -> ActionRefused:
    return ActionRefused(f"{key}: {why} (state: {STATE_TEXT[rec.state]})")


def _revealed(rec: Record) -> Record:
    """The record once nothing hides it: announced again if the condition is abnormal, normal if not."""
    if rec.hidden:
        return rec
    return replace(rec, acked=not rec.active, held=False)


def apply(rec: Record, action: Action, *, key: str = "alarm", t: float = 0.0, latched: bool = False,
          user: str = "", comment: str = "", until: float | None = None) -> Record:
    """The record after ``action`` (a pure function); :class:`ActionRefused` when the action does not apply.

    ``latched``: the alarm is configured latched; ``until``: the end of a shelve (epoch s), ``inf`` for a
    one-shot shelve; ``t``: now (a shelve must end after it).
    """
    if action in OPERATOR_ACTIONS and action != Action.COMMENT and not user.strip():
        raise ActionRefused(f"{key}: {action.value} needs the name of the user who does it")
    if action == Action.RAISE:
        if rec.active:
            raise _refuse(key, rec, "its condition is already abnormal")
        return replace(rec, active=True, acked=False, held=False)
    if action == Action.CLEAR:
        if not rec.active:
            raise _refuse(key, rec, "its condition is already normal")
        out = replace(rec, active=False, held=latched and not rec.hidden)
        if out.shelved_until == math.inf:  # a one-shot shelve ends when the alarm clears
            out = _revealed(replace(out, shelved_until=None, shelved_by="", shelve_reason=""))
        return out
    if action == Action.ACK:
        if rec.hidden:
            raise _refuse(key, rec, "a hidden alarm cannot be acknowledged")
        if rec.acked:
            raise _refuse(key, rec, "it is already acknowledged" if rec.tracked != AlarmState.NORMAL
                          else "there is nothing to acknowledge")
        return replace(rec, acked=True)
    if action == Action.RESET:
        if rec.hidden or not rec.held:
            raise _refuse(key, rec, "only a latched alarm whose condition has returned to normal can be reset")
        if not rec.acked:
            raise _refuse(key, rec, "acknowledge it before resetting it")
        return replace(rec, held=False)
    if action == Action.SHELVE:
        if rec.out_of_service:
            raise _refuse(key, rec, "an alarm out of service cannot be shelved")
        if rec.shelved:
            raise _refuse(key, rec, "it is already shelved; unshelve it first")
        if not comment.strip():
            raise ActionRefused(f"{key}: shelving needs a reason")
        if until is None or not until > t:
            raise ActionRefused(f"{key}: a shelve must end after it starts")
        if until == math.inf and not rec.active:
            raise _refuse(key, rec, "a one-shot shelve (until it clears) needs an alarm whose condition is abnormal")
        return replace(rec, shelved_until=until, shelved_by=user, shelve_reason=comment)
    if action in (Action.UNSHELVE, Action.SHELVE_EXPIRED):
        if not rec.shelved:
            raise _refuse(key, rec, "it is not shelved")
        if action == Action.SHELVE_EXPIRED and rec.shelved_until is not None and t < rec.shelved_until:
            raise _refuse(key, rec, "its shelf time has not run out")
        return _revealed(replace(rec, shelved_until=None, shelved_by="", shelve_reason=""))
    if action == Action.OUT_OF_SERVICE:
        if rec.out_of_service:
            raise _refuse(key, rec, "it is already out of service")
        if not comment.strip():
            raise ActionRefused(f"{key}: taking an alarm out of service needs a reason")
        return replace(rec, out_of_service=True, oos_by=user, oos_reason=comment)
    if action == Action.RETURN_TO_SERVICE:
        if not rec.out_of_service:
            raise _refuse(key, rec, "it is not out of service")
        return _revealed(replace(rec, out_of_service=False, oos_by="", oos_reason=""))
    if action == Action.SUPPRESS:
        if not comment:
            raise ActionRefused(f"{key}: suppression needs what suppresses it")
        return replace(rec, suppressed_by=comment)
    if action == Action.UNSUPPRESS:
        if not rec.suppressed_by:
            raise _refuse(key, rec, "it is not suppressed")
        return _revealed(replace(rec, suppressed_by=""))
    if action == Action.COMMENT:
        if not comment.strip():
            raise ActionRefused(f"{key}: a comment needs its text")
        if not user.strip():
            raise ActionRefused(f"{key}: a comment needs the name of the user who writes it")
        return rec
    raise ActionRefused(f"{key}: unknown action {action!r}")


class Lifecycle:
    """The lifecycle records of every alarm point of a line: the one owner of that state.

    ``latched``: the keys configured latched; ``shelve_max``: the longest shelve an operator may set (s).
    Every method returns the :class:`LifecycleEvent` it caused (to record, publish and log).
    """

    def __init__(self, keys: Iterable[str], *, latched: Iterable[str] = (), shelve_max: float = 8 * 3600.0) -> None:
        self.records: dict[str, Record] = {k: Record() for k in keys}
        self.latched = frozenset(latched)
        self.shelve_max = shelve_max
        self._shelved: set[str] = set()  # keys with a shelve, so that expire() looks at those only

    def _do(self, t: float, key: str, action: Action, *, user: str = "", comment: str = "",
            until: float | None = None, request: int | None = None) -> LifecycleEvent:
        rec = self.records.get(key)
        if rec is None:
            raise ActionRefused(f"{key}: no such alarm on this line")
        new = apply(rec, action, key=key, t=t, latched=key in self.latched, user=user, comment=comment, until=until)
        self.set(key, new)
        return LifecycleEvent(t=t, key=key, action=action, before=rec.state, after=new.state, user=user,
                              comment=comment, until=until, request=request)

    def set(self, key: str, rec: Record) -> None:
        """Put ``rec`` as the record of ``key`` (an action's result, or one restored from the history)."""
        self.records[key] = rec
        if rec.shelved:
            self._shelved.add(key)
        else:
            self._shelved.discard(key)

    def condition(self, t: float, key: str, event: str) -> LifecycleEvent | None:
        """A raise or clear from the condition engine (None for a key this lifecycle does not have)."""
        if key not in self.records:
            return None
        return self._do(t, key, Action(event))

    def act(self, t: float, key: str, action: Action | str, *, user: str, comment: str = "",
            until: float | None = None, request: int | None = None) -> LifecycleEvent:
        """An operator's action (refused with :class:`ActionRefused` when it does not apply).

        A shelve needs ``until`` (epoch s, at most ``shelve_max`` after ``t``; ``inf``: one-shot, until the alarm
        clears).
        """
        act = Action(action)
        if act not in OPERATOR_ACTIONS:
            raise ActionRefused(f"{key}: {act.value} is not an operator's action")
        if act == Action.SHELVE and until is not None and until != math.inf and until - t > self.shelve_max + 1e-6:
            raise ActionRefused(f"{key}: a shelve may last at most {self.shelve_max / 3600:g} h "
                                f"(asked for {(until - t) / 3600:.3g} h)")
        return self._do(t, key, act, user=user, comment=comment, until=until, request=request)

    def expire(self, t: float) -> list[LifecycleEvent]:
        """End every timed shelve whose time has run out at ``t``."""
        due = sorted(k for k in self._shelved if self.records[k].shelved_until <= t)  # type: ignore[operator]
        return [self._do(t, k, Action.SHELVE_EXPIRED) for k in due]

    def suppress(self, t: float, suppressed: dict[str, str]) -> list[LifecycleEvent]:
        """Make the suppression by design what ``suppressed`` (key -> what suppresses it) says."""
        out = []
        for k, r in self.records.items():
            why = suppressed.get(k, "")
            if why == r.suppressed_by:
                continue
            if r.suppressed_by:
                out.append(self._do(t, k, Action.UNSUPPRESS))
            if why:
                out.append(self._do(t, k, Action.SUPPRESS, comment=why))
        return out

    def state(self, key: str) -> AlarmState:
        return self.records[key].state

    def replay(self, events: Iterable[LifecycleEvent]) -> None:
        """Apply recorded events in order (rebuilding the records from a journal)."""
        for e in events:
            if e.key not in self.records:
                continue
            self._do(e.t, e.key, e.action, user=e.user, comment=e.comment, until=e.until, request=e.request)
