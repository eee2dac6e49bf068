"""Alarm history (monitor/history.py) on a real SQLite file and on PostgreSQL.

Every test that takes ``db_url`` runs on both backends. PostgreSQL is expected on 127.0.0.1:5432 (trust auth,
database ``test``, user ``postgres``); each test gets a fresh schema, dropped afterwards. Under CI=true a missing
PostgreSQL fails the PostgreSQL tests; elsewhere they are skipped with the reason.
"""

from __future__ import annotations

import math
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import uuid
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path

import pytest
from spanwatch.monitor.history import History, latest_run, make_engine, query_episodes, sqlite_url
from spanwatch.rules.alarms import AlarmPoint, Transition
from spanwatch.rules.base import LineState
from sqlalchemy import text

REPO = Path(__file__).resolve().parents[1]
PG_BASE = "postgresql+psycopg://postgres@127.0.0.1:5432/test"
PG_CONNINFO = "host=127.0.0.1 port=5432 dbname=test user=postgres connect_timeout=3"
T0 = 1_772_427_600.0
RUNNING = int(LineState.RUNNING)


# --- backends ------------------------------------------------------------------------------------------------------


@pytest.fixture(scope="session")
def postgres_available() -> None:
    """Fail under CI=true, skip elsewhere, when PostgreSQL cannot be reached."""
    try:
        import psycopg

        with psycopg.connect(PG_CONNINFO) as conn:
            conn.execute("select 1")
    except Exception as exc:  # any failure to connect: driver missing, refused, auth
        msg = f"PostgreSQL not reachable on 127.0.0.1:5432: {exc}"
        if os.environ.get("CI") == "true":
            pytest.fail(msg + " (CI=true: a test that needs a service must not skip)")
        pytest.skip(msg)


@pytest.fixture
def pg_url(postgres_available) -> Iterator[str]:
    """A URL whose connections work in a fresh, empty schema; the schema is dropped afterwards."""
    import psycopg

    schema = f"spanwatch_test_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(PG_CONNINFO, autocommit=True) as conn:
        conn.execute(f'create schema "{schema}"')
    try:
        yield f"{PG_BASE}?options=-csearch_path%3D{schema}"
    finally:
        with psycopg.connect(PG_CONNINFO, autocommit=True) as conn:
            conn.execute(f'drop schema if exists "{schema}" cascade')


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
    from spanwatch.monitor.history import History

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
