"""Line configuration: the example files validate; broken files fail with exit code 2 and a message that
names the file and the key path; ``spanwatch check-config`` prints each driven roller's capacity."""

from __future__ import annotations

import math
import os
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
    # one capacity row at standstill per driven roller (the row starts "<roller>: wrap ...")
    rows = [ln for ln in proc.stdout.splitlines() if "standstill" in ln and ": wrap " in ln]
    assert len(rows) == len(load_line(REPO / "config" / "quillmere-q2.toml").driven_rollers)


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


# Values that would silently switch a check off (NaN compares false with every limit; a negative accuracy
# would be taken as its absolute value; a warning beyond its alarm never warns first), and absurd magnitudes
# (a width of 1e-300 mm, a frame rate that allocates gigabytes). Each quantity field has a plausible range,
# stated with its reason in monitor/config.py.
S2_ACC = 'accuracy = 4.0                     # N, load-cell pair after calibration'
UNWIND_FROZEN = 'frozen_after = "60 s"\nfrozen_tolerance = 0.0'
TRACTION = 'warning = 0.85                     # share of the capacity at this speed (1.0: slip)\nalarm = 0.95'
S2 = 'tags."q2.s2.tension"'


def _set(old, new):
    return lambda t: replace_once(t, old, new)


BAD_VALUES = {
    "accuracy_nan": (_set(S2_ACC, "accuracy = nan"), [f"{S2}.accuracy"]),
    "accuracy_negative": (_set(S2_ACC, "accuracy = -4.0"), [f"{S2}.accuracy"]),
    "accuracy_infinite": (_set(S2_ACC, "accuracy = inf"), [f"{S2}.accuracy"]),
    "accuracy_negative_percent": (_set('accuracy = "0.1 %"', 'accuracy = "-0.1 %"'),
                                  ['tags."q2.line.speed_ref".accuracy']),
    "accuracy_nan_percent": (_set('accuracy = "0.1 %"', 'accuracy = "nan %"'), ['tags."q2.line.speed_ref".accuracy']),
    "frozen_tolerance_nan": (_set(UNWIND_FROZEN, 'frozen_after = "60 s"\nfrozen_tolerance = nan'),
                             ['tags."q2.unwind.diameter".frozen_tolerance']),
    "frozen_tolerance_negative": (_set(UNWIND_FROZEN, 'frozen_after = "60 s"\nfrozen_tolerance = -1.0'),
                                  ['tags."q2.unwind.diameter".frozen_tolerance']),
    "width_1e-300_mm": (_set('width = "1300 mm"', 'width = "1e-300 mm"'), ["material.width"]),
    "width_a_kilometre": (_set('width = "1300 mm"', 'width = "1 km"'), ["material.width"]),
    "caliper_a_metre": (_set('caliper = "1.2 mil"', 'caliper = "1 m"'), ["material.caliper"]),
    "modulus_1e-300_pa": (_set('modulus = "2.2 GPa"', 'modulus = "1e-300 Pa"'), ["material.modulus"]),
    "roller_diameter_a_micrometre": (_set('id = "pull_1"\ndiameter = "200 mm"', 'id = "pull_1"\ndiameter = "1 um"'),
                                     ["rollers[2].diameter"]),
    "cof_a_million": (_set(PULL_1_WRAP, 'wrap = "180 deg"\ncof = 1e6'), ["rollers[2].cof"]),
    "span_length_1e300_m": (_set('length = "2.5 m"', 'length = "1e300 m"'), ["spans[4].length"]),
    "setpoint_nan": (_set('setpoint = "1.0 pli"', 'setpoint = "nan pli"'), ["spans[4].setpoint"]),
    "frame_rate_a_megahertz": (_set('frame_rate = "50 Hz"', 'frame_rate = "1 MHz"'), ["line.frame_rate"]),
    "frame_rate_a_millihertz": (_set('frame_rate = "50 Hz"', 'frame_rate = "0.001 Hz"'), ["line.frame_rate"]),
    "sample_period_a_picosecond": (_set('sample_period = "100 ms"', 'sample_period = "1 ps"'),
                                   ['tags."q2.rewind.core_change".sample_period']),
    "sample_period_a_century": (_set('sample_period = "100 ms"', 'sample_period = "100 year"'),
                                ['tags."q2.rewind.core_change".sample_period']),
    "stale_after_below_one_period": (_set("stale_after = 20", "stale_after = 0.1"),
                                     ['tags."q2.rewind.core_change".stale_after']),
    "air_temperature_absurd": (_set('air_temperature = "22 degC"', 'air_temperature = "1e6 K"'),
                               ["line.air_temperature"]),
    "draw_nan": (_set('draw = "0.1064 %"', 'draw = nan'), ["rollers[5].draw"]),
    "fraction_nan": (_set("air_traction_floor = 0.0", "air_traction_floor = nan"), ["line.air_traction_floor"]),
    "stack_factor_huge": (_set("stack_factor = 1.04", "stack_factor = 1e6"), ["material.stack_factor"]),
    "warning_nan": (_set(TRACTION, "warning = nan\nalarm = 1.0"), ["checks.traction.warning"]),
    "alarm_infinite": (_set(TRACTION, "warning = 0.8\nalarm = inf"), ["checks.traction.alarm"]),
    "deadband_negative": (lambda t: t + "\n[checks.slip]\ndeadband = -0.01\n", ["checks.slip.deadband"]),
    "on_delay_a_century": (_set('on_delay = "1 s"', 'on_delay = "100 year"'), ["checks.traction.on_delay"]),
    # direction high (traction): the warning must not be above the alarm
    "warning_above_alarm_high": (_set(TRACTION, "warning = 1.2\nalarm = 1.0"), ["checks.traction.warning"]),
    # an override that puts the warning past the kind's alarm, for one object
    "override_warning_above_alarm": (_set("[checks.traction.overrides.pull_2]\nwarning = 0.8",
                                          "[checks.traction.overrides.pull_2]\nwarning = 1.5"),
                                     ["checks.traction.overrides.pull_2.warning"]),
    # an override of the alarm alone that falls below the kind's warning
    "override_alarm_below_warning": (_set("[checks.traction.overrides.pull_2]\nwarning = 0.8",
                                          "[checks.traction.overrides.pull_2]\nalarm = 0.7"),
                                     ["checks.traction.overrides.pull_2.alarm"]),
    # direction abs (slip): |warning| must not exceed |alarm|
    "warning_beyond_alarm_abs": (lambda t: t + "\n[checks.slip]\nwarning = -0.05\nalarm = 0.02\n",
                                 ["checks.slip.warning"]),
}
BROKEN.update(BAD_VALUES)


