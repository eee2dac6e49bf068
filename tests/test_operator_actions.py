"""Operator actions against a running daemon: the command line writes a request, the daemon carries it out and
the lifecycle state follows; every action is recorded; a SIGKILL loses nothing reported done.

The expected states are those of the alarm state diagram of ANSI/ISA-18.2-2016 and IEC 62682:2014 (from
memory): acknowledging an unacknowledged alarm makes it acknowledged; acknowledging it again is refused;
a shelved alarm is hidden until unshelved; out of service hides it until returned to service.
"""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from pathlib import Path

from storagefaults import ENV, REPO, DaemonProcess, free_port, line_config, wait_for

STALE = "tag_stale:q2.unwind.rpm:alarm"


def sw(*args: str, timeout: float = 120.0) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "spanwatch", *args], cwd=REPO, env=ENV, capture_output=True,
                          text=True, timeout=timeout)


def rows(db: Path, sql: str, *args: object) -> list[tuple]:
    try:
        con = sqlite3.connect(db, timeout=30)
    except sqlite3.OperationalError:
        return []
    try:
        return con.execute(sql, args).fetchall()
    except sqlite3.OperationalError:  # the tables are not there yet
        return []
    finally:
        con.close()


def open_episode(db: Path, key: str) -> int | None:
    got = rows(db, "select id from alarm_episodes where alarm_key = ? and cleared_t is null order by id", key)
    return got[0][0] if got else None


def state_of(db: Path, key: str) -> str | None:
    got = rows(db, "select state from alarm_states where alarm_key = ?", key)
    return got[0][0] if got else None


def start(tmp: Path, dropouts: list[tuple[str, float, float]], *, log: str = "daemon.log") -> tuple[DaemonProcess,
                                                                                                  Path, Path]:
    db = tmp / "history.db"
    port = free_port()
    cfg = line_config(tmp, f"sqlite:///{db}", dropouts, port=port)
    d = DaemonProcess(cfg, port, tmp / log)
    d.wait_up()
    return d, cfg, db


def test_ack_shelve_and_refusals_from_the_command_line(tmp_path):
    d, cfg, db = start(tmp_path, [("q2.unwind.rpm", 2, 600)])
    try:
        ep = wait_for(lambda: open_episode(db, STALE), 90, "the stale alarm")
        assert state_of(db, STALE) == "unack"
        # by alarm id, through the config's history
        r = sw("ack", str(ep), "--user", "op-north", "-m", "seen", "--config", str(cfg))
        assert r.returncode == 0, r.stdout + r.stderr
        assert "unack -> acked" in r.stdout
        assert state_of(db, STALE) == "acked"
        # the same again is refused, with why, and exit 1
        r = sw("ack", str(ep), "--user", "op-north", "--config", str(cfg))
        assert r.returncode == 1
        assert "already acknowledged" in r.stderr
        # by check and object (every level of it) through --db
        r = sw("shelve", "tag_stale:q2.unwind.rpm", "--for", "2 h", "-m", "tacho cable being replaced",
               "--user", "op-north", "--db", str(db))
        assert r.returncode == 0, r.stdout + r.stderr
        assert state_of(db, STALE) == "shelved"
        r = sw("shelve", STALE, "--for", "30 h", "-m", "x", "--user", "op-north", "--db", str(db))
        assert r.returncode == 1 and "at most 8 h" in r.stderr
        r = sw("unshelve", STALE, "--user", "op-south", "--db", str(db))
        assert r.returncode == 0, r.stderr
        # unshelved while the condition holds: announced again, unacknowledged (ISA-18.2: F -> B)
        assert state_of(db, STALE) == "unack"
        r = sw("out-of-service", STALE, "--user", "tech", "-m", "encoder replaced", "--db", str(db))
        assert r.returncode == 0, r.stderr
        r = sw("return-to-service", STALE, "--user", "tech", "--db", str(db))
        assert r.returncode == 0, r.stderr
        r = sw("comment", str(ep), "--user", "op-north", "-m", "cable found chafed at the unwind", "--db", str(db))
        assert r.returncode == 0, r.stderr
        r = sw("ack", "nosuch:thing", "--user", "op", "--db", str(db))
        assert r.returncode == 1 and "no such alarm" in r.stderr
        health = d.health()
        assert health is not None and health["alarm_states"].get(STALE) == "unack"
    finally:
        assert d.stop() == 0, d.text()[-3000:]
    # every action, with who, when, the comment and the states around it, in order
    acts = rows(db, "select action, user, comment, state_before, state_after from alarm_actions "
                    "where alarm_key = ? and origin = 'operator' order by id", STALE)
    assert [a[0] for a in acts] == ["ack", "shelve", "unshelve", "out_of_service", "return_to_service", "comment"]
    assert acts[0] == ("ack", "op-north", "seen", "unack", "acked")
    assert acts[1][2] == "tacho cable being replaced" and acts[1][3:] == ("acked", "shelved")
    assert acts[2][3:] == ("shelved", "unack")
    answered = rows(db, "select status from action_requests order by id")
    assert [a[0] for a in answered] == ["applied", "refused", "applied", "refused", "applied", "applied",
                                        "applied", "applied", "refused"]
    # the journal alone rebuilds the lifecycle the daemon left (every change is in it, in order)
    from spanwatch.connectors.history import actions_of, open_reader
    from spanwatch.rules.lifecycle import Action, AlarmState, Lifecycle, LifecycleEvent

    engine = open_reader(f"sqlite:///{db}")
    journal = actions_of(engine)
    engine.dispose()
    states = dict(rows(db, "select alarm_key, state from alarm_states"))
    rebuilt = Lifecycle(sorted(states))
    rebuilt.replay(LifecycleEvent(a["t"], a["key"], Action(a["action"]), AlarmState(a["before"]),
                                  AlarmState(a["after"]), a["user"] or "", a["comment"] or "", a["until"])
                   for a in journal)
    assert {k: r.state.value for k, r in rebuilt.records.items()} == states
    # the detail view shows the actions with the alarm
    r = sw("alarms", "show", str(ep), "--db", str(db))
    assert r.returncode == 0, r.stderr
    for text in ("op-north", "tacho cable being replaced", "cable found chafed", "encoder replaced"):
        assert text in r.stdout


