"""Each check's value per minute in the history (``check_minutes``, revision 0005), on a real SQLite file and on
PostgreSQL (127.0.0.1:5432, a fresh schema per test; under CI=true a missing server fails those tests).

The reference is independent of the code under test: the same recording run through a pipeline without any history,
keeping one check's results block by block (:func:`spanwatch.monitor.sweep.keep_results`), then aggregated per minute
here, plainly with numpy over the whole recording at once. Minutes are those of POSIX time: every day has 86,400 s
("Seconds Since the Epoch", POSIX.1-2017, Base Definitions 4.16), so a minute begins at a multiple of 60 s, and its UTC
time reads hh:mm:00 (ISO 8601). A frame is valid when its reason is OK (``Reason.OK``, the check contract).

The recording starts 25 s into a minute and ends mid-minute (a partial first and last minute) and the line stops
in the middle, so minutes have gated frames (valid < n) and some checks no valid frame at all (min, mean, max
None).
"""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest
from alembic import command
from spanwatch.connectors.history import (
    CheckMinute,
    History,
    make_engine,
    prune_check_minutes,
    query_check_minutes,
    sqlite_url,
)
from spanwatch.connectors.history.schema import alembic_config, head, migration_connection
from spanwatch.connectors.history.writer import UNAVAILABLE, decode, encode, open_writer
from spanwatch.connectors.recording import read_recording
from spanwatch.monitor.line import load_line
from spanwatch.monitor.pipeline import Pipeline
from spanwatch.monitor.replay import replay
from spanwatch.monitor.simline import SimulatedLine
from spanwatch.monitor.simline.scenario import parse_scenario
from spanwatch.monitor.simulate import simulate_to_file
from spanwatch.monitor.sweep import keep_results
from sqlalchemy import inspect, text
from storagefaults import Locker, wait_for

ROOT = Path(__file__).resolve().parents[1]
CONFIG = ROOT / "config" / "quillmere-q2.toml"
T0 = 1_772_427_600.0  # 2026-03-02T05:00:00Z
# checks whose values move (traction, slip, an idler's lag), one gated most of the time (tension_zero: only at a
# standstill) and a tag check (a flag)
KINDS = ("traction", "slip", "idler_lag", "tension_zero", "tag_stale")


@pytest.fixture(params=["sqlite", "postgresql"])
def db_url(request, tmp_path) -> str:
    if request.param == "sqlite":
        return sqlite_url(str(tmp_path / "history.db"))
    return request.getfixturevalue("pg_url")


@pytest.fixture(scope="module")
def recorded(tmp_path_factory):
    """Line Q2 for 250 s from 06:00:25+01:00: up to 400 m/min, a stop at 100 s, running again from 150 s."""
    data = {"scenario": {"name": "minutes", "config": str(CONFIG), "duration": "250 s", "seed": 5,
                         "start": "2026-03-02T06:00:25+01:00"},
            "speed": [{"at": "0 s", "to": "400 m/min"}, {"at": "100 s", "to": "0 m/min"},
                      {"at": "150 s", "to": "400 m/min"}]}
    sc, cfg = parse_scenario(data, ROOT / "config" / "scenarios" / "minutes.toml")
    line = load_line(cfg)
    out = tmp_path_factory.mktemp("minutes") / "q2.csv.gz"
    simulate_to_file(SimulatedLine(line, sc), out, progress=False)
    return line, out


def reference(line, rec: Path, kind: str) -> dict[tuple[str, float], tuple]:
    """(object, minute start) -> (n, valid, min, mean, max) of check ``kind``, from its results kept by a run without
    history, aggregated here over the whole recording at once."""
    kept = keep_results(line, rec, kind)
    out = {}
    objects = {k[1] for b in kept.blocks for k in b.results}
    for obj in sorted(objects):
        t = np.concatenate([b.t for b in kept.blocks if (kind, obj) in b.results])
        v = np.concatenate([b.results[(kind, obj)].value for b in kept.blocks if (kind, obj) in b.results])
        ok = np.concatenate([b.results[(kind, obj)].reason for b in kept.blocks if (kind, obj) in b.results]) == 0
        minute = np.floor(t / 60.0) * 60.0
        for m in np.unique(minute):
            sel = minute == m
            good = v[sel & ok]
            stats = (float(good.min()), float(good.mean()), float(good.max())) if good.size else (None, None, None)
            out[(obj, float(m))] = (int(sel.sum()), int(good.size), *stats)
    return out


