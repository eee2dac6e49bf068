"""The history writer and its spool (connectors/history/writer.py, spool.py) on real files, real databases and real
second processes: what is appended survives SIGKILL, a torn or stale record is never read back, the spool's space
is reserved so a full disk does not refuse it, a full spool is counted and said once, a write the database already
has is not written twice, and the writer writes what the store writes directly, in the same order.
"""

from __future__ import annotations

import logging
import os
import signal
import stat
import subprocess
import sys
import textwrap

import pytest
from spanwatch.connectors.history import History, query_episodes, sqlite_url
from spanwatch.connectors.history.spool import Spool, SpoolBusy
from spanwatch.connectors.history.writer import UNAVAILABLE, HistoryWriter, encode, open_writer, spool_path
from spanwatch.rules.alarms import AlarmPoint, Transition
from spanwatch.rules.base import LineState
from storagefaults import REPO, Locker, fill, small_filesystem, wait_for

T0 = 1_772_427_600.0
RUNNING = int(LineState.RUNNING)


def point(i: int) -> AlarmPoint:
    return AlarmPoint(kind="tag_stale", object_id=f"q2.tag{i}", level="alarm", limit=0.5, direction="high",
                      deadband=0.0, on_delay=0.0, off_delay=0.0, priority="medium", unit="flag",
                      cause="no new sample within the stale limit", consequence="checks read a stale value",
                      action="check the sensor and its connection", response_time=60.0)


def raise_(i: int) -> Transition:
    return Transition(T0 + i, point(i), "raise", 1.0, RUNNING)


# --- the spool -----------------------------------------------------------------------------------------------------

APPENDER = textwrap.dedent("""
    import sys
    from spanwatch.connectors.history.spool import Spool
    spool = Spool(sys.argv[1], 1 << 20)
    i = 0
    while True:
        spool.append(f"record {i}".encode())  # returns after fdatasync
        print(i, flush=True)
        i += 1
""")