def test_no_daemon_means_queued_and_said_so(tmp_path):
    d, cfg, db = start(tmp_path, [("q2.unwind.rpm", 2, 600)])
    ep = wait_for(lambda: open_episode(db, STALE), 90, "the stale alarm")
    assert d.stop() == 0
    r = sw("ack", str(ep), "--user", "op", "--db", str(db), "--wait", "1")
    assert r.returncode == 3
    assert "stays queued" in r.stderr
    # the next start carries it out
    d2 = DaemonProcess(cfg, d.port, tmp_path / "daemon2.log")
    try:
        d2.wait_up()
        wait_for(lambda: rows(db, "select status from action_requests where status != 'pending'"), 60,
                 "the queued request to be answered")
    finally:
        d2.stop()
    assert rows(db, "select status, answer from action_requests")[0][0] == "applied"


def test_busy_history_many_operators_and_a_kill(tmp_path):
    """One daemon writing and four command-line operators acting and reading on one SQLite file for a minute: no
    error, no lost row; then SIGKILL: every action answered as done is there after the restart, in the same state."""
    d, _cfg, db = start(tmp_path, [("q2.unwind.rpm", 2, 900), ("q2.rewind.rpm", 2, 900)])
    wait_for(lambda: open_episode(db, STALE), 90, "the stale alarm")
    script = f"""
import subprocess, sys, time, json
end = time.monotonic() + 60
n = ok = 0
while time.monotonic() < end:
    r = subprocess.run([sys.executable, "-m", "spanwatch", "comment", "{STALE}", "--user", sys.argv[1],
                        "-m", f"note {{n}}", "--db", "{db}", "--wait", "30"], capture_output=True, text=True)
    n += 1
    ok += r.returncode == 0
    if r.returncode != 0:
        print("FAIL", r.returncode, r.stderr, file=sys.stderr)
    q = subprocess.run([sys.executable, "-m", "spanwatch", "alarms", "--db", "{db}", "--format", "json"],
                       capture_output=True, text=True)
    if q.returncode != 0:
        print("READ FAIL", q.stderr, file=sys.stderr)
    json.loads(q.stdout)
print(json.dumps({{"sent": n, "ok": ok}}))
"""
    ops = [subprocess.Popen([sys.executable, "-c", script, f"op{i}"], cwd=REPO, env=ENV, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True) for i in range(4)]
    try:
        results = []
        for p in ops:
            out, err = p.communicate(timeout=300)
            assert p.returncode == 0, err[-2000:]
            assert "FAIL" not in err, err[-2000:]
            results.append(json.loads(out.strip().splitlines()[-1]))
    finally:
        for p in ops:
            if p.poll() is None:
                p.kill()
    sent = sum(r["sent"] for r in results)
    assert sent == sum(r["ok"] for r in results) > 0
    comments = rows(db, "select count(*) from alarm_actions where action = 'comment'")[0][0]
    assert comments == sent  # no lost row
    assert rows(db, "select count(*) from action_requests where status = 'applied'")[0][0] == sent
    # an ack and a shelve answered as done, then the daemon killed mid-stream
    r = sw("ack", STALE, "--user", "op0", "--db", str(db))
    assert r.returncode == 0, r.stderr
    r = sw("shelve", "tag_stale:q2.rewind.rpm:alarm", "--for", "1 h", "-m", "known", "--user", "op1",
           "--db", str(db))
    assert r.returncode == 0, r.stderr
    before = dict(rows(db, "select alarm_key, state from alarm_states"))
    actions_before = rows(db, "select id, action, alarm_key, state_after from alarm_actions order by id")
    d.kill()
    after_kill = rows(db, "select id, action, alarm_key, state_after from alarm_actions order by id")
    assert after_kill[:len(actions_before)] == actions_before
    assert before[STALE] == "acked" and before["tag_stale:q2.rewind.rpm:alarm"] == "shelved"
    # restart with both tags still silent: the lifecycle is the one the killed daemon committed (the alarms are
    # carried on, not raised again, so still acknowledged and shelved)
    cfg2 = line_config(tmp_path, f"sqlite:///{db}", [("q2.unwind.rpm", 0, 900), ("q2.rewind.rpm", 0, 900)],
                       port=d.port, name="line2.toml")
    d2 = DaemonProcess(cfg2, d.port, tmp_path / "daemon2.log")
    try:
        d2.wait_up()
        # 10 s of frames: well past the start-up grace, the silent tags judged (and still abnormal)
        h = wait_for(lambda: (st := d2.health()) and st["frames"] >= 10 * 50 and st, 120, "10 s of frames")
        states = h["alarm_states"]
        assert states.get("tag_stale:q2.rewind.rpm:alarm") == "shelved"
        assert states.get(STALE) == "acked"
    finally:
        assert d2.stop() == 0, d2.text()[-3000:]
    assert dict(rows(db, "select alarm_key, state from alarm_states"))[STALE] == "acked"


