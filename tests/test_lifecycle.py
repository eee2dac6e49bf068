"""The alarm lifecycle against the alarm state diagram of the alarm-management standards.

Every expected state below is read from the state diagram of ANSI/ISA-18.2-2016, *Management of Alarm
Systems for the Process Industries* (alarm states A normal, B unacknowledged alarm, C acknowledged alarm,
D returned to normal unacknowledged, E latched, F shelved, G suppressed by design, H out of service) and
IEC 62682:2014, which has the same diagram (from memory: the standards' text was not at hand), and from
OPC UA Part 9, *Alarms and Conditions* (IEC 62541-9), for one-shot and timed shelving (from memory).
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from spanwatch.rules.lifecycle import (
    Action,
    ActionRefused,
    AlarmState,
    Lifecycle,
    LifecycleEvent,
    Record,
    apply,
)

S = AlarmState
K = "traction:R2:alarm"


def walk(steps: list[tuple[str, dict]], *, latched: bool = False) -> list[tuple[S, S]]:
    """Apply (action, args) steps to one alarm; the (before, after) state of each."""
    life = Lifecycle([K], latched=[K] if latched else [])
    out = []
    for i, (action, kw) in enumerate(steps):
        t = float(i + 1)
        if action in ("raise", "clear"):
            e = life.condition(t, K, action)
        elif action == "expire":
            (e,) = life.expire(kw["t"])
        elif action in ("suppress", "unsuppress"):
            (e,) = life.suppress(t, {K: "source lost"} if action == "suppress" else {})
        else:
            e = life.act(t, K, action, **kw)
        assert e is not None
        out.append((e.before, e.after))
    return out


OP = {"user": "op1"}


# --- ISA-18.2 state diagram, transition by transition (ANSI/ISA-18.2-2016 alarm state diagram; from memory) ---

@pytest.mark.parametrize(("steps", "expected"), [
    # A -> B: the condition becomes abnormal
    ([("raise", {})], [(S.NORMAL, S.UNACK)]),
    # B -> C: acknowledged while abnormal; C -> A: returns to normal
    ([("raise", {}), ("ack", OP), ("clear", {})], [(S.NORMAL, S.UNACK), (S.UNACK, S.ACKED), (S.ACKED, S.NORMAL)]),
    # B -> D: returns to normal unacknowledged; D -> A: acknowledged
    ([("raise", {}), ("clear", {}), ("ack", OP)], [(S.NORMAL, S.UNACK), (S.UNACK, S.RTN_UNACK),
                                                   (S.RTN_UNACK, S.NORMAL)]),
    # D -> B: the condition returns before acknowledgement
    ([("raise", {}), ("clear", {}), ("raise", {})], [(S.NORMAL, S.UNACK), (S.UNACK, S.RTN_UNACK),
                                                     (S.RTN_UNACK, S.UNACK)]),
    # C -> B? no: an acknowledged alarm stays acknowledged while the condition holds; a new raise needs a clear
    ([("raise", {}), ("ack", OP), ("clear", {}), ("raise", {})],
     [(S.NORMAL, S.UNACK), (S.UNACK, S.ACKED), (S.ACKED, S.NORMAL), (S.NORMAL, S.UNACK)]),
])
def test_unlatched_transitions(steps, expected):
    assert walk(steps) == expected


def test_latched_alarm_needs_ack_and_reset():
    # E: a latched alarm stays annunciated after the return to normal until an operator resets it
    got = walk([("raise", {}), ("clear", {}), ("ack", OP), ("reset", OP)], latched=True)
    assert got == [(S.NORMAL, S.UNACK), (S.UNACK, S.LATCHED_UNACK), (S.LATCHED_UNACK, S.LATCHED),
                   (S.LATCHED, S.NORMAL)]
    got = walk([("raise", {}), ("ack", OP), ("clear", {}), ("reset", OP)], latched=True)
    assert got[-2:] == [(S.ACKED, S.LATCHED), (S.LATCHED, S.NORMAL)]
    # a latched alarm whose condition returns before the reset is abnormal again (E -> B)
    got = walk([("raise", {}), ("ack", OP), ("clear", {}), ("raise", {})], latched=True)
    assert got[-1] == (S.LATCHED, S.UNACK)


@pytest.mark.parametrize("start", [
    [], [("raise", {})], [("raise", {}), ("ack", OP)], [("raise", {}), ("clear", {})]])
@pytest.mark.parametrize(("enter", "leave", "hidden"), [
    (("shelve", {"user": "op1", "comment": "sensor cleaning", "until": 3600.0}), ("unshelve", OP), S.SHELVED),
    (("out_of_service", {"user": "tech", "comment": "load cell replaced"}), ("return_to_service", OP),
     S.OUT_OF_SERVICE),
    (("suppress", {}), ("unsuppress", {}), S.SUPPRESSED),
])
def test_hiding_states_from_any_state(start, enter, leave, hidden):
    # F, G, H can be entered from any state; on leaving, the alarm takes the state its condition has:
    # B when abnormal (announced again), A when normal
    got = walk([*start, enter, leave])
    active = sum(1 if a == "raise" else -1 if a == "clear" else 0 for a, _ in start) > 0
    assert got[-2][1] == hidden
    assert got[-1] == (hidden, S.UNACK if active else S.NORMAL)


def test_condition_is_tracked_while_hidden():
    got = walk([("shelve", {"user": "op1", "comment": "trial", "until": 3600.0}), ("raise", {}), ("unshelve", OP)])
    assert got == [(S.NORMAL, S.SHELVED), (S.SHELVED, S.SHELVED), (S.SHELVED, S.UNACK)]
    got = walk([("raise", {}), ("out_of_service", {"user": "tech", "comment": "repair"}), ("clear", {}),
                ("return_to_service", OP)])
    assert got[-1] == (S.OUT_OF_SERVICE, S.NORMAL)


def test_timed_shelve_expires_and_one_shot_ends_at_clear():
    # OPC UA Part 9: timed shelving ends at its time; one-shot shelving ends when the alarm returns to normal
    got = walk([("raise", {}), ("shelve", {"user": "op1", "comment": "known", "until": 100.0}),
                ("expire", {"t": 100.0})])
    assert got[-1] == (S.SHELVED, S.UNACK)
    got = walk([("raise", {}), ("shelve", {"user": "op1", "comment": "known", "until": math.inf}), ("clear", {})])
    assert got[-1] == (S.SHELVED, S.NORMAL)
    life = Lifecycle([K])
    life.act(0.0, K, "shelve", user="op1", comment="known", until=100.0)
    assert life.expire(99.9) == []


def test_out_of_service_hides_a_shelve_and_shows_it_again():
    got = walk([("shelve", {"user": "op1", "comment": "a", "until": 3600.0}),
                ("out_of_service", {"user": "tech", "comment": "b"}), ("return_to_service", {"user": "tech"})])
    assert got == [(S.NORMAL, S.SHELVED), (S.SHELVED, S.OUT_OF_SERVICE), (S.OUT_OF_SERVICE, S.SHELVED)]


def test_comment_changes_nothing():
    assert walk([("raise", {}), ("comment", {"user": "op1", "comment": "checking the nip"})])[-1] == (S.UNACK,
                                                                                                       S.UNACK)


# --- actions that do not apply are refused, with a message, and change nothing ---

@pytest.mark.parametrize(("start", "action", "kw", "says"), [
    ([], "ack", OP, "nothing to acknowledge"),
    ([("raise", {}), ("ack", OP)], "ack", OP, "already acknowledged"),
    ([("raise", {})], "reset", OP, "only a latched alarm"),
    ([], "unshelve", OP, "not shelved"),
    ([("shelve", {"user": "a", "comment": "b", "until": 3600.0})], "shelve",
     {"user": "a", "comment": "b", "until": 7200.0}, "already shelved"),
    ([], "shelve", {"user": "a", "comment": "", "until": 3600.0}, "needs a reason"),
    ([], "shelve", {"user": "a", "comment": "b", "until": 0.5}, "must end after it starts"),
    ([], "shelve", {"user": "a", "comment": "b", "until": math.inf}, "one-shot"),
    ([], "shelve", {"user": "a", "comment": "b", "until": 9 * 3600 + 2}, "at most 8 h"),
    ([], "return_to_service", OP, "not out of service"),
    ([("out_of_service", {"user": "a", "comment": "b"})], "out_of_service", {"user": "a", "comment": "b"},
     "already out of service"),
    ([("out_of_service", {"user": "a", "comment": "b"})], "shelve", {"user": "a", "comment": "b", "until": 9},
     "out of service cannot be shelved"),
    ([("raise", {}), ("shelve", {"user": "a", "comment": "b", "until": 3600.0})], "ack", OP, "hidden"),
    ([("raise", {})], "ack", {"user": " "}, "name of the user"),
    ([("raise", {})], "comment", {"user": "a", "comment": ""}, "needs its text"),
    ([("raise", {})], "raise", {"user": "a"}, "not an operator's action"),
])
def test_refused(start, action, kw, says):
    life = Lifecycle([K])
    for i, (a, args) in enumerate(start):
        if a in ("raise", "clear"):
            life.condition(float(i), K, a)
        else:
            life.act(float(i), K, a, **args)
    before = life.records[K]
    with pytest.raises(ActionRefused, match=says):
        life.act(1.0, K, action, **kw)
    assert life.records[K] == before


def test_unknown_alarm_refused():
    with pytest.raises(ActionRefused, match="no such alarm"):
        Lifecycle([K]).act(0.0, "nope:x:alarm", "ack", user="op1")


def test_engine_raise_twice_is_a_defect():
    with pytest.raises(ActionRefused):
        apply(apply(Record(), Action.RAISE), Action.RAISE)


# --- property: random conditions and actions never reach an undefined state; the journal rebuilds it ---

ACTIONS = st.sampled_from(["raise", "clear", "ack", "reset", "shelve", "shelve1", "unshelve", "comment",
                           "out_of_service", "return_to_service", "suppress", "unsuppress", "expire"])


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["a", "b"]), ACTIONS, st.floats(1.0, 40_000.0)), max_size=60),
       st.booleans())
def test_random_sequences_stay_defined_and_replay(steps, latched):
    keys = ["a", "b"]
    life = Lifecycle(keys, latched=keys if latched else [])
    journal: list[LifecycleEvent] = []
    suppressed: dict[str, str] = {}
    t = 0.0
    for key, action, dt in steps:
        t += dt
        try:
            if action in ("raise", "clear"):
                e = life.condition(t, key, action)
                journal.append(e)
            elif action == "expire":
                journal += life.expire(t)
            elif action in ("suppress", "unsuppress"):
                if action == "suppress":
                    suppressed[key] = "by design"
                else:
                    suppressed.pop(key, None)
                journal += life.suppress(t, dict(suppressed))
            else:
                name = "shelve" if action == "shelve1" else action
                until = math.inf if action == "shelve1" else t + 3600.0
                journal.append(life.act(t, key, name, user="op", comment="why", until=until))
        except ActionRefused:
            continue
        for r in life.records.values():
            assert r.state in set(AlarmState)
            # the tracked state agrees with the condition: abnormal states only while the condition is abnormal
            assert (r.tracked in (S.UNACK, S.ACKED)) == r.active
            assert not (r.held and r.active)
            assert not (r.held and not latched)
            if not r.hidden:
                assert r.state == r.tracked
    for e in journal:  # every change is recorded with the states around it
        assert e.before in set(AlarmState) and e.after in set(AlarmState)
    again = Lifecycle(keys, latched=keys if latched else [])
    again.replay(journal)
    assert again.records == life.records