def test_what_was_appended_survives_sigkill_of_the_appending_process(tmp_path):
    path = tmp_path / "spool"
    proc = subprocess.Popen([sys.executable, "-c", APPENDER, str(path)], cwd=REPO, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    acknowledged = -1
    try:
        while acknowledged < 300:
            line = proc.stdout.readline()
            assert line, proc.stderr.read()
            acknowledged = int(line)
    finally:
        os.kill(proc.pid, signal.SIGKILL)  # mid-loop: appending the next record
        proc.wait()
        proc.stdout.close()
        proc.stderr.close()
    spool = Spool(path, 1 << 20)
    got = [p.decode() for p in spool.read()]
    spool.close()
    assert len(got) >= acknowledged + 1  # every record acknowledged, perhaps the one after
    assert got == [f"record {i}" for i in range(len(got))]  # in order, whole, nothing else


def test_a_torn_or_stale_record_is_never_read_back(tmp_path):
    path = tmp_path / "spool"
    spool = Spool(path, 1 << 16)
    for i in range(3):
        spool.append(f"record {i}".encode())
    spool.close()
    raw = bytearray(path.read_bytes())
    last = raw.rindex(b"record 2")
    raw[last + 7] ^= 0xFF  # the last record, torn: its bytes are not what was written
    path.write_bytes(bytes(raw))
    spool = Spool(path, 1 << 16)
    assert [p.decode() for p in spool.read()] == ["record 0", "record 1"]
    spool.clear()  # written to the database: the old records stay on disk but belong to an older epoch
    spool.append(b"new")
    spool.close()
    assert path.read_bytes().count(b"record 1") == 1
    spool = Spool(path, 1 << 16)
    assert list(spool.read()) == [b"new"]
    spool.close()


def test_the_spool_is_private_and_held_by_one_process(tmp_path):
    folder = tmp_path / "spool-folder"
    spool = Spool(folder / "q2.spool", 1 << 16)
    assert stat.S_IMODE(folder.stat().st_mode) == 0o700
    assert stat.S_IMODE((folder / "q2.spool").stat().st_mode) == 0o600
    res = subprocess.run([sys.executable, "-c", "import sys\nfrom spanwatch.connectors.history.spool import Spool\n"
                          "try:\n    Spool(sys.argv[1], 1 << 16)\nexcept Exception as e:\n    print(type(e).__name__)",
                          str(folder / "q2.spool")], cwd=REPO, capture_output=True, text=True)
    assert res.stdout.strip() == SpoolBusy.__name__, res.stderr
    spool.close()


def test_a_full_disk_does_not_refuse_the_spool_it_reserved(tmp_path):
    with small_filesystem(tmp_path / "disk", "1m") as disk:
        spool = Spool(disk / "q2.spool", 256 * 1024)
        assert spool.reserved
        fill(disk)
        with pytest.raises(OSError) as full, open(disk / "one-more", "wb", buffering=0) as f:
            f.write(b"x" * 4096)
        assert full.value.errno == 28  # ENOSPC: the disk is really full
        payloads = [encode(1, i, "record", [raise_(i)]) for i in range(1, 101)]
        for p in payloads:
            spool.append(p)
        spool.close()
        spool = Spool(disk / "q2.spool", 256 * 1024)
        assert list(spool.read()) == payloads
        assert spool.used <= spool.capacity and spool.capacity == 256 * 1024
        spool.close()


def test_spool_path_beside_sqlite_or_in_the_default_folder(tmp_path):
    assert spool_path(sqlite_url(str(tmp_path / "h.db")), "Q2").parent == tmp_path
    pg = spool_path("postgresql+psycopg://u:secret@db/plant", "Q2", default_folder=tmp_path / "d")
    assert pg.parent == tmp_path / "d" and "secret" not in pg.name
    assert spool_path(sqlite_url(str(tmp_path / "h.db")), "Q2", tmp_path / "x").parent == tmp_path / "x"
    assert spool_path(sqlite_url("h.db"), "Q2") != spool_path(sqlite_url("h.db"), "Q3")


# --- the writer ----------------------------------------------------------------------------------------------------


def _events(url: str) -> list[tuple[str, str]]:
    import sqlite3

    con = sqlite3.connect(url.removeprefix("sqlite:///"))
    try:
        return con.execute("select object_id, event from alarm_events order by id").fetchall()
    finally:
        con.close()


def test_a_full_spool_is_counted_and_said_once_and_the_rest_is_written_in_order(tmp_path, caplog):
    url = sqlite_url(str(tmp_path / "history.db"))
    h = History(url, timeout=0.5)
    h.start_run(mode="daemon", line_name="Q2", config_file="f", config_hash="h")
    writer = HistoryWriter(h, Spool(tmp_path / "q2.spool", 64 * 1024), retry_max=0.5)
    writer.start()
    locker = Locker(tmp_path / "history.db")  # another process holds the write lock: every write goes to the spool
    try:
        with caplog.at_level(logging.WARNING, logger="spanwatch.history"):
            n = 400  # more than the 64 KiB spool holds
            for i in range(n):
                writer.record([raise_(i)])  # hands over and returns: the database is locked meanwhile
            wait_for(lambda: writer.status()["pending"] == 0 and writer.status()["spooled"] + writer.lost == n, 60,
                     "every write handled")
            st = writer.status()
            assert st["state"] == "spool full" and 0 < st["spooled"] < n and st["lost"] == n - st["spooled"]
            kept = st["spooled"]
            assert sum("spool full" in r.message for r in caplog.records) == 1
            assert sum("history unavailable" in r.message for r in caplog.records) == 1
    finally:
        locker.release()
    wait_for(lambda: writer.status()["state"] == "ok", 60, "the writer to recover")
    writer.record([raise_(n)])  # written directly again
    writer.close()
    # the first writes were kept and written in order; the later ones, which found the spool full, were lost
    assert _events(url) == [(f"q2.tag{i}", "raise") for i in [*range(kept), n]]


def test_a_write_the_database_already_has_is_not_written_twice(tmp_path):
    # a writer killed after committing a spooled write and before clearing the spool: the next start skips it
    url = sqlite_url(str(tmp_path / "history.db"))
    h = History(url)
    run = h.start_run(mode="daemon", line_name="Q2", config_file="f", config_hash="h")
    h.record([raise_(1)], seq=1)
    h.close()
    path = spool_path(url, "Q2")
    spool = Spool(path, 1 << 20)
    clear = Transition(T0 + 5, point(1), "clear", 0.0, RUNNING, peak=1.0)
    for seq, op, data in ((1, "record", [raise_(1)]), (2, "record", [raise_(2)]), (3, "record", [clear])):
        spool.append(encode(run, seq, op, data))
    spool.close()
    writer = open_writer(url, line_name="Q2", timeout=5.0)
    writer.history.start_run(mode="daemon", line_name="Q2", config_file="f", config_hash="h")
    writer.start()
    writer.close()
    assert _events(url) == [("q2.tag1", "raise"), ("q2.tag2", "raise"), ("q2.tag1", "clear")]
    eps = query_episodes(History(url).engine, run_id=run)
    assert [(e["object"], e["cleared_t"]) for e in eps] == [("q2.tag1", T0 + 5), ("q2.tag2", None)]


def test_the_writer_writes_what_the_store_writes_directly(tmp_path):
    # the same transitions and context windows through the writer thread and straight into the store
    from spanwatch.connectors.history import Context

    def feed(sink) -> None:
        for i in range(20):
            sink.record([raise_(i)])
            sink.record_contexts([Context(point(i).key, T0 + i, f"tag/q2.tag{i}", T0 + i - 1, 0.5, [1.0, None, 2.0])])
            if i % 3 == 0:
                sink.record([Transition(T0 + i + 0.5, point(i), "clear", 0.0, RUNNING, peak=2.0)])
        sink.finish_run(input_rows=[{"tag": "q2.tag1", "reason": "late", "count": 2, "refs": [3, 4]}],
                        data_start=T0, data_end=T0 + 20)

    direct = sqlite_url(str(tmp_path / "direct.db"))
    h = History(direct)
    h.start_run(mode="daemon", line_name="Q2", config_file="f", config_hash="h")
    feed(h)
    h.close()
    threaded = sqlite_url(str(tmp_path / "threaded.db"))
    writer = open_writer(threaded, line_name="Q2")
    writer.history.start_run(mode="daemon", line_name="Q2", config_file="f", config_hash="h")
    writer.start()
    feed(writer)
    writer.close()
    assert writer.written == 20 + 20 + 7 + 1 and writer.lost == writer.refused == 0

    def dump(url: str) -> list:
        import sqlite3

        con = sqlite3.connect(url.removeprefix("sqlite:///"))
        try:
            return [con.execute(q).fetchall() for q in (
                "select run_id, episode_id, t, alarm_key, event, value from alarm_events order by id",
                "select alarm_key, raised_t, cleared_t, peak_value from alarm_episodes order by id",
                "select episode_id, signal, t0, dt, \"values\" from alarm_context order by id",
                "select tag, reason, count, refs from input_issues",
                "select data_start, data_end, end_state from runs")]
        finally:
            con.close()

    assert dump(threaded) == dump(direct)


def test_the_writer_says_unavailable_while_the_database_is_locked(tmp_path):
    url = sqlite_url(str(tmp_path / "history.db"))
    writer = open_writer(url, line_name="Q2", timeout=0.5, lock_timeout=2.0)
    writer.history.start_run(mode="daemon", line_name="Q2", config_file="f", config_hash="h")
    writer.start()
    locker = Locker(tmp_path / "history.db")
    try:
        writer.record([raise_(1)])
        st = wait_for(lambda: writer.status()["spooled"] == 1 and writer.status(), 30, "the write to be spooled")
        assert st["state"] == UNAVAILABLE and "locked by another process (waited 0.5 s)" in st["reason"]
    finally:
        locker.release()
    wait_for(lambda: writer.status()["state"] == "ok", 30, "the writer to recover")
    writer.close()
    assert _events(url) == [("q2.tag1", "raise")]
    left = Spool(writer.spool.path, 1 << 16)
    assert left.count == 0  # written, and cleared
    left.close()


def test_lifecycle_writes_wait_in_the_spool_and_are_written_in_order(tmp_path):
    # lifecycle rows, states and answers take the same way as transitions: spooled while the database is locked,
    # written in order when it returns (a one-shot shelve's infinite end included)
    import math

    from spanwatch.connectors.history import RequestAnswer, actions_of, make_engine
    from spanwatch.connectors.history.requests import answer_of, submit
    from spanwatch.rules.lifecycle import Lifecycle

    url = sqlite_url(str(tmp_path / "history.db"))
    writer = open_writer(url, line_name="Q2", timeout=0.5, lock_timeout=2.0)
    writer.history.start_run(mode="daemon", line_name="Q2", config_file="f", config_hash="h")
    writer.start()
    key = point(1).key
    req = submit(writer.history.engine, line_name="Q2", action="ack", user="operator-a", alarm_key=key, at=T0)
    lc = Lifecycle([key])
    locker = Locker(tmp_path / "history.db")
    try:
        writer.record([raise_(1)], lifecycle=[lc.condition(T0 + 1, key, "raise")], states=dict(lc.records))
        ack = lc.act(T0 + 2, key, "ack", user="operator-a", request=req)
        writer.record([], lifecycle=[ack], states=dict(lc.records),
                      answers=[RequestAnswer(req, "applied", "acknowledged", T0 + 2)])
        shelve = lc.act(T0 + 3, key, "shelve", user="operator-b", comment="trial", until=math.inf)
        writer.record([], lifecycle=[shelve], states=dict(lc.records))
        st = wait_for(lambda: writer.status()["spooled"] == 3 and writer.status(), 30, "the writes to be spooled")
        assert st["state"] == UNAVAILABLE
    finally:
        locker.release()
    wait_for(lambda: writer.status()["state"] == "ok", 30, "the writer to recover")
    writer.close()
    assert writer.lost == writer.refused == 0
    engine = make_engine(url)
    try:
        assert [(a["action"], a["before"], a["after"], a["until"], a["request"]) for a in actions_of(engine)] == [
            ("raise", "normal", "unack", None, None), ("ack", "unack", "acked", None, req),
            ("shelve", "acked", "shelved", math.inf, None)]
        assert answer_of(engine, req).status == "applied"
    finally:
        engine.dispose()
    h = History(url)
    assert h.load_states("Q2") == lc.records and lc.records[key].shelved_until == math.inf
    h.close()
    assert _events(url) == [("q2.tag1", "raise")]
