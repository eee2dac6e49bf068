"""``spanwatch evaluate``: the score's rules on hand-made alarms and faults, and the CI set end to end.

The expected numbers below are worked by hand from the definitions in spanwatch.monitor.evalscore (a raise
in [start, end + grace] detects; on the right object when it names one of the fault's blame; false alarms
per 8-h shift = count x 8 h / time they could happen in); the interval floor is checked against a Monte
Carlo simulation of a periodic detector with a random phase.
"""

from __future__ import annotations

import csv
import io
import json
import random
from pathlib import Path

import pytest
from spanwatch.monitor.cli import app
from spanwatch.monitor.evalscore import (
    FaultWindow,
    Raise,
    covered_seconds,
    interval_floor,
    outside_windows,
    per_shift,
    score_fault,
)
from spanwatch.monitor.evaluate import RunResult, _line_for, eval_sets, scenario_files, summarise
from spanwatch.monitor.simline import FAULT_KINDS, load_scenario
from typer.testing import CliRunner

ROOT = Path(__file__).resolve().parent.parent
T0 = 1_000_000.0
FAULT = FaultWindow(label="cof_drop", kind="cof_drop", start=T0 + 600, end=T0 + 900,
                    blame=("pull_1", "unwind-pull_1", "pull_1-pull_2"), severity="obvious", target="pull_1")


def r(t: float, kind: str = "traction", obj: str = "pull_1", level: str = "alarm", priority: str = "high",
      blames: tuple[str, ...] = ()) -> Raise:
    return Raise(T0 + t, kind, obj, level, priority, blames)


# --- the score of one fault ---------------------------------------------------------------------------------


def test_hit_on_the_right_object_and_its_delay():
    s = score_fault(FAULT, [r(100, obj="idler_3"), r(630), r(640, kind="draw", obj="pull_1-pull_2")], grace=300)
    assert s.detected and s.right
    assert s.delay == pytest.approx(30.0)  # 630 s - 600 s
    assert s.by_kind == {"traction": pytest.approx(30.0), "draw": pytest.approx(40.0)}
    assert s.first_kinds == ("traction",)


def test_wrong_object_is_detected_but_not_right():
    s = score_fault(FAULT, [r(650, kind="idler_lag", obj="idler_5")], grace=300)
    assert s.detected and not s.right and s.delay is None
    assert s.first_delay == pytest.approx(50.0)


def test_the_check_blames_put_an_alarm_on_the_right_object():
    # a check whose object is something else but whose blames name the roller (as a draw check names its rollers)
    s = score_fault(FAULT, [r(700, kind="drift", obj="draw.z9", blames=("z9", "pull_1"))], grace=300)
    assert s.right and s.delay == pytest.approx(100.0)


def test_late_raise_misses_and_is_a_false_alarm():
    # window [600, 900 + 300]: a raise at 1200 s is the last that counts, one at 1201 s is late
    edge = score_fault(FAULT, [r(1200)], grace=300)
    assert edge.right and edge.delay == pytest.approx(600.0)
    late = [r(1201)]
    assert not score_fault(FAULT, late, grace=300).detected
    assert outside_windows(late, [FAULT], grace=300) == late
    assert outside_windows([r(1200)], [FAULT], grace=300) == []
    assert not score_fault(FAULT, [r(599)], grace=300).detected  # before the start


