"""Time alignment (monitor/aligner.py): sample and hold onto an epoch-aligned grid, refusals, late samples.

The expected frames come from a deliberately naive reference written here (for each frame time, scan all
accepted samples of the tag for the newest one at or before it), not from the aligner's own arithmetic.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from spanwatch.monitor.aligner import REJECT_DUPLICATE, REJECT_OUT_OF_ORDER, Aligner
from spanwatch.rules.base import QUALITY_NONE

NAMES = ("a", "b", "c")
T0 = 1_772_427_600.0


def _arr(col, t, v=None, q=None):
    col = np.asarray(col, dtype=np.int64)
    t = np.asarray(t, dtype=float)
    v = np.asarray(v if v is not None else np.arange(t.size, dtype=float), dtype=float)
    q = np.asarray(q if q is not None else np.zeros(t.size), dtype=np.int8)
    return col, t, v, q


def _reference(frames: np.ndarray, samples: list[tuple[int, float, float, int]], k: int):
    """Naive sample and hold: per frame and tag, the newest accepted sample at or before the frame."""
    n = frames.size
    value = np.full((n, k), np.nan)
    quality = np.full((n, k), QUALITY_NONE, dtype=np.int8)
    age = np.full((n, k), np.inf)
    for i, f in enumerate(frames):
        for c in range(k):
            best = None
            for col, t, v, q in samples:
                if col == c and t <= f + 1e-12 and (best is None or t > best[0]):
                    best = (t, v, q)
            if best is not None:
                value[i, c], quality[i, c], age[i, c] = best[1], best[2], f - best[0]
    return value, quality, age


# --- sample and hold onto the grid ---------------------------------------------------------------------------------


@pytest.mark.parametrize("rate", [10.0, 4.0, 50.0])
def test_sample_and_hold_on_epoch_aligned_grid(rate):
    rng = np.random.default_rng(3)
    n = 200
    col = rng.integers(0, 3, n)
    t = T0 + 0.013 + np.sort(rng.uniform(0, 5.0, n))
    v = rng.normal(size=n)
    q = rng.integers(0, 3, n).astype(np.int8)
    al = Aligner(NAMES, rate)
    refused = al.push(*_arr(col, t, v, q))
    assert not refused[REJECT_OUT_OF_ORDER].any() and not refused[REJECT_DUPLICATE].any()
    frames, tf = al.emit(t.max())

    # grid: integer multiples of the frame period (epoch-aligned), from the first frame at or after the first sample
    idx = frames * rate
    np.testing.assert_allclose(idx, np.round(idx), rtol=0, atol=1e-6)
    assert frames[0] >= t.min() - 1e-9
    assert frames[0] - 1 / rate < t.min()
    np.testing.assert_allclose(np.diff(frames), 1 / rate, rtol=0, atol=1e-6)  # epoch floats: ulp ~2.4e-7 s
    assert frames[-1] <= t.max() + 1e-9 < frames[-1] + 1 / rate

    value, quality, age = _reference(frames, list(zip(col, t, v, q, strict=True)), 3)
    np.testing.assert_array_equal(tf.value, value)
    np.testing.assert_array_equal(tf.quality, quality)
    np.testing.assert_allclose(tf.age, age, rtol=0, atol=1e-9)


def test_hand_computed_frames():
    al = Aligner(("a", "b"), 10.0)
    # tag a at .03 and .27 past T0; tag b at .15
    al.push(*_arr([0, 1, 0], [T0 + 0.03, T0 + 0.15, T0 + 0.27], [1.0, 5.0, 2.0]))
    frames, tf = al.emit(T0 + 0.3)
    # first frame: first multiple of 0.1 s at or after T0 + 0.03
    np.testing.assert_allclose(frames, [T0 + 0.1, T0 + 0.2, T0 + 0.3])
    np.testing.assert_array_equal(tf.value[:, 0], [1.0, 1.0, 2.0])
    np.testing.assert_allclose(tf.age[:, 0], [0.07, 0.17, 0.03], atol=1e-6)  # age = frame time - sample time
    # b has no sample before its first one: no value, quality "none", infinite age
    assert math.isnan(tf.value[0, 1]) and tf.quality[0, 1] == QUALITY_NONE and tf.age[0, 1] == math.inf
    np.testing.assert_array_equal(tf.value[1:, 1], [5.0, 5.0])
    np.testing.assert_allclose(tf.age[1:, 1], [0.05, 0.15], atol=1e-6)


def test_hold_carries_across_emits_and_age_grows():
    al = Aligner(("a",), 10.0)
    al.push(*_arr([0], [T0], [7.0]))
    f1, tf1 = al.emit(T0 + 0.2)
    f2, tf2 = al.emit(T0 + 0.5)
    np.testing.assert_allclose(np.r_[f1, f2], T0 + np.arange(6) / 10, atol=1e-6)
    np.testing.assert_array_equal(np.r_[tf1.value[:, 0], tf2.value[:, 0]], [7.0] * 6)
    np.testing.assert_allclose(np.r_[tf1.age[:, 0], tf2.age[:, 0]], np.arange(6) / 10, atol=1e-6)


def test_emit_returns_none_until_there_is_a_new_frame():
    al = Aligner(("a",), 10.0)
    assert al.emit(T0 + 10) is None  # nothing pushed yet
    al.push(*_arr([0], [T0 + 0.05]))
    assert al.emit(T0 + 0.05) is None  # the first frame (T0 + 0.1) is not due yet
    frames, _ = al.emit(T0 + 0.1)
    assert frames.size == 1
    assert al.emit(T0 + 0.15) is None  # already emitted


# --- refusals ------------------------------------------------------------------------------------------------------


def test_out_of_order_and_duplicate_refused_within_a_push():
    al = Aligner(NAMES, 10.0)
    col, t, v, q = _arr([0, 0, 0, 0, 0], [T0 + 1.0, T0 + 2.0, T0 + 1.5, T0 + 2.0, T0 + 3.0], [1, 2, 99, 98, 3])
    refused = al.push(col, t, v, q)
    assert refused[REJECT_OUT_OF_ORDER].tolist() == [False, False, True, False, False]
    assert refused[REJECT_DUPLICATE].tolist() == [False, False, False, True, False]
    frames, tf = al.emit(T0 + 3.0)
    # refused samples are never used
    assert not np.isin(tf.value[:, 0], [99.0, 98.0]).any()
    at = {round(f - T0, 1): tf.value[i, 0] for i, f in enumerate(frames)}
    assert at[1.5] == 1.0 and at[2.0] == 2.0 and at[2.5] == 2.0 and at[3.0] == 3.0


def test_out_of_order_and_duplicate_refused_across_pushes():
    al = Aligner(NAMES, 10.0)
    al.push(*_arr([0, 1], [T0 + 2.0, T0 + 2.0]))
    r = al.push(*_arr([0, 0, 1], [T0 + 1.0, T0 + 2.0, T0 + 2.5]))
    assert r[REJECT_OUT_OF_ORDER].tolist() == [True, False, False]
    assert r[REJECT_DUPLICATE].tolist() == [False, True, False]


def test_out_of_order_against_the_newest_not_the_previous():
    # 3.0 then 1.0 (refused) then 2.0: still older than the newest accepted (3.0), so also refused
    al = Aligner(NAMES, 10.0)
    r = al.push(*_arr([0, 0, 0], [T0 + 3.0, T0 + 1.0, T0 + 2.0]))
    assert r[REJECT_OUT_OF_ORDER].tolist() == [False, True, True]


def test_equal_times_on_different_tags_are_fine():
    al = Aligner(NAMES, 10.0)
    r = al.push(*_arr([0, 1, 2, 2, 1, 0], [T0 + 1] * 3 + [T0 + 2] * 3, [1, 2, 3, 6, 5, 4]))
    assert not r[REJECT_OUT_OF_ORDER].any()
    assert not r[REJECT_DUPLICATE].any()
    _, tf = al.emit(T0 + 2)
    np.testing.assert_array_equal(tf.value[-1], [4.0, 5.0, 6.0])
    np.testing.assert_array_equal(tf.value[0], [1.0, 2.0, 3.0])


# --- late samples --------------------------------------------------------------------------------------------------


def test_late_sample_accepted_flagged_and_used_for_later_frames_only():
    al = Aligner(("a", "b"), 10.0)
    al.push(*_arr([0, 1, 0], [T0, T0, T0 + 2.0], [1.0, 10.0, 2.0]))
    _, tf1 = al.emit(T0 + 2.0)
    assert al.emitted_until == pytest.approx(T0 + 2.0)
    before = tf1.value.copy()

    # b at T0 + 1.8: newer than b's last accepted (T0) but older than frames already emitted
    r = al.push(*_arr([1, 0], [T0 + 1.8, T0 + 2.1], [20.0, 3.0]))
    assert r["late"].tolist() == [True, False]
    assert not r[REJECT_OUT_OF_ORDER].any() and not r[REJECT_DUPLICATE].any()
    assert al.late == 1
    np.testing.assert_array_equal(tf1.value, before)  # frames already emitted are not rewritten

    frames2, tf2 = al.emit(T0 + 2.2)
    np.testing.assert_allclose(frames2, [T0 + 2.1, T0 + 2.2], atol=1e-6)
    np.testing.assert_array_equal(tf2.value[:, 1], [20.0, 20.0])
    np.testing.assert_allclose(tf2.age[:, 1], [0.3, 0.4], atol=1e-6)
    np.testing.assert_array_equal(tf2.value[:, 0], [3.0, 3.0])


def test_late_sample_older_than_the_last_accepted_is_out_of_order_not_late():
    al = Aligner(("a",), 10.0)
    al.push(*_arr([0], [T0 + 1.0]))
    al.emit(T0 + 2.0)
    r = al.push(*_arr([0], [T0 + 0.5]))
    assert r[REJECT_OUT_OF_ORDER].tolist() == [True]
    assert r["late"].tolist() == [False]


# --- block-size invariance -----------------------------------------------------------------------------------------


def _stream(seed: int, n: int):
    """A stream in arrival order: irregular times per tag, plus some out-of-order and duplicate arrivals."""
    rng = np.random.default_rng(seed)
    t = T0 + 0.007 + np.sort(rng.uniform(0, 8.0, n))
    col = rng.integers(0, 3, n)
    v = rng.normal(size=n)
    q = rng.choice([0, 0, 0, 1, 2], n).astype(np.int8)
    # duplicates: repeat some samples right after themselves; out of order: swap some neighbours
    for i in rng.choice(n - 1, size=n // 20, replace=False):
        t[i + 1], col[i + 1] = t[i], col[i]
    for i in rng.choice(np.arange(1, n - 1), size=n // 20, replace=False):  # never the very first arrival
        t[i], t[i + 1] = t[i + 1], t[i]
        col[i], col[i + 1] = col[i + 1], col[i]
    return col, t, v, q


def _run(col, t, v, q, cuts: list[int], until_frac: list[float], rate: float):
    """Push the stream in consecutive batches; after each, emit up to a point no later than any sample to come."""
    al = Aligner(NAMES, rate)
    masks = {REJECT_OUT_OF_ORDER: [], REJECT_DUPLICATE: [], "late": []}
    frames, values, quals, ages = [], [], [], []
    bounds = [0, *sorted(set(cuts)), t.size]
    for j, (a, b) in enumerate(itertools.pairwise(bounds)):
        if a == b:
            continue
        r = al.push(col[a:b], t[a:b], v[a:b], q[a:b])
        for k in masks:
            masks[k].append(r[k])
        lo = t[: b].max() - 2.0
        hi = t[b:].min() if b < t.size else t.max()
        until = min(lo + (hi - lo) * until_frac[j % len(until_frac)], hi) - (1e-6 if b < t.size else 0.0)
        out = al.emit(until)
        if out is not None:
            frames.append(out[0])
            values.append(out[1].value)
            quals.append(out[1].quality)
            ages.append(out[1].age)
    out = al.emit(t.max())
    if out is not None:
        frames.append(out[0])
        values.append(out[1].value)
        quals.append(out[1].quality)
        ages.append(out[1].age)
    return ({k: np.concatenate(m) for k, m in masks.items()}, np.concatenate(frames), np.concatenate(values),
            np.concatenate(quals), np.concatenate(ages))


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 10_000), cuts=st.lists(st.integers(1, 299), max_size=30),
       until_frac=st.lists(st.floats(0.0, 1.0), min_size=1, max_size=5), rate=st.sampled_from([10.0, 50.0, 4.0]))
def test_block_size_invariance(seed, cuts, until_frac, rate):
    col, t, v, q = _stream(seed, 300)
    one = _run(col, t, v, q, [], [1.0], rate)
    many = _run(col, t, v, q, cuts, until_frac, rate)
    for k in (REJECT_OUT_OF_ORDER, REJECT_DUPLICATE):
        np.testing.assert_array_equal(one[0][k], many[0][k])
    assert not many[0]["late"].any()  # emission never ran ahead of samples still to come
    for a, b in zip(one[1:], many[1:], strict=True):
        np.testing.assert_array_equal(a, b)


def test_stream_really_contains_refusals():
    # guard for the property test above: the generated stream exercises both refusal reasons
    col, t, v, q = _stream(1, 300)
    masks = _run(col, t, v, q, [], [1.0], 10.0)[0]
    assert masks[REJECT_OUT_OF_ORDER].sum() > 0
    assert masks[REJECT_DUPLICATE].sum() > 0
