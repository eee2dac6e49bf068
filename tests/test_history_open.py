"""Opening a history that cannot be used: one clear line and exit 2 from ``replay``, ``alarms`` and ``run``, never a
traceback, and the database left as it was; a replay that stops on an error or Ctrl-C closes its run as such.

The databases are real files made unusable for real: text that is not a database, another program's SQLite
database, a history at a schema revision no spanwatch has, a file or folder without write permission (the command
runs as an unprivileged user when the tests run as root, since file modes do not stop root), a file without read
permission, and a database a second process keeps locked. SQLite's documented result for each (result codes,
https://sqlite.org/rescode.html): SQLITE_NOTADB, SQLITE_READONLY, SQLITE_CANTOPEN, SQLITE_BUSY.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from spanwatch.connectors.history import sqlite_url
from storagefaults import ENV, REPO, Locker, free_port, line_config, spanwatch, wait_for

CONFIG = REPO / "config" / "quillmere-q2.toml"
SCENARIO = f"""
[scenario]
name = "open-test"
config = "{CONFIG.as_posix()}"
duration = "40 s"
seed = 3

[[speed]]
at = "0 s"
to = "400 m/min"

[[fault]]
kind = "tag_dropout"
target = "q2.unwind.rpm"
start = "10 s"
end = "20 s"
"""


@pytest.fixture(scope="module")
def shared() -> Iterator[Path]:
    """A folder an unprivileged user can reach (pytest's own temporary folders are root's alone)."""
    home = Path(tempfile.mkdtemp(prefix="spanwatch-open-", dir="/tmp"))
    home.chmod(0o755)
    try:
        yield home
    finally:
        for p in home.rglob("*"):
            if p.is_dir():
                p.chmod(0o755)
        shutil.rmtree(home)


@pytest.fixture(scope="module")
def recording(shared: Path) -> Path:
    scenario = shared / "scenario.toml"
    scenario.write_text(SCENARIO, encoding="utf-8")
    rec = shared / "rec.csv"
    res = spanwatch("simulate", str(scenario), "--out", str(rec), "--no-progress")
    assert res.returncode == 0, res.stderr
    for p in shared.iterdir():
        p.chmod(0o644)
    return rec


@pytest.fixture(scope="module")
def history(shared: Path, recording: Path) -> Path:
    """A real history with one run and its stale-tag alarm (written by replay)."""
    db = shared / "good" / "history.db"
    db.parent.mkdir(mode=0o755)
    res = spanwatch("replay", str(recording), "--config", str(CONFIG), "--db", str(db), "--no-progress")
    assert res.returncode == 0, res.stderr
    return db


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def make(kind: str, folder: Path, good: Path) -> Path:
    """A database of ``kind`` in a new ``folder`` anyone may write (so only what ``kind`` says is wrong)."""
    folder.mkdir()
    folder.chmod(0o777)
    db = folder / "history.db"
    if kind == "corrupt":
        db.write_bytes(b"spanwatch history? no: a text file that happens to be called history.db\n" * 50)
    elif kind == "foreign":
        con = sqlite3.connect(db)
        con.execute("create table customers (id integer primary key, name text)")
        con.execute("insert into customers values (1, 'a customer')")
        con.commit()
        con.close()
    elif kind == "unknown revision":
        shutil.copy(good, db)
        con = sqlite3.connect(db)
        con.execute("update alembic_version set version_num = 'ffff'")
        con.commit()
        con.close()
    else:
        shutil.copy(good, db)
    db.chmod(0o666)
    if kind == "read-only file":
        db.chmod(0o444)
    elif kind == "read-only folder":
        folder.chmod(0o555)
    elif kind == "unreadable":
        db.chmod(0o000)
    return db


UNUSABLE = {  # kind: what the one line says
    "corrupt": "not a SQLite database",
    "foreign": "holds other tables (customers) and no spanwatch history",
    "unknown revision": "schema revision 'ffff', which this version of spanwatch does not know",
    "unreadable": "cannot open",
}
NOT_WRITABLE = {"read-only file": "read-only", "read-only folder": "read-only"}


def one_line(res: subprocess.CompletedProcess, db: Path, says: str) -> None:
    assert res.returncode == 2, f"exit {res.returncode}\n{res.stdout}\n{res.stderr}"
    assert "Traceback" not in res.stderr + res.stdout
    lines = [x for x in res.stderr.splitlines() if x.strip()]
    assert len(lines) == 1, res.stderr
    assert lines[0].startswith(str(db)) and says in lines[0], lines[0]


@pytest.mark.parametrize("kind", [*UNUSABLE, *NOT_WRITABLE])
def test_replay_into_an_unusable_history_says_so_in_one_line(kind, shared, recording, history, tmp_path):
    # Before: a traceback (exit 1) for each, and the foreign database got the history's tables added to it.
    db = make(kind, shared / f"replay-{kind.replace(' ', '-')}", history)
    before = digest(db) if kind != "unreadable" else None
    res = spanwatch("replay", str(recording), "--config", str(CONFIG), "--db", str(db), "--no-progress",
                    unprivileged=True)
    one_line(res, db, {**UNUSABLE, **NOT_WRITABLE}[kind])
    if before is not None:
        assert digest(db) == before  # left as it was


@pytest.mark.parametrize("kind", list(UNUSABLE))
def test_alarms_from_an_unusable_history_says_so_in_one_line(kind, shared, history):
    db = make(kind, shared / f"alarms-{kind.replace(' ', '-')}", history)
    one_line(spanwatch("alarms", "--db", str(db), unprivileged=True), db, UNUSABLE[kind])


@pytest.mark.parametrize("kind", list(NOT_WRITABLE))
def test_alarms_reads_a_history_it_cannot_write(kind, shared, history):
    db = make(kind, shared / f"list-{kind.replace(' ', '-')}", history)
    before = digest(db)
    res = spanwatch("alarms", "--db", str(db), "--format", "csv", unprivileged=True)
    assert res.returncode == 0, res.stderr
    assert "tag_stale,q2.unwind.rpm" in res.stdout
    assert digest(db) == before


def test_a_locked_history_gives_up_after_the_timeout_with_one_line(shared, recording, history):
    db = make("locked", shared / "locked", history)
    locker = Locker(db)  # a second process in a write transaction
    try:
        res = spanwatch("replay", str(recording), "--config", str(CONFIG), "--db", str(db), "--no-progress",
                        "--db-timeout", "1")
        one_line(res, db, "locked by another process (waited 1 s)")
    finally:
        locker.release()
    locker = Locker(db, "exclusive-mode")  # keeps readers out too
    try:
        one_line(spanwatch("alarms", "--db", str(db), "--db-timeout", "1"), db, "locked by another process")
    finally:
        locker.release()


def test_a_missing_or_empty_history_is_named(shared):
    missing = shared / "nowhere.db"
    one_line(spanwatch("alarms", "--db", str(missing)), missing, "no such database")
    empty = shared / "empty.db"
    empty.touch()
    one_line(spanwatch("alarms", "--db", str(empty)), empty, "empty: no spanwatch history")


@pytest.mark.parametrize("kind", ["corrupt", "foreign", "read-only file"])
def test_the_daemon_refuses_to_start_on_an_unusable_history_in_one_line(kind, shared, history):
    db = make(kind, shared / f"daemon-{kind.replace(' ', '-')}", history)
    cfg_home = shared / f"daemon-{kind.replace(' ', '-')}-config"
    cfg_home.mkdir(mode=0o777)
    cfg_home.chmod(0o777)  # the spool folder may be created beside the config
    cfg = line_config(cfg_home, sqlite_url(str(db)), [], port=free_port(), daemon='spool = "' + str(cfg_home) + '"')
    for p in cfg_home.iterdir():
        p.chmod(0o644)
    before = digest(db)
    res = spanwatch("run", "--config", str(cfg), unprivileged=True, timeout=60)
    says = {**UNUSABLE, **NOT_WRITABLE}[kind]
    assert res.returncode == 2, res.stdout + res.stderr
    last = [x for x in res.stderr.splitlines() if x.strip()][-1]  # after the start-up log lines
    assert "Traceback" not in res.stderr and last.startswith(str(db)) and says in last, res.stderr
    assert digest(db) == before


def _runs(db: Path) -> list[tuple]:
    con = sqlite3.connect(db)
    try:
        return con.execute("select id, finished_at, end_state from runs order by id").fetchall()
    finally:
        con.close()


def test_a_replay_that_stops_on_an_error_is_closed_as_failed(tmp_path):
    # Before: the run stayed open for ever (finished_at NULL), like a replay still running.
    bad = tmp_path / "bad.csv"
    bad.write_text("when,name,val\n1,a,2\n", encoding="utf-8")
    db = tmp_path / "history.db"
    res = spanwatch("replay", str(bad), "--config", str(CONFIG), "--db", str(db), "--no-progress")
    assert res.returncode == 2 and "expected the header" in res.stderr
    [(_, finished, state)] = _runs(db)
    assert state == "failed" and finished is not None


@pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals and FIFOs")
def test_a_replay_stopped_by_ctrl_c_is_closed_as_interrupted(tmp_path, recording):
    # the recording comes through a pipe that stays open: the replay is mid-way, waiting for more, when SIGINT comes
    fifo = tmp_path / "recording.csv"
    os.mkfifo(fifo)
    db = tmp_path / "history.db"
    proc = subprocess.Popen([sys.executable, "-m", "spanwatch", "replay", str(fifo), "--config", str(CONFIG), "--db",
                             str(db), "--no-progress"], cwd=REPO, env=ENV, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        with open(fifo, "w", encoding="utf-8") as feed:
            feed.write("".join(recording.read_text(encoding="utf-8").splitlines(keepends=True)[:2000]))
            feed.flush()

            def started() -> bool:
                try:
                    return bool(db.exists() and _runs(db))
                except sqlite3.OperationalError:
                    return False

            wait_for(started, 60, "the replay's run to start")
            time.sleep(0.5)
            proc.send_signal(signal.SIGINT)
            _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130, err
    [(_, finished, state)] = _runs(db)
    assert state == "interrupted" and finished is not None
