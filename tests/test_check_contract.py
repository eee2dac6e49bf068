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
from spanwatch.rules.base import AlarmDefaults, Block, Check, CheckResult, batches_of
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


def test_a_kind_evaluated_together_answers_as_its_objects_one_by_one(line, blocks):
    # The pipeline evaluates each kind's objects together (rules.base.batches_of); every result, extras included,
    # must be what each check's own update gives, block after block (state carried), and after a reset.
    one, together = checks_for(line.model), checks_for(line.model)
    batches = batches_of(together)
    assert [c for b in batches for c in b.checks] == together  # catalog order kept
    for i, block in enumerate(blocks):
        if i == len(blocks) // 2:
            for c in one:
                c.reset()
            for b in batches:
                b.reset()
        a, b = _one_by_one(one, block), _together(batches, block)
        assert list(a) == list(b)
        for key in a:
            _same_with_extras(a[key], b[key])
