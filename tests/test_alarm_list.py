"""``spanwatch alarm-list``: the master alarm database of a line (every alarm point, its settings, its rationalization).

What a master alarm database must hold per alarm (limit, priority, deadband, delays, cause, consequence, corrective
action, time to respond): ANSI/ISA-18.2-2016, clauses on the master alarm database and rationalization; from memory.
Checked on the example line files that ship in config/ (spanwatch.examples): every alarm point once, every table
line within an 80-column terminal, CSV read back with the csv module and JSON with json, limits and units as
alarm_points resolves them, and the values the example file's ``[checks]`` table writes by hand.
"""

from __future__ import annotations

import csv
import io
import json
import re
from pathlib import Path

import pytest
from spanwatch.monitor.alarmlist import COLUMNS
from spanwatch.monitor.checkset import alarm_points, build_checks
from spanwatch.monitor.cli import app
from spanwatch.monitor.line import load_line
from typer.testing import CliRunner

REPO = Path(__file__).resolve().parents[1]
LINE_FILES = sorted((REPO / "config").glob("*.toml"))  # the line files; scenarios live in config/scenarios
runner = CliRunner()


def listing(path: Path, *args: str) -> str:
    res = runner.invoke(app, ["alarm-list", "--config", str(path), *args])
    assert res.exit_code == 0, res.output
    return res.stdout


def points_of(path: Path) -> list:
    line = load_line(path)
    return alarm_points(line, build_checks(line))


def test_the_example_line_files_are_there():
    assert {p.name for p in LINE_FILES} >= {"quillmere-q2.toml", "quillmere-q2-mqtt.toml", "quillmere-q2-opcua.toml"}


@pytest.mark.parametrize("path", LINE_FILES, ids=lambda p: p.name)
def test_table_fits_80_columns_and_lists_every_point_once(path):
    pts = points_of(path)
    out = listing(path)
    lines = out.splitlines()
    too_wide = [ln for ln in lines if len(ln) > 80]
    assert not too_wide, too_wide
    assert f"{len(pts)} alarm point(s)" in out
    # one row per point under its kind's heading: "  <object> <level> <priority> ..."
    kind = None
    wrapped = ""
    seen: list[str] = []
    for ln in lines:
        m = re.match(r"== (\S+) \((\d+)\)", ln)
        if m:
            kind = m.group(1)
            continue
        m = re.match(r"  (\S+)\s+(warning|alarm)\s+(advisory|low|medium|high|urgent)\s", ln)
        if m and kind is not None:
            seen.append(f"{kind}:{m.group(1)}:{m.group(2)}")
            continue
        m = re.match(r"  (\S+)$", ln)  # an object too long for its column: the row goes on below it
        if m and kind is not None:
            wrapped = m.group(1)
            continue
        m = re.match(r" {20,}(warning|alarm)\s+(advisory|low|medium|high|urgent)\s", ln)
        if m and kind is not None:
            seen.append(f"{kind}:{wrapped}:{m.group(1)}")
    assert sorted(seen) == sorted(p.key for p in pts)
    assert len(set(seen)) == len(seen)
    # the rationalization is printed once per check kind where every point of the kind shares it
    texts = {(q.kind, q.cause, q.consequence, q.action, q.response_time) for q in pts}
    assert out.count("Response time:") == out.count("Corrective action:") == len(texts)


@pytest.mark.parametrize("path", LINE_FILES, ids=lambda p: p.name)
def test_csv_and_json_agree_with_alarm_points(path):
    pts = {p.key: p for p in points_of(path)}
    rows = list(csv.DictReader(io.StringIO(listing(path, "--format", "csv"))))
    doc = json.loads(listing(path, "--format", "json"))
    assert [r["key"] for r in rows] == list(pts) == [r["key"] for r in doc]
    assert set(doc[0]) >= set(COLUMNS) and set(rows[0]) >= set(COLUMNS)
    for r, j in zip(rows, doc, strict=True):
        p = pts[r["key"]]
        assert float(r["limit"]) == p.limit == j["limit"]
        assert r["unit"] == p.unit == j["unit"]
        assert (r["direction"], r["priority"], r["level"]) == (p.direction, p.priority, p.level)
        assert float(r["deadband"]) == p.deadband == j["deadband"]
        assert float(r["on_delay_s"]) == p.on_delay and float(r["off_delay_s"]) == p.off_delay
        assert float(r["response_time_s"]) == p.response_time == j["response_time_s"]
        assert (r["cause"], r["consequence"], r["action"]) == (p.cause, p.consequence, p.action)