def stored(rows: list[dict], kind: str) -> dict[tuple[str, float], tuple]:
    return {(r["object"], r["t"]): (r["n"], r["valid"], r["min"], r["mean"], r["max"]) for r in rows
            if r["check"] == kind}


def assert_same(got: dict, want: dict) -> None:
    assert got.keys() == want.keys()
    for key, (n, valid, lo, mu, hi) in want.items():
        g = got[key]
        assert g[:3] == (n, valid, lo), key  # counts and the least value: exact
        assert g[4] == hi, key
        assert (g[3] is None) == (mu is None), key
        if mu is not None:
            assert g[3] == pytest.approx(mu, rel=1e-12, abs=1e-15), key  # summed block by block: rounding only


def test_a_replay_stores_each_checks_minutes_as_the_check_computed_them(recorded, db_url):
    line, rec = recorded
    summary = replay(line, rec, db_url)
    engine = make_engine(db_url)
    try:
        rows = query_check_minutes(engine, start=T0, end=T0 + 3600, run_id=summary.run_id)
    finally:
        engine.dispose()
    # every minute begins on a whole UTC minute, partial first (from :25) and last ones included
    minutes = sorted({r["t"] for r in rows})
    assert [datetime.fromtimestamp(m, UTC).strftime("%H:%M:%S") for m in minutes] == [
        "05:00:00", "05:01:00", "05:02:00", "05:03:00", "05:04:00"]
    assert all(r["run"] == summary.run_id and r["line"] == line.name for r in rows)
    checked = set()
    for kind in KINDS:
        want = reference(line, rec, kind)
        assert want, kind
        assert_same(stored(rows, kind), want)
        checked.add(kind)
    # what the comparison covered: gated frames, minutes without any valid frame, and values that move
    kinds = {r["check"] for r in rows}
    assert kinds >= set(KINDS)
    assert any(0 < r["valid"] < r["n"] for r in rows if r["check"] == "traction")
    assert any(r["valid"] == 0 and r["mean"] is None for r in rows if r["check"] == "tension_zero")
    assert any(r["min"] < r["max"] for r in rows if r["check"] == "traction" and r["valid"])
    # the first minute holds the 35 s the recording has of it, at most (50 frames a second)
    first = [r for r in rows if r["t"] == minutes[0]]
    assert first and all(r["n"] <= 35 * 50 for r in first)
    # the unit, as the alarm points state it (the example line's traction: a share of the roller's capacity)
    units = {(r["check"], r["unit"]) for r in rows if r["check"] in ("traction", "tag_stale")}
    assert units == {("traction", "share of capacity"), ("tag_stale", "flag")}


def test_query_filters_and_orders(db_url):
    rows = {"Q2": [CheckMinute("traction", o, T0 + 60 * k, 3000, 2990 - k, 0.2, 0.3 + k / 100, 0.4,
                               "share of capacity") for o in ("pull_2", "pull_1") for k in range(4)],
            "Q3": [CheckMinute("traction", "pull_1", T0 + 60 * k, 3000, 0, None, None, None, "share of capacity")
                   for k in range(4)]}
    runs = {}
    for name, rs in rows.items():
        h = History(db_url)
        runs[name] = h.start_run(mode="daemon", line_name=name, config_file="f", config_hash="h")
        h.record_minutes(rs)
        h.close()
    engine = make_engine(db_url)
    try:
        got = query_check_minutes(engine, start=T0 + 60, end=T0 + 180, line="Q2")
        # the minutes overlapping [start, end): 05:01 and 05:02; by check, object, time
        assert [(r["object"], r["t"]) for r in got] == [("pull_1", T0 + 60), ("pull_1", T0 + 120),
                                                        ("pull_2", T0 + 60), ("pull_2", T0 + 120)]
        assert got[0] == {"run": runs["Q2"], "line": "Q2", "check": "traction", "object": "pull_1", "t": T0 + 60,
                          "n": 3000, "valid": 2989, "min": 0.2, "mean": 0.31, "max": 0.4,
                          "unit": "share of capacity"}
        # a window that begins inside a minute takes that minute
        assert [r["t"] for r in query_check_minutes(engine, start=T0 + 90, end=T0 + 120, obj="pull_2")] == [T0 + 60]
        both = query_check_minutes(engine, start=T0, end=T0 + 60, obj="pull_1")
        assert [(r["line"], r["t"]) for r in both] == [("Q2", T0), ("Q3", T0)]  # same minute: by run
        q3 = query_check_minutes(engine, start=T0, end=T0 + 3600, run_id=runs["Q3"])
        assert len(q3) == 4 and all(r["min"] is None and r["mean"] is None and r["max"] is None for r in q3)
        assert query_check_minutes(engine, start=T0, end=T0 + 3600, check="slip") == []
        assert query_check_minutes(engine, start=T0 + 240, end=T0 + 3600) == []
        # retention: the minutes that begin before the limit go, the rest stay
        assert prune_check_minutes(engine, older_than=T0 + 120) == 2 * 2 + 2
        left = query_check_minutes(engine, start=T0 - 3600, end=T0 + 3600)
        assert sorted({r["t"] for r in left}) == [T0 + 120, T0 + 180] and len(left) == 6
        assert prune_check_minutes(engine, older_than=T0 + 120) == 0
    finally:
        engine.dispose()


