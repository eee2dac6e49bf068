"""Alarm history (connectors/history/) on a real SQLite file and on PostgreSQL.

Every test that takes ``db_url`` runs on both backends. PostgreSQL is expected on 127.0.0.1:5432 (trust auth,
database ``test``, user ``postgres``); each test gets a fresh schema, dropped afterwards. Under CI=true a missing
PostgreSQL fails the PostgreSQL tests; elsewhere they are skipped with the reason.
"""

from __future__ import annotations

import json
import math
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from spanwatch.connectors.history import (
    Context,
    History,
    SchemaError,
    latest_run,
    make_engine,
    query_episodes,
    sqlite_url,
)
from spanwatch.connectors.history.errors import RecordRefused
from spanwatch.connectors.history.models import AlarmEpisode, Base, Level, Priority, Run, RunMode
from spanwatch.connectors.history.schema import alembic_config, head, migration_connection
from spanwatch.rules.alarms import LEVELS, AlarmEngine, AlarmPoint, Transition
from spanwatch.rules.base import CheckResult, LineState
from sqlalchemy import MetaData, String, inspect, select, text
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

REPO = Path(__file__).resolve().parents[1]
T0 = 1_772_427_600.0
RUNNING = int(LineState.RUNNING)


# --- backends ------------------------------------------------------------------------------------------------------


@pytest.fixture(params=["sqlite", "postgresql"])
def db_url(request, tmp_path) -> str:
    if request.param == "sqlite":
        return sqlite_url(str(tmp_path / "history.db"))
    return request.getfixturevalue("pg_url")


# --- test data -----------------------------------------------------------------------------------------------------


def point(kind: str, object_id: str, level: str, priority: str, limit: float, unit: str = "ratio") -> AlarmPoint:
    return AlarmPoint(kind=kind, object_id=object_id, level=level, limit=limit, direction="high", deadband=0.0,
                      on_delay=0.0, off_delay=0.0, priority=priority, unit=unit, cause="c", consequence="q",
                      action="a", response_time=60.0)


TR_ALARM = point("traction", "pull_1", "alarm", "high", 1.0)
TR_WARN = point("traction", "pull_1", "warning", "low", 0.8)
SLIP = point("slip", "idler_3", "alarm", "medium", 0.05)
STALE = point("tag_stale", "q2.unwind.rpm", "alarm", "medium", 0.5, unit="flag")

# (point, raise at s, raise value, clear at s or None, peak, line state at raise) for run 1 and run 2
RUN1 = [
    (TR_WARN, 10.0, 0.85, 40.0, 1.4, int(LineState.ACCELERATING)),
    (TR_ALARM, 15.0, 1.1, 35.0, 1.4, RUNNING),
    (SLIP, 50.0, 0.07, None, None, RUNNING),
    (STALE, 60.0, 1.0, 70.0, 1.0, RUNNING),
    (TR_WARN, 100.0, 0.9, None, None, int(LineState.DECELERATING)),
]
RUN2 = [(STALE, 200.0, 1.0, 210.5, 1.0, RUNNING)]


def transitions(episodes) -> list[Transition]:
    out = []
    for p, t_raise, value, t_clear, peak, ls in episodes:
        out.append(Transition(T0 + t_raise, p, "raise", value, ls))
        if t_clear is not None:
            out.append(Transition(T0 + t_clear, p, "clear", 0.1, RUNNING, peak=peak))
    return sorted(out, key=lambda tr: tr.t)


def expected(episodes, run_id: int) -> list[dict]:
    return [{"run": run_id, "check": p.kind, "object": p.object_id, "level": p.level, "priority": p.priority,
             "raised_t": T0 + tr, "cleared_t": None if tc is None else T0 + tc, "value": v, "peak": peak,
             "limit": p.limit, "unit": p.unit, "line_state": LineState(ls).name.lower()}
            for p, tr, v, tc, peak, ls in episodes]


@pytest.fixture
def filled(db_url) -> Iterator[tuple[str, int, int, list[dict]]]:
    """Two runs written through History (the second by a new History object, as after a restart)."""
    h1 = History(db_url)
    run1 = h1.start_run(mode="replay", line_name="test line", config_file="line.toml", config_hash="hash1")
    trs = transitions(RUN1)
    h1.record(trs[:3])  # several transactions, as the pipeline writes them block by block
    h1.record(trs[3:])
    h1.finish_run(input_rows=[{"tag": "q2.s2.tension", "reason": "out of order", "count": 3, "refs": [5, 9, 12]}],
                  data_start=T0, data_end=T0 + 120)
    h1.close()
    h2 = History(db_url)
    run2 = h2.start_run(mode="replay", line_name="test line", config_file="line.toml", config_hash="hash2")
    h2.record(transitions(RUN2))
    h2.close()
    assert run1 != run2
    want = expected(RUN1, run1) + expected(RUN2, run2)
    want.sort(key=lambda r: r["raised_t"])
    yield db_url, run1, run2, want


def _query(url: str, **filters) -> list[dict]:
    engine = make_engine(url)
    try:
        return query_episodes(engine, **filters)
    finally:
        engine.dispose()


def _project(rows: list[dict]) -> list[dict]:
    keys = ("run", "check", "object", "level", "priority", "raised_t", "cleared_t", "value", "peak", "limit", "unit",
            "line_state")
    return [{k: r[k] for k in keys} for r in rows]


# --- read back with every filter -----------------------------------------------------------------------------------


