"""Parquet recordings (connectors/parquetrec.py): round trip, row groups per time slice, files written by other
tools, clear errors, and damage counted by row group (hypothesis flips bytes of real files).

What a Parquet file is (row groups, column chunks, pages, page CRC-32, the footer) is the Apache Parquet file
format specification (https://parquet.apache.org/docs/file-format/); the files here are read back by pyarrow,
the Arrow project's own implementation of it, as the outside reference.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from spanwatch.connectors.recording import ReadProblems, RecordingError, read_recording, write_recording
from spanwatch.rules.samples import SampleBatch

TAGS = ("a.speed", "b.tension", "c.diameter")


def _batches(n: int, seed: int = 0, start: float = 1_772_427_600.0, step: float = 0.05) -> list[SampleBatch]:
    rng = np.random.default_rng(seed)
    t = start + np.arange(n) * step + rng.integers(0, 1000, n) / 1e6  # whole microseconds
    tag = (np.arange(n) % 3).astype(np.int32)
    value = rng.normal(100.0, 30.0, n)
    value[::97] = np.nan
    quality = rng.integers(0, 3, n).astype(np.int8)
    b = SampleBatch(TAGS, tag, np.round(t * 1e6) / 1e6, value, quality, np.full(n, -1, np.int64))
    cut = n // 3
    return [SampleBatch(TAGS, *(getattr(b, f)[s] for f in ("tag", "t", "value", "quality", "ref")))
            for s in (slice(0, cut), slice(cut, None))]


def _read(path: Path, problems: ReadProblems | None = None, chunk_rows: int = 200_000) -> SampleBatch:
    got = list(read_recording(path, TAGS, problems=problems, chunk_rows=chunk_rows))
    return SampleBatch.concat(got) if got else SampleBatch.empty(TAGS)


def test_round_trip_keeps_every_sample_exactly(tmp_path):
    written = _batches(6000)
    path = tmp_path / "r.parquet"
    assert write_recording(path, written) == 6000
    problems = ReadProblems()
    got = _read(path, problems)
    want = SampleBatch.concat(written)
    np.testing.assert_array_equal(got.t, want.t)
    np.testing.assert_array_equal(got.tag, want.tag)
    np.testing.assert_array_equal(got.value, want.value)  # NaN where written
    nonfinite = ~np.isfinite(want.value)
    np.testing.assert_array_equal(got.quality, np.where(nonfinite, 2, want.quality))  # a NaN enters as bad quality
    assert problems.counts == {"non-finite value": int(nonfinite.sum())}
    assert got.ref.tolist() == list(range(1, 6001))  # row numbers, the first row is 1


def test_one_row_group_per_minute_in_time_order(tmp_path):
    path = tmp_path / "r.parquet"
    write_recording(path, _batches(6000, step=0.05))  # 300 s from a whole minute
    meta = pq.ParquetFile(path).metadata
    assert meta.num_row_groups == 5
    names = [meta.schema.column(j).name for j in range(meta.num_columns)]
    assert names == ["time", "tag", "value", "quality"]
    for i in range(meta.num_row_groups):
        stats = meta.row_group(i).column(0).statistics
        lo, hi = (v.timestamp() for v in (stats.min, stats.max))
        assert lo // 60 == hi // 60  # a time slice of 60 s
        assert meta.row_group(i).column(2).compression == "ZSTD"
    table = pq.read_table(path)
    assert table.schema.field("time").type == pa.timestamp("us", tz="UTC")


def test_chunks_of_any_size_read_the_same(tmp_path):
    path = tmp_path / "r.parquet"
    write_recording(path, _batches(6000))
    whole = _read(path)
    for chunk_rows in (1, 1000, 1_000_000):
        part = _read(path, chunk_rows=chunk_rows)
        np.testing.assert_array_equal(part.t, whole.t)
        np.testing.assert_array_equal(part.ref, whole.ref)


def test_a_file_written_by_another_tool_with_other_column_types(tmp_path):
    times = ["2026-03-02T05:00:00.020Z", "2026-03-02T06:00:00.04+01:00", "bad", "2026-03-02T05:00:00.060Z", None]
    table = pa.table({"time": pa.array(times, pa.string()), "tag": ["a.speed", "b.tension", "a.speed", "zz", "a.speed"],
                      "value": pa.array([1, 2, 3, 4, 5], pa.int32()), "quality": pa.array([0, 1, 2, 0, 7], pa.int8())})
    path = tmp_path / "other.parquet"
    pq.write_table(table, path)
    problems = ReadProblems()
    got = _read(path, problems)
    assert got.ref.tolist() == [1, 2]
    assert got.t.tolist() == [1772427600.02, 1772427600.04]
    assert got.quality.tolist() == [0, 1]
    assert problems.lines["malformed"] == [3, 5] and problems.counts["malformed"] == 2
    assert problems.lines["unknown tag: zz"] == [4]


def test_epoch_seconds_and_no_quality_column(tmp_path):
    table = pa.table({"time": [1772427600.02, 1772427600.04], "tag": ["a.speed", "c.diameter"], "value": [1.5, 2.5]})
    path = tmp_path / "epoch.parquet"
    pq.write_table(table, path)
    got = _read(path)
    assert got.t.tolist() == [1772427600.02, 1772427600.04] and got.quality.tolist() == [0, 0]


@pytest.mark.parametrize(("columns", "said"), [
    ({"time": pa.array([1, 2], pa.int64()), "tag": ["a", "b"], "value": [1.0, 2.0]}, "column time: expected"),
    ({"time": [1.0, 2.0], "tag": [1, 2], "value": [1.0, 2.0]}, "column tag: expected text"),
    ({"time": [1.0, 2.0], "tag": ["a", "b"]}, "column value: expected a column 'value'"),
    ({"time": [1.0, 2.0], "tag": ["a", "b"], "value": ["x", "y"]}, "column value: expected numbers"),
])
def test_a_column_of_the_wrong_kind_is_one_clear_error(tmp_path, columns, said):
    path = tmp_path / "wrong.parquet"
    pq.write_table(pa.table(columns), path)
    with pytest.raises(RecordingError, match=said):
        _read(path)


def test_a_file_cut_short_by_a_killed_writer_is_one_clear_error(tmp_path):
    path = tmp_path / "cut.parquet"
    write_recording(path, _batches(3000))
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(RecordingError, match="not a readable Parquet file"):
        _read(path)
    path.write_bytes(b"time,tag,value\n")
    with pytest.raises(RecordingError, match="not a readable Parquet file"):
        _read(path)


def test_a_damaged_row_group_costs_its_own_rows_only(tmp_path):
    path = tmp_path / "r.parquet"
    write_recording(path, _batches(6000))
    meta = pq.ParquetFile(path).metadata
    col = meta.row_group(2).column(2)  # the values of the third minute
    data = bytearray(path.read_bytes())
    at = col.data_page_offset + col.total_compressed_size // 2
    data[at] ^= 0xFF
    path.write_bytes(bytes(data))
    problems = ReadProblems()
    got = _read(path, problems)
    lost = meta.row_group(2).num_rows
    first = 1 + sum(meta.row_group(i).num_rows for i in range(2))
    assert len(got) == 6000 - lost
    assert not set(got.ref.tolist()) & set(range(first, first + lost))
    [(reason, count)] = [(k, v) for k, v in problems.counts.items() if k.startswith("damaged file")]
    assert count == lost and problems.lines[reason] == [first]


# --- fuzz: bytes of a real file damaged (hypothesis) ------------------------------------------------------------------

_ORIGINAL: dict[str, tuple[bytes, SampleBatch, int]] = {}


def _original() -> tuple[bytes, SampleBatch, int]:
    if not _ORIGINAL:
        with tempfile.TemporaryDirectory() as d:
            path = Path(d) / "o.parquet"
            write_recording(path, _batches(2400, step=0.1))
            data = path.read_bytes()
            footer = int.from_bytes(data[-8:-4], "little") + 8
            _ORIGINAL["o"] = (data, _read(path), len(data) - footer)
    return _ORIGINAL["o"]


@settings(deadline=None, max_examples=300, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_fuzz_damaged_parquet_never_crashes_and_never_passes_off_damage(data):
    original, want, footer_at = _original()
    damaged = bytearray(original)
    in_pages = data.draw(st.booleans())
    for _ in range(data.draw(st.integers(1, 4))):
        hi = footer_at - 1 if in_pages else len(damaged) - 1
        pos = data.draw(st.integers(4, hi))
        damaged[pos] = data.draw(st.integers(0, 255))
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "f.parquet"
        path.write_bytes(bytes(damaged))
        problems = ReadProblems()
        try:
            got = _read(path, problems, chunk_rows=data.draw(st.sampled_from([1, 500, 200_000])))
        except RecordingError:
            return  # the footer cannot be read: one clear error
    lost = sum(v for k, v in problems.counts.items() if k.startswith("damaged file"))
    assert problems.rows == len(want)
    if in_pages:
        # pages carry a CRC-32 and the footer is intact: a row is used as written, or counted with its row group
        assert len(got) + lost + sum(v for k, v in problems.counts.items()
                                     if not k.startswith(("damaged file", "non-finite"))) == len(want)
        where = {r: i for i, r in enumerate(want.ref.tolist())}
        idx = np.array([where[r] for r in got.ref.tolist()], dtype=np.int64)
        np.testing.assert_array_equal(got.t, want.t[idx])
        np.testing.assert_array_equal(got.value, want.value[idx])
        np.testing.assert_array_equal(got.tag, want.tag[idx])


# --- replay: a recording and its Parquet copy -----------------------------------------------------------------------

REPO = Path(__file__).resolve().parent.parent


def test_replay_of_a_fault_recording_and_its_parquet_copy_raise_the_same_alarms(tmp_path):
    import subprocess
    import sys

    from spanwatch.monitor.line import load_line
    from spanwatch.monitor.replay import replay
    from spanwatch.monitor.simline import SimulatedLine
    from spanwatch.monitor.simline.scenario import parse_scenario

    config = REPO / "config" / "quillmere-q2.toml"
    data = {"scenario": {"name": "copy", "config": str(config), "duration": "4 min", "seed": 7},
            "speed": [{"at": "0 s", "to": "400 m/min"}],
            "fault": [{"kind": "cof_drop", "target": "pull_1", "start": "90 s", "end": "200 s", "size": 0.10}]}
    sc, cfg = parse_scenario(data, tmp_path / "s.toml")
    csv = tmp_path / "rec.csv.gz"
    write_recording(csv, [SimulatedLine(load_line(cfg), sc).advance(240.0)])
    names = tuple(load_line(config).tags)
    copy = tmp_path / "rec.parquet"
    write_recording(copy, read_recording(csv, names))
    line = load_line(config)
    a = replay(line, csv, f"sqlite:///{tmp_path / 'a.db'}")
    b = replay(line, copy, f"sqlite:///{tmp_path / 'b.db'}")
    assert a.raised and a.raised == b.raised and a.samples == b.samples and a.frames == b.frames
    proc = subprocess.run([sys.executable, "-m", "spanwatch", "replay", str(copy), "--config", str(config),
                           "--db", str(tmp_path / "c.db"), "--no-progress"], cwd=REPO, capture_output=True,
                          text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert f"replayed {a.samples} samples" in proc.stdout
