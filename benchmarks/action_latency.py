"""How long an operator's action takes to reach a running daemon and come back: request written to the history,
read by the daemon's poll, carried out on its lifecycle, answer committed, answer read.

Usage: python benchmarks/action_latency.py [--actions 100] [--db postgresql+psycopg://127.0.0.1/test]

Starts ``spanwatch run`` on the example line fed by the simulated line (one tag silent, so there is an alarm to act
on) with a SQLite history in a temporary folder (or ``--db``), then sends ``--actions`` comments on that alarm
through the same functions ``spanwatch comment`` uses (:func:`spanwatch.connectors.history.requests.submit` and
``wait_answer``), one at a time, and prints the distribution of the round trip (submit to answer read), and the
same for whole ``spanwatch comment`` command lines (process start included) for a few of them.

Target (issue 9): the daemon's state follows an action within one second. Figures are printed; nothing is
asserted.
"""

from __future__ import annotations

import argparse
import os
import signal
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
KEY = "tag_stale:q2.unwind.rpm:alarm"


def config(tmp: Path, history: str) -> Path:
    scenario = tmp / "scenario.toml"
    scenario.write_text(f'[scenario]\nname = "bench"\nconfig = "{REPO / "config" / "quillmere-q2.toml"}"\n'
                        'duration = "1 h"\nseed = 3\n\n[[speed]]\nat = "0 s"\nto = "400 m/min"\n\n'
                        '[[fault]]\nkind = "tag_dropout"\ntarget = "q2.unwind.rpm"\nstart = "2 s"\nend = "1 h"\n',
                        encoding="utf-8")
    cfg = tmp / "line.toml"
    cfg.write_text((REPO / "config" / "quillmere-q2.toml").read_text(encoding="utf-8")
                   + f'\n[sources.sim]\nkind = "simulated"\nscenario = "{scenario}"\n\n'
                     f'[daemon]\nhistory = "{history}"\nhttp = ""\nstartup_grace = "1 s"\n', encoding="utf-8")
    return cfg


def pct(xs: list[float], p: float) -> float:
    xs = sorted(xs)
    return xs[min(len(xs) - 1, round(p / 100 * (len(xs) - 1)))]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--actions", type=int, default=100)
    ap.add_argument("--commands", type=int, default=10)
    ap.add_argument("--db", default=None)
    args = ap.parse_args()
    from spanwatch.connectors.history.database import make_engine
    from spanwatch.connectors.history.requests import submit, wait_answer

    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        url = args.db or f"sqlite:///{tmp / 'history.db'}"
        cfg = config(tmp, url)
        proc = subprocess.Popen([sys.executable, "-m", "spanwatch", "run", "--config", str(cfg), "--log-level",
                                 "warning"], cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            engine = make_engine(url)
            deadline = time.monotonic() + 120
            while time.monotonic() < deadline:
                time.sleep(0.5)
                try:
                    if url.startswith("sqlite"):
                        con = sqlite3.connect(url.removeprefix("sqlite:///"))
                        n = con.execute("select count(*) from alarm_states where alarm_key = ?", (KEY,)).fetchone()
                        con.close()
                        if n and n[0]:
                            break
                    else:
                        break
                except sqlite3.Error:
                    continue
            time.sleep(2)
            line = "Q2 film rewinder"
            trips = []
            for i in range(args.actions):
                t0 = time.perf_counter()
                rid = submit(engine, line_name=line, action="comment", user="bench", comment=f"note {i}",
                             alarm_key=KEY)
                ans = wait_answer(engine, rid, timeout=30, poll=0.01)
                trips.append(time.perf_counter() - t0)
                if ans.status != "applied":
                    print(f"request {rid}: {ans.status}: {ans.answer}")
            cmds = []
            for i in range(args.commands):
                t0 = time.perf_counter()
                r = subprocess.run([sys.executable, "-m", "spanwatch", "comment", KEY, "--user", "bench", "-m",
                                    f"cli {i}", "--db", url, "--line", line], capture_output=True, text=True,
                                   env={**os.environ})
                cmds.append(time.perf_counter() - t0)
                if r.returncode:
                    print(r.stderr)
            engine.dispose()
        finally:
            proc.send_signal(signal.SIGTERM)
            proc.wait(timeout=60)
    print(f"history: {'SQLite file' if url.startswith('sqlite') else url}; daemon polls every 0.25 s")
    print(f"round trip of {len(trips)} actions (submit -> answer read, 10 ms answer poll):")
    print(f"  median {statistics.median(trips) * 1000:.0f} ms, p90 {pct(trips, 90) * 1000:.0f} ms, "
          f"max {max(trips) * 1000:.0f} ms")
    print(f"whole `spanwatch comment` commands ({len(cmds)}, process start included):")
    print(f"  median {statistics.median(cmds) * 1000:.0f} ms, max {max(cmds) * 1000:.0f} ms")


if __name__ == "__main__":
    main()
