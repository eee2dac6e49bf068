"""The alarm lifecycle in the history (revision 0003): the lifecycle journal, the current states, operators' requests,
configuration texts and the readers over them, on a real SQLite file and on PostgreSQL.

Every test that takes ``db_url`` runs on both backends (PostgreSQL on 127.0.0.1:5432, a fresh schema per test; under
CI=true a missing server fails those tests, elsewhere they are skipped with the reason).

The expected lifecycle states are written out by hand from the alarm state diagram of ANSI/ISA-18.2-2016 (clause on
alarm states; from memory): a raise takes normal (A) to unacknowledged (B), an acknowledgement B to acknowledged (C),
a shelve any state to shelved, and the clear of an alarm shelved until it clears (OPC UA Part 9, "one-shot
shelving"; from memory) ends the shelve, the alarm then normal.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
import textwrap
import threading
import time
from dataclasses import dataclass

import pytest
from alembic import command
from spanwatch.connectors.history import (
    Context,
    History,
    RequestAnswer,
    actions_of,
    config_at,
    episode_detail,
    make_engine,
    prune_context,
    sqlite_url,
)
from spanwatch.connectors.history.errors import RecordRefused
from spanwatch.connectors.history.requests import answer_of, pending, submit, wait_answer
from spanwatch.connectors.history.schema import alembic_config, head, migration_connection
from spanwatch.rules.alarms import AlarmPoint, Transition
from spanwatch.rules.base import LineState
from spanwatch.rules.lifecycle import Action, AlarmState, Lifecycle, LifecycleEvent, Record
from sqlalchemy import text
from sqlalchemy.exc import IntegrityError
from storagefaults import REPO

T0 = 1_772_427_600.0
RUNNING = int(LineState.RUNNING)
LINE = "L3 laminator"
INF = math.inf


@pytest.fixture(params=["sqlite", "postgresql"])
def db_url(request, tmp_path) -> str:
    if request.param == "sqlite":
        return sqlite_url(str(tmp_path / "history.db"))
    return request.getfixturevalue("pg_url")


def point(kind: str, object_id: str, level: str = "alarm", priority: str = "high", limit: float = 1.0) -> AlarmPoint:
    return AlarmPoint(kind=kind, object_id=object_id, level=level, limit=limit, direction="high", deadband=0.0,
                      on_delay=0.0, off_delay=0.0, priority=priority, unit="ratio",
                      cause=f"{kind} beyond its limit on {object_id}", consequence="the web slips on the roll",
                      action="reduce the tension set point", response_time=120.0)


TR = point("traction", "pull_1")
TR_WARN = point("traction", "pull_1", level="warning", priority="advisory", limit=0.8)
SLIP = point("slip", "idler_3", priority="urgent", limit=0.05)


@dataclass(frozen=True)
class FlaggedTransition(Transition):
    """A transition with the flags the condition engine gives it (first-out, chattering), as the store reads them."""

    first_out: bool = False
    chattering: bool = False


def count(url: str, table: str, where: str = "") -> int:
    engine = make_engine(url)
    try:
        with engine.connect() as c:
            return int(c.execute(text(f"select count(*) from {table} {where}")).scalar_one())
    finally:
        engine.dispose()


def new_history(url: str, *, started_at: float | None = None, config_hash: str = "hash1") -> History:
    h = History(url)
    h.start_run(mode="daemon", line_name=LINE, config_file="l3.toml", config_hash=config_hash, started_at=started_at)
    return h


# --- one write: transitions, lifecycle, states, answers -----------------------------------------------------------


def test_record_with_lifecycle_states_and_answers_reads_back(db_url):
    h = new_history(db_url)
    lc = Lifecycle([TR.key, SLIP.key])
    ack_req = submit(h.engine, line_name=LINE, action="ack", user="operator-a", comment="seen",
                     alarm_key="traction:pull_1", at=T0 + 15)
    raise_ = FlaggedTransition(T0 + 10, TR, "raise", 1.1, RUNNING, first_out=True)
    e_raise = lc.condition(T0 + 10, TR.key, "raise")
    h.record([raise_], lifecycle=[e_raise], states={TR.key: lc.records[TR.key]})
    h.record_contexts([Context(TR.key, T0 + 10, "traction/pull_1", T0 + 5, 0.5, [0.9, 1.1]),
                       Context(TR.key, T0 + 10, "tension/s3", T0 + 5, 0.5, [410.0, None])])
    e_ack = lc.act(T0 + 20, TR.key, "ack", user="operator-a", comment="seen", request=ack_req)
    h.record([], lifecycle=[e_ack], states={TR.key: lc.records[TR.key]},
             answers=[RequestAnswer(ack_req, "applied", "traction:pull_1:alarm acknowledged", T0 + 20.5)])
    e_shelve = lc.act(T0 + 30, TR.key, "shelve", user="operator-b", comment="sensor being replaced", until=INF)
    clear = Transition(T0 + 40, TR, "clear", 0.5, RUNNING, peak=1.3)
    e_clear = lc.condition(T0 + 40, TR.key, "clear")
    h.record([clear], lifecycle=[e_shelve, e_clear], states={TR.key: lc.records[TR.key]})
    h.close()

    engine = make_engine(db_url)
    try:
        with engine.connect() as c:
            ep_id = c.execute(text("select id from alarm_episodes")).scalar_one()
        d = episode_detail(engine, ep_id)
        assert d is not None and episode_detail(engine, ep_id + 1000) is None
        assert (d["key"], d["raised_t"], d["cleared_t"], d["value"], d["peak"]) == (TR.key, T0 + 10, T0 + 40, 1.1, 1.3)
        assert (d["cause"], d["consequence"], d["corrective_action"], d["response_time"]) == (
            "traction beyond its limit on pull_1", "the web slips on the roll", "reduce the tension set point", 120.0)
        assert (d["first_out"], d["chattering"]) == (True, False)
        assert [(e["event"], e["t"]) for e in d["events"]] == [("raise", T0 + 10), ("clear", T0 + 40)]
        assert d["context"] == ["traction/pull_1", "tension/s3"]
        # A -> B -> C -> shelved -> A (the one-shot shelve ends with the clear)
        assert [(a["action"], a["before"], a["after"], a["origin"], a["user"], a["comment"], a["until"], a["request"])
                for a in d["actions"]] == [
            ("raise", "normal", "unack", "system", "", "", None, None),
            ("ack", "unack", "acked", "operator", "operator-a", "seen", None, ack_req),
            ("shelve", "acked", "shelved", "operator", "operator-b", "sensor being replaced", INF, None),
            ("clear", "shelved", "normal", "system", "", "", None, None)]
        assert [a["one_shot"] for a in d["actions"]] == [False, False, True, False]
        assert {a["episode"] for a in d["actions"]} == {ep_id}
        req = answer_of(engine, ack_req)
        assert (req.status, req.answer, req.answered_at) == ("applied", "traction:pull_1:alarm acknowledged",
                                                            T0 + 20.5)
        # the journal by alarm: "kind:object" is every level of it, and only of it
        assert len(actions_of(engine, line_name=LINE, alarm_key="traction:pull_1")) == 4
        assert len(actions_of(engine, alarm_key=TR.key, since=T0 + 20, until=T0 + 40)) == 2
        assert actions_of(engine, alarm_key="traction:pull") == []
        assert actions_of(engine, line_name="another line") == []
    finally:
        engine.dispose()
    h2 = History(db_url)
    assert h2.load_states(LINE) == {TR.key: Record()}  # after the clear: normal, acknowledged, nothing hides it
    h2.close()


def test_an_action_is_tied_to_the_episode_open_then_or_the_latest(db_url):
    h = new_history(db_url)
    lc = Lifecycle([SLIP.key])
    h.record([Transition(T0 + 1, SLIP, "raise", 0.1, RUNNING), Transition(T0 + 2, SLIP, "clear", 0.0, RUNNING)],
             lifecycle=[lc.condition(T0 + 1, SLIP.key, "raise"), lc.condition(T0 + 2, SLIP.key, "clear")])
    # acknowledged after it cleared, in a later write by a new store (a restart): the latest episode of the key
    h.close()
    h = History(db_url)
    h.start_run(mode="daemon", line_name=LINE, config_file="l3.toml", config_hash="hash1")
    ack = lc.act(T0 + 3, SLIP.key, "ack", user="operator-a")
    # a second raise in the same write, after the acknowledgement: the acknowledgement keeps the first episode
    again = lc.condition(T0 + 4, SLIP.key, "raise")
    h.record([Transition(T0 + 4, SLIP, "raise", 0.2, RUNNING)], lifecycle=[ack, again])
    h.close()
    engine = make_engine(db_url)
    try:
        with engine.connect() as c:
            first, second = c.execute(text("select id from alarm_episodes order by id")).scalars()
        assert [(a["action"], a["episode"]) for a in actions_of(engine, line_name=LINE)] == [
            ("raise", first), ("clear", first), ("ack", first), ("raise", second)]
    finally:
        engine.dispose()


def test_a_refused_write_leaves_nothing_written(db_url):
    h = new_history(db_url)
    req = submit(h.engine, line_name=LINE, action="ack", user="operator-a", alarm_key=SLIP.key, at=T0)
    lc = Lifecycle([SLIP.key])
    raise_ = Transition(T0 + 1, SLIP, "raise", 0.1, RUNNING)
    ev = lc.condition(T0 + 1, SLIP.key, "raise")
    ghost = LifecycleEvent(T0 + 1, SLIP.key, Action.COMMENT, AlarmState.UNACK, AlarmState.UNACK, user="operator-a",
                           comment="x", request=999_999)  # answers a request that does not exist: the foreign key
    answer = RequestAnswer(req, "applied", "acknowledged", T0 + 2)
    with pytest.raises(RecordRefused):
        h.record([raise_], lifecycle=[ev, ghost], states={SLIP.key: lc.records[SLIP.key]}, answers=[answer])
    with pytest.raises(ValueError):  # an answer outside the closed set of statuses
        h.record([raise_], lifecycle=[ev], states={SLIP.key: lc.records[SLIP.key]},
                 answers=[RequestAnswer(req, "done", "", T0 + 2)])
    for table in ("alarm_events", "alarm_episodes", "alarm_actions", "alarm_states"):
        assert count(db_url, table) == 0, table
    assert answer_of(h.engine, req).status == "pending"
    # control: the same write with the real request id goes in whole
    h.record([raise_], lifecycle=[ev], states={SLIP.key: lc.records[SLIP.key]}, answers=[answer])
    h.close()
    assert [count(db_url, t) for t in ("alarm_events", "alarm_episodes", "alarm_actions", "alarm_states")] == [1] * 4
    engine = make_engine(db_url)
    try:
        assert answer_of(engine, req).status == "applied"
    finally:
        engine.dispose()


# --- states, config versions ----------------------------------------------------------------------------------------


STATES = {
    "traction:pull_1:alarm": Record(active=True, acked=False),  # unacknowledged (B)
    "traction:pull_1:warning": Record(active=True, acked=True, shelved_until=INF, shelved_by="operator-b",
                                      shelve_reason="sensor being replaced"),  # one-shot shelve
    "slip:idler_3:alarm": Record(active=False, acked=False, held=True),  # latched, unacknowledged
    "slip:idler_2:alarm": Record(shelved_until=T0 + 3600.25, shelved_by="operator-a", shelve_reason="trial"),
    "tag_stale:l3.unwind.rpm:alarm": Record(out_of_service=True, oos_by="technician", oos_reason="drive swap"),
    "speed_diff:nip_1:alarm": Record(active=True, acked=True, suppressed_by="line stopped"),
    "runout:unwind:warning": Record(),
}


def test_load_states_restores_exactly_the_records_written(db_url):
    h = new_history(db_url)
    h.record([], states=STATES)
    h.close()
    h = History(db_url)
    assert h.load_states(LINE) == STATES
    assert h.load_states("another line") == {}
    # an upsert: the one record changes, the others stay, no row added
    h.start_run(mode="daemon", line_name=LINE, config_file="l3.toml", config_hash="hash1")
    h.record([], states={"traction:pull_1:alarm": Record(active=True, acked=True)})
    got = h.load_states(LINE)
    h.close()
    assert got == {**STATES, "traction:pull_1:alarm": Record(active=True, acked=True)}
    assert count(db_url, "alarm_states") == len(STATES)
    assert count(db_url, "alarm_states", "where state = 'acked'") == 1


def test_save_config_version_is_idempotent(db_url):
    h = new_history(db_url)
    h.save_config_version(line_name=LINE, config_hash="hash1", config_file="l3.toml", content="[line]\nname = 1\n",
                          saved_by="operator-a")
    h.save_config_version(line_name=LINE, config_hash="hash1", config_file="other.toml", content="changed",
                          saved_by="operator-b")  # the same hash again: left as it was
    h.save_config_version(line_name=LINE, config_hash="hash2", config_file="l3.toml", content="[line]\nname = 2\n",
                          saved_by="operator-a")
    h.save_config_version(line_name="another line", config_hash="hash1", config_file="x.toml", content="x",
                          saved_by="operator-a")
    h.close()
    engine = make_engine(db_url)
    try:
        with engine.connect() as c:
            rows = c.execute(text("select line_name, config_hash, config_file, content, saved_by from config_versions "
                                  "order by id")).all()
    finally:
        engine.dispose()
    assert [tuple(r) for r in rows] == [(LINE, "hash1", "l3.toml", "[line]\nname = 1\n", "operator-a"),
                                        (LINE, "hash2", "l3.toml", "[line]\nname = 2\n", "operator-a"),
                                        ("another line", "hash1", "x.toml", "x", "operator-a")]


def test_config_at_gives_the_config_of_the_run_covering_the_time(db_url):
    h = new_history(db_url, started_at=T0, config_hash="hash1")
    h.save_config_version(line_name=LINE, config_hash="hash1", config_file="l3.toml", content="limit = 1.0",
                          saved_by="operator-a")
    h.finish_run(input_rows=[], finished_at=T0 + 100)
    h.close()
    h = new_history(db_url, started_at=T0 + 200, config_hash="hash2")  # still running (or killed): no finish time
    h.save_config_version(line_name=LINE, config_hash="hash2", config_file="l3.toml", content="limit = 1.2",
                          saved_by="operator-a")
    h.close()
    engine = make_engine(db_url)
    try:
        def content(t: float) -> str | None:
            got = config_at(engine, LINE, t)
            return None if got is None else got["content"]

        assert [content(T0 + dt) for dt in (-1, 0, 50, 100, 150, 200, 250, 10_000)] == [
            None, "limit = 1.0", "limit = 1.0", "limit = 1.0", None, "limit = 1.2", "limit = 1.2", "limit = 1.2"]
        assert config_at(engine, "another line", T0 + 50) is None
        assert config_at(engine, LINE, T0 + 50)["config_hash"] == "hash1"
    finally:
        engine.dispose()


# --- requests -----------------------------------------------------------------------------------------------------


def test_submit_pending_answer_and_wait(db_url):
    h = new_history(db_url)
    engine = h.engine
    a = submit(engine, line_name=LINE, action="ack", user="operator-a", episode_id=7, at=T0)
    b = submit(engine, line_name=LINE, action="shelve", user="operator-a", comment="trial", alarm_key="slip:idler_3",
               until=INF, at=T0 + 1)
    c = submit(engine, line_name="another line", action="reset", user="operator-b", alarm_key=SLIP.key, at=T0 + 2)
    d = submit(engine, line_name=LINE, action="shelve", user="operator-a", comment="trial", alarm_key=SLIP.key,
               until=T0 + 600, at=T0 + 3)
    assert a < b < c < d
    assert [r.id for r in pending(engine, LINE)] == [a, b, d]
    assert [r.id for r in pending(engine, LINE, after_id=a)] == [b, d]
    assert [r.id for r in pending(engine, "another line")] == [c]
    rb = answer_of(engine, b)
    assert (rb.alarm_key, rb.episode_id, rb.action, rb.until, rb.one_shot, rb.shelve_until, rb.status, rb.answer) == (
        "slip:idler_3", None, "shelve", None, True, INF, "pending", "")
    assert (answer_of(engine, d).until, answer_of(engine, d).shelve_until) == (T0 + 600, T0 + 600)
    assert answer_of(engine, a).episode_id == 7
    with pytest.raises(ValueError, match="expected one of ack, comment"):
        submit(engine, line_name=LINE, action="raise", user="operator-a", alarm_key=SLIP.key)
    with pytest.raises(ValueError, match="target"):
        submit(engine, line_name=LINE, action="ack", user="operator-a")
    with pytest.raises(LookupError):
        answer_of(engine, d + 100)
    assert wait_answer(engine, a, timeout=0.2, poll=0.05).status == "pending"  # not answered: returned pending

    def daemon() -> None:
        time.sleep(0.3)
        h.record([], answers=[RequestAnswer(a, "refused", "no alarm with id 7 on this line", T0 + 5)])

    th = threading.Thread(target=daemon)
    th.start()
    try:
        got = wait_answer(engine, a, timeout=60, poll=0.05)
    finally:
        th.join()
    assert (got.status, got.answer, got.answered_at) == ("refused", "no alarm with id 7 on this line", T0 + 5)
    assert [r.id for r in pending(engine, LINE)] == [b, d]
    h.close()


# --- pruning -----------------------------------------------------------------------------------------------------


def test_prune_context_deletes_only_context_oldest_first(db_url):
    h = new_history(db_url)
    lc = Lifecycle([TR.key, TR_WARN.key, SLIP.key])
    for dt, p in ((10.0, TR_WARN), (20.0, TR), (30.0, SLIP)):
        h.record([Transition(T0 + dt, p, "raise", 1.0, RUNNING)], lifecycle=[lc.condition(T0 + dt, p.key, "raise")])
        h.record_contexts([Context(p.key, T0 + dt, f"{p.kind}/{p.object_id}/{i}", T0 + dt - 5, 1.0, [1.0, 2.0])
                           for i in range(2)])
    h.record([], lifecycle=[lc.act(T0 + 40, TR.key, "ack", user="operator-a")])
    h.close()
    kept = [count(db_url, t) for t in ("alarm_events", "alarm_episodes", "alarm_actions")]
    assert kept == [3, 3, 4] and count(db_url, "alarm_context") == 6
    engine = make_engine(db_url)
    try:
        assert prune_context(engine, older_than=T0 + 15) == 2  # the warning's two windows (raised at +10 s)
        assert prune_context(engine, older_than=T0 + 15) == 0
        assert prune_context(engine, max_rows=1) == 3  # the alarm's two, then the slip's first
        with engine.connect() as c:
            left = c.execute(text("select signal from alarm_context")).scalars().all()
        assert left == ["slip/idler_3/1"]
        assert prune_context(engine, max_rows=5) == 0
    finally:
        engine.dispose()
    assert [count(db_url, t) for t in ("alarm_events", "alarm_episodes", "alarm_actions")] == kept


# --- migration 0002 -> 0003 ---------------------------------------------------------------------------------------


def test_upgrade_of_a_0002_history_keeps_its_rows(db_url):
    engine = make_engine(db_url)
    try:
        with migration_connection(engine) as conn:
            command.upgrade(alembic_config(conn), "0002")
        with engine.begin() as c:
            run = c.execute(text("insert into runs (started_at, finished_at, mode, line_name, config_file, "
                                 "config_hash, source, end_state, written_seq) values (:t, :f, 'daemon', :line, "
                                 "'l3.toml', 'hash0', 'sim', 'finished', 4) returning id"),
                            {"t": T0, "f": T0 + 100, "line": LINE}).scalar_one()
            ep = c.execute(text(
                "insert into alarm_episodes (run_id, alarm_key, kind, object_id, level, priority, unit, raised_t, "
                "cleared_t, raise_value, peak_value, \"limit\", line_state, config_hash) values (:run, :key, "
                "'traction', 'pull_1', 'alarm', 'high', 'ratio', :tr, :tc, 1.1, 1.3, 1.0, 'running', 'hash0') "
                "returning id"), {"run": run, "key": TR.key, "tr": T0 + 10, "tc": T0 + 40}).scalar_one()
            for event, t in (("raise", T0 + 10), ("clear", T0 + 40)):
                c.execute(text(
                    "insert into alarm_events (run_id, episode_id, t, alarm_key, kind, object_id, level, event, "
                    "value, \"limit\", priority, line_state, config_hash) values (:run, :ep, :t, :key, 'traction', "
                    "'pull_1', 'alarm', :event, 1.1, 1.0, 'high', 'running', 'hash0')"),
                    {"run": run, "ep": ep, "t": t, "key": TR.key, "event": event})
            c.execute(text("insert into alarm_context (episode_id, signal, t0, dt, \"values\") values (:ep, "
                           "'traction/pull_1', :t0, 0.5, '[0.9, 1.1]')"), {"ep": ep, "t0": T0 + 5})
            c.execute(text("insert into input_issues (run_id, tag, reason, count, refs) values (:run, 'l3.s2.tension', "
                           "'late', 2, '[3, 4]')"), {"run": run})
        before = _dump(engine)
    finally:
        engine.dispose()

    History(db_url).close()  # upgrades to head
    engine = make_engine(db_url)
    try:
        with engine.connect() as c:
            assert c.execute(text("select version_num from alembic_version")).scalar_one() == head() == "0005"
            assert c.execute(text("select cause, consequence, corrective_action, response_time, first_out, "
                                  "chattering, blames, detail from alarm_episodes")).all() == [(None,) * 8]
        assert _dump(engine) == before
        assert [e["event"] for e in episode_detail(engine, ep)["events"]] == ["raise", "clear"]
        # the widened CHECK on both tables: "urgent" and "advisory" pass, an unknown value is refused; the other
        # constraints survived the tables' re-creation (SQLite batch mode)
        insert = text("insert into alarm_events (run_id, episode_id, t, alarm_key, kind, object_id, level, event, "
                      "value, \"limit\", priority, line_state, config_hash) values (:run, :ep, 0, 'k', 'slip', 'o', "
                      ":level, 'raise', 1, 1, :priority, 'running', 'h')")
        ok = {"run": run, "ep": ep, "level": "alarm", "priority": "urgent"}
        with engine.begin() as c:
            c.execute(insert, ok)
            c.execute(insert, {**ok, "priority": "advisory"})
        for bad in ({"priority": "emergency"}, {"level": "critical"}, {"ep": ep + 1000}):
            with pytest.raises(IntegrityError), engine.begin() as c:
                c.execute(insert, {**ok, **bad})
        with pytest.raises(IntegrityError), engine.begin() as c:
            c.execute(text("update alarm_episodes set priority = 'emergency'"))
        with engine.begin() as c:
            c.execute(text("update alarm_episodes set priority = 'urgent'"))
        if db_url.startswith("sqlite"):
            with engine.connect() as c:
                assert c.exec_driver_sql("PRAGMA foreign_key_check").all() == []
    finally:
        engine.dispose()


def _dump(engine) -> list:
    q = ("select id, started_at, finished_at, mode, line_name, config_hash, end_state, written_seq from runs",
         "select id, run_id, alarm_key, level, priority, raised_t, cleared_t, raise_value, peak_value from "
         "alarm_episodes order by id",
         "select id, run_id, episode_id, t, event, priority from alarm_events order by id",
         "select episode_id, signal, t0, dt, \"values\" from alarm_context",
         "select run_id, tag, reason, count, refs from input_issues")
    with engine.connect() as c:
        return [[tuple(r) for r in c.execute(text(s))] for s in q]


# --- many processes on one SQLite file ---------------------------------------------------------------------------

SUBMITTER = textwrap.dedent("""
    import pathlib, sys, time
    from spanwatch.connectors.history import make_engine
    from spanwatch.connectors.history.requests import submit

    url, line, me, n, go = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4]), pathlib.Path(sys.argv[5])
    engine = make_engine(url)
    print("ready", flush=True)
    while not go.exists():
        time.sleep(0.01)
    for i in range(n):
        submit(engine, line_name=line, action="comment", user=f"operator-{me}", comment=f"{me}-{i}",
               alarm_key="traction:pull_1")
        time.sleep(0.2 + 0.05 * me)
    engine.dispose()
    print("done", flush=True)