def test_all_episodes_read_back(filled):
    url, _, _, want = filled
    rows = _query(url)
    assert _project(rows) == want
    for r in rows:
        # ISO 8601 read back by Python's own parser: aware, UTC, same instant as the stored epoch seconds
        raised = datetime.fromisoformat(r["raised"])
        assert raised.utcoffset() is not None and raised.utcoffset().total_seconds() == 0
        assert raised.timestamp() == pytest.approx(r["raised_t"], abs=1e-3)
        if r["cleared_t"] is None:
            assert r["cleared"] == "" and r["duration_s"] is None
        else:
            assert datetime.fromisoformat(r["cleared"]).timestamp() == pytest.approx(r["cleared_t"], abs=1e-3)
            assert r["duration_s"] == pytest.approx(r["cleared_t"] - r["raised_t"], abs=1e-3)


FILTERS = [
    ({"kind": "traction"}, lambda r: r["check"] == "traction"),
    ({"kind": "runout"}, lambda r: False),
    ({"object_id": "q2.unwind.rpm"}, lambda r: r["object"] == "q2.unwind.rpm"),
    ({"priority": "medium"}, lambda r: r["priority"] == "medium"),
    ({"priority": "high"}, lambda r: r["priority"] == "high"),
    ({"level": "warning"}, lambda r: r["level"] == "warning"),
    ({"active_only": True}, lambda r: r["cleared_t"] is None),
    ({"since": T0 + 50}, lambda r: r["raised_t"] >= T0 + 50),  # since: inclusive
    ({"until": T0 + 60}, lambda r: r["raised_t"] < T0 + 60),  # until: exclusive
    ({"since": T0 + 15, "until": T0 + 100}, lambda r: T0 + 15 <= r["raised_t"] < T0 + 100),
    ({"kind": "traction", "level": "warning", "active_only": True},
     lambda r: r["check"] == "traction" and r["level"] == "warning" and r["cleared_t"] is None),
]


@pytest.mark.parametrize(("filters", "keep"), FILTERS, ids=[str(f) for f, _ in FILTERS])
def test_filters(filled, filters, keep):
    url, _, _, want = filled
    rows = _project(_query(url, **filters))
    assert rows == [r for r in want if keep(r)]


def test_filter_by_run(filled):
    url, run1, run2, want = filled
    assert _project(_query(url, run_id=run1)) == [r for r in want if r["run"] == run1]
    assert _project(_query(url, run_id=run2)) == [r for r in want if r["run"] == run2]
    assert _project(_query(url, run_id=run2, kind="traction")) == []
    engine = make_engine(url)
    try:
        assert latest_run(engine) == run2
    finally:
        engine.dispose()


def test_filters_are_not_vacuous(filled):
    # guard: each single filter above keeps some but not all episodes (except the deliberately empty one)
    _, _, _, want = filled
    for filters, keep in FILTERS:
        n = sum(1 for r in want if keep(r))
        if filters != {"kind": "runout"}:
            assert 0 < n < len(want), filters


def test_journal_and_input_issues(filled):
    url, run1, run2, _ = filled
    engine = make_engine(url)
    try:
        with engine.connect() as c:
            n_events = c.execute(text("select count(*) from alarm_events")).scalar_one()
            by_run = dict(c.execute(text("select run_id, count(*) from alarm_events group by run_id")).all())
            issues = c.execute(text("select run_id, tag, reason, count, refs from input_issues")).all()
            hashes = {r[0] for r in c.execute(text("select distinct config_hash from alarm_episodes")).all()}
            finished = c.execute(text("select finished_at, data_start, data_end from runs where id = :r"),
                                 {"r": run1}).one()
    finally:
        engine.dispose()
    assert n_events == len(transitions(RUN1)) + len(transitions(RUN2))
    assert by_run == {run1: len(transitions(RUN1)), run2: len(transitions(RUN2))}
    assert [(r[0], r[1], r[2], r[3]) for r in issues] == [(run1, "q2.s2.tension", "out of order", 3)]
    assert issues[0][4] == "[5, 9, 12]"
    assert hashes == {"hash1", "hash2"}
    assert finished[0] is not None and finished[1] == T0 and finished[2] == T0 + 120


def test_non_finite_value_stored_as_null(db_url):
    h = History(db_url)
    h.start_run(mode="replay", line_name="l", config_file="f", config_hash="h")
    h.record([Transition(T0, SLIP, "raise", float("nan"), RUNNING),
              Transition(T0 + 5, SLIP, "clear", float("inf"), RUNNING, peak=float("nan"))])
    h.close()
    (row,) = _query(db_url)
    assert row["value"] is None and row["peak"] is None
    assert row["cleared_t"] == T0 + 5


# --- SQLite specifics ----------------------------------------------------------------------------------------------


def test_sqlite_file_is_in_wal_mode(tmp_path):
    path = tmp_path / "wal.db"
    h = History(sqlite_url(str(path)))
    h.start_run(mode="replay", line_name="l", config_file="f", config_hash="h")
    h.close()
    # read with the standard library's sqlite3, not SQLAlchemy: WAL is a persistent property of the file
    # (SQLite documentation, "Write-Ahead Logging": the WAL journal mode is persistent)
    con = sqlite3.connect(path)
    try:
        assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    finally:
        con.close()


# --- crash safety --------------------------------------------------------------------------------------------------