def test_false_alarms_per_shift_worked_by_hand():
    # 3 raises in 2 h of clean running: 3 x 8 / 2 = 12 per 8-h shift
    assert per_shift(3, 2 * 3600) == pytest.approx(12.0)
    # a 1-h fault run with windows [10, 25] min and [20, 35] min (grace 5 min): they cover 10..35 min,
    # 25 min once (the overlap counts once), leaving 35 min in which 2 raises outside are 2 x 480 / 35 per shift
    a = FaultWindow("a", "a", T0 + 600, T0 + 1200, ())
    b = FaultWindow("b", "b", T0 + 1200, T0 + 1800, ())
    assert covered_seconds([a, b], 300, T0, T0 + 3600) == pytest.approx(25 * 60)
    # clipped to the run: a window running past the run's end counts only up to it
    assert covered_seconds([b], 300, T0, T0 + 1500) == pytest.approx(300)
    run = RunResult("f", "f.toml", 1, "main", T0, 3600.0, [a, b], [r(100), r(2200), r(1000)], 5, 0.0)
    clean = RunResult("c", "c.toml", 1, "main", T0, 7200.0, [], [r(10), r(20, priority="advisory"), r(30)], 5, 0.0)
    fixed = [RunResult(**{**x.__dict__, "variant": "fixed"}) for x in (run, clean)]
    s = summarise([run, clean, *fixed], grace=300)
    fa = s["false_alarms"]["main"]
    assert fa["outside"]["raises_all"] == 2  # 100 s and 2200 s; 1000 s is inside a's window
    assert fa["outside"]["hours"] == pytest.approx(35 / 60)
    assert fa["outside"]["per_shift_all"] == pytest.approx(2 * 480 / 35)
    assert fa["clean"]["raises_all"] == 3 and fa["clean"]["per_shift_all"] == pytest.approx(12.0)
    # advisory alarms count in "all", not in "annunciated": 2 x 8 / 2 = 8 per shift
    assert fa["clean"]["raises_annunciated"] == 2 and fa["clean"]["per_shift_annunciated"] == pytest.approx(8.0)
    # the clean rate is 12 per shift: the target of at most 1 is not met
    assert [t["met"] for t in s["targets"]][2] is False


def test_summary_per_class_seeds_and_targets():
    # two seeds of one obvious fault: found on the right object in one (delay 30 s), on a wrong object in the other
    hit = RunResult("x", "x.toml", 1, "main", T0, 1800.0, [FAULT], [r(630)], 4, 0.0)
    miss = RunResult("x", "x.toml", 2, "main", T0, 1800.0, [FAULT], [r(630, obj="idler_3")], 4, 0.0)
    runs = [hit, miss, *(RunResult(**{**x.__dict__, "variant": "fixed"}) for x in (hit, miss))]
    s = summarise(runs, grace=300)
    (row,) = s["faults"]
    assert (row["runs"], row["detected"], row["right"], row["right_share"]) == (2, 2, 1, 0.5)
    assert row["delay_median"] == pytest.approx(30.0) and row["first_by"] == ["traction"]
    assert row["fixed_right"] == 1
    # the floor: window 300 + 300 s, one alarm per 8 h, 4 objects: 600 / 28800 / 4
    assert row["floor_right_share"] == pytest.approx(600 / 28800 / 4)
    assert s["targets"][0]["met"] is False and s["targets"][0]["value"] == "1/2"
    assert s["targets"][1]["met"] is None  # no subtle fault in this set: nothing to judge
    det = {d["detector"]: d for d in s["by_detector"]}
    assert det["traction"]["raised"] == 2 and det["traction"]["right"] == 1


def test_interval_floor_against_monte_carlo():
    # A detector raising every X s from a uniformly random phase, naming one of n objects at random: count how
    # often its first raise in a window of W s exists and is on the right object, and its mean delay.
    rng = random.Random(7)
    window, interval, n = 1800.0, 7200.0, 6
    hits = right = 0
    delays = []
    trials = 40_000
    for _ in range(trials):
        first = rng.uniform(0.0, interval)  # the first raise at or after the window's start
        if first <= window:
            hits += 1
            delays.append(first)
            right += rng.randrange(n) == 0
    p, p_right, delay = interval_floor(window, interval, n)
    assert p == pytest.approx(hits / trials, abs=0.01)
    assert p_right == pytest.approx(right / trials, abs=0.005)
    assert delay == pytest.approx(sum(delays) / len(delays), rel=0.03)
    # a window longer than the interval is always hit; the first raise then comes within one interval
    assert interval_floor(3 * interval, interval, n)[:1] == (1.0,)
    assert interval_floor(3 * interval, interval, n)[2] == pytest.approx(interval / 2)


# --- the scenario sets --------------------------------------------------------------------------------------


def test_full_set_covers_every_fault_kind_at_two_sizes_and_8_h_of_clean_running():
    files = scenario_files("full")
    kinds: dict[str, set[str]] = {}
    labels: set[str] = set()
    clean_s = 0.0
    for f in files:
        sc, cfg = load_scenario(f)
        assert cfg.is_file(), f"{f.name}: its line file {cfg} is missing"
        for x in sc.fault:
            kinds.setdefault(x.kind, set()).add(x.severity or "")
            labels.add(x.label or x.kind)
        if not sc.fault:
            clean_s += sc.scenario.duration
            assert sc.roll_change and len(sc.speed) > 3
    assert set(FAULT_KINDS) <= set(kinds), set(FAULT_KINDS) - set(kinds)
    assert all(v == {"obvious", "subtle"} for v in kinds.values()), kinds
    assert {"caliper_change_within_roll", "caliper_change_between_rolls"} <= labels
    assert clean_s >= 8 * 3600
    assert any(load_scenario(f)[0].grade_change for f in files)
    assert set(eval_sets()) >= {"full", "ci"}