""")


def test_processes_submitting_while_the_daemon_writes_lose_nothing(tmp_path):
    # 4 operator processes submit 50 requests each into one SQLite file while this process, as the daemon, writes
    # transitions, lifecycle rows and states and answers the requests it finds. SQLite serialises writers with its
    # lock and the busy timeout (SQLite documentation, "File Locking And Concurrency", WAL mode); none may fail,
    # and every row must be there.
    url = sqlite_url(str(tmp_path / "history.db"))
    h = new_history(url)
    script = tmp_path / "submitter.py"
    script.write_text(SUBMITTER, encoding="utf-8")
    go = tmp_path / "go"
    procs = [subprocess.Popen([sys.executable, str(script), url, LINE, str(k), "50", str(go)], cwd=REPO,
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for k in range(4)]
    lc = Lifecycle([TR.key])
    written_tr = written_ev = answered = 0
    seen_after = 0
    try:
        for p in procs:
            assert p.stdout.readline().strip() == "ready", p.stderr.read()
        go.touch()
        start = time.monotonic()
        t = T0
        while True:
            t += 1.0
            tr = Transition(t, TR, "clear" if lc.records[TR.key].active else "raise", 1.0, RUNNING, peak=1.2)
            events = [lc.condition(t, TR.key, tr.event)]
            done = all(p.poll() is not None for p in procs)  # before reading: all their requests are committed
            reqs = pending(h.engine, LINE, after_id=seen_after)
            assert not (done and not reqs and answered < 200), f"requests lost: {answered} answered"
            answers = []
            for r in reqs:
                events.append(lc.act(t, TR.key, r.action, user=r.user, comment=r.comment, request=r.id))
                answers.append(RequestAnswer(r.id, "applied", "comment recorded", t))
                seen_after = r.id
            h.record([tr], lifecycle=events, states={TR.key: lc.records[TR.key]}, answers=answers)
            written_tr += 1
            written_ev += len(events)
            answered += len(answers)
            if done and answered == 200 and time.monotonic() - start >= 15:
                break
            assert time.monotonic() - start < 300, "the submitters did not finish (a behaviour bound, not a timing)"
            time.sleep(0.02)
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
            p.wait()
    errs = [p.stderr.read() for p in procs]
    assert [p.returncode for p in procs] == [0, 0, 0, 0], errs
    h.close()
    assert count(url, "action_requests") == 200
    assert count(url, "action_requests", "where status = 'applied' and answered_at is not null") == 200
    assert count(url, "alarm_events") == written_tr
    assert count(url, "alarm_episodes") == (written_tr + 1) // 2
    assert count(url, "alarm_actions") == written_ev == written_tr + 200
    assert count(url, "alarm_actions", "where request_id is not null") == 200
    engine = make_engine(url)
    try:
        with engine.connect() as c:
            comments = set(c.execute(text("select comment from action_requests")).scalars())
            linked = c.execute(text("select count(distinct request_id) from alarm_actions")).scalar_one()
    finally:
        engine.dispose()
    assert comments == {f"{k}-{i}" for k in range(4) for i in range(50)}
    assert linked == 200


def test_spool_records_of_the_lifecycle_read_back_as_written():
    from spanwatch.connectors.history.writer import decode, encode

    lc_events = [LifecycleEvent(T0, TR.key, Action.SHELVE, AlarmState.UNACK, AlarmState.SHELVED, user="operator-b",
                                comment="trial", until=INF, request=3),
                 LifecycleEvent(T0 + 1, TR.key, Action.CLEAR, AlarmState.SHELVED, AlarmState.NORMAL)]
    data = {"transitions": [Transition(T0, TR, "clear", 0.5, RUNNING)],  # peak NaN
            "lifecycle": lc_events, "states": STATES,
            "answers": [RequestAnswer(3, "applied", "shelved until it clears", T0 + 0.5)]}
    run, seq, op, got = decode(encode(9, 4, "record", data))
    assert (run, seq, op) == (9, 4, "record")
    assert got["lifecycle"] == lc_events and got["states"] == STATES and got["answers"] == data["answers"]
    assert got["states"]["traction:pull_1:warning"].shelved_until == INF
    (tr,) = got["transitions"]
    assert (tr.t, tr.point, tr.event, tr.value) == (T0, TR, "clear", 0.5) and math.isnan(tr.peak)
    # a record spooled by the former version (a bare list of transitions) still reads
    old = json.dumps({"run": 9, "seq": 5, "op": "record", "data": json.loads(encode(9, 5, "record", data))["data"][
        "transitions"]}).encode()
    assert decode(old)[3]["transitions"][0].point == TR and decode(old)[3]["lifecycle"] == []