# `extends` of things that are not line files: each must give the one-line error, not hang, RecursionError or
# MemoryError. The edit gets the folder of the file, to make what it names there.
def _extends(target):
    def edit(text, folder):
        return f'extends = "{target(folder) if callable(target) else target}"\n'
    return edit


def _fifo(folder):
    os.mkfifo(folder / "fifo.toml")
    return folder / "fifo.toml"


def _huge(folder):
    path = folder / "huge.toml"
    with open(path, "wb") as fh:  # 64 MB of comment: a file no line description needs
        fh.truncate(64 << 20)
    return path


def _chain(n, cyclic=False):
    def make(folder):
        for i in range(n):
            nxt = (0 if cyclic else None) if i == n - 1 else i + 1
            body = f'extends = "chain{nxt}.toml"\n' if nxt is not None else EXAMPLE.read_text(encoding="utf-8")
            (folder / f"chain{i}.toml").write_text(body, encoding="utf-8")
        return folder / "chain0.toml"
    return make


def _deep_tables(folder):
    path = folder / "deep.toml"
    path.write_text(EXAMPLE.read_text(encoding="utf-8") + "\nx = " + "[" * 5000 + "]" * 5000 + "\n", encoding="utf-8")
    return path


def _deep_keys(folder):
    path = folder / "deepkeys.toml"
    path.write_text(EXAMPLE.read_text(encoding="utf-8") + "\n[" + ".".join(["k"] * 5000) + "]\nv = 1\n",
                    encoding="utf-8")
    return path


EXAMPLE = REPO / "config" / "quillmere-q2.toml"
BROKEN_FILES = {
    "extends_dev_zero": (_extends("/dev/zero"), ["extends", "/dev/zero"]),
    "extends_dev_urandom": (_extends("/dev/urandom"), ["extends", "/dev/urandom"]),
    "extends_directory": (_extends(lambda folder: folder), ["extends"]),
    "extends_fifo": (_extends(_fifo), ["extends", "fifo.toml"]),
    "extends_huge_file": (_extends(_huge), ["extends", "huge.toml"]),
    "extends_cycle": (_extends(_chain(3, cyclic=True)), ["extends", "cycle"]),
    "extends_too_deep": (_extends(_chain(12)), ["extends"]),
    "deeply_nested_arrays": (lambda text, folder: text + "\nx = " + "[" * 5000 + "]" * 5000 + "\n", ["nested"]),
    "deeply_nested_keys": (lambda text, folder: text + "\n[" + ".".join(["k"] * 5000) + "]\nv = 1\n", ["nested"]),
    "extends_deeply_nested": (_extends(_deep_tables), ["deep.toml", "nested"]),
    "extends_deeply_nested_keys": (_extends(_deep_keys), ["deepkeys.toml", "nested"]),
}


