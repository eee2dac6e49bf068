"""End to end through the real command line: simulate -> replay -> alarms (table, csv, json, filters).

A short scenario (150 s of simulated line: a friction drop on a pull roll, then an rpm tag that stops updating)
is simulated once per module. The simulator's ground truth (``.truth.json``) says when the tag dropout happened;
the stale-tag alarm is checked against that window. Listings are checked against each other and against Python's
own ISO 8601 parser, and a recording with injected bad rows must replay and report each row by line number.
"""

from __future__ import annotations

import csv
import gzip
import io
import json
import re
import subprocess
import sys
from collections import Counter
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest
from spanwatch.monitor.cli import app
from spanwatch.rules.base import LineState
from spanwatch.rules.catalog import CHECK_KINDS
from typer.testing import CliRunner

REPO = Path(__file__).resolve().parents[1]
CONFIG = REPO / "config" / "quillmere-q2.toml"
COLUMNS = ["id", "line", "run", "raised", "raised_epoch", "cleared", "cleared_epoch", "duration_s", "check", "object",
           "level", "priority", "value", "peak", "limit", "unit", "line_state", "config_hash", "state", "first_out",
           "chattering", "cause", "consequence", "corrective_action", "response_time"]
DROPOUT_TAG = "q2.unwind.rpm"

SCENARIO = f"""
[scenario]
name = "cli-test"
config = "{CONFIG.as_posix()}"
duration = "150 s"
seed = 21

[[speed]]
at = "0 s"
to = "400 m/min"

[[fault]]
kind = "cof_drop"
target = "pull_1"
start = "20 s"
end = "70 s"
size = 0.10

[[fault]]
kind = "tag_dropout"
target = "{DROPOUT_TAG}"
start = "90 s"
end = "120 s"
"""


