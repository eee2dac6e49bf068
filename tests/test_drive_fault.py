"""The drive fault of a driven roller: ``rollers[i].fault_tag``, the ``drive_fault`` check and the suppression by
design of the alarms its fault explains.

Sources: ANSI/ISA-18.2-2016 (designed suppression: an alarm suppressed by logic based on the state of other
equipment, here the roller's drive; from memory). That a drive reports a fault as a non-zero fault bit or fault
word is a convention of drive status words (common practice, no source). The expected alarm keys are written out
by hand from the example line config/quillmere-q2.toml (zones unwind-pull_1, pull_1-pull_2, pull_2-rewind; the
only zone between two driven rollers is pull_1-pull_2, so the only draw check is on it; no web_speed_from, so
both pull rolls have a slip check), not computed by the code under test.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from spanwatch.monitor.checkset import alarm_points, build_checks, suppression_rules
from spanwatch.monitor.config import ConfigError
from spanwatch.monitor.line import load_line
from spanwatch.monitor.pipeline import Pipeline
from spanwatch.monitor.signals import SignalDeriver
from spanwatch.rules.base import QUALITY_BAD, QUALITY_GOOD, Block, LineState, Reason, TagFrames
from spanwatch.rules.catalog import checks_for
from spanwatch.rules.drivefault import DriveFaultCheck
from spanwatch.rules.samples import SampleBatch

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "config" / "quillmere-q2.toml"


def fault_text(rollers: tuple[str, ...] = ("pull_2",), *, on: dict[str, str] | None = None,
               tag_table: bool = True, unit: str = '""') -> str:
    """The example line with a fault tag ``q2.<roller>.fault`` on each of ``rollers`` (after its speed_tag line).

    ``on`` puts a fault_tag line after another roller's ``id`` line instead (roller id -> tag name).
    ``[[rollers]]`` arrays replace rather than merge under ``extends``, so the whole file is written.
    """
    text = EXAMPLE.read_text(encoding="utf-8")

    def once(old: str, new: str) -> str:
        assert text.count(old) == 1, f"the example config changed: {old!r} is not there exactly once"
        return text.replace(old, new)

    for r in rollers:
        text = once(f'speed_tag = "q2.{r}.speed"\n', f'speed_tag = "q2.{r}.speed"\nfault_tag = "q2.{r}.fault"\n')
        if tag_table:
            text += f'\n[tags."q2.{r}.fault"]\nunit = {unit}\nsample_period = "100 ms"\n'
    for r, tag in (on or {}).items():
        text = once(f'id = "{r}"\n', f'id = "{r}"\nfault_tag = "{tag}"\n')
    return text


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "line.toml"
    path.write_text(text, encoding="utf-8")
    return path


# --- config -----------------------------------------------------------------------------


def test_a_fault_tag_gives_the_roller_a_drive_fault_signal_and_check(tmp_path):
    line = load_line(write(tmp_path, fault_text()))
    assert line.model.rollers["pull_2"].has_fault_tag and not line.model.rollers["pull_1"].has_fault_tag
    assert line.signal_tag("drive_fault/pull_2") == "q2.pull_2.fault"
    assert line.signal_tag("drive_fault/pull_1") is None
    assert [c.object_id for c in checks_for(line.model) if c.kind == "drive_fault"] == ["pull_2"]
    # the example line itself has no fault tag, hence no drive-fault check
    assert not [c for c in checks_for(load_line(EXAMPLE).model) if c.kind == "drive_fault"]


@pytest.mark.parametrize(("text", "key", "words"), [
    # idler_3 is rollers[3] of the example and not driven
    (lambda: fault_text((), on={"idler_3": "q2.rewind.core_change"}), "rollers[3].fault_tag",
     ["driven roller", "idler_3"]),
    # pull_2 is rollers[5]; the tag is not under [tags]
    (lambda: fault_text(("pull_2",), tag_table=False), "rollers[5].fault_tag", ["under [tags]", "q2.pull_2.fault"]),
    # a fault bit is dimensionless: a tag in m/min is not one
    (lambda: fault_text((), on={"pull_2": "q2.pull_1.speed"}), "rollers[5].fault_tag", ["flag", "m/min"]),
], ids=["on_an_idler", "unknown_tag", "not_dimensionless"])
def test_a_wrong_fault_tag_is_a_config_error_naming_the_key(text, key, words, tmp_path):
    path = write(tmp_path, text())
    with pytest.raises(ConfigError) as exc:
        load_line(path)
    problems = dict(exc.value.problems)
    assert key in problems, exc.value
    assert str(path) in str(exc.value)
    assert "expected" in problems[key] and all(w in problems[key] for w in words), problems[key]


# --- the check --------------------------------------------------------------------------


def test_the_check_reads_zero_one_and_invalid_on_bad_quality(tmp_path):
    line = load_line(write(tmp_path, fault_text()))
    names = tuple(line.tags)
    k = names.index("q2.pull_2.fault")
    n = 5
    value = np.zeros((n, len(names)))
    value[:, k] = [0.0, 1.0, 1.0, 4.0, 0.0]  # 4: a fault word with bit 2 set is a fault too
    quality = np.full((n, len(names)), QUALITY_GOOD, dtype=np.int8)
    quality[2, k] = QUALITY_BAD
    age = np.zeros((n, len(names)))
    frames = TagFrames(names, value, quality, age)
    signals = SignalDeriver(line, names).derive(frames)
    # the line stands still on every frame: a drive may fault while stopped, so the check is not gated
    block = Block(t=np.arange(n) * 0.02, signals=signals, line_state=np.full(n, int(LineState.STOPPED), np.int8),
                  tags=frames)
    check = next(c for c in checks_for(line.model) if c.kind == "drive_fault")
    res = check.update(block)
    np.testing.assert_array_equal(res.value, [0.0, 1.0, np.nan, 1.0, 0.0])
    assert res.reason.tolist() == [Reason.OK, Reason.OK, Reason.INPUT_BAD, Reason.OK, Reason.OK]


def test_the_check_states_its_alarm():
    d = DriveFaultCheck.defaults
    assert (d.direction, d.unit, d.warning, d.alarm, d.priority, d.on_delay) == ("high", "flag", None, 0.5, "high", 0.0)
    assert DriveFaultCheck.rests_on == "the fault bit is non-zero exactly while the drive is faulted"
    assert "suppressed" in d.action


# --- suppression by design ----------------------------------------------------------------

PULL_2 = {"traction:pull_2:warning", "traction:pull_2:alarm", "no_drive:pull_2:alarm", "slip:pull_2:warning",
          "slip:pull_2:alarm"}
PULL_1 = {"traction:pull_1:warning", "traction:pull_1:alarm", "no_drive:pull_1:alarm", "slip:pull_1:warning",
          "slip:pull_1:alarm"}
DRAW = {"draw:pull_1-pull_2:warning", "draw:pull_1-pull_2:alarm"}  # the one zone between the pull rolls


def _rules(tmp_path: Path, text: str):
    line = load_line(write(tmp_path, text))
    checks = build_checks(line)
    points = alarm_points(line, checks)
    return points, suppression_rules(line, points, checks)


def test_a_drive_fault_suppresses_its_rollers_alarms_and_the_draw_of_its_zones(tmp_path):
    _, rules = _rules(tmp_path, fault_text())
    got = rules.suppressed({"drive_fault:pull_2:alarm"})
    assert set(got) == PULL_2 | DRAW
    assert all(r == "drive of pull_2 faulted (drive_fault:pull_2:alarm active)" for r in got.values()), got


def test_each_drive_fault_suppresses_only_its_own_roller(tmp_path):
    _, rules = _rules(tmp_path, fault_text(("pull_1", "pull_2")))
    assert set(rules.suppressed({"drive_fault:pull_1:alarm"})) == PULL_1 | DRAW
    assert set(rules.suppressed({"drive_fault:pull_2:alarm"})) == PULL_2 | DRAW
    # one drive fault never hides the other drive's fault alarm
    both = rules.suppressed({"drive_fault:pull_1:alarm", "drive_fault:pull_2:alarm"})
    assert set(both) == PULL_1 | PULL_2 | DRAW


def test_a_stale_fault_tag_hides_the_drive_fault_alarm_not_the_physics(tmp_path):
    # the fault tag's plausibility alarms speak for the check that reads it (the tag-over-check rule)
    _, rules = _rules(tmp_path, fault_text())
    got = rules.suppressed({"tag_stale:q2.pull_2.fault:alarm"})
    assert "drive_fault:pull_2:alarm" in got
    assert not (set(got) & (PULL_2 | DRAW))


def test_the_derived_rule_comes_before_a_configured_one(tmp_path):
    extra = ('\n[[alarms.suppress]]\nwhile = "drive_fault:pull_2"\nsuppress = ["traction:pull_2"]\n'
             'reason = "configured"\n')
    _, rules = _rules(tmp_path, fault_text() + extra)
    got = rules.suppressed({"drive_fault:pull_2:alarm"})
    assert got["traction:pull_2:alarm"].startswith("drive of pull_2 faulted")


# --- end to end: the pipeline suppresses the traction alarm while the drive reports a fault -------------------


def _samples(line, fault: float, seconds: float = 15.0) -> SampleBatch:
    """Every tag at 50 Hz with the line at 100 m/min and a tension ratio of 6 across pull_2 (values in tag units).

    pull_2 (COF 0.5, wrap 180 deg, safety factor 1.5) holds at most exp(0.5 pi) = 4.81 without slip (capstan
    equation, Euler-Eytelwein); 100 N upstream and 600 N downstream demand ln 6 / (0.5 pi) = 1.14 of its capacity,
    1.71 of the safe capacity: above the traction alarm limit 1.0 whatever the air film takes off. Every value but
    the fault bit wobbles by 0.1 % so that no tag reads frozen.
    """
    t = np.arange(0.0, seconds, 0.02)
    wobble = 1.0 + 1e-3 * np.where(np.arange(t.size) % 2 == 0, 1.0, -1.0)
    v = 100.0  # m/min
    rpm_4in = v / (np.pi * 0.1016)
    base = {
        "q2.line.speed_ref": v, "q2.pull_1.speed": v, "q2.pull_2.speed": v * 1.001064,
        "q2.idler_3.speed": rpm_4in, "q2.idler_5.speed": rpm_4in,
        "q2.s2.tension": 300.0, "q2.s5.tension": 100.0, "q2.s8.tension": 600.0,
        "q2.unwind.diameter": 500.0, "q2.unwind.rpm": v / (np.pi * 0.5),
        "q2.rewind.diameter": 300.0, "q2.rewind.rpm": v / (np.pi * 0.3),
    }
    names = tuple(line.tags)
    cols = []
    for name in names:
        if name in base:
            cols.append(base[name] * wobble)
        elif name.endswith(".length"):
            cols.append(1000.0 + v / 60.0 * t)
        elif name == "q2.rewind.core_change":
            cols.append(np.zeros(t.size))
        elif name == "q2.pull_2.fault":
            cols.append(np.full(t.size, fault))
        else:
            raise AssertionError(f"no sample for tag {name}")
    k = len(names)
    t0 = 1.77e9
    return SampleBatch(names, np.tile(np.arange(k, dtype=np.int32), t.size), np.repeat(t0 + t, k),
                       np.stack(cols, axis=1).ravel(), np.zeros(t.size * k, np.int8), np.full(t.size * k, -1, np.int64))


@pytest.mark.parametrize("fault", [0.0, 1.0])
def test_the_pipeline_suppresses_the_traction_alarm_while_the_drive_reports_a_fault(fault, tmp_path):
    line = load_line(write(tmp_path, fault_text()))
    pipe = Pipeline(line, context=False)
    pipe.feed(_samples(line, fault))
    pipe.finish_frames()
    rec = pipe.lifecycle.records
    assert rec["traction:pull_2:alarm"].active  # the condition is there either way (the engine still sees it)
    if fault:
        assert rec["drive_fault:pull_2:alarm"].active
        assert rec["traction:pull_2:alarm"].state == "suppressed"
        assert "drive_fault:pull_2:alarm" in rec["traction:pull_2:alarm"].suppressed_by
    else:
        assert not rec["drive_fault:pull_2:alarm"].active
        assert rec["traction:pull_2:alarm"].state == "unack"
    # pull_1's own traction check is never suppressed by pull_2's drive
    assert rec["traction:pull_1:warning"].state != "suppressed"
