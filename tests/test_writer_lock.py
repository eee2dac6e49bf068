"""One writer per history and line: a second ``spanwatch run`` of the same line on the same history refuses to start
(exit 2, one line naming the first) instead of carrying on and closing the first one's alarms; a killed first one
does not block the next start; a hung one is taken over once its heartbeat is stale (SQLite), or keeps the lock
while its connection lives (PostgreSQL, whose server releases a session's advisory locks when the session ends:
PostgreSQL documentation, "Explicit Locking", "Advisory Locks").

Two real daemon processes on a real SQLite file and on the shared PostgreSQL server (a schema of its own), killed
with SIGKILL or stopped with SIGSTOP.
"""

from __future__ import annotations

import re
import signal
import sqlite3
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from pgtest import fresh_schema
from spanwatch.connectors.history import sqlite_url
from storagefaults import (
    ENV,
    REPO,
    DaemonProcess,
    free_port,
    line_config,
    pg_rows,
    pg_url,
    wait_for,
)

UNWIND = "q2.unwind.rpm"
KEY = f"tag_stale:{UNWIND}:alarm"
LINE = "Q2 film rewinder"


class Backend:
    def __init__(self, url: str, rows) -> None:
        self.url, self.rows = url, rows

    def episodes(self) -> list[tuple]:
        try:
            return self.rows("select id, run_id, alarm_key, cleared_t from alarm_episodes order by id")
        except Exception:  # the tables are made a moment after the daemon starts
            return []

    def runs(self) -> list[tuple]:
        return self.rows("select id, end_state from runs order by id")


@pytest.fixture(params=["sqlite", "postgresql"])
def backend(request, tmp_path) -> Iterator[Backend]:
    if request.param == "sqlite":
        db = tmp_path / "history.db"

        def rows(sql: str) -> list[tuple]:
            con = sqlite3.connect(db)
            try:
                return con.execute(sql).fetchall()
            finally:
                con.close()

        yield Backend(sqlite_url(str(db)), rows)
    else:
        with fresh_schema() as schema:
            yield Backend(pg_url(schema), lambda sql: pg_rows(schema, sql))


def config(tmp: Path, backend: Backend, name: str) -> tuple[Path, int]:
    port = free_port()
    return line_config(tmp, backend.url, [(UNWIND, 3, 600)], port=port, name=name,
                       daemon='lock_timeout = "3 s"'), port


def start_refused(cfg: Path) -> subprocess.CompletedProcess:
    """``spanwatch run`` that must end by itself (a refused start); killed and failed if it runs on."""
    proc = subprocess.Popen([sys.executable, "-m", "spanwatch", "run", "--config", str(cfg)], cwd=REPO, env=ENV,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        out, err = proc.communicate(timeout=60)
    except subprocess.TimeoutExpired:
        proc.kill()
        out, err = proc.communicate()
        pytest.fail(f"the second daemon started instead of refusing:\n{err[-2000:]}")
    return subprocess.CompletedProcess(proc.args, proc.returncode, out, err)


def refusal(res: subprocess.CompletedProcess, first: DaemonProcess) -> str:
    assert res.returncode == 2, res.stderr
    assert "Traceback" not in res.stderr
    last = [x for x in res.stderr.splitlines() if x.strip()][-1]
    assert f"pid {first.proc.pid}" in last and f"is writing line {LINE!r} into this history" in last, last
    return last


def test_a_second_daemon_of_the_line_refuses_and_a_killed_first_does_not_block_the_next(backend, tmp_path):
    # Before: the second started on the same history, carried the first one's open alarm on, and closed it.
    cfg1, port1 = config(tmp_path, backend, "first.toml")
    cfg2, port2 = config(tmp_path, backend, "second.toml")
    first = DaemonProcess(cfg1, port1, tmp_path / "first.log")
    second: DaemonProcess | None = None
    try:
        first.wait_up()
        wait_for(lambda: [e for e in backend.episodes() if e[2] == KEY], 60, "the first daemon's alarm")
        refusal(start_refused(cfg2), first)
        st = first.health()
        assert st is not None and st["status"] == "ok" and KEY in st["active_alarms"]
        assert [(e[1], e[3]) for e in backend.episodes() if e[2] == KEY] == [(1, None)]  # still open, still its
        assert len(backend.runs()) == 1  # the refused start left no run behind

        first.kill()  # SIGKILL: no chance to release the lock
        second = DaemonProcess(cfg2, port2, tmp_path / "second.log")
        second.wait_up(60)
        assert "carrying on 1 alarm(s)" in second.text()
        assert second.stop() == 0, second.text()[-3000:]
    finally:
        first.kill()
        if second is not None:
            second.kill()
    if backend.url.startswith("sqlite"):
        assert "took over the writer lock" in second.text() and "its process is gone" in second.text()
    assert backend.runs() == [(1, "interrupted"), (2, "finished")]


def test_a_hung_daemon_keeps_or_loses_the_line_as_its_lock_says(backend, tmp_path):
    cfg1, port1 = config(tmp_path, backend, "first.toml")
    cfg2, port2 = config(tmp_path, backend, "second.toml")
    first = DaemonProcess(cfg1, port1, tmp_path / "first.log")
    second: DaemonProcess | None = None
    try:
        first.wait_up()
        first.proc.send_signal(signal.SIGSTOP)  # alive, but no heartbeat
        if backend.url.startswith("postgresql"):
            # the lock is the session's: a hung daemon whose connection is up keeps its line
            refusal(start_refused(cfg2), first)
            first.proc.send_signal(signal.SIGCONT)
            assert first.stop() == 0
            return

        def takes_over() -> DaemonProcess | None:
            nonlocal second
            second = DaemonProcess(cfg2, port2, tmp_path / "second.log")
            while second.proc.poll() is None:
                if second.health():
                    return second
                time.sleep(0.2)
            second.kill()
            assert second.proc.returncode == 2, second.text()[-2000:]  # refused while the heartbeat is fresh
            return None

        wait_for(takes_over, 90, "the second daemon to take the hung one's line over", every=0.5)
        took = re.search(r"its heartbeat is stale: last heartbeat ([\d.]+) s ago", second.text())
        assert took and float(took.group(1)) >= 3.0, second.text()[-2000:]  # not before it was lock_timeout old
        first.proc.send_signal(signal.SIGCONT)
        # the first finds its lock taken: it writes nothing more, says so, and keeps monitoring
        wait_for(lambda: (st := first.health()) and st["history"]["state"] == "lock lost", 60, "the first to see it")
        assert second.stop() == 0
        assert first.stop() == 0
    finally:
        if first.proc.poll() is None:
            first.proc.send_signal(signal.SIGCONT)
        first.kill()
        if second is not None:
            second.kill()