def test_minutes_wait_in_the_spool_while_the_database_is_locked_and_are_written_after(recorded, tmp_path):
    # the daemon's way: the pipeline hands the rows to the writer thread, which keeps them in its spool while another
    # process holds the database's write lock (a real lock: SQLite documentation, "BEGIN TRANSACTION", EXCLUSIVE)
    line, rec = recorded
    direct = sqlite_url(str(tmp_path / "direct.db"))
    h = History(direct)
    direct_run = h.start_run(mode="daemon", line_name=line.name, config_file="q2.toml", config_hash="h")
    straight = Pipeline(line, h)  # the same blocks (10 s), straight into the store
    for batch in read_recording(rec, straight.names):
        straight.feed(batch)
    straight.finish()
    h.close()
    url = sqlite_url(str(tmp_path / "history.db"))
    writer = open_writer(url, line_name=line.name, timeout=0.5, lock_timeout=2.0)
    run = writer.history.start_run(mode="daemon", line_name=line.name, config_file="q2.toml", config_hash="h")
    writer.start()
    pipe = Pipeline(line, writer)
    locker = Locker(tmp_path / "history.db")
    try:
        for batch in read_recording(rec, pipe.names):
            pipe.feed(batch)
        pipe.finish_frames()
        pipe.flush_minutes()
        # one write per minute as each completes (five), each kept in the spool
        st = wait_for(lambda: (s := writer.status())["pending"] == 0 and s["spooled"] >= 5 and s, 60,
                      "the minutes' writes to be spooled")
        assert st["state"] == UNAVAILABLE
        engine = make_engine(url, read_only=True)
        try:  # WAL: a reader still reads, and finds none written yet
            assert query_check_minutes(engine, start=T0, end=T0 + 3600) == []
        finally:
            engine.dispose()
    finally:
        locker.release()
    wait_for(lambda: writer.status()["state"] == "ok" and writer.status()["spooled"] == 0, 60, "the writer to recover")
    pipe.finish_history()
    writer.close()
    assert writer.lost == writer.lost_minutes == writer.refused == 0

    def minutes(db: str, run_id: int) -> list[tuple]:
        engine = make_engine(db)
        try:
            return [tuple(r[k] for k in ("check", "object", "t", "n", "valid", "min", "mean", "max", "unit"))
                    for r in query_check_minutes(engine, start=T0, end=T0 + 3600, run_id=run_id)]
        finally:
            engine.dispose()

    got, want = minutes(url, run), minutes(direct, direct_run)
    assert len(want) > 5 * 60 and got == want  # the same rows as written straight into the store, None included
    assert any(r[5] is None for r in got)


def test_a_spool_record_of_minutes_reads_back_as_written():
    rows = [CheckMinute("slip", "pull_1", T0, 3000, 2999, -1e-4, 3.2e-7, 9.4e-5, "%"),
            CheckMinute("tension_zero", "unwind-pull_1", T0, 3000, 0, None, None, None, "% of setpoint")]
    assert decode(encode(7, 3, "minutes", rows)) == (7, 3, "minutes", rows)


