"""``check-config`` prints the effective limits of every alarm point: the check's defaults, the ``[checks.KIND]``
table and the per-object overrides applied, in 80 columns.

The expected numbers are the ones the test writes into the config (and the example line's file), not the
code's: a warning at 0.8 of capacity written for pull_2, an on-delay of 3 s written for pull_1, a slip
alarm written as "4 %"; ISA-18.2 asks for limit, deadband, delays and priority of every alarm in the master
alarm database (ANSI/ISA-18.2-2016, clause on the master alarm database; from memory).
"""

from __future__ import annotations

from pathlib import Path

from spanwatch.monitor.checkset import alarm_points, build_checks
from spanwatch.monitor.cli import app
from spanwatch.monitor.line import load_line
from typer.testing import CliRunner

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = ROOT / "config" / "quillmere-q2.toml"


def _limits(out: str) -> list[str]:
    lines = out.splitlines()
    start = next(i for i, ln in enumerate(lines) if ln.startswith("Effective alarm limits:"))
    end = next((i for i in range(start + 1, len(lines)) if lines[i].startswith(("WARNING", "spanwatch is"))),
               len(lines))
    return lines[start:end]


def test_every_alarm_point_with_its_effective_settings_in_80_columns(tmp_path):
    cfg = tmp_path / "line.toml"
    cfg.write_text(f'''extends = "{EXAMPLE}"

[checks.traction.overrides.pull_1]
on_delay = "3 s"

[checks.slip]
alarm = "4 %"
''', encoding="utf-8")
    r = CliRunner().invoke(app, ["check-config", str(cfg)])
    assert r.exit_code == 0, r.output
    block = _limits(r.stdout)
    assert all(len(ln) <= 80 for ln in block), [ln for ln in block if len(ln) > 80]
    line = load_line(cfg)
    points = alarm_points(line, build_checks(line))
    assert block[0].startswith(f"Effective alarm limits: {len(points)} alarm point(s)")
    kind, name = "", ""
    seen: dict[tuple[str, str, str], list[str]] = {}
    for ln in block[2:]:
        if not ln.startswith("  "):
            kind = ln.split(":")[0]
            continue
        obj, level = ln[2:24].strip(), ln[25:32].strip()
        if not level:  # an object name too long for its column, on a line of its own
            name = ln.strip()
            continue
        seen[(kind, obj or name, level)] = ln[33:].split()
    assert len(seen) == len(points)  # one line per point
    assert set(seen) == {(p.kind, p.object_id, p.level) for p in points}
    # the example file: traction warning 0.85, alarm 0.95, off-delay 5 s, priority high (alarm); pull_2's own 0.8
    assert seen[("traction", "pull_2", "warning")][:2] == [">=", "0.8"]
    assert seen[("traction", "pull_1", "alarm")][:2] == [">=", "0.95"]
    # this test's file: pull_1's on-delay 3 s, the slip alarm at 4 %
    assert seen[("traction", "pull_1", "warning")][-3:-1] == ["3", "5"]
    assert seen[("traction", "pull_2", "warning")][-3:-1] == ["1", "5"]
    assert seen[("slip", "pull_1", "alarm")][:4] == ["|x|", ">=", "4", "%"]
    assert ("tag_stale", "q2.s5.tension", "alarm") in seen