def test_values_written_in_the_example_file_come_through():
    """Values typed by hand in config/quillmere-q2.toml ``[checks]``: traction warning 0.85, pull_2 override 0.8,
    on_delay "1 s", off_delay "5 s"; runout warning "5 %" (a fraction 0.05 shown as 5 %); roll_diameter alarm 2.0
    tolerance bands."""
    path = REPO / "config" / "quillmere-q2.toml"
    doc = {r["key"]: r for r in json.loads(listing(path, "--format", "json"))}
    assert doc["traction:pull_1:warning"]["limit"] == 0.85
    assert doc["traction:pull_2:warning"]["limit"] == 0.8
    assert doc["traction:pull_2:alarm"]["limit"] == 0.95
    assert (doc["traction:pull_1:alarm"]["on_delay_s"], doc["traction:pull_1:alarm"]["off_delay_s"]) == (1.0, 5.0)
    assert doc["traction:pull_1:alarm"]["cause"].startswith("Tension ratio across a pull roll")
    assert doc["runout:unwind:warning"]["limit"] == pytest.approx(0.05)
    assert doc["roll_diameter:rewind:alarm"]["limit"] == 2.0

    table = listing(path, "--check", "runout").splitlines()
    row = next(ln for ln in table if re.match(r"  unwind\s+warning", ln))
    assert re.search(r"\s5 %\s", row)  # 0.05 of mean tension, read as 5 %
    table = listing(path, "--check", "roll_diameter").splitlines()
    row = next(ln for ln in table if re.match(r"  rewind\s+alarm", ln))
    assert "2 x band" in row


def test_check_filter_and_bad_options():
    path = REPO / "config" / "quillmere-q2.toml"
    doc = json.loads(listing(path, "--format", "json", "--check", "traction"))
    assert {r["key"] for r in doc} == {"traction:pull_1:warning", "traction:pull_1:alarm", "traction:pull_2:warning",
                                       "traction:pull_2:alarm"}
    bad = runner.invoke(app, ["alarm-list", "--config", str(path), "--check", "slp"])
    assert bad.exit_code == 2 and "did you mean slip" in bad.output
    bad = runner.invoke(app, ["alarm-list", "--config", str(path), "--format", "xml"])
    assert bad.exit_code == 2
    missing = runner.invoke(app, ["alarm-list", "--config", str(REPO / "config" / "no-such-line.toml")])
    assert missing.exit_code == 2


def test_rationalization_differing_within_a_kind_is_shown_per_point():
    """Two texts for one kind (a config may one day set them per object): each printed once, naming its points;
    a long object name goes on a line of its own, so nothing passes 80 columns."""
    from dataclasses import replace

    from spanwatch.monitor.alarmlist import table

    pts = [p for p in points_of(REPO / "config" / "quillmere-q2.toml") if p.kind == "traction"]
    pts = [replace(p, cause="Pull roll 2 has a worn sleeve that lost its grip on the web.")
           if p.object_id == "pull_2" else p for p in pts]
    pts.append(replace(pts[0], object_id="q2.a_very_long_object_name_for_a_roller.in.the.coating.section"))
    lines = table(pts, "title")
    assert all(len(ln) <= 80 for ln in lines), [ln for ln in lines if len(ln) > 80]
    text = "\n".join(lines)
    assert text.count("worn sleeve") == 1
    assert text.count("Tension ratio across a pull roll") == 1
    assert "for pull_2 warning, pull_2 alarm:" in text
    assert "  q2.a_very_long_object_name_for_a_roller.in.the.coating.section" in lines


def test_the_alarm_list_kept_in_the_history_is_the_one_in_force(tmp_path):
    """A replay keeps its configuration's alarm list; `alarm-list --db --line` shows it as it was, even after the
    file changed (what a rationalization review compares against)."""
    import shutil

    from spanwatch.connectors.history import History, sqlite_url
    from spanwatch.monitor.exposure import remember_config
    from spanwatch.monitor.pipeline import Pipeline

    cfg = tmp_path / "line.toml"
    shutil.copy(REPO / "config" / "quillmere-q2.toml", cfg)
    line = load_line(cfg)
    db = tmp_path / "h.db"
    h = History(sqlite_url(str(db)))
    h.start_run(mode="replay", line_name=line.name, config_file=str(cfg), config_hash=line.config_hash)
    remember_config(h, line, Pipeline(line, None).points)
    h.finish_run(input_rows=[])
    h.close()
    before = json.loads(listing(cfg, "--format", "json"))
    # the file changes afterwards: the kept list still gives the old limits
    cfg.write_text(cfg.read_text(encoding="utf-8").replace("warning = 0.85 ", "warning = 0.7 ", 1),
                   encoding="utf-8")
    assert json.loads(listing(cfg, "--format", "json")) != before
    r = CliRunner().invoke(app, ["alarm-list", "--db", str(db), "--line", line.name, "--format", "json"])
    assert r.exit_code == 0, r.output
    assert json.loads(r.output) == before
    r = CliRunner().invoke(app, ["alarm-list", "--db", str(db), "--line", line.name, "--at", "2000-01-01T00:00:00Z"])
    assert r.exit_code == 2