def test_upgrade_of_a_0004_history_adds_the_table_and_keeps_its_rows(db_url, recorded):
    engine = make_engine(db_url)
    try:
        with migration_connection(engine) as conn:
            command.upgrade(alembic_config(conn), "0004")
        assert "check_minutes" not in inspect(engine).get_table_names()
        with engine.begin() as c:
            c.execute(text("insert into runs (started_at, finished_at, mode, line_name, config_file, config_hash, "
                           "source, end_state, written_seq) values (:t, :f, 'replay', 'Q2', 'q2.toml', 'hash0', "
                           "'old.csv', 'finished', 0)"), {"t": T0, "f": T0 + 100})
    finally:
        engine.dispose()
    line, rec = recorded
    summary = replay(line, rec, db_url)  # opening the history upgrades it
    engine = make_engine(db_url)
    try:
        with engine.connect() as c:
            assert c.execute(text("select version_num from alembic_version")).scalar_one() == head() == "0005"
            assert c.execute(text("select id, source from runs order by id")).all() == [
                (1, "old.csv"), (summary.run_id, str(rec))]
        indexes = {ix["name"]: ix["column_names"] for ix in inspect(engine).get_indexes("check_minutes")}
        assert indexes == {"ix_check_minutes_run_t": ["run_id", "t"],
                           "ix_check_minutes_check_object_t": ["check", "object", "t"]}
        assert query_check_minutes(engine, start=T0, end=T0 + 3600, run_id=1) == []
        assert len(query_check_minutes(engine, start=T0, end=T0 + 3600, run_id=summary.run_id)) > 5 * 60
        with migration_connection(engine) as conn:  # and back: the table goes, the rest stays
            command.downgrade(alembic_config(conn), "0004")
        assert "check_minutes" not in inspect(engine).get_table_names()
        with engine.connect() as c:
            assert c.execute(text("select count(*) from runs")).scalar_one() == 2
    finally:
        engine.dispose()


def test_a_minute_is_written_once_complete_and_the_partial_last_one_at_the_end(recorded, tmp_path):
    # the daemon's pipeline (minutes written as they complete): before the run ends the history holds every whole
    # minute the frames have passed, and not the minute still open; closing the run adds it
    line, rec = recorded
    url = sqlite_url(str(tmp_path / "history.db"))
    h = History(url)
    run = h.start_run(mode="daemon", line_name=line.name, config_file="q2.toml", config_hash="h")
    pipe = Pipeline(line, h)
    for batch in read_recording(rec, pipe.names):
        pipe.feed(batch)
    pipe.finish_frames()
    engine = make_engine(url)
    try:
        def times() -> list[str]:
            rows = query_check_minutes(engine, start=T0, end=T0 + 3600, run_id=run, check="traction", obj="pull_1")
            return [datetime.fromtimestamp(r["t"], UTC).strftime("%H:%M") for r in rows]

        assert pipe.last_t is not None and datetime.fromtimestamp(pipe.last_t, UTC).strftime("%H:%M") == "05:04"
        assert times() == ["05:00", "05:01", "05:02", "05:03"]
        pipe.finish_history()
        assert times() == ["05:00", "05:01", "05:02", "05:03", "05:04"]
    finally:
        engine.dispose()
        h.close()


def test_the_accumulator_closes_a_minute_when_its_last_frame_is_computed():
    from spanwatch.monitor.minutes import MinuteAccumulator

    acc = MinuteAccumulator({("slip", "pull_1"): "%"})
    # one frame a second; the first block ends on the minute's last frame (05:00:59), the second starts the next one
    t = T0 + np.arange(0.0, 60.0)
    values = np.where(np.arange(60) < 30, 1.0, 3.0)[None, :]
    valid = (np.arange(60) % 10 != 0)[None, :]  # every tenth frame gated
    assert acc.push(t, [("slip", "pull_1")], values, valid) == []
    assert acc.complete_before(T0 + 59.5) == []  # a frame of the minute may still come
    (row,) = acc.complete_before(T0 + 60.0)
    # 54 valid frames: 27 at 1.0 and 27 at 3.0, mean 2.0 (by hand)
    assert row == CheckMinute("slip", "pull_1", T0, 60, 54, 1.0, 2.0, 3.0, "%")
    assert acc.flush() == []
    # a block across a minute's end: the first minute is complete at once, the second stays open until flushed
    rows = acc.push(T0 + np.array([60.0, 119.0, 120.0]), [("slip", "pull_1")], np.array([[5.0, 7.0, 9.0]]),
                    np.array([[True, False, True]]))
    assert rows == [CheckMinute("slip", "pull_1", T0 + 60, 2, 1, 5.0, 5.0, 5.0, "%")]
    assert acc.flush() == [CheckMinute("slip", "pull_1", T0 + 120, 1, 1, 9.0, 9.0, 9.0, "%")]