def test_actions_on_postgresql(tmp_path, pg_schema, pg_url):
    """The same round trip on the real PostgreSQL server: the daemon writes there, the command line acts there."""
    from storagefaults import pg_rows

    port = free_port()
    cfg = line_config(tmp_path, pg_url, [("q2.unwind.rpm", 2, 600)], port=port)
    d = DaemonProcess(cfg, port, tmp_path / "daemon.log")
    try:
        d.wait_up()

        def open_ep() -> int | None:
            got = pg_rows(pg_schema, f"select id from alarm_episodes where alarm_key = '{STALE}' "
                                     "and cleared_t is null order by id")
            return got[0][0] if got else None

        ep = wait_for(open_ep, 90, "the stale alarm")
        r = sw("ack", str(ep), "--user", "op-north", "-m", "seen", "--config", str(cfg))
        assert r.returncode == 0, r.stdout + r.stderr
        r = sw("shelve", STALE, "--until-clear", "-m", "tacho cable", "--user", "op-north", "--config", str(cfg))
        assert r.returncode == 0, r.stdout + r.stderr
        r = sw("ack", str(ep), "--user", "op-north", "--config", str(cfg))
        assert r.returncode == 1 and "hidden" in r.stderr
        assert pg_rows(pg_schema, f"select state, shelved_one_shot from alarm_states where alarm_key = '{STALE}'") \
            == [("shelved", True)]
    finally:
        assert d.stop() == 0, d.text()[-3000:]
    acts = pg_rows(pg_schema, f"select action, state_before, state_after from alarm_actions where alarm_key = "
                              f"'{STALE}' and origin = 'operator' order by id")
    assert acts == [("ack", "unack", "acked"), ("shelve", "acked", "shelved")]