def cli(*args: str) -> subprocess.CompletedProcess:
    """Run the real CLI in a fresh interpreter; fail with its output if it does not exit 0."""
    proc = subprocess.run([sys.executable, "-m", "spanwatch", *args], cwd=REPO, capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 0, f"spanwatch {' '.join(args)} exited {proc.returncode}:\n{proc.stdout}\n{proc.stderr}"
    return proc


def cli_inproc(*args: str):
    """The same app in this process (fast, for the many filter combinations)."""
    return CliRunner().invoke(app, list(args))


@pytest.fixture(scope="module")
def recording(tmp_path_factory) -> tuple[Path, dict]:
    d = tmp_path_factory.mktemp("cli")
    scenario = d / "scenario.toml"
    scenario.write_text(SCENARIO, encoding="utf-8")
    out = d / "rec.csv.gz"
    proc = cli("simulate", str(scenario), "--out", str(out), "--no-progress")
    truth_path = d / "rec.truth.json"
    assert truth_path.exists(), proc.stdout
    return out, json.loads(truth_path.read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def replayed(recording, tmp_path_factory) -> tuple[Path, str]:
    rec, _ = recording
    db = tmp_path_factory.mktemp("db") / "alarms.db"
    proc = cli("replay", str(rec), "--config", str(CONFIG), "--db", str(db), "--no-progress")
    return db, proc.stdout


@pytest.fixture(scope="module")
def rows(replayed) -> list[dict]:
    db, _ = replayed
    return json.loads(cli("alarms", "--db", str(db), "--format", "json").stdout)


def _data_rows(path: Path) -> list[str]:
    with gzip.open(path, "rt", encoding="utf-8", newline="") as fh:
        return fh.read().splitlines()


# --- replay --------------------------------------------------------------------------------------------------------


def test_replay_summary_matches_recording_and_database(recording, replayed, rows):
    rec, truth = recording
    _, out = replayed
    n_rows = len(_data_rows(rec)) - 1  # minus the header
    m = re.search(r"replayed (\d+) samples, (\d+) frames", out)
    assert m, out
    assert int(m.group(1)) == n_rows
    assert "input:" not in out  # a clean simulated recording has no bad rows
    # the kinds and counts printed after the replay are the episodes in the database
    m = re.search(r"alarms raised: (.*)", out)
    assert m, out
    printed = {} if m.group(1).strip() == "none" else {
        k: int(n) for k, n in (part.rsplit(" ", 1) for part in m.group(1).split(", "))}
    assert printed == dict(Counter(r["check"] for r in rows))
    assert truth["duration_s"] == 150.0


def test_json_rows_are_complete_and_well_formed(rows):
    assert len(rows) >= 2
    states = {s.name.lower() for s in LineState}
    for r in rows:
        assert list(r) == COLUMNS
        # ISO 8601 times with an offset, read back by Python's own parser
        raised = datetime.fromisoformat(r["raised"])
        assert raised.tzinfo is not None
        if r["cleared"]:
            cleared = datetime.fromisoformat(r["cleared"])
            assert cleared.tzinfo is not None
            assert cleared > raised
            assert r["duration_s"] == pytest.approx((cleared - raised).total_seconds(), abs=1e-3)
        else:
            assert r["duration_s"] is None
        assert isinstance(r["check"], str) and r["check"]
        assert isinstance(r["object"], str) and r["object"]
        assert r["level"] in ("warning", "alarm")
        assert r["priority"] in ("low", "medium", "high")
        assert r["line_state"] in states
        assert isinstance(r["limit"], float)
        assert r["value"] is None or isinstance(r["value"], float)
        assert r["run"] == 1
        assert r["config_hash"]
        # the lifecycle state it was left in by the replay (nobody acknowledges in a replay: ANSI/ISA-18.2-2016
        # state B or D, unacknowledged; from memory) and the rationalization configured for it
        assert r["state"] == ("unack" if r["cleared"] is None else "rtn_unack")
        assert r["cause"] and r["corrective_action"] and r["response_time"] > 0


def test_stale_alarm_matches_the_simulated_dropout(recording, rows):
    _, truth = recording
    (fault,) = [f for f in truth["faults"] if f["kind"] == "tag_dropout"]
    assert fault["target"] == DROPOUT_TAG
    start, end = fault["start_epoch"], fault["end_epoch"]
    stale = [r for r in rows if r["check"] == "tag_stale" and r["object"] == DROPOUT_TAG]
    assert len(stale) == 1, rows
    (r,) = stale
    raised = datetime.fromisoformat(r["raised"]).timestamp()
    cleared = datetime.fromisoformat(r["cleared"]).timestamp()
    # raised while the tag was silent; cleared only once samples came back
    assert start < raised < end
    assert cleared > end
    assert r["value"] >= r["limit"]  # a "high" alarm is raised at or above its limit


def test_csv_has_header_and_the_same_rows(replayed, rows):
    db, _ = replayed
    text = cli("alarms", "--db", str(db), "--format", "csv").stdout
    reader = csv.DictReader(io.StringIO(text))
    assert reader.fieldnames == COLUMNS
    got = list(reader)
    assert len(got) == len(rows)
    for c, j in zip(got, rows, strict=True):
        for col in COLUMNS:
            if j[col] is None:
                assert c[col] == ""
            elif isinstance(j[col], float):
                assert float(c[col]) == pytest.approx(j[col], rel=1e-12)
            else:
                assert c[col] == str(j[col])


def test_table_lists_every_alarm(replayed, rows):
    db, _ = replayed
    out = cli("alarms", "--db", str(db), "--format", "table").stdout
    assert f"{len(rows)} alarm(s)" in out
    for r in rows:
        assert r["check"] in out and r["object"] in out


# --- filters -------------------------------------------------------------------------------------------------------


def _listing(db: Path, *args: str) -> list[dict]:
    res = cli_inproc("alarms", "--db", str(db), "--format", "json", *args)
    assert res.exit_code == 0, res.output
    return json.loads(res.output)


def test_filters_select_the_matching_rows(replayed, rows):
    db, _ = replayed
    assert _listing(db) == rows
    for r in rows:
        assert _listing(db, "--check", r["check"]) == [x for x in rows if x["check"] == r["check"]]
        assert _listing(db, "--object", r["object"]) == [x for x in rows if x["object"] == r["object"]]
        assert _listing(db, "--priority", r["priority"]) == [x for x in rows if x["priority"] == r["priority"]]
        assert _listing(db, "--level", r["level"]) == [x for x in rows if x["level"] == r["level"]]
    assert _listing(db, "--run", "1") == rows
    assert cli_inproc("alarms", "--db", str(db), "--run", "2").exit_code == 2  # no such run: said so, not []
    quiet = sorted(set(CHECK_KINDS) - {r["check"] for r in rows})  # kinds spanwatch knows that raised nothing here
    assert quiet and _listing(db, "--check", quiet[0]) == []
    assert _listing(db, "--active") == [x for x in rows if not x["cleared"]]


def test_since_until_filters_in_any_offset(replayed, rows):
    db, _ = replayed
    # a cut between the first and the last raise, written in another offset than the stored UTC times
    t_first = datetime.fromisoformat(rows[0]["raised"])
    t_last = datetime.fromisoformat(rows[-1]["raised"])
    assert t_last > t_first
    cut = t_first + (t_last - t_first) / 2
    cut_text = cut.astimezone(timezone(-timedelta(hours=5, minutes=30))).isoformat()
    before = [x for x in rows if datetime.fromisoformat(x["raised"]) < cut]
    # --since selects every alarm still active at or after it: raised after it, or cleared after it
    after = [x for x in rows if not x["cleared"] or datetime.fromisoformat(x["cleared"]) > cut]
    assert before and after
    assert _listing(db, "--until", cut_text) == before
    assert _listing(db, "--since", cut_text) == after
    # until is exclusive: an alarm raised exactly at the cut is active "since" it, not "until" it
    exact = rows[-1]["raised"]
    assert rows[-1] in _listing(db, "--since", exact)
    assert rows[-1] not in _listing(db, "--until", exact)


@pytest.mark.parametrize("args", [["--since", "2026-13-02 05:00"], ["--until", "yesterday"],
                                  ["--format", "xml"], ["--check", "no_such_check"], ["--priority", "critical"],
                                  ["--level", "alarms"]])
def test_bad_filter_arguments_exit_2(replayed, args):
    db, _ = replayed
    res = cli_inproc("alarms", "--db", str(db), *args)
    assert res.exit_code == 2


def test_missing_database_exits_2(tmp_path):
    assert cli_inproc("alarms", "--db", str(tmp_path / "nope.db")).exit_code == 2


# --- bad input -----------------------------------------------------------------------------------------------------


def _input_lines(out: str) -> dict[tuple[str, str], tuple[int, list[int]]]:
    """Parse 'input: TAG: N x REASON (lines a, b)' lines of the replay output."""
    got = {}
    for line in out.splitlines():
        m = re.match(r"input: (\S+): (\d+) x (.+?)(?: \(lines ([\d, ]+)\))?$", line.strip())
        if m:
            refs = [int(x) for x in m.group(4).split(", ")] if m.group(4) else []
            got[(m.group(1), m.group(3))] = (int(m.group(2)), refs)
    return got


def test_bad_rows_replay_and_are_reported_by_line(recording, tmp_path):
    rec, _ = recording
    lines = _data_rows(rec)
    header, data = lines[0], lines[1:]

    def row_of(tag: str, after: int) -> int:
        return next(i for i in range(after, len(data)) if data[i].split(",")[1] == tag)

    stamp = data[3000].split(",")[0]  # an ISO time with offset from the recording
    naive = datetime.fromisoformat(stamp).replace(tzinfo=None).isoformat()
    # (index in data before which to insert, text, expected (tag, reason)); indices refer to the original data
    inserts = [
        (2000, "this is not a row", ("*", "malformed")),
        (2500, f"{stamp},q2.s2.tension", ("*", "malformed")),  # too few columns
        (3000, f"{naive},q2.s2.tension,100,good", ("*", "malformed")),  # time without offset
        (3500, f"{stamp},q2.s2.tension,abc,good", ("*", "malformed")),  # unparsable value
        (4000, f"{stamp},q2.s2.tension,100,excellent", ("*", "malformed")),  # unknown quality word
        (4500, f"{stamp},,100,good", ("*", "malformed")),  # empty tag
        (5000, "", ("*", "malformed")),  # blank line
        (6000, f"{stamp},q2.bogus.tag,1.0,good", ("q2.bogus.tag", "unknown tag")),
        (6100, f"{stamp},q2.bogus.tag,1.0,good", ("q2.bogus.tag", "unknown tag")),
        (9000, f"{stamp},q2.bogus.tag,1.0,good", ("q2.bogus.tag", "unknown tag")),
    ]
    # out of order: an old q2.s5.tension row again, much later in the file
    old = row_of("q2.s5.tension", 1000)
    inserts.append((20_000, data[old], ("q2.s5.tension", "out of order")))
    # duplicate: a q2.pull_1.speed row repeated right after itself
    dup = row_of("q2.pull_1.speed", 30_000)
    inserts.append((dup + 1, data[dup], ("q2.pull_1.speed", "duplicate timestamp")))
    # non-finite values: two q2.s8.tension rows get nan and inf (same time, so still in order)
    nonfinite = [row_of("q2.s8.tension", 40_000), row_of("q2.s8.tension", 50_000)]
    for i, word in zip(nonfinite, ["nan", "inf"], strict=True):
        t, tag, _, q = data[i].split(",")
        data[i] = f"{t},{tag},{word},{q}"

    # build the file, remembering the line number (header is line 1) of every injected row
    at: dict[int, list[tuple[str, tuple[str, str]]]] = {}
    for idx, txt, why in inserts:
        at.setdefault(idx, []).append((txt, why))
    out_lines = [header]
    want: dict[tuple[str, str], list[int]] = {}
    modified_line: dict[int, int] = {}
    for i, row in enumerate(data):
        for txt, why in at.get(i, []):
            out_lines.append(txt)
            want.setdefault(why, []).append(len(out_lines))
        out_lines.append(row)
        if i in nonfinite:
            modified_line[i] = len(out_lines)
    nf_lines = [modified_line[i] for i in nonfinite]
    bad = tmp_path / "bad.csv.gz"
    with gzip.open(bad, "wt", encoding="utf-8", newline="") as fh:
        fh.write("\n".join(out_lines) + "\n")

    db = tmp_path / "bad.db"
    proc = cli("replay", str(bad), "--config", str(CONFIG), "--db", str(db), "--no-progress")  # must not crash
    got = _input_lines(proc.stdout)

    count, refs = got[("*", "malformed")]
    assert count == len(want[("*", "malformed")]) == 7
    assert sorted(refs) == want[("*", "malformed")]
    count, refs = got[("q2.bogus.tag", "unknown tag")]
    assert count == 3
    assert refs == want[("q2.bogus.tag", "unknown tag")][:1]  # reported once, at its first line
    assert got[("q2.s5.tension", "out of order")] == (1, want[("q2.s5.tension", "out of order")])
    assert got[("q2.pull_1.speed", "duplicate timestamp")] == (1, want[("q2.pull_1.speed", "duplicate timestamp")])
    assert got[("*", "non-finite value")] == (2, nf_lines)
    assert got[("q2.s8.tension", "bad quality")] == (2, nf_lines)  # NaN/inf enter as bad-quality samples
    assert set(got) == {("*", "malformed"), ("q2.bogus.tag", "unknown tag"), ("q2.s5.tension", "out of order"),
                        ("q2.pull_1.speed", "duplicate timestamp"), ("*", "non-finite value"),
                        ("q2.s8.tension", "bad quality")}, proc.stdout

    # every original row was still replayed (the two non-finite ones as bad-quality samples); whether the refused
    # out-of-order and duplicate copies count as "replayed" is left open
    m = re.search(r"replayed (\d+) samples", proc.stdout)
    assert m and int(m.group(1)) in (len(data), len(data) + 2)
    # and the history is still readable
    assert cli_inproc("alarms", "--db", str(db), "--format", "json").exit_code == 0
