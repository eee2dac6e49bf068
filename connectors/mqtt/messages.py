"""The JSON objects the alarm publisher sends: alarm messages and the retained list of alarms (pure functions).

Every object carries ``version`` (:data:`VERSION`; the unversioned messages of earlier releases are version 1) and
``advisory: true``. Times are given twice: as ISO 8601 in UTC with milliseconds (``time``, ``raised`` ...) and as
epoch seconds (``time_epoch_s``, ``raised_epoch_s`` ...). Non-finite numbers become ``null`` (JSON has no NaN).
``value``, ``limit``, ``peak`` and ``deadband`` are the check's own value, in ``unit``; a ``unit`` starting with
``%`` holds a fraction (0.02 reads 2 %), as the checks compute it. Lifecycle states and their texts are those of
:mod:`spanwatch.rules.lifecycle` (ANSI/ISA-18.2-2016 alarm state diagram; from memory).

**Alarm message** (``alarm_topic``, QoS 1, not retained), one per event:

=========================  ===============  ===============================================================
field                      type             meaning
=========================  ===============  ===============================================================
``version``                int              :data:`VERSION`
``type``                   str              ``condition`` (raise, clear) or ``lifecycle`` (everything else)
``event``                  str              ``raise``, ``clear``, or the lifecycle action: ``ack``, ``reset``,
                                            ``shelve``, ``unshelve``, ``shelve_expired``, ``comment``,
                                            ``out_of_service``, ``return_to_service``, ``suppress``,
                                            ``unsuppress``
``origin``                 str              ``system`` (process, design, shelf timer) or ``operator``
``time``                   str              when, ISO 8601 UTC (frame time of a raise or clear)
``time_epoch_s``           float            the same, epoch seconds
``key``                    str              ``<check>:<object>:<level>``
``check``, ``object``      str              the check kind and the roller, zone, winder or tag
``level``                  str              ``warning`` or ``alarm``
``priority``               str              ``low``, ``medium``, ``high``
``limit``                  float|null       the alarm limit, in ``unit``
``unit``                   str              unit of ``value``, ``limit``, ``peak``, ``deadband``
``direction``              str              ``high`` (value >= limit), ``low`` (<=), ``abs`` (abs value >=)
``state``                  str|null         lifecycle state after the event (``unack``, ``acked``, ``shelved``
                                            ...); null when published without the lifecycle
``state_text``             str|null         the state in words (``unacknowledged alarm`` ...)
``state_before``           str|null         the state before the event
``state_before_text``      str|null         in words
``rationalization``        object           ``cause``, ``consequence``, ``action`` (corrective action),
                                            ``response_time_s`` (float, s)
``line``                   str              the line's name (only when the publisher was given one)
``advisory``               bool             always true: spanwatch is not a safety function
*condition only*
``value``                  float|null       the check value at the raise or clear
``line_state``             str              line state then (``running``, ``stopped`` ...)
``peak``                   float|null       most abnormal value of the episode (clear only)
``first_out``              bool             first alarm of a burst (false when the engine does not tell)
``chattering``             bool             the alarm chatters (false when the engine does not tell)
``blames``                 list of str      the measured things to look at (a zone, its tension tag, rollers)
``detail``                 object           raise only: what the check gave at the raise (a drift's
                                            ``change_time`` epoch s, ``shift``, ``mean``, ``sigma`` in the
                                            residual's unit; non-finite as null); empty otherwise
*lifecycle only*
``user``                   str              who did it (empty for the system)
``comment``                str              the operator's reason or comment; what suppresses the alarm
``until``                  str|null         end of a timed shelve, ISO 8601 UTC (null otherwise)
``until_epoch_s``          float|null       the same, epoch seconds
``one_shot``               bool             a shelve until the alarm next clears (``until`` then null)
``request``                int|null         the id of the operator's request
=========================  ===============  ===============================================================

**Alarm list** (``active_topic``, QoS 1, retained, after every change): ``version``, ``time``, ``time_epoch_s``,
``count``, ``counts`` (state -> number of alarms), ``active`` (the list), ``line``, ``advisory``. Each row:
``key``, ``check``, ``object``, ``level``, ``priority``, ``limit``, ``unit``, ``direction``, ``state``,
``state_text``, ``condition_active`` (bool: the condition is abnormal now), ``acked`` (bool), ``raised``,
``raised_epoch_s``, ``value`` (at the raise), ``cleared``, ``cleared_epoch_s``, ``peak`` (at the clear; null while
the condition holds), ``shelved_until``, ``shelved_until_epoch_s``, ``shelve_one_shot``, ``shelved_by``,
``shelve_reason``, ``out_of_service_by``, ``out_of_service_reason``, ``suppressed_by``, ``rationalization``.
With the lifecycle, the list holds every alarm whose state is not ``normal`` (unacknowledged, acknowledged,
returned unacknowledged, latched, shelved, suppressed, out of service), so a subscriber that connects late
sees all of them; without it (:meth:`MqttAlarmPublisher.publish`), the alarms whose condition is active, with
the lifecycle fields null.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from spanwatch.rules.alarms import AlarmPoint, Transition
from spanwatch.rules.base import state_name
from spanwatch.rules.lifecycle import STATE_TEXT, Action, AlarmState, LifecycleEvent, Record
from spanwatch.rules.values import finite_or_none, iso

VERSION = 2
CONDITION_EVENTS = frozenset({Action.RAISE, Action.CLEAR})


def stamp(name: str, t: float | None) -> dict[str, Any]:
    """``{name: ISO 8601 UTC, name_epoch_s: epoch s}``, both null for None or a non-finite time.

    >>> stamp("time", 0.0)
    {'time': '1970-01-01T00:00:00.000+00:00', 'time_epoch_s': 0.0}
    >>> stamp("until", float("inf"))
    {'until': None, 'until_epoch_s': None}
    """
    ok = t is not None and math.isfinite(t)
    return {name: iso(t) if ok else None, f"{name}_epoch_s": float(t) if ok else None}  # type: ignore[arg-type]


def rationalization(p: AlarmPoint) -> dict[str, Any]:
    """The alarm's rationalization: cause, consequence, corrective action, response time (s)."""
    return {"cause": p.cause, "consequence": p.consequence, "action": p.action,
            "response_time_s": finite_or_none(p.response_time)}


