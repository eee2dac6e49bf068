"""Line configuration: the example files validate; broken files fail with exit code 2 and a message that
names the file and the key path; ``spanwatch check-config`` prints each driven roller's capacity."""

from __future__ import annotations

import math
import re
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest
from spanwatch.monitor.checkset import alarm_points, build_checks
from spanwatch.monitor.cli import app
from spanwatch.monitor.config import ConfigError, key_path, load_config
from spanwatch.monitor.line import load_line
from typer.testing import CliRunner

REPO = Path(__file__).resolve().parents[1]
EXAMPLES = sorted((REPO / "config").glob("*.toml"))


def run_cli(*args):
    return CliRunner().invoke(app, [*map(str, args)])


def flat(text):
    """Output with all whitespace runs collapsed (rich may wrap long lines)."""
    return " ".join(text.split())


def replace_once(text, old, new):
    assert text.count(old) == 1, f"the example config changed: {old!r} is not there exactly once"
    return text.replace(old, new)


# --- the example configs -------------------------------------------------------------------


def test_there_are_example_configs():
    assert EXAMPLES, "no config/*.toml"


@pytest.mark.parametrize("path", EXAMPLES, ids=[p.name for p in EXAMPLES])
def test_example_config_validates(path):
    line = load_line(path)
    checks = build_checks(line)
    assert checks
    assert alarm_points(line, checks)
    result = run_cli("check-config", path)
    assert result.exit_code == 0, result.output


@pytest.mark.parametrize("path", EXAMPLES, ids=[p.name for p in EXAMPLES])
def test_check_config_prints_standstill_and_top_speed_for_each_driven_roller(path):
    line = load_line(path)
    out = run_cli("check-config", path).stdout
    lines = out.splitlines()
    assert line.driven_rollers
    for el in line.driven_rollers:
        i = next((k for k, s in enumerate(lines) if f"{el.id}:" in s), None)
        assert i is not None, f"driven roller {el.id} not in the capacity table:\n{out}"
        assert "standstill" in lines[i]
        assert "top speed" in lines[i + 1]


def _cells(row):
    return [c.strip() for c in row.split("│")[1:-1]]


def test_check_config_standstill_capacity_matches_capstan_equation():
    # Independent: read the example with tomllib, apply Euler–Eytelwein exp(mu theta) and the safety factor.
    path = REPO / "config" / "quillmere-q2.toml"
    raw = tomllib.loads(path.read_text())
    out = run_cli("check-config", path).stdout.splitlines()
    driven = [r for r in raw["rollers"] if r.get("driven")]
    assert driven
    for r in driven:
        value, unit = r["wrap"].split()
        assert unit == "deg"
        theta = math.radians(float(value))
        mu, sf = float(r["cof"]), float(r.get("safety_factor", 1.5))
        row = _cells(next(s for s in out if f"{r['id']}:" in s))
        assert row[1] == "standstill"
        assert float(row[2]) == pytest.approx(mu, abs=5e-4)  # no air film at standstill
        assert float(row[4]) == pytest.approx(math.exp(mu * theta), abs=0.006)
        assert float(row[5]) == pytest.approx(math.exp(mu * theta / sf), abs=0.006)
        # share of safe capacity = ln(demanded ratio) / (mu theta) * SF, with the ratio as printed
        demanded = float(row[6])
        assert float(row[7]) == pytest.approx(math.log(demanded) / (mu * theta) * sf, abs=0.01)