def test_fixed_limit_line_turns_the_drift_kind_off(monkeypatch):
    # Once a check kind "drift" is registered, the baseline line carries [checks.drift] enabled = false.
    import spanwatch.rules.catalog as catalog

    cfg = load_scenario(scenario_files("ci")[0])[1]
    monkeypatch.setitem(catalog.CHECK_KINDS, "drift", catalog.CHECK_KINDS["draw"])
    fixed = _line_for(cfg, "fixed")
    assert fixed.config.checks["drift"].enabled is False
    assert "drift" not in _line_for(cfg, "main").config.checks


# --- end to end ---------------------------------------------------------------------------------------------


def test_evaluate_ci_set_end_to_end(tmp_path):
    out = {k: tmp_path / f"eval.{k}" for k in ("csv", "json", "md")}
    res = CliRunner().invoke(app, ["evaluate", "--set", "ci", "--seeds", "2", "--no-progress", "--csv",
                                   str(out["csv"]), "--json", str(out["json"]), "--markdown", str(out["md"])])
    assert res.exit_code == 0, res.output
    assert all(len(ln) <= 80 for ln in res.stdout.splitlines()), res.stdout
    doc = json.loads(out["json"].read_text())
    rows = {(f["fault"], f["severity"]): f for f in doc["summary"]["faults"]}
    # pull_1 slipping at COF 0.10 upsets the middle zone it bounds: its draw alarm names that zone
    cof = rows[("cof_drop", "obvious")]
    assert cof["runs"] == 2 and cof["right"] == 2 and "draw" in cof["kinds_right"]
    assert 0 < cof["delay_max"] <= 60
    # a silent rpm tag is stale within a few sample periods
    drop = rows[("tag_dropout", "obvious")]
    assert drop["right"] == 2 and "tag_stale" in drop["kinds_right"] and drop["delay_max"] <= 5
    # the clean scenario is counted: 2 seeds x 10 min
    clean = doc["summary"]["false_alarms"]["main"]["clean"]
    assert clean["runs"] == 2 and clean["hours"] == pytest.approx(2 * 10 / 60)
    assert clean["raises_all"] == sum(x["raises"] for x in clean["by_run"])
    assert {r["seed"] for r in doc["runs"] if r["scenario"] == "ci-clean"} == {403, 404}
    table = list(csv.DictReader(io.StringIO(out["csv"].read_text())))
    assert any(t["section"] == "fault" and t["fault"] == "cof_drop" and t["variant"] == "interval_floor"
               for t in table)
    md = out["md"].read_text()
    assert "## How it was produced" in md and "ci-cof-drop.toml" in md and "seeds: 2" in md


def test_evaluate_option_errors_are_one_line_errors():
    res = CliRunner().invoke(app, ["evaluate", "--set", "no-such-set", "--no-progress"])
    assert res.exit_code == 2
    assert "--set" in res.output and "full" in res.output and "ci" in res.output
    res = CliRunner().invoke(app, ["evaluate", "--set", "ci", "--grace", "5 kg", "--no-progress"])
    assert res.exit_code == 2 and "--grace" in res.output and "duration" in res.output


def test_a_detector_chosen_for_the_evaluation_replaces_the_configs():
    from spanwatch.monitor.evaluate import _line_for

    cfg = Path(__file__).resolve().parent.parent / "config" / "scenarios" / "eval" / "quillmere-q2-drives.toml"
    assert _line_for(cfg, "main").model.drift.detector == "cusum"
    line = _line_for(cfg, "main", "page_hinkley")
    assert line.model.drift.detector == "page_hinkley"
    assert {c.detector for c in line_checks(line) if c.kind == "drift"} == {"page_hinkley"}
    fixed = _line_for(cfg, "fixed")
    assert fixed.config.checks["drift"].enabled is False


def line_checks(line):
    from spanwatch.monitor.checkset import build_checks

    return build_checks(line)