def _state(prefix: str, s: AlarmState | None) -> dict[str, Any]:
    return {prefix: s.value if s is not None else None, f"{prefix}_text": STATE_TEXT[s] if s is not None else None}


def point_fields(p: AlarmPoint) -> dict[str, Any]:
    """What identifies an alarm point and its limit."""
    out = {"key": p.key, "check": p.kind, "object": p.object_id, "level": p.level, "priority": p.priority,
           "limit": finite_or_none(p.limit), "unit": p.unit, "direction": p.direction}
    for extra in ("latched", "groups"):  # fields an alarm point may carry in a later release
        v = getattr(p, extra, None)
        if v is not None:
            out[extra] = list(v) if isinstance(v, (tuple, list, set, frozenset)) else v
    return out


def alarm_message(p: AlarmPoint, *, t: float, event: str, tr: Transition | None = None,
                  ev: LifecycleEvent | None = None, line: str = "") -> dict[str, Any]:
    """One alarm message (see the module docstring): a raise or clear (``tr`` and/or ``ev``) or a lifecycle event.

    ``tr``: the condition engine's transition (value, line state, peak, first-out, chattering); ``ev``: the
    lifecycle's event (states before and after, who, comment, shelve end). Either may be missing: a transition
    published without the lifecycle has null states; a raise or clear replayed from a journal, a null value.
    """
    act = Action(event)
    msg: dict[str, Any] = {"version": VERSION, "type": "condition" if act in CONDITION_EVENTS else "lifecycle",
                           "event": act.value,
                           "origin": ev.origin if ev is not None else "system", **stamp("time", t)}
    msg.update(point_fields(p))
    msg.update(_state("state", ev.after if ev is not None else None))
    msg.update(_state("state_before", ev.before if ev is not None else None))
    msg["rationalization"] = rationalization(p)
    if act in CONDITION_EVENTS:
        msg["value"] = finite_or_none(tr.value) if tr is not None else None
        msg["line_state"] = state_name(tr.line_state) if tr is not None else None
        if act == Action.CLEAR:
            msg["peak"] = finite_or_none(tr.peak) if tr is not None else None
        msg["first_out"] = bool(getattr(tr, "first_out", False))
        msg["chattering"] = bool(getattr(tr, "chattering", False))
        msg["blames"] = list(getattr(p, "blames", ()))
        msg["detail"] = {k: finite_or_none(v) for k, v in getattr(tr, "detail", ())} if tr is not None else {}
    elif ev is not None:
        msg.update({"user": ev.user, "comment": ev.comment, **stamp("until", ev.until),
                    "one_shot": ev.until == math.inf, "request": ev.request})
    if line:
        msg["line"] = line
    msg["advisory"] = True
    return msg


def transition_message(tr: Transition, line: str = "", ev: LifecycleEvent | None = None) -> dict[str, Any]:
    """The alarm message of one raise or clear (non-finite numbers become null); ``ev``: its lifecycle event."""
    return alarm_message(tr.point, t=tr.t, event=tr.event, tr=tr, ev=ev, line=line)


def list_row(p: AlarmPoint, rec: Record | None, episode: Mapping[str, float] | None) -> dict[str, Any]:
    """One row of the alarm list: the point, its lifecycle record (None: not known) and its episode.

    ``episode``: ``raised``, ``value`` (at the raise), and after the clear ``cleared`` and ``peak``, epoch s and
    check values; None when the publisher has not seen the raise (a lifecycle restored from a journal).
    """
    ep = episode or {}
    row = point_fields(p)
    row.update(_state("state", rec.state if rec is not None else None))
    row["condition_active"] = rec.active if rec is not None else True
    row["acked"] = rec.acked if rec is not None else None
    row.update(stamp("raised", ep.get("raised")))
    row["value"] = finite_or_none(ep.get("value"))
    row.update(stamp("cleared", ep.get("cleared")))
    row["peak"] = finite_or_none(ep.get("peak"))
    until = rec.shelved_until if rec is not None else None
    row.update(stamp("shelved_until", until))
    row["shelve_one_shot"] = until == math.inf
    row["shelved_by"] = rec.shelved_by if rec is not None else ""
    row["shelve_reason"] = rec.shelve_reason if rec is not None else ""
    row["out_of_service_by"] = rec.oos_by if rec is not None else ""
    row["out_of_service_reason"] = rec.oos_reason if rec is not None else ""
    row["suppressed_by"] = rec.suppressed_by if rec is not None else ""
    row["rationalization"] = rationalization(p)
    return row


def list_message(rows: list[dict[str, Any]], now: float, line: str = "") -> dict[str, Any]:
    """The retained alarm list around its rows, with the number of alarms in each state."""
    counts: dict[str, int] = {}
    for r in rows:
        if r["state"] is not None:
            counts[r["state"]] = counts.get(r["state"], 0) + 1
    msg: dict[str, Any] = {"version": VERSION, **stamp("time", now), "count": len(rows), "counts": counts,
                           "active": rows}
    if line:
        msg["line"] = line
    msg["advisory"] = True
    return msg
