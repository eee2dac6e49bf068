"""The check seam: every registered check kind keeps the contract the pipeline and the alarm engine rely on.

A check kind is one class registered once in ``spanwatch.rules.catalog``. These tests hold every
registered kind to the protocol (``spanwatch.rules.base.Check``) on the example line (with a fault
tag on each pull roll's drive, which the example itself does not have), with blocks of frames from
the simulated line: it builds itself from the core line model, states its alarm defaults, and
``reset`` returns it to the state of a fresh object.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from spanwatch.monitor.line import load_line
from spanwatch.monitor.pipeline import Pipeline
from spanwatch.monitor.simline import SimulatedLine
from spanwatch.monitor.simline.scenario import parse_scenario
from spanwatch.rules.base import (
    QUALITY_BAD,
    QUALITY_NONE,
    QUALITY_UNCERTAIN,
    AlarmDefaults,
    Block,
    Check,
    CheckResult,
    LineState,
    OneByOne,
    Reason,
    Signal,
    TagFrames,
    batches_of,
)
from spanwatch.rules.catalog import CHECK_CLASSES, CHECK_KINDS, DERIVED_CLASSES, checks_for

ROOT = Path(__file__).resolve().parent.parent
CONFIG = ROOT / "config" / "quillmere-q2.toml"


@pytest.fixture(scope="module")
def fault_config(tmp_path_factory) -> Path:
    """The example line with a fault tag on the drives of pull_1 and pull_2 (the simulator serves them as 0)."""
    text = CONFIG.read_text(encoding="utf-8")
    for r in ("pull_1", "pull_2"):
        old = f'speed_tag = "q2.{r}.speed"\n'
        assert text.count(old) == 1, "the example config changed"
        text = text.replace(old, f'{old}fault_tag = "q2.{r}.fault"\n')
        text += f'\n[tags."q2.{r}.fault"]\nunit = ""\nsample_period = "100 ms"\n'
    path = tmp_path_factory.mktemp("contract") / "line.toml"
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def line(fault_config):
    return load_line(fault_config)


@pytest.fixture(scope="module")
def blocks(line, fault_config) -> list[Block]:
    """Consecutive blocks (at most 10 s each) over 80 s of the line at 400 m/min, a roll change near the end."""
    data = {"scenario": {"name": "contract", "config": str(fault_config), "duration": "2 min", "seed": 3},
            "speed": [{"at": "0 s", "to": "400 m/min"}],
            "roll_change": [{"at": "112 s", "winder": "rewind"}]}
    sc, cfg = parse_scenario(data, ROOT / "config" / "scenarios" / "contract.toml")
    sim = SimulatedLine(load_line(cfg), sc)
    pipe = Pipeline(line, context=False)
    out = []
    batch = sim.advance(40.0)  # run-up: line state settles, windows fill
    pipe.ingest(batch)
    while pipe.next_block(float(batch.t.max()) - 1.0) is not None:
        pass
    for _ in range(4):
        batch = sim.advance(20.0)
        pipe.ingest(batch)
        while (block := pipe.next_block(float(batch.t.max()) - 1.0)) is not None:
            out.append(block)
    assert len(out) >= 8
    return out


def _same(a: CheckResult, b: CheckResult) -> None:
    np.testing.assert_array_equal(a.reason, b.reason)
    np.testing.assert_allclose(a.value, b.value, rtol=0, atol=0, equal_nan=True)


def test_every_kind_is_registered_once_by_name():
    everything = (*CHECK_CLASSES, *DERIVED_CLASSES)
    assert len(CHECK_KINDS) == len({c.kind for c in everything})
    assert {"traction", "draw", "roll_diameter", "runout", "tag_stale", "drift"} <= set(CHECK_KINDS)


def test_every_kind_states_its_contract():
    for cls in (*CHECK_CLASSES, *DERIVED_CLASSES):
        assert isinstance(cls.defaults, AlarmDefaults), cls
        assert cls.defaults.direction in ("high", "low", "abs"), cls
        assert cls.rests_on.strip(), f"{cls.__name__} must say which assumption it rests on"
        assert cls.defaults.cause and cls.defaults.consequence and cls.defaults.action, cls


def test_the_example_line_gets_every_kind(line):
    checks = checks_for(line.model)
    # a recording has no live source; the same line read over OPC UA gets the source's own check
    assert {c.kind for c in checks} == set(CHECK_KINDS) - {"source_lost"}
    # the example without fault tags gets no drive-fault check, and nothing else missing
    plain = {c.kind for c in checks_for(load_line(CONFIG).model)}
    assert plain == set(CHECK_KINDS) - {"source_lost", "drive_fault"}
    live = checks_for(load_line(ROOT / "config" / "quillmere-q2-opcua.toml").model)
    assert {c.kind for c in live} == set(CHECK_KINDS) - {"drive_fault"}
    assert [c.object_id for c in live if c.kind == "source_lost"] == ["plc"]
    keys = [(c.kind, c.object_id) for c in checks]
    assert len(keys) == len(set(keys)), "one check per kind and object"
    for c in checks:
        assert isinstance(c, Check), c
        assert all(isinstance(name, str) for name in c.inputs)


def test_reset_returns_a_check_to_a_fresh_state(line, blocks):
    # After reset, a check that has seen blocks must answer the next block exactly as a new one does.
    fresh = {(c.kind, c.object_id): c for c in checks_for(line.model)}
    used = checks_for(line.model)
    for block in blocks[:2]:
        for c in used:
            c.update(block)
    for c in used:
        c.reset()
    for block in blocks[2:]:
        for c in used:
            _same(c.update(block), fresh[(c.kind, c.object_id)].update(block))


def test_state_carries_across_blocks_where_a_check_keeps_any(line, blocks):
    # Without a reset the windowed checks do carry state: the same block reads differently by a check that has
    # seen the frames before it (otherwise the reset test above proves nothing for them).
    carried = set()
    seen = {(c.kind, c.object_id): c for c in checks_for(line.model)}
    for block in blocks[:6]:  # 60 s: the roll-diameter check has calibrated its caliper (300 m at 400 m/min)
        for c in seen.values():
            c.update(block)
    for c in checks_for(line.model):
        a, b = seen[(c.kind, c.object_id)].update(blocks[6]), c.update(blocks[6])
        if not (np.array_equal(a.reason, b.reason) and np.allclose(a.value, b.value, equal_nan=True)):
            carried.add(c.kind)
    assert {"draw", "roll_diameter", "length_rate", "runout"} <= carried


def _one_by_one(checks, block: Block) -> dict:
    results: dict = {}
    b = replace(block, results=results)
    for c in checks:
        results[(c.kind, c.object_id)] = c.update(b)
    return results


def _together(batches, block: Block) -> dict:
    results: dict = {}
    b = replace(block, results=results)
    for batch in batches:
        for c, r in zip(batch.checks, batch.update(b), strict=True):
            results[(c.kind, c.object_id)] = r
    return results


def _same_with_extras(a: CheckResult, b: CheckResult) -> None:
    _same(a, b)
    assert set(a.extras) == set(b.extras)
    for name in a.extras:
        np.testing.assert_allclose(np.asarray(b.extras[name], dtype=float), np.asarray(a.extras[name], dtype=float),
                                   rtol=1e-12, atol=1e-12, equal_nan=True, err_msg=name)


def _compare_block_by_block(one, batches, blocks, reset_at: int) -> dict:
    """Each block through the checks one by one and through the batches, both reset before block ``reset_at``;
    every result must agree, extras included. Returns the one-by-one results by (kind, object), block by block."""
    seen: dict = {}
    for i, block in enumerate(blocks):
        if i == reset_at:
            for c in one:
                c.reset()
            for b in batches:
                b.reset()
        a, b = _one_by_one(one, block), _together(batches, block)
        assert list(a) == list(b)
        for key in a:
            _same_with_extras(a[key], b[key])
            seen.setdefault(key, []).append(a[key])
    return seen


def test_a_kind_evaluated_together_answers_as_its_objects_one_by_one(line, blocks):
    # The pipeline evaluates each kind's objects together (rules.base.batches_of); every result, extras included,
    # must be what each check's own update gives, block after block (state carried), and after a reset.
    one, together = checks_for(line.model), checks_for(line.model)
    batches = batches_of(together)
    assert [c for b in batches for c in b.checks] == together  # catalog order kept
    _compare_block_by_block(one, batches, blocks, reset_at=len(blocks) // 2)


# Kinds that evaluate all their objects at once; the test above must exercise their batches, not OneByOne.
STACKED_KINDS = {"tag_range", "tag_quality", "tag_stale", "tag_frozen", "traction", "no_drive", "slip", "idler_lag",
                 "draw", "tension_zero", "drive_fault"}


def test_the_stacked_kinds_are_evaluated_together(line):
    batches = batches_of(checks_for(line.model))
    stacked = {b.checks[0].kind for b in batches if not isinstance(b, OneByOne)}
    assert stacked >= STACKED_KINDS


def _faulty(blocks: list[Block]) -> list[Block]:
    """The fixture's blocks with faults put in by hand, so every stacked kind meets its non-trivial states.

    Tags (columns of ``block.tags``): speed_ref out of range on a stretch of every block, pull_1's speed
    uncertain and s5's tension bad there, the unwind rpm never sampled (quality 3), the rewind length NaN on a
    stretch, the idler_5 speed without a new sample from the third block on (its age grows: stale), s8's tension
    held from the second block on (frozen after its 10 s). The source ``plc`` is silent on a stretch of the fourth
    block.
    Signals: the line stops for a stretch of the fifth block with the webs slack (traction restarts, tension
    zero judged, no drive), pull_2's drive reports a fault and the middle zone's load cell is not usable on a
    stretch of the sixth.
    """
    out = []
    held = None
    age0 = None
    for i, b in enumerate(blocks):
        names = b.tags.names
        v, q, age = b.tags.value.copy(), b.tags.quality.copy(), b.tags.age.copy()
        n = b.n
        a, z = n // 4, n // 2
        col = names.index
        v[a:z, col("q2.line.speed_ref")] = 40.0  # 2400 m/min: beyond its 800 m/min range
        q[a:z, col("q2.pull_1.speed")] = QUALITY_UNCERTAIN
        q[a:z, col("q2.s5.tension")] = QUALITY_BAD
        q[:, col("q2.unwind.rpm")] = QUALITY_NONE
        v[a:z, col("q2.rewind.length")] = np.nan
        if i >= 2:
            age0 = b.t[0] if age0 is None else age0
            age[:, col("q2.idler_5.speed")] = b.t - age0
        if i >= 1:
            held = v[0, col("q2.s8.tension")] if held is None else held
            v[:, col("q2.s8.tension")] = held
        signals = dict(b.signals)
        quiet = np.full(n, 1e3)
        if i == 3:
            quiet[a:z] = 0.0
        signals["source_quiet/plc"] = Signal(quiet, np.ones(n, dtype=bool))
        state = b.line_state.copy()
        if i == 4:
            state[a:z] = int(LineState.STOPPED)
            for zone in ("unwind-pull_1", "pull_1-pull_2", "pull_2-rewind"):
                s = signals[f"tension/{zone}"]
                value = s.value.copy()
                value[a:z] = 3.0 + i  # slack: a few N/m against setpoints over 100 N/m
                signals[f"tension/{zone}"] = Signal(value, s.ok)
        if i == 5:
            s = signals["tension/pull_1-pull_2"]
            ok = s.ok.copy()
            ok[a:z] = False
            signals["tension/pull_1-pull_2"] = Signal(s.value, ok)
            word = np.zeros(n)
            word[a:] = 7.0
            signals["drive_fault/pull_2"] = Signal(word, np.ones(n, dtype=bool))
        out.append(Block(t=b.t, signals=signals, line_state=state, tags=TagFrames(names, v, q, age),
                         roll_start=b.roll_start, roll_settling=b.roll_settling))
    return out


def test_stacked_kinds_answer_as_their_objects_one_by_one_through_faults(line, blocks):
    # Tags of a live source (the OPC UA example: each tag's source is "plc") and the fault tags of the contract
    # line; faults placed by hand (see _faulty) must be flagged where they were placed, batch and one by one alike.
    live = load_line(ROOT / "config" / "quillmere-q2-opcua.toml").model
    def build():
        tags = [c for c in checks_for(live) if c.kind.startswith("tag_")]
        return tags + [c for c in checks_for(line.model) if c.kind in STACKED_KINDS and not c.kind.startswith("tag_")]
    one, together = build(), build()
    batches = batches_of(together)
    assert {b.checks[0].kind for b in batches if isinstance(b, OneByOne)} == set()
    faulty = _faulty(blocks)
    seen = _compare_block_by_block(one, batches, faulty, reset_at=6)
    n = faulty[0].n

    def flagged(kind, obj, i):
        r = seen[(kind, obj)][i]
        return np.flatnonzero(r.valid & (r.value == 1.0))

    q = n // 4, n // 2
    assert flagged("tag_range", "q2.line.speed_ref", 0).tolist() == list(range(*q))
    assert flagged("tag_quality", "q2.pull_1.speed", 0).tolist() == list(range(*q))
    assert flagged("tag_quality", "q2.s5.tension", 0).tolist() == list(range(*q))
    assert flagged("tag_quality", "q2.rewind.length", 0).tolist() == list(range(*q))  # NaN value
    assert (seen[("tag_quality", "q2.unwind.rpm")][0].reason == int(Reason.INPUT_BAD)).all()  # never sampled
    stale = seen[("tag_stale", "q2.idler_5.speed")]
    assert not flagged("tag_stale", "q2.idler_5.speed", 1).size and sum(flagged(
        "tag_stale", "q2.idler_5.speed", i).size for i in range(2, 6)) > 0
    assert (stale[3].reason[q[0]:q[1]] == int(Reason.INPUT_BAD)).all()  # the source was silent: its alarm speaks
    assert not flagged("tag_frozen", "q2.s8.tension", 1).size  # held for less than 10 s yet
    assert sum(flagged("tag_frozen", "q2.s8.tension", i).size for i in range(2, 6)) > 0
    assert (seen[("tag_frozen", "q2.s8.tension")][4].reason[q[0]:q[1]] == int(Reason.LINE_STATE)).all()
    zero = seen[("tension_zero", "pull_1-pull_2")][4]
    assert zero.valid[q[0]:q[1]].all() and not zero.valid[:q[0]].any()
    assert flagged("no_drive", "pull_1", 4).size == 0  # stopped: not judged
    assert flagged("drive_fault", "pull_2", 5).tolist() == list(range(q[0], n))
    assert (seen[("traction", "pull_1")][5].reason[q[0]:q[1]] == int(Reason.INPUT_BAD)).all()
    assert (seen[("traction", "pull_1")][4].reason[q[0]:q[1]] == int(Reason.LINE_STATE)).all()
