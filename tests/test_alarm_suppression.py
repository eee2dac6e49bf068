"""Suppression by design (spanwatch.rules.suppression, spanwatch.monitor.checkset.suppression_rules) and the
``[alarms]`` config table.

ANSI/ISA-18.2-2016 and IEC 62682 (designed suppression; from memory): an alarm explained by another active
alarm is suppressed by logic, so the operator sees the cause once rather than a flood of consequences. EEMUA 191,
3rd ed. (2013) (from memory) names one alarm per fault as the aim. The expected alarm keys below are written out
from the example line file config/quillmere-q2.toml (its tags and checks), not computed by the code under test.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from spanwatch.monitor.checkset import alarm_points, build_checks, chatter_settings, suppression_rules
from spanwatch.monitor.config import ConfigError
from spanwatch.monitor.line import load_line
from spanwatch.rules.alarms import AlarmPoint, ChatterSettings
from spanwatch.rules.plausibility import STALE_DEFAULTS
from spanwatch.rules.sourcehealth import DEFAULTS as SOURCE_LOST_DEFAULTS
from spanwatch.rules.suppression import SuppressionRule, SuppressionRules, matches

REPO = Path(__file__).resolve().parents[1]
OPCUA = REPO / "config" / "quillmere-q2-opcua.toml"

# the tags of config/quillmere-q2.toml, all delivered by the one OPC UA source "plc" of quillmere-q2-opcua.toml
TAGS = ["q2.line.speed_ref", "q2.pull_1.speed", "q2.pull_2.speed", "q2.idler_3.speed", "q2.idler_5.speed",
        "q2.s2.tension", "q2.s5.tension", "q2.s8.tension", "q2.unwind.diameter", "q2.unwind.rpm",
        "q2.unwind.length", "q2.rewind.diameter", "q2.rewind.rpm", "q2.rewind.length", "q2.rewind.core_change"]
# tags with frozen_after in the example file
FROZEN = ["q2.pull_1.speed", "q2.pull_2.speed", "q2.s2.tension", "q2.s5.tension", "q2.s8.tension",
          "q2.unwind.diameter", "q2.rewind.diameter"]


def _rules(path: Path = OPCUA, extra: str = "", tmp: Path | None = None):
    if extra:
        assert tmp is not None
        text = f'extends = "{path}"\n{extra}'
        path = tmp / "line.toml"
        path.write_text(text, encoding="utf-8")
    line = load_line(path)
    checks = build_checks(line)
    points = alarm_points(line, checks)
    return line, points, suppression_rules(line, points, checks)


def _pt(kind: str, obj: str, level: str = "alarm") -> AlarmPoint:
    return AlarmPoint(kind, obj, level, 1.0, "high", 0.0, 0.0, 0.0, "high", "", "", "", "", 60.0)


def test_a_lost_source_suppresses_every_tag_alarm_of_its_tags():
    _, _, rules = _rules()
    got = rules.suppressed({"source_lost:plc:alarm"})
    expected = {f"{k}:{t}:alarm" for t in TAGS for k in ("tag_stale", "tag_quality", "tag_range")}
    expected |= {f"tag_frozen:{t}:alarm" for t in FROZEN}
    assert set(got) == expected
    assert all(reason.startswith("source plc lost") and "source_lost:plc:alarm" in reason for reason in got.values())


def test_a_lost_source_together_with_its_stale_tags_keeps_the_source_as_the_reason():
    _, _, rules = _rules()
    got = rules.suppressed({"source_lost:plc:alarm", "tag_stale:q2.s5.tension:alarm"})
    assert got["tag_frozen:q2.s5.tension:alarm"].startswith("source plc lost")
    assert got["tag_stale:q2.s5.tension:alarm"].startswith("source plc lost")
    # the stale tag still hides the physics alarms that read it: traction pull_1 reads tension/pull_1-pull_2
    assert got["traction:pull_1:alarm"].startswith("tag q2.s5.tension implausible")
    assert "source_lost:plc:alarm" not in got


def test_a_stale_tag_suppresses_its_frozen_alarm_and_the_checks_that_read_it():
    _, _, rules = _rules()
    got = rules.suppressed({"tag_stale:q2.unwind.diameter:alarm"})
    tag_alarms = {"tag_frozen:q2.unwind.diameter:alarm", "tag_quality:q2.unwind.diameter:alarm",
                  "tag_range:q2.unwind.diameter:alarm"}
    # the unwind diameter is read by the roll-diameter and speed-diameter checks of the unwind
    physics = {f"{k}:unwind:{lv}" for k in ("roll_diameter", "speed_diameter") for lv in ("warning", "alarm")}
    # and by the checks that read the roll-diameter check's results (they read what their source reads): the
    # drift detector on its local caliper ratio and the roll's calibrated caliper
    drift = {"drift:caliper.unwind:alarm", "roll_caliper:unwind:alarm"}
    assert set(got) == tag_alarms | physics | drift
    assert all(got[k].startswith("tag q2.unwind.diameter stale") for k in tag_alarms)
    assert "tag_stale:q2.unwind.diameter:alarm" not in got


def test_a_frozen_speed_tag_suppresses_the_checks_reading_that_speed_only():
    _, _, rules = _rules()
    got = rules.suppressed({"tag_frozen:q2.pull_2.speed:alarm"})
    # speed/pull_2 is read by traction pull_2, slip pull_2 and draw pull_1-pull_2 (monitor/line.py signals), and
    # by the drift detectors on their residuals
    assert {k.rsplit(":", 1)[0] for k in got} == {
        "traction:pull_2", "slip:pull_2", "draw:pull_1-pull_2", "drift:traction.pull_2", "drift:traction.mu.pull_2",
        "drift:slip.pull_2",
        "drift:draw.pull_1-pull_2", "drift:draw.gain.pull_1-pull_2"}


def test_no_active_alarm_suppresses_nothing():
    _, _, rules = _rules()
    assert rules.suppressed(set()) == {}
    assert rules.suppressed({"traction:pull_1:alarm"}) == {}


def test_a_config_rule_suppresses_by_pattern(tmp_path):
    extra = ('[[alarms.suppress]]\nwhile = "no_drive:pull_1"\nsuppress = ["traction:pull_1", "draw:pull_1-*"]\n'
             'reason = "pull_1 drive not transmitting"\n')
    _, _, rules = _rules(extra=extra, tmp=tmp_path)
    got = rules.suppressed({"no_drive:pull_1:alarm"})
    assert set(got) == {"traction:pull_1:warning", "traction:pull_1:alarm", "draw:pull_1-pull_2:warning",
                        "draw:pull_1-pull_2:alarm"}
    assert got["traction:pull_1:alarm"] == "pull_1 drive not transmitting (no_drive:pull_1:alarm active)"
    assert rules.suppressed({"no_drive:pull_2:alarm"}) == {}


def test_patterns_match_kind_object_or_the_full_key():
    p = _pt("traction", "R1a", "warning")
    assert matches("traction:R1*", p) and matches("traction:R1a:warning", p) and matches("*:*:warning", p)
    assert matches("traction:R1[ab]", p) and matches("traction:R1?", p)
    assert not matches("traction:R1a:alarm", p) and not matches("Traction:R1a", p) and not matches("traction", p)


def test_an_alarm_never_suppresses_itself():
    pts = [_pt("slip", "a"), _pt("slip", "b")]
    rules = SuppressionRules([SuppressionRule("slip:*", ("slip:*",), "any slip")], pts)
    assert rules.suppressed({"slip:a:alarm"}) == {"slip:b:alarm": "any slip (slip:a:alarm active)"}
    assert set(rules.suppressed({"slip:a:alarm", "slip:b:alarm"})) == {"slip:a:alarm", "slip:b:alarm"}


def test_first_out_groups_and_latched_reach_the_points(tmp_path):
    extra = ('[alarms.first_out]\nunwind = ["traction:pull_1", "slip:*"]\n\n'
             '[checks.no_drive]\nlatched = true\n')
    _, points, _ = _rules(extra=extra, tmp=tmp_path)
    by_key = {p.key: p for p in points}
    assert by_key["traction:pull_1:alarm"].groups == ("unwind",)
    assert by_key["slip:pull_2:alarm"].groups == ("unwind",)
    assert by_key["traction:pull_2:alarm"].groups == ()
    assert by_key["no_drive:pull_1:alarm"].latched and not by_key["traction:pull_1:alarm"].latched


def test_alarms_table_defaults_and_values(tmp_path):
    line, _, _ = _rules()
    a = line.config.alarms
    # defaults: one operator; shelve at most 8 h (common practice, no source); 3 raises in 60 s chatter (ISA-18.2 TR
    # / EEMUA 191, from memory); the remedy's 30 s off-delay held 10 min (common practice, no source)
    assert (a.operators, a.shelve_max, a.chatter_count, a.chatter_window) == (1, 28_800.0, 3, 60.0)
    assert chatter_settings(line) == ChatterSettings(count=3, window=60.0, off_delay=30.0, hold=600.0)
    extra = ('[alarms]\noperators = 2\nshelve_max = "4 h"\nchatter_count = 4\nchatter_window = "2 min"\n'
             'chatter_off_delay = "0 s"\nchatter_hold = "15 min"\n')
    line, _, _ = _rules(extra=extra, tmp=tmp_path)
    assert line.config.alarms.operators == 2 and line.config.alarms.shelve_max == 14_400.0
    assert chatter_settings(line) == ChatterSettings(count=4, window=120.0, off_delay=0.0, hold=900.0)


@pytest.mark.parametrize(("extra", "key"), [
    ('[alarms.first_out]\nunwind = ["traction:pull_1", "slipp:*"]\n', "alarms.first_out.unwind[1]"),
    ('[alarms.first_out]\nunwind = ["traction:[pull"]\n', "alarms.first_out.unwind[0]"),
    ('[alarms.first_out]\nunwind = ["traction"]\n', "alarms.first_out.unwind[0]"),
    ('[[alarms.suppress]]\nwhile = "no_drive:pull_9"\nsuppress = ["traction:pull_1"]\nreason = "r"\n',
     "alarms.suppress[0].while"),
    ('[[alarms.suppress]]\nwhile = "no_drive:pull_1"\nsuppress = ["traction:pull_1", "traction pull_2"]\n'
     'reason = "r"\n', "alarms.suppress[0].suppress[1]"),
    ('[[alarms.suppress]]\nwhile = "no_drive:pull_1"\nsuppress = []\nreason = "r"\n', "alarms.suppress[0].suppress"),
    ('[[alarms.suppress]]\nwhile = "no_drive:pull_1"\nsuppress = ["traction:*"]\n', "alarms.suppress[0].reason"),
    ('[alarms]\nchatter_count = 1\n', "alarms.chatter_count"),
    ('[alarms]\noperators = 1.5\n', "alarms.operators"),
    ('[alarms]\nshelve_max = "2 day"\n', "alarms.shelve_max"),
    ('[alarms]\nshelve_max = 8\n', "alarms.shelve_max"),
    ('[alarms]\nchatter_wndow = "60 s"\n', "alarms.chatter_wndow"),
    ('[checks.slip]\npriority = "critical"\n', "checks.slip.priority"),
])
def test_alarms_table_errors_name_the_file_and_key(extra, key, tmp_path):
    with pytest.raises(ConfigError) as exc:
        _rules(extra=extra, tmp=tmp_path)
    assert key in [k for k, _ in exc.value.problems], exc.value
    assert str(tmp_path / "line.toml") in str(exc.value)
    assert any(w in str(exc.value) for w in ("expected", "unknown key", "required key"))


@pytest.mark.parametrize("priority", ["advisory", "low", "medium", "high", "urgent"])
def test_five_priorities(priority, tmp_path):
    # ISA-18.2 recommends 3-4 annunciated priorities (from memory); advisory is journal only
    _, points, _ = _rules(extra=f'[checks.slip]\npriority = "{priority}"\n', tmp=tmp_path)
    assert {p.priority for p in points if p.kind == "slip" and p.level == "alarm"} == {priority}


def test_source_lost_raises_no_later_than_a_stale_tag_by_default():
    # the source_lost alarm trips when the source's freshest tag is 0.5 s past its sample period (lag limit 0.5 s,
    # no on-delay); a tag's stale check does not judge frames within its stale limit of a source silence
    # (rules/plausibility.py), so with one sample period per source it never speaks first. Its delays:
    assert SOURCE_LOST_DEFAULTS.on_delay <= STALE_DEFAULTS.on_delay == 0.0
    assert SOURCE_LOST_DEFAULTS.alarm == 0.5


def test_exact_patterns_resolve_as_matching_every_point_would(tmp_path):
    # Exact patterns (every derived rule) are looked up by name instead of matched against every point (a line
    # of a thousand points has thousands of rules); with wildcard and exact configured rules, the resolved
    # table must be what matching each pattern against every point gives.
    extra = ('[[alarms.suppress]]\nwhile = "tag_stale:q2.s5.*"\nsuppress = ["draw:*", "traction:pull_2:warning"]\n'
             'reason = "test"\n')
    _, points, rules = _rules(extra=extra, tmp=tmp_path)
    want: dict[str, list[tuple[int, str, str]]] = {}
    for i, r in enumerate(rules.rules):
        whiles = [p.key for p in points if matches(r.while_, p)]
        targets = [p.key for p in points if any(matches(s, p) for s in r.suppress)]
        for w in whiles:
            want.setdefault(w, []).extend((i, k, f"{r.reason} ({w} active)") for k in targets if k != w)
    assert rules._by_key == want
    assert any(r.reason == "test" for r in rules.rules) and len(rules.rules) > 40