def test_check_config_real_entry_point_happy_path():
    example = str(REPO / "config" / "quillmere-q2.toml")
    proc = subprocess.run([sys.executable, "-m", "spanwatch", "check-config", example],
                          capture_output=True, text=True, cwd=REPO, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.count("standstill") == len(load_line(REPO / "config" / "quillmere-q2.toml").driven_rollers)


# --- broken configs ----------------------------------------------------------------------------
# Each case edits a copy of the example. Expected: exit code 2, and the message names the file and
# every listed key path.

PULL_1_WRAP = 'wrap = "180 deg"\ncof = 0.6'
S5_TAG = 'tension_tag = "q2.s5.tension"\nsetpoint = "1.0 pli"\n'
S5_UNIT = '[tags."q2.s5.tension"]\nunit = "N"'


def _typo(t):
    return replace_once(t, PULL_1_WRAP, 'wrapp = "180 deg"\ncof = 0.6')


def _reversed_range(t):
    pattern = r'(\[tags\."q2\.line\.speed_ref"\]\nunit = "m/min"\nrange = )\[(-?[\d.]+), (-?[\d.]+)\]'
    out, count = re.subn(pattern, r"\1[\3, \2]", t, count=1)
    assert count == 1, "the example config changed: no range on q2.line.speed_ref"
    return out


BROKEN = {
    "typo_key": (_typo, ["rollers[2].wrapp"]),
    "wrong_unit": (lambda t: replace_once(t, PULL_1_WRAP, 'wrap = "180 kg"\ncof = 0.6'), ["rollers[2].wrap"]),
    "bare_number": (lambda t: replace_once(t, PULL_1_WRAP, "wrap = 180\ncof = 0.6"), ["rollers[2].wrap"]),
    # A bare number written as a string is still a bare number: "3" must not be read as 3 rad.
    "bare_number_in_string": (lambda t: replace_once(t, PULL_1_WRAP, 'wrap = "3"\ncof = 0.6'), ["rollers[2].wrap"]),
    "wrap_over_two_turns": (lambda t: replace_once(t, PULL_1_WRAP, 'wrap = "900 deg"\ncof = 0.6'),
                            ["rollers[2].wrap"]),
    "negative_diameter": (lambda t: replace_once(t, 'id = "pull_1"\ndiameter = "200 mm"',
                                                 'id = "pull_1"\ndiameter = "-200 mm"'), ["rollers[2].diameter"]),
    "span_names_missing_roller": (lambda t: replace_once(t, 'from = "pull_1"\nto = "idler_3"',
                                                         'from = "pull_1"\nto = "idler_9"'), ["spans[3].to"]),
    "driven_roller_without_tension_tag": (lambda t: replace_once(t, S5_TAG, ""),
                                          ["rollers[2].driven", "rollers[5].driven"]),
    "tagged_span_without_setpoint": (lambda t: replace_once(t, S5_TAG, 'tension_tag = "q2.s5.tension"\n'),
                                     ["spans[4]"]),
    "unknown_check": (lambda t: t + "\n[checks.tracton]\nwarning = 0.5\n", ["checks.tracton"]),
    "override_for_missing_object": (lambda t: t + "\n[checks.traction.overrides.pull_9]\nwarning = 0.5\n",
                                    ["checks.traction.overrides.pull_9"]),
    "max_diameter_below_core": (lambda t: replace_once(t, 'max_diameter = "700 mm"', 'max_diameter = "70 mm"'),
                                ["winders[1]", "max_diameter"]),
    "max_diameter_equals_core": (lambda t: replace_once(t, 'max_diameter = "700 mm"', 'max_diameter = "3 in"'),
                                 ["winders[1]", "max_diameter"]),
    "tag_unit_of_wrong_kind": (lambda t: replace_once(t, S5_UNIT, '[tags."q2.s5.tension"]\nunit = "m/min"'),
                               ["spans[4].tension_tag"]),
    "tag_unit_not_usable": (lambda t: replace_once(t, S5_UNIT, '[tags."q2.s5.tension"]\nunit = "kg"'),
                            ['tags."q2.s5.tension".unit']),
    "undefined_tag": (lambda t: replace_once(t, 'speed_tag = "q2.line.speed_ref"', 'speed_tag = "q2.line.speed_rfe"'),
                      ["line.speed_tag", "[tags]"]),
    "range_low_above_high": (_reversed_range, ['tags."q2.line.speed_ref"']),
    "missing_required_key": (lambda t: replace_once(t, 'caliper = "1.2 mil"\n', ""), ["material.caliper"]),
    "duplicate_roller_id": (lambda t: replace_once(t, 'id = "idler_2"', 'id = "idler_1"'), ["rollers[1].id"]),
    "safety_factor_below_one": (lambda t: replace_once(t, 'speed_tag = "q2.pull_1.speed"\nsafety_factor = 1.5',
                                                       'speed_tag = "q2.pull_1.speed"\nsafety_factor = 0.8'),
                                ["rollers[2].safety_factor"]),
}


@pytest.fixture
def example_text(example_config_path):
    return example_config_path.read_text(encoding="utf-8")


@pytest.mark.parametrize("case", sorted(BROKEN))
def test_broken_config_exits_2_naming_file_and_key(case, example_text, tmp_path):
    edit, keys = BROKEN[case]
    path = tmp_path / f"{case}.toml"
    path.write_text(edit(example_text), encoding="utf-8")
    result = run_cli("check-config", path)
    message = flat(result.stderr)
    assert result.exit_code == 2, f"exit {result.exit_code}; stdout: {result.stdout[:300]!r}"
    assert str(path) in message
    for key in keys:
        assert key in message, f"{key!r} not in {message!r}"


def test_toml_syntax_error_names_file_and_line(example_text, tmp_path):
    broken = replace_once(example_text, PULL_1_WRAP, 'wrap = "180 deg\ncof = 0.6')  # unterminated string
    lineno = broken.splitlines().index('wrap = "180 deg') + 1
    path = tmp_path / "syntax.toml"
    path.write_text(broken, encoding="utf-8")
    result = run_cli("check-config", path)
    message = flat(result.stderr)
    assert result.exit_code == 2
    assert str(path) in message
    assert "TOML" in message
    assert re.search(rf"\bline {lineno}\b", message), message


def test_missing_file_exits_2(tmp_path):
    path = tmp_path / "nowhere.toml"
    result = run_cli("check-config", path)
    assert result.exit_code == 2
    assert str(path) in flat(result.stderr)


@pytest.mark.parametrize("case", ["typo_key", "toml_syntax"])
def test_broken_config_real_entry_point(case, example_text, tmp_path):
    text = _typo(example_text) if case == "typo_key" else example_text.replace("[line]", "[line", 1)
    path = tmp_path / f"{case}.toml"
    path.write_text(text, encoding="utf-8")
    proc = subprocess.run([sys.executable, "-m", "spanwatch", "check-config", str(path)],
                          capture_output=True, text=True, cwd=REPO, timeout=120)
    assert proc.returncode == 2
    message = flat(proc.stderr)
    assert str(path) in message
    if case == "typo_key":
        assert "rollers[2].wrapp" in message


def test_config_error_carries_key_paths(example_text, tmp_path):
    path = tmp_path / "typo.toml"
    path.write_text(_typo(example_text), encoding="utf-8")
    with pytest.raises(ConfigError) as info:
        load_config(path)
    keys = [k for k, _ in info.value.problems]
    assert "rollers[2].wrapp" in keys
    assert info.value.file == str(path)


@pytest.mark.parametrize(("loc", "expected"), [
    (("rollers", 2, "wrap"), "rollers[2].wrap"),
    (("tags", "q2.s5.tension", "unit"), 'tags."q2.s5.tension".unit'),
    (("checks", "traction", "overrides", "pull_2", "warning"), "checks.traction.overrides.pull_2.warning"),
])
def test_key_path(loc, expected):
    assert key_path(loc) == expected
