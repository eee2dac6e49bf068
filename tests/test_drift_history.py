"""A drift alarm end to end: simulated load-cell gain error -> replay -> history -> ``spanwatch alarms show``.

The simulator's ground truth says when the fault starts (a gain error of the s5 load cell growing to 20 % from
720 s to 780 s); the drift alarm must name that load cell among what to look at, and carry an estimated change
time close to the true start and a change of the right sign.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

from spanwatch.connectors.history import History, episode_detail, query_episodes, sqlite_url

ROOT = Path(__file__).resolve().parent.parent
SCENARIO = ROOT / "config" / "scenarios" / "eval" / "full" / "loadcell-gain-obvious.toml"
CONFIG = ROOT / "config" / "scenarios" / "eval" / "quillmere-q2-drives.toml"


def _spanwatch(*args: str) -> subprocess.CompletedProcess:
    proc = subprocess.run([sys.executable, "-m", "spanwatch", *args], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return proc


def test_a_drift_alarm_names_the_load_cell_and_when_it_began(tmp_path):
    rec, db = tmp_path / "gain.csv.gz", tmp_path / "h.db"
    _spanwatch("simulate", str(SCENARIO), "--out", str(rec), "--no-progress")
    truth = json.loads((tmp_path / "gain.truth.json").read_text())
    start = truth["faults"][0]["start_epoch"]
    _spanwatch("replay", str(rec), "--config", str(CONFIG), "--db", str(db))
    h = History(sqlite_url(str(db)))
    try:
        eps = [e for e in query_episodes(h.engine) if e["check"] == "drift"]
        gain = [e for e in eps if e["object"] == "draw.gain.pull_1-pull_2"]
        assert gain, [e["object"] for e in eps]
        d = episode_detail(h.engine, int(gain[0]["id"]))
    finally:
        h.close()
    assert "q2.s5.tension" in d["blames"]
    assert gain[0]["raised_t"] >= start  # nothing before the fault (the run before it is clean)
    assert start - 20.0 <= d["detail"]["change_time"] <= gain[0]["raised_t"]
    assert d["detail"]["shift"] > 0  # the load cell reads high: measured / predicted tension rises
    out = _spanwatch("alarms", "show", str(gain[0]["id"]), "--db", str(db)).stdout
    assert "look at" in out and "q2.s5.tension" in out
    assert "draw gain residual moved by +" in out and "(estimate)" in out
    assert all(len(line) <= 80 for line in out.splitlines())
