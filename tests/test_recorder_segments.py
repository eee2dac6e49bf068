"""The recorder's files read back exactly, through the project's one reader, and its rotation rule.

Batches go straight into :class:`~spanwatch.monitor.recorder.Recorder` (no connector), with a clock the test
steps, so the segments are known in advance from the documented rule (a segment is closed at the first sync
at which it is ``rotate_seconds`` old). What is checked: every sample comes back with its time to the
microsecond, its value bit for bit (a float64 written as its shortest repr reads back as the same float,
Python's float repr contract, "Floating Point Arithmetic: Issues and Limitations" in the Python tutorial),
its quality, and bad (NaN) samples are kept and counted, not dropped.
"""

from __future__ import annotations

import asyncio

import numpy as np
import pytest
from spanwatch.connectors.recording import ReadProblems, read_recording
from spanwatch.monitor.recorder import Recorder, segment_path
from spanwatch.rules.samples import SampleBatch

TAGS = ("q2.s5.tension", "q2.line.speed_ref")


def _batch(t0: float, n: int, rng: np.random.Generator) -> SampleBatch:
    tag = np.tile(np.arange(2, dtype=np.int32), n)
    t = t0 + np.repeat(np.arange(n) * 0.02, 2) + 1e-6 * rng.integers(0, 999, 2 * n)
    value = rng.normal(300.0, 50.0, 2 * n)
    quality = rng.choice(np.array([0, 0, 0, 1, 2], dtype=np.int8), 2 * n)
    value[quality == 2] = np.nan  # what a connector hands on for a bad value
    return SampleBatch(TAGS, tag, t, value, quality, np.arange(2 * n, dtype=np.int64))


def _read(path):  # type: ignore[no-untyped-def]
    problems = ReadProblems()
    got = [b for b in read_recording(path, TAGS, problems=problems)]
    return (SampleBatch.concat(got) if got else SampleBatch.empty(TAGS)), problems


def _same(a: SampleBatch, b: SampleBatch) -> None:
    a, b = a.sorted_by_time(), b.sorted_by_time()
    assert np.array_equal(a.tag, b.tag)
    assert np.array_equal(np.round(a.t * 1e6), np.round(b.t * 1e6))
    assert np.array_equal(a.value, b.value, equal_nan=True)
    assert np.array_equal(a.quality, b.quality)


@pytest.mark.parametrize("name", ["q2.csv.gz", "q2.csv"])
def test_segments_by_time_hold_every_sample_exactly(tmp_path, name):
    rng = np.random.default_rng(7)
    now = [1772427600.0]  # 2026-03-02T05:00:00Z
    rec = Recorder(tmp_path / name, TAGS, rotate_seconds=10.0, clock=lambda: now[0])
    sent: list[SampleBatch] = []

    async def run() -> None:
        for _ in range(9):  # a sync every 4 s of the clock: at 0, 4, ..., 32
            b = _batch(now[0], 50, rng)
            sent.append(b)
            rec.receive(b)
            await rec.flush()
            now[0] += 4.0
        await rec.finish()

    asyncio.run(run())
    # opened at 0; at 12 s it is 12 s old: closed, the next opened at 12; closed at 24, the last opened at 24
    expected = [segment_path(tmp_path / name, i + 1, 1772427600.0 + 12.0 * i) for i in range(3)]
    assert sorted(tmp_path.iterdir()) == expected
    assert expected[1].name == name.replace("q2", "q2-0002-20260302T050012Z")
    for path, part in zip(expected, (sent[0:4], sent[4:7], sent[7:9]), strict=True):
        got, problems = _read(path)
        want = SampleBatch.concat(part)
        assert problems.counts == {"non-finite value": int((want.quality == 2).sum())}
        _same(got, want)


def test_size_rotation_and_parquet_conversion_of_closed_segments(tmp_path):
    rng = np.random.default_rng(11)
    rec = Recorder(tmp_path / "r.csv.gz", TAGS, rotate_bytes=4096, parquet=True)
    sent: list[SampleBatch] = []

    async def run() -> None:
        for k in range(12):
            b = _batch(1772427600.0 + k, 50, rng)
            sent.append(b)
            rec.receive(b)
            await rec.flush()
        await rec.finish()

    asyncio.run(run())
    files = sorted(tmp_path.iterdir())
    assert len(files) >= 2 and all(f.suffix == ".parquet" for f in files), files
    assert [int(f.name.split("-")[1]) for f in files] == list(range(1, len(files) + 1))
    got = SampleBatch.concat([_read(f)[0] for f in files])
    _same(got, SampleBatch.concat(sent))
    assert rec.stats.samples == len(got)