@pytest.fixture
def example_text(example_config_path):
    return example_config_path.read_text(encoding="utf-8")


@pytest.mark.parametrize("case", sorted(BROKEN) + sorted(BROKEN_FILES))
def test_broken_config_exits_2_naming_file_and_key(case, example_text, tmp_path):
    path = tmp_path / f"{case}.toml"
    if case in BROKEN_FILES:
        edit, keys = BROKEN_FILES[case]
        text = edit(example_text, tmp_path)
    else:
        edit, keys = BROKEN[case]
        text = edit(example_text)
    path.write_text(text, encoding="utf-8")
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


# The warning comes before its alarm on the way into the abnormal region (ANSI/ISA-18.2-2016: a pre-alarm
# warns earlier than the alarm it precedes; from memory). No check kind of the catalog has direction "low" yet,
# so the rule is checked here for all three directions on the function the alarm-point resolution uses.
@pytest.mark.parametrize(("direction", "warning", "alarm", "ok"), [
    ("high", 0.8, 1.0, True), ("high", 1.0, 1.0, True), ("high", 1.2, 1.0, False), ("high", -5.0, -2.0, True),
    ("low", 0.3, 0.2, True), ("low", 0.2, 0.2, True), ("low", 0.1, 0.2, False), ("low", -1.0, -2.0, True),
    ("abs", 0.01, 0.02, True), ("abs", -0.02, 0.02, True), ("abs", -0.05, 0.02, False), ("abs", 0.05, -0.02, False),
    ("high", None, 1.0, True),
])
def test_warning_must_come_before_its_alarm(direction, warning, alarm, ok):
    from spanwatch.monitor.checkset import limit_order_problem

    problem = limit_order_problem(direction, warning, alarm)
    assert (problem is None) == ok
    if not ok:
        assert problem.startswith("expected the warning limit") and f"{warning:g}" in problem


def test_all_problems_of_the_limits_are_reported_once_per_table(example_text, tmp_path):
    # the kind-level pair is wrong for both pull rolls: one problem at checks.traction.warning, not two
    text = replace_once(example_text, TRACTION, "warning = 1.2\nalarm = 1.0")
    text = replace_once(text, "[checks.traction.overrides.pull_2]\nwarning = 0.8", "")
    path = tmp_path / "twice.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as info:
        line = load_line(path)
        alarm_points(line, build_checks(line))
    assert [k for k, _ in info.value.problems] == ["checks.traction.warning"]


# --- the draw window, the normal speed and the start-up settle of the traction check --------------------------


@pytest.mark.parametrize(("added", "key", "words"), [
    ('normal_speed = "450 m/min"', "line", "normal_speed at most max_speed"),
    ('draw_window = "601 s"', "line.draw_window", ""),
    ('startup_band = "150 %"', "line.startup_band", ""),
])
def test_new_line_keys_are_checked(example_text, tmp_path, added, key, words):
    text = replace_once(example_text, 'check_window = "2 s"\n', f'check_window = "2 s"\n{added}\n')
    path = tmp_path / "line.toml"
    path.write_text(text, encoding="utf-8")
    result = run_cli("check-config", path)
    message = flat(result.stderr)
    assert result.exit_code == 2, result.stdout[:300]
    assert str(path) in message and key in message and words in message


def test_draw_window_in_frames_is_bounded(example_text, tmp_path):
    # 500 s at 1 kHz is 500 000 frames per signal: more than a window may hold (MAX_WINDOW_FRAMES)
    text = replace_once(example_text, 'frame_rate = "50 Hz"', 'frame_rate = "1000 Hz"')
    text = replace_once(text, 'check_window = "2 s"\n', 'check_window = "2 s"\ndraw_window = "500 s"\n')
    path = tmp_path / "line.toml"
    path.write_text(text, encoding="utf-8")
    result = run_cli("check-config", path)
    assert result.exit_code == 2
    assert "draw_window" in flat(result.stderr)


def test_new_line_keys_reach_the_checks(example_text, tmp_path):
    text = replace_once(example_text, 'check_window = "2 s"\n',
                        'check_window = "2 s"\ndraw_window = "15 s"\nstartup_settle = "12 s"\nstartup_band = "10 %"\n')
    path = tmp_path / "line.toml"
    path.write_text(text, encoding="utf-8")
    s = load_line(path).model.settings
    assert (s.draw_window, s.startup_settle, s.startup_band) == (15.0, 12.0, pytest.approx(0.1))
    draw = next(c for c in build_checks(load_line(path)) if c.kind == "draw")
    assert draw.window_frames == 15 * 50