WRITER = textwrap.dedent("""
    import sys
    from spanwatch.rules.alarms import Transition
    from spanwatch.rules.alarms import AlarmPoint
    from spanwatch.connectors.history import History

    h = History(sys.argv[1])
    run = h.start_run(mode="daemon", line_name="crash test", config_file="f", config_hash="h")
    print("run", run, flush=True)
    i = 0
    while True:
        p = AlarmPoint(kind="tag_stale", object_id=f"tag{i}", level="alarm", limit=0.5, direction="high",
                       deadband=0.0, on_delay=0.0, off_delay=0.0, priority="medium", unit="flag", cause="c",
                       consequence="q", action="a", response_time=60.0)
        h.record([Transition(1772427600.0 + i, p, "raise", float(i), 3)])  # returns after the commit
        print(i, flush=True)
        i += 1
""")


def test_killed_writer_loses_no_committed_alarm(db_url, tmp_path):
    script = tmp_path / "writer.py"
    script.write_text(WRITER, encoding="utf-8")
    proc = subprocess.Popen([sys.executable, str(script), db_url], cwd=REPO, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    committed: list[int] = []
    run_id = None
    try:
        first = proc.stdout.readline().split()
        assert first[:1] == ["run"], f"writer did not start: {first} {proc.stderr.read() if proc.poll() else ''}"
        run_id = int(first[1])
        while len(committed) < 40:
            line = proc.stdout.readline()
            if not line:
                pytest.fail(f"writer stopped early: {proc.stderr.read()}")
            committed.append(int(line))
    finally:
        os.kill(proc.pid, signal.SIGKILL)  # mid-run: it is writing the next transaction
        proc.wait()
        proc.stdout.close()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL

    rows = _query(db_url, run_id=run_id)
    stored = {int(r["object"].removeprefix("tag")) for r in rows}
    assert set(committed) <= stored, f"lost committed alarms: {sorted(set(committed) - stored)}"
    # nothing half-written: every stored raise is a complete row, numbered without gaps from 0
    assert stored == set(range(len(stored)))
    assert all(r["value"] == float(int(r["object"].removeprefix("tag"))) for r in rows)
    assert all(math.isclose(r["raised_t"], T0 + r["value"]) for r in rows)
    if db_url.startswith("sqlite"):
        con = sqlite3.connect(db_url.removeprefix("sqlite:///"))
        try:
            assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
            n_events = con.execute("select count(*) from alarm_events").fetchone()[0]
        finally:
            con.close()
        assert n_events == len(stored)  # journal and episodes were written in the same transaction


# --- long names: no length limit on either database ----------------------------------------------------------------

LONG_TAG = ("q2.unwind." + "segment_" * 62)[:496] + ".rpm"  # 500 characters


def test_500_character_tag_is_stored_whole(db_url):
    # A 190-character tag once crashed the PostgreSQL history: its alarm key (check kind, tag, level) passed the
    # old varchar(200). PostgreSQL refuses a string longer than a varchar(n) (PostgreSQL documentation, "Character
    # Types": "an attempt to store a longer string into a column of these types will result in an error"), SQLite
    # ignores the length (SQLite documentation, "Datatypes In SQLite": "SQLite does not impose any length
    # restrictions"), so only the PostgreSQL run of this test could catch a limit.
    assert len(LONG_TAG) == 500
    p = point("tag_stale", LONG_TAG, "alarm", "medium", 0.5, unit="flag")
    h = History(db_url)
    run = h.start_run(mode="daemon", line_name="L" * 500, config_file="/d" * 250, config_hash="h" * 500,
                      source="s" * 500)
    h.record([Transition(T0, p, "raise", 1.0, RUNNING)])
    h.record_contexts([Context(p.key, T0, f"tag/{LONG_TAG}", T0 - 1.0, 0.5, [1.0, None, 2.0])])
    h.record([Transition(T0 + 5, p, "clear", 0.0, RUNNING, peak=1.0)])
    h.finish_run(input_rows=[{"tag": LONG_TAG, "reason": "r" * 500, "count": 2, "refs": [1, 2]}])
    h.close()
    (row,) = _query(db_url, object_id=LONG_TAG)
    assert row["object"] == LONG_TAG and row["run"] == run and row["cleared_t"] == T0 + 5
    engine = make_engine(db_url)
    try:
        with Session(engine) as s:
            ep = s.scalars(select(AlarmEpisode)).one()
            assert ep.alarm_key == f"tag_stale:{LONG_TAG}:alarm"
            assert [e.alarm_key for e in ep.events] == [ep.alarm_key, ep.alarm_key]
            assert [c.signal for c in ep.context] == [f"tag/{LONG_TAG}"]
            r = s.get(Run, run)
            assert (r.line_name, r.config_file, r.config_hash, r.source) == ("L" * 500, "/d" * 250, "h" * 500,
                                                                             "s" * 500)
            assert [(i.tag, i.reason) for i in r.input_issues] == [(LONG_TAG, "r" * 500)]
    finally:
        engine.dispose()


TAG_190 = ("q2.rewind." + "nip_load_" * 21)[:186] + ".pos"  # 190 characters: the length that once crashed


def _rows_of(url: str) -> list[tuple]:
    engine = make_engine(url)
    try:
        with engine.connect() as c:
            return [tuple(r) for q in (
                "select run_id, t, alarm_key, kind, object_id, level, event, value, \"limit\", priority, line_state "
                "from alarm_events order by id",
                "select run_id, alarm_key, kind, object_id, raised_t, cleared_t, raise_value, peak_value "
                "from alarm_episodes order by id",
                "select episode_id, signal, t0, dt, \"values\" from alarm_context order by id",
                "select tag, reason, count, refs from input_issues order by id",
                "select line_name, config_file, source, end_state from runs order by id") for r in c.execute(text(q))]
    finally:
        engine.dispose()


def test_the_same_long_names_give_the_same_rows_on_both_databases(tmp_path, pg_url):
    # The issue's case (a 190-character tag crashed PostgreSQL only) and a 500-character one, through the same
    # writes on both databases: every row equal, no length limit on either (see the 500-character test's sources).
    assert len(TAG_190) == 190 and len(LONG_TAG) == 500
    urls = (sqlite_url(str(tmp_path / "history.db")), pg_url)
    for url in urls:
        h = History(url)
        h.start_run(mode="replay", line_name="Q2 " + "x" * 300, config_file="/c" * 200, config_hash="h",
                    source=LONG_TAG)
        for i, tag in enumerate((TAG_190, LONG_TAG)):
            p = point("tag_stale", tag, "alarm", "medium", 0.5, unit="flag")
            h.record([Transition(T0 + i, p, "raise", 1.0, RUNNING)])
            h.record_contexts([Context(p.key, T0 + i, f"tag/{tag}", T0 + i - 1.0, 0.5, [1.0, None])])
            h.record([Transition(T0 + 10 + i, p, "clear", 0.0, RUNNING, peak=1.0)])
        h.finish_run(input_rows=[{"tag": t, "reason": "late", "count": 1, "refs": [7]} for t in (TAG_190, LONG_TAG)])
        h.close()
    on_sqlite, on_postgres = (_rows_of(u) for u in urls)
    assert on_sqlite == on_postgres
    assert {r[4] for r in on_sqlite if len(r) == 11} == {TAG_190, LONG_TAG}


# --- what the history refuses to open, and how runs end -------------------------------------------------------------


def test_a_foreign_database_is_refused_and_left_as_it_was(db_url):
    # a database that holds another program's tables and no history: spanwatch adds nothing to it (it used to add
    # its tables beside the others, and switch a SQLite file to WAL)
    engine = make_engine(db_url)
    with engine.begin() as c:
        c.execute(text("create table customers (id integer primary key, name text)"))
        c.execute(text("insert into customers values (1, 'a customer')"))
    engine.dispose()
    before = Path(db_url.removeprefix("sqlite:///")).read_bytes() if db_url.startswith("sqlite") else None
    with pytest.raises(SchemaError, match=r"holds other tables \(customers\) and no spanwatch history"):
        History(db_url)
    engine = make_engine(db_url)
    try:
        assert set(inspect(engine).get_table_names()) == {"customers"}
    finally:
        engine.dispose()
    if before is not None:
        assert Path(db_url.removeprefix("sqlite:///")).read_bytes() == before


def test_runs_end_as_finished_failed_or_interrupted(db_url):
    # revision 0002 on a history at 0001: its finished runs become "finished", an open one stays open
    engine = make_engine(db_url)
    with migration_connection(engine) as conn:
        command.upgrade(alembic_config(conn), "0001")
    with engine.begin() as c:
        for finished in (T0 + 60, None):
            c.execute(text("insert into runs (started_at, finished_at, mode, line_name, config_file, config_hash, "
                           "source) values (:s, :f, 'daemon', 'Q2', 'f', 'h', '')"), {"s": T0, "f": finished})
    engine.dispose()
    h = History(db_url)
    assert [(r[0], r[1]) for r in _runs(db_url)] == [(1, "finished"), (2, None)]
    # a new daemon run of the line (holding its writer lock) finds the open one dead: interrupted
    h.start_run(mode="daemon", line_name="Q2", config_file="f", config_hash="h")
    assert h.interrupt_dead_runs() == [2]
    h.finish_run(input_rows=[], state="failed")
    h.close()
    assert [r[1] for r in _runs(db_url)] == ["finished", "interrupted", "failed"]
    with pytest.raises(ValueError):
        h.finish_run(input_rows=[], state="crashed")


def _runs(url: str) -> list[tuple]:
    engine = make_engine(url)
    try:
        with engine.connect() as c:
            return [tuple(r) for r in c.execute(text("select id, end_state, finished_at from runs order by id"))]
    finally:
        engine.dispose()


# --- relationships -------------------------------------------------------------------------------------------------


def test_episode_events_context_and_run_through_relationships(db_url):
    h = History(db_url)
    run = h.start_run(mode="replay", line_name="test line", config_file="line.toml", config_hash="hash1")
    trs = transitions(RUN1)
    h.record(trs[:3])
    h.record(trs[3:])
    h.record_contexts([
        Context(TR_ALARM.key, T0 + 15.0, "traction/pull_1", T0 - 5.0, 0.1, [0.9, 1.1, None]),
        Context(TR_ALARM.key, T0 + 15.0, "tension/s2", T0 - 5.0, 0.1, [400.0, 410.0, 420.0]),
        Context(SLIP.key, T0 + 50.0, "slip/idler_3", T0 + 30.0, 0.2, [0.07]),
    ])
    h.finish_run(input_rows=[{"tag": "q2.s2.tension", "reason": "late", "count": 1, "refs": [7]}])
    h.close()
    engine = make_engine(db_url)
    try:
        with Session(engine) as s:
            r = s.get(Run, run)
            assert len(r.episodes) == len(RUN1)
            by_raise = {(e.alarm_key, e.raised_t): e for e in r.episodes}
            ep = by_raise[(TR_ALARM.key, T0 + 15.0)]
            assert [(e.event, e.t, e.run_id) for e in ep.events] == [("raise", T0 + 15.0, run),
                                                                     ("clear", T0 + 35.0, run)]
            assert all(e.episode is ep for e in ep.events) and ep.run is r
            assert [(c.signal, c.t0, c.dt, json.loads(c.values)) for c in ep.context] == [
                ("traction/pull_1", T0 - 5.0, 0.1, [0.9, 1.1, None]),
                ("tension/s2", T0 - 5.0, 0.1, [400.0, 410.0, 420.0])]
            assert all(c.episode is ep for c in ep.context)
            slip = by_raise[(SLIP.key, T0 + 50.0)]
            assert [e.event for e in slip.events] == ["raise"] and [c.signal for c in slip.context] == ["slip/idler_3"]
            # the warning was raised twice: each episode has its own raise (and the first its clear), no context
            first, second = by_raise[(TR_WARN.key, T0 + 10.0)], by_raise[(TR_WARN.key, T0 + 100.0)]
            assert [e.t for e in first.events] == [T0 + 10.0, T0 + 40.0] and [e.t for e in second.events] == [T0 + 100]
            assert first.context == [] and second.context == []
            # every journal row of the run belongs to one of its episodes
            assert sorted(e.id for e in r.events) == sorted(e.id for x in r.episodes for e in x.events)
            assert [(i.tag, i.reason, i.count, json.loads(i.refs)) for i in r.input_issues] == [
                ("q2.s2.tension", "late", 1, [7])]
    finally:
        engine.dispose()


# --- closed sets ---------------------------------------------------------------------------------------------------


def test_closed_sets_are_the_applications():
    # the enums restate sets owned elsewhere: the alarm levels of the core and the priorities the config accepts
    from typing import get_args

    from spanwatch.monitor.config import Priority as ConfigPriority

    assert [m.value for m in Level] == list(LEVELS)
    assert [m.value for m in Priority] == list(get_args(ConfigPriority))
    assert {m.value for m in RunMode} == {"replay", "demo", "daemon"}  # spanwatch replay, demo, run


INSERT_EVENT = text('insert into alarm_events (run_id, t, alarm_key, kind, object_id, level, event, value, "limit", '
                    "priority, line_state, config_hash) values (:run, 0, 'k', 'slip', 'o', :level, :event, 1, 1, "
                    ":priority, 'running', 'h')")


def test_closed_sets_refuse_an_unknown_value(db_url):
    h = History(db_url)
    with pytest.raises(ValueError, match="run mode"):
        h.start_run(mode="test", line_name="l", config_file="f", config_hash="h")
    run = h.start_run(mode="replay", line_name="l", config_file="f", config_hash="h")
    # by the ORM, before any statement: the whole transaction is refused, its valid raise with it
    with pytest.raises(RecordRefused, match="acknowledge"):
        h.record([Transition(T0, SLIP, "raise", 1.0, RUNNING), Transition(T0 + 1, SLIP, "acknowledge", 1.0, RUNNING)])
    with pytest.raises(RecordRefused, match="emergency"):
        h.record([Transition(T0, point("slip", "idler_3", "alarm", "emergency", 0.05), "raise", 1.0, RUNNING)])
    with pytest.raises(RecordRefused, match="critical"):
        h.record([Transition(T0, point("slip", "idler_3", "critical", "high", 0.05), "raise", 1.0, RUNNING)])
    h.close()
    assert _query(db_url) == []
    # by the database, from any other writer: the CHECK constraints (the same statement with valid values passes)
    engine = make_engine(db_url)
    ok = {"run": run, "level": "alarm", "event": "raise", "priority": "low"}
    try:
        with engine.begin() as c:
            c.execute(INSERT_EVENT, ok)
        for column, bad in (("level", "critical"), ("event", "acknowledge"), ("priority", "emergency")):
            with pytest.raises(IntegrityError), engine.begin() as c:
                c.execute(INSERT_EVENT, {**ok, column: bad})
        with pytest.raises(IntegrityError), engine.begin() as c:
            c.execute(text("update runs set mode = 'test'"))
        with pytest.raises(IntegrityError), engine.begin() as c:
            c.execute(text("insert into alarm_episodes (run_id, alarm_key, kind, object_id, level, priority, unit, "
                           "raised_t, \"limit\", line_state, config_hash) values (:run, 'k', 'slip', 'o', 'alarm', "
                           "'emergency', 'ratio', 0, 1, 'running', 'h')"), {"run": run})
    finally:
        engine.dispose()


# --- migrations ----------------------------------------------------------------------------------------------------


def _schema_diff(url: str, metadata: MetaData = Base.metadata) -> tuple[list, str | None]:
    """Alembic's comparison of the database with ``metadata`` (``compare_metadata``), and its revision."""
    engine = make_engine(url)
    try:
        with engine.connect() as c:
            mc = MigrationContext.configure(c)
            return compare_metadata(mc, metadata), mc.get_current_revision()
    finally:
        engine.dispose()


def test_migrated_schema_equals_the_models(db_url):
    # Alembic documentation, "API Details: Autogeneration" (alembic.autogenerate.compare_metadata): the
    # differences between a live database and a MetaData, as autogenerate would write them into a revision
    History(db_url).close()
    diff, rev = _schema_diff(db_url)
    assert diff == []
    assert rev == head()
    # control: the comparison sees column types and columns, so a model with the former varchar(200) key and
    # without the episode link differs from the migrated database
    other = MetaData()
    for t in Base.metadata.tables.values():
        t.to_metadata(other)
    other.tables["alarm_events"].c.alarm_key.type = String(200)
    diff, _ = _schema_diff(db_url, other)
    assert [d[0][0] if isinstance(d, list) else d[0] for d in diff] == ["modify_type"]
    events = other.tables["alarm_events"]
    events._columns.remove(events.c.episode_id)
    diff, _ = _schema_diff(db_url, other)
    assert {d[0][0] if isinstance(d, list) else d[0] for d in diff} >= {"remove_column"}


def test_downgrade_to_nothing_and_upgrade_again(db_url):
    History(db_url).close()
    engine = make_engine(db_url)
    try:
        with migration_connection(engine) as conn:
            command.downgrade(alembic_config(conn), "base")
        assert set(inspect(engine).get_table_names()) <= {"alembic_version"}
    finally:
        engine.dispose()
    h = History(db_url)
    h.start_run(mode="replay", line_name="l", config_file="f", config_hash="h")
    h.close()
    assert _schema_diff(db_url) == ([], head())


# The tables as spanwatch created them before the migrations (SQLAlchemy create_all of the former models), for
# both databases: {id} is INTEGER on SQLite and SERIAL on PostgreSQL.
LEGACY_DDL = """
CREATE TABLE runs (
    id {id} NOT NULL, started_at FLOAT NOT NULL, finished_at FLOAT, mode VARCHAR(16) NOT NULL,
    line_name VARCHAR(200) NOT NULL, config_file VARCHAR(500) NOT NULL, config_hash VARCHAR(64) NOT NULL,
    source VARCHAR(500) NOT NULL, data_start FLOAT, data_end FLOAT,
    PRIMARY KEY (id));
CREATE TABLE alarm_episodes (
    id {id} NOT NULL, run_id INTEGER NOT NULL, alarm_key VARCHAR(200) NOT NULL, kind VARCHAR(40) NOT NULL,
    object_id VARCHAR(200) NOT NULL, level VARCHAR(16) NOT NULL, priority VARCHAR(16) NOT NULL,
    unit VARCHAR(40) NOT NULL, raised_t FLOAT NOT NULL, cleared_t FLOAT, raise_value FLOAT, peak_value FLOAT,
    "limit" FLOAT NOT NULL, line_state VARCHAR(16) NOT NULL, config_hash VARCHAR(64) NOT NULL,
    PRIMARY KEY (id), FOREIGN KEY(run_id) REFERENCES runs (id));
CREATE INDEX ix_alarm_episodes_kind ON alarm_episodes (kind);
CREATE INDEX ix_alarm_episodes_object_id ON alarm_episodes (object_id);
CREATE INDEX ix_alarm_episodes_raised_t ON alarm_episodes (raised_t);
CREATE INDEX ix_alarm_episodes_run_id ON alarm_episodes (run_id);
CREATE INDEX ix_episode_open ON alarm_episodes (alarm_key, cleared_t);
CREATE TABLE alarm_events (
    id {id} NOT NULL, run_id INTEGER NOT NULL, t FLOAT NOT NULL, alarm_key VARCHAR(200) NOT NULL,
    kind VARCHAR(40) NOT NULL, object_id VARCHAR(200) NOT NULL, level VARCHAR(16) NOT NULL,
    event VARCHAR(16) NOT NULL, value FLOAT, "limit" FLOAT NOT NULL, priority VARCHAR(16) NOT NULL,
    line_state VARCHAR(16) NOT NULL, config_hash VARCHAR(64) NOT NULL,
    PRIMARY KEY (id), FOREIGN KEY(run_id) REFERENCES runs (id));
CREATE INDEX ix_alarm_events_alarm_key ON alarm_events (alarm_key);
CREATE INDEX ix_alarm_events_run_id ON alarm_events (run_id);
CREATE INDEX ix_alarm_events_t ON alarm_events (t);
CREATE TABLE input_issues (
    id {id} NOT NULL, run_id INTEGER NOT NULL, tag VARCHAR(200) NOT NULL, reason VARCHAR(60) NOT NULL,
    count INTEGER NOT NULL, refs TEXT NOT NULL,
    PRIMARY KEY (id), FOREIGN KEY(run_id) REFERENCES runs (id));
CREATE INDEX ix_input_issues_run_id ON input_issues (run_id);
CREATE TABLE alarm_context (
    id {id} NOT NULL, episode_id INTEGER NOT NULL, signal VARCHAR(200) NOT NULL, t0 FLOAT NOT NULL,
    dt FLOAT NOT NULL, "values" TEXT NOT NULL,
    PRIMARY KEY (id), FOREIGN KEY(episode_id) REFERENCES alarm_episodes (id));
CREATE INDEX ix_alarm_context_episode_id ON alarm_context (episode_id);
"""


def _legacy_rows(c, run_id_of: dict[str, int]) -> None:
    """What the former code wrote for one run: TR_ALARM raised and cleared, SLIP raised and left open."""
    run = c.execute(text("insert into runs (started_at, finished_at, mode, line_name, config_file, config_hash, "
                         "source) values (:t, null, 'daemon', 'test line', 'line.toml', 'hash0', '') returning id"),
                    {"t": T0}).scalar_one()
    run_id_of["run"] = run
    for p, t_raise, t_clear in ((TR_ALARM, 15.0, 35.0), (SLIP, 50.0, None)):
        ep = c.execute(text(
            "insert into alarm_episodes (run_id, alarm_key, kind, object_id, level, priority, unit, raised_t, "
            "cleared_t, raise_value, peak_value, \"limit\", line_state, config_hash) values (:run, :key, :kind, :obj, "
            ":level, :prio, :unit, :tr, :tc, 1.2, :peak, :limit, 'running', 'hash0') returning id"),
            {"run": run, "key": p.key, "kind": p.kind, "obj": p.object_id, "level": p.level, "prio": p.priority,
             "unit": p.unit, "tr": T0 + t_raise, "tc": None if t_clear is None else T0 + t_clear,
             "peak": None if t_clear is None else 1.4, "limit": p.limit}).scalar_one()
        run_id_of[p.key] = ep
        for event, t in (("raise", t_raise), ("clear", t_clear)):
            if t is not None:
                c.execute(text(
                    "insert into alarm_events (run_id, t, alarm_key, kind, object_id, level, event, value, \"limit\", "
                    "priority, line_state, config_hash) values (:run, :t, :key, :kind, :obj, :level, :event, 1.2, "
                    ":limit, :prio, 'running', 'hash0')"),
                    {"run": run, "t": T0 + t, "key": p.key, "kind": p.kind, "obj": p.object_id, "level": p.level,
                     "event": event, "limit": p.limit, "prio": p.priority})
    c.execute(text("insert into alarm_context (episode_id, signal, t0, dt, \"values\") values (:ep, 'traction/pull_1', "
                   ":t0, 0.1, '[0.9, 1.1]')"), {"ep": run_id_of[TR_ALARM.key], "t0": T0 + 5})
    c.execute(text("insert into input_issues (run_id, tag, reason, count, refs) values (:run, 'q2.s2.tension', "
                   "'late', 2, '[3, 4]')"), {"run": run})


def test_history_written_before_migrations_is_stamped_and_upgraded(db_url):
    postgres = db_url.startswith("postgresql")
    engine = make_engine(db_url)
    ids: dict[str, int] = {}
    try:
        with engine.begin() as c:
            for stmt in LEGACY_DDL.format(id="SERIAL" if postgres else "INTEGER").split(";"):
                if stmt.strip():
                    c.exec_driver_sql(stmt)
            _legacy_rows(c, ids)
        if postgres:  # control: the former schema refuses the long tag on PostgreSQL, which the upgrade must lift
            with pytest.raises(Exception, match="too long"), engine.begin() as c:
                c.execute(text("update alarm_episodes set object_id = :o"), {"o": LONG_TAG})
    finally:
        engine.dispose()
    before = _query(db_url)
    assert [r["object"] for r in before] == ["pull_1", "idler_3"]

    h = History(db_url)
    assert _schema_diff(db_url) == ([], head())
    assert _query(db_url) == before  # every episode read back as it was
    check = make_engine(db_url)
    try:
        with Session(check) as s:  # the journal rows were linked to their episodes by key and time
            closed, still_open = s.get(AlarmEpisode, ids[TR_ALARM.key]), s.get(AlarmEpisode, ids[SLIP.key])
            assert [(e.event, e.t) for e in closed.events] == [("raise", T0 + 15.0), ("clear", T0 + 35.0)]
            assert [(e.event, e.t) for e in still_open.events] == [("raise", T0 + 50.0)]
            assert [json.loads(c.values) for c in closed.context] == [[0.9, 1.1]]
            assert [(i.tag, i.count) for i in s.get(Run, ids["run"]).input_issues] == [("q2.s2.tension", 2)]
    finally:
        check.dispose()
    # the upgraded history takes what the former schema refused, and carries on the alarm it left open
    engine_after = AlarmEngine([SLIP])
    run2 = h.start_run(mode="daemon", line_name="test line", config_file="line.toml", config_hash="hash1")
    from spanwatch.monitor.daemon import carry_on_open_alarms

    assert carry_on_open_alarms(h, engine_after) == 1
    h.record([Transition(T0 + 300.0, point("tag_stale", LONG_TAG, "alarm", "medium", 0.5, unit="flag"), "raise", 1.0,
                         RUNNING)])
    h.close()
    assert [r["object"] for r in _query(db_url, run_id=run2)] == [LONG_TAG]


def test_unknown_schemas_are_refused_with_the_reason(tmp_path):
    partial = tmp_path / "partial.db"
    con = sqlite3.connect(partial)
    con.execute("create table runs (id integer primary key)")
    con.commit()
    con.close()
    with pytest.raises(SchemaError, match=r"but not \['alarm_events'"):
        History(sqlite_url(str(partial)))
    newer = tmp_path / "newer.db"
    History(sqlite_url(str(newer))).close()
    con = sqlite3.connect(newer)
    con.execute("update alembic_version set version_num = '9999'")
    con.commit()
    con.close()
    with pytest.raises(SchemaError, match=r"'9999'.*newer spanwatch"):
        History(sqlite_url(str(newer)))


OPENER = textwrap.dedent("""
    import pathlib, sys, time
    from spanwatch.connectors.history import History

    print("ready", flush=True)
    go = pathlib.Path(sys.argv[2])
    while not go.exists():
        time.sleep(0.005)
    h = History(sys.argv[1])
    print("run", h.start_run(mode="daemon", line_name="l", config_file="f", config_hash="h"), flush=True)
    h.close()
""")


def test_processes_opening_a_new_history_together_all_succeed(db_url, tmp_path):
    # four processes create the same history at once: one migrates under the write lock, the others wait and
    # find it at head; without the lock they race to create the same tables. The locks: SQLite documentation,
    # "BEGIN TRANSACTION" (IMMEDIATE starts a write transaction at once); PostgreSQL documentation, "Explicit
    # Locking", advisory locks (pg_advisory_xact_lock, held until the transaction ends)
    script = tmp_path / "opener.py"
    script.write_text(OPENER, encoding="utf-8")
    go = tmp_path / "go"
    procs = [subprocess.Popen([sys.executable, str(script), db_url, str(go)], cwd=REPO, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for _ in range(4)]
    try:
        for p in procs:
            assert p.stdout.readline().strip() == "ready", p.stderr.read()
        go.touch()
        outs = [p.communicate(timeout=120) for p in procs]
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait()
    assert [p.returncode for p in procs] == [0, 0, 0, 0], [err for _, err in outs]
    runs = sorted(int(out.split()[1]) for out, _ in outs)
    assert len(set(runs)) == 4
    assert _schema_diff(db_url) == ([], head())


# --- carrying open alarms on across a restart (monitor.daemon.carry_on_open_alarms, through the engine) -----------


def _falling_traction(t_start: float, n: int = 5) -> tuple[np.ndarray, dict, np.ndarray]:
    """A block where pull_1's traction ratio is well below both limits: an active traction alarm clears."""
    t = T0 + t_start + np.arange(n) * 0.1
    res = CheckResult(value=np.full(n, 0.3), reason=np.zeros(n, dtype=np.int8))
    return t, {("traction", "pull_1"): res}, np.full(n, RUNNING, dtype=np.int8)


def test_restart_carries_open_alarms_on_and_closes_those_no_longer_configured(db_url):
    from spanwatch.monitor.daemon import carry_on_open_alarms

    h1 = History(db_url)
    run1 = h1.start_run(mode="daemon", line_name="test line", config_file="line.toml", config_hash="hash1")
    h1.record([Transition(T0 + 10.0, TR_ALARM, "raise", 1.2, RUNNING), Transition(T0 + 11.0, SLIP, "raise", 0.08,
                                                                                  RUNNING)])
    h1.close()  # killed: both alarms left open

    # the new run's config has no slip alarm on idler_3 any more
    engine = AlarmEngine([TR_ALARM, TR_WARN])
    h2 = History(db_url)
    run2 = h2.start_run(mode="daemon", line_name="test line", config_file="line.toml", config_hash="hash2",
                        started_at=T0 + 100.0)
    assert carry_on_open_alarms(h2, engine) == 1
    assert [p.key for p in engine.active()] == [TR_ALARM.key]
    slip = _query(db_url, kind="slip")
    assert [(r["run"], r["cleared_t"]) for r in slip] == [(run1, T0 + 100.0)]  # closed at the new run's start

    # the carried alarm clears through the engine's own evaluation (a raise would need a value above the limit)
    trs = engine.evaluate(*_falling_traction(120.0))
    assert [(tr.key, tr.event) for tr in trs] == [(TR_ALARM.key, "clear")]
    h2.record(trs)
    h2.close()
    traction = _query(db_url, kind="traction")
    assert [(r["run"], r["raised_t"], r["cleared_t"]) for r in traction] == [(run1, T0 + 10.0, T0 + 120.0)]
    assert _query(db_url, run_id=run2) == []  # no second episode
    engine_db = make_engine(db_url)
    try:
        with Session(engine_db) as s:
            ep = s.get(AlarmEpisode, traction[0]["id"])
            assert [(e.event, e.run_id) for e in ep.events] == [("raise", run1), ("clear", run2)]
    finally:
        engine_db.dispose()

    # a third start finds nothing open, so nothing is restored
    h3 = History(db_url)
    h3.start_run(mode="daemon", line_name="test line", config_file="line.toml", config_hash="hash2")
    fresh = AlarmEngine([TR_ALARM, TR_WARN])
    assert carry_on_open_alarms(h3, fresh) == 0 and fresh.active() == []
    h3.close()


def test_only_runs_of_the_same_line_and_mode_are_carried_on(db_url):
    from spanwatch.monitor.daemon import carry_on_open_alarms

    h1 = History(db_url)
    h1.start_run(mode="daemon", line_name="test line", config_file="line.toml", config_hash="hash1")
    h1.record([Transition(T0 + 10.0, TR_ALARM, "raise", 1.2, RUNNING)])
    h1.close()
    for mode, line in (("replay", "test line"), ("demo", "test line"), ("daemon", "other line")):
        h = History(db_url)
        h.start_run(mode=mode, line_name=line, config_file="line.toml", config_hash="hash1")
        engine = AlarmEngine([TR_ALARM])
        assert carry_on_open_alarms(h, engine) == 0 and engine.active() == [], (mode, line)
        h.close()
    assert [r["cleared_t"] for r in _query(db_url)] == [None]  # left alone by the other lines and modes
    h = History(db_url)
    h.start_run(mode="daemon", line_name="test line", config_file="line.toml", config_hash="hash1")
    engine = AlarmEngine([TR_ALARM])
    assert carry_on_open_alarms(h, engine) == 1 and engine.active() == [TR_ALARM]
    h.close()
