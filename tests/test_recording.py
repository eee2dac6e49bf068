"""Recordings (connectors/recording.py): round trip, ISO 8601 times, and bad rows counted with line numbers.

Times are checked against Python's own ISO 8601 parser (``datetime.fromisoformat``), which is
independent of the vectorised numpy parser the reader uses for speed.
"""

from __future__ import annotations

import gzip
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest
from spanwatch.connectors.recording import ReadProblems, parse_times, read_recording, write_recording
from spanwatch.rules.samples import SampleBatch

TAGS = ("a.speed", "b.tension", "c.diameter")


def _read_all(path: Path, tags: tuple[str, ...] = TAGS, chunk_rows: int = 200_000,
              problems: ReadProblems | None = None) -> SampleBatch:
    batches = list(read_recording(path, tags, chunk_rows=chunk_rows, problems=problems))
    return SampleBatch.concat(batches) if batches else SampleBatch.empty(tags)


def _write_text(path: Path, lines: list[str]) -> None:
    text = "\n".join(lines) + "\n"
    if path.suffix == ".gz":
        path.write_bytes(gzip.compress(text.encode("utf-8")))
    else:
        path.write_text(text, encoding="utf-8")


def _random_batch(rng: np.random.Generator, n: int, start: float = 1_772_427_600.0) -> SampleBatch:
    # times on a millisecond grid: the ISO writer keeps milliseconds, the epoch writer three decimals
    t = start + np.sort(rng.integers(0, 600_000, n)) / 1000.0
    tag = rng.integers(0, len(TAGS), n).astype(np.int32)
    value = np.round(rng.normal(100.0, 50.0, n), 6)
    quality = rng.integers(0, 3, n).astype(np.int8)
    return SampleBatch(TAGS, tag, t, value, quality, np.full(n, -1, np.int64))


# --- round trip ----------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("suffix", [".csv", ".csv.gz"])
@pytest.mark.parametrize("time_format", ["iso", "epoch"])
def test_write_read_round_trip(tmp_path, suffix, time_format):
    rng = np.random.default_rng(7)
    batches = [_random_batch(rng, 500), _random_batch(rng, 300, start=1_772_428_300.0)]
    path = tmp_path / f"rec{suffix}"
    rows = write_recording(path, batches, time_format=time_format)
    assert rows == 800

    raw = path.read_bytes()
    if suffix.endswith(".gz"):
        assert raw[:2] == b"\x1f\x8b", "a .gz recording must be gzip-compressed (RFC 1952 magic bytes)"
    else:
        assert raw.startswith(b"time,tag,value,quality\n")

    problems = ReadProblems()
    got = _read_all(path, problems=problems)
    assert problems.counts == {}
    # the writer sorts each batch by time; compare against the same order built here
    want = SampleBatch.concat([b.sorted_by_time() for b in batches])
    assert got.tags == TAGS
    np.testing.assert_array_equal(got.tag, want.tag)
    np.testing.assert_allclose(got.t, want.t, rtol=0, atol=5e-7)
    np.testing.assert_allclose(got.value, want.value, rtol=1e-9)
    np.testing.assert_array_equal(got.quality, want.quality)
    # ref is the line number, header is line 1
    np.testing.assert_array_equal(got.ref, np.arange(2, 802))


def test_iso_written_times_are_utc_per_python_parser(tmp_path):
    t = np.array([1_772_427_600.02, 1_772_427_601.5])
    b = SampleBatch(TAGS, np.zeros(2, np.int32), t, np.array([1.0, 2.0]), np.zeros(2, np.int8), np.zeros(2, np.int64))
    path = tmp_path / "r.csv"
    write_recording(path, [b], time_format="iso")
    lines = path.read_text(encoding="utf-8").splitlines()[1:]
    for line, want in zip(lines, t, strict=True):
        stamp = line.split(",")[0]
        # Python's ISO 8601 parser (independent of the writer) must see an aware UTC time
        dt = datetime.fromisoformat(stamp)
        assert dt.utcoffset() is not None and dt.utcoffset().total_seconds() == 0
        assert dt.timestamp() == pytest.approx(want, abs=1e-6)


def test_empty_recording_with_header_only(tmp_path):
    path = tmp_path / "empty.csv"
    _write_text(path, ["time,tag,value,quality"])
    problems = ReadProblems()
    assert list(read_recording(path, TAGS, problems=problems)) == []
    assert problems.counts == {}


def test_header_is_required(tmp_path):
    path = tmp_path / "nohead.csv"
    _write_text(path, ["2026-03-02T05:00:00Z,a.speed,1.0,good"])
    with pytest.raises(ValueError, match="line 1"):
        list(read_recording(path, TAGS))


def test_three_column_file_reads_as_good_quality(tmp_path):
    path = tmp_path / "three.csv"
    _write_text(path, ["time,tag,value", "1772427600.0,a.speed,1.5", "1772427600.1,b.tension,2.5"])
    got = _read_all(path)
    np.testing.assert_array_equal(got.quality, [0, 0])
    np.testing.assert_array_equal(got.value, [1.5, 2.5])


@pytest.mark.parametrize(("word", "code"), [("good", 0), ("uncertain", 1), ("bad", 2), ("0", 0), ("1", 1),
                                            ("2", 2), ("", 0), ("GOOD", 0), (" Bad ", 2)])
def test_quality_words(tmp_path, word, code):
    path = tmp_path / "q.csv"
    _write_text(path, ["time,tag,value,quality", f"1772427600.0,a.speed,1.0,{word}"])
    problems = ReadProblems()
    got = _read_all(path, problems=problems)
    assert problems.counts == {}
    assert got.quality.tolist() == [code]


# --- ISO 8601 with offsets -----------------------------------------------------------------------------------------

ISO_CASES = [
    "2026-03-02T05:00:00.020Z",
    "2026-03-02T06:00:00.02+01:00",
    "2026-03-01T23:30:00.5-05:30",
    "2026-03-02T10:45:00+05:45",
    "2026-03-02T04:30:00-00:30",
    "2026-03-02T05:00:00.123456+00:00",
    "2026-06-30T23:59:59.999+14:00",
    "2026-03-02 05:00:00+01:00",
    "2026-03-02T05:00:00+0100",
]


@pytest.mark.parametrize("stamp", ISO_CASES)
def test_iso_offsets_match_python_parser(stamp):
    # reference: Python's datetime.fromisoformat (3.11 reads 'Z' and basic-format offsets)
    want = datetime.fromisoformat(stamp).timestamp()
    got, ok = parse_times([stamp])
    assert ok.tolist() == [True]
    assert got[0] == pytest.approx(want, abs=1e-6)


def test_iso_mixed_column_each_row_its_own_offset():
    # a chunk mixes offsets; each row must use its own (the reader groups rows by offset)
    col = [*ISO_CASES, "1772427600.25"]
    got, ok = parse_times(col)
    want = [datetime.fromisoformat(s).timestamp() for s in ISO_CASES] + [1772427600.25]
    assert ok.all()
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-6)


def test_same_instant_in_three_offsets():
    col = ["2026-03-02T05:00:00Z", "2026-03-02T06:00:00+01:00", "2026-03-01T23:30:00-05:30"]
    got, ok = parse_times(col)
    assert ok.all()
    want = datetime(2026, 3, 2, 5, 0, 0, tzinfo=UTC).timestamp()
    np.testing.assert_allclose(got, [want] * 3, rtol=0, atol=1e-6)


def test_one_bad_stamp_does_not_spoil_its_offset_group():
    col = ["2026-03-02T05:00:00+01:00", "2026-13-45T05:00:00+01:00", "2026-03-02T05:00:01+01:00"]
    got, ok = parse_times(col)
    assert ok.tolist() == [True, False, True]
    assert got[0] == pytest.approx(datetime.fromisoformat(col[0]).timestamp(), abs=1e-6)
    assert got[2] == pytest.approx(datetime.fromisoformat(col[2]).timestamp(), abs=1e-6)


@pytest.mark.parametrize("stamp", ["2026-03-02T05:00:00", "2026-03-02T05:00:00.5", "yesterday", "", "nan", "inf"])
def test_unusable_times_refused(stamp):
    # a time without an offset is ambiguous (local? UTC?) and must be refused, not guessed
    _, ok = parse_times([stamp])
    assert ok.tolist() == [False]


# --- bad rows ------------------------------------------------------------------------------------------------------

GOOD = "2026-03-02T05:00:{:02d}.000Z,{},{},good"

# (line content, reason or None for a good row); line numbers are assigned below, header is line 1
BAD_FILE: list[tuple[str, str | None]] = [
    (GOOD.format(0, "a.speed", 1.0), None),
    ("2026-03-02T05:00:01.000Z,a.speed,1.0,good,extra", "malformed"),  # too many columns
    ("2026-03-02T05:00:01.000Z,a.speed", "malformed"),  # too few columns
    (GOOD.format(2, "b.tension", 2.0), None),
    ("not-a-time,a.speed,1.0,good", "malformed"),  # unparsable time
    ("2026-03-02T05:00:03.000,a.speed,1.0,good", "malformed"),  # time without offset
    ("2026-03-02T05:00:03.000Z,a.speed,one,good", "malformed"),  # unparsable value
    ("2026-03-02T05:00:03.000Z,a.speed,1.0,excellent", "malformed"),  # unknown quality word
    ("2026-03-02T05:00:03.000Z,,1.0,good", "malformed"),  # empty tag
    ("", "malformed"),  # blank line
    (GOOD.format(4, "c.diameter", "nan"), "non-finite value"),
    (GOOD.format(5, "c.diameter", "inf"), "non-finite value"),
    (GOOD.format(5, "b.tension", "-inf"), "non-finite value"),
    (GOOD.format(6, "x.unknown", 9.0), "unknown tag: x.unknown"),
    (GOOD.format(7, "a.speed", 3.0), None),
    (GOOD.format(8, "x.unknown", 9.0), "unknown tag: x.unknown"),
    (GOOD.format(9, "y.other", 9.0), "unknown tag: y.other"),
    (GOOD.format(10, "x.unknown", 9.0), "unknown tag: x.unknown"),
    (GOOD.format(11, "b.tension", 4.0), None),
]


def _bad_file(tmp_path: Path, suffix: str) -> Path:
    path = tmp_path / f"bad{suffix}"
    _write_text(path, ["time,tag,value,quality"] + [line for line, _ in BAD_FILE])
    return path


def _expected_lines(reason: str) -> list[int]:
    return [i + 2 for i, (_, r) in enumerate(BAD_FILE) if r == reason]


@pytest.mark.parametrize("suffix", [".csv", ".csv.gz"])
@pytest.mark.parametrize("chunk_rows", [1, 3, 200_000])
def test_bad_rows_counted_with_line_numbers(tmp_path, suffix, chunk_rows):
    path = _bad_file(tmp_path, suffix)
    problems = ReadProblems()
    got = _read_all(path, chunk_rows=chunk_rows, problems=problems)  # must not raise

    malformed = _expected_lines("malformed")
    nonfinite = _expected_lines("non-finite value")
    assert problems.counts["malformed"] == len(malformed)
    assert sorted(problems.lines["malformed"]) == malformed  # order: see test_problem_lines_in_file_order
    assert problems.counts["non-finite value"] == len(nonfinite)
    assert problems.lines["non-finite value"] == nonfinite
    assert set(problems.counts) == {"malformed", "non-finite value", "unknown tag: x.unknown", "unknown tag: y.other"}

    # the good rows and the non-finite ones (as bad quality) are still read, with their own line numbers
    good = _expected_lines(None)
    assert sorted(got.ref.tolist()) == sorted(good + nonfinite)
    for ref, tag, value, quality in zip(got.ref, got.tag, got.value, got.quality, strict=True):
        line = BAD_FILE[int(ref) - 2][0]
        fields = line.split(",")
        assert TAGS[int(tag)] == fields[1]
        if int(ref) in nonfinite:
            assert not np.isfinite(value)
            assert quality == 2, "a NaN/inf value enters the pipeline as bad quality"
        else:
            assert value == float(fields[2])
            assert quality == 0


@pytest.mark.parametrize("chunk_rows", [1, 3, 200_000])
def test_unknown_tags_reported_once_with_all_rows(tmp_path, chunk_rows):
    path = _bad_file(tmp_path, ".csv")
    problems = ReadProblems()
    _read_all(path, chunk_rows=chunk_rows, problems=problems)
    x_lines = _expected_lines("unknown tag: x.unknown")
    y_lines = _expected_lines("unknown tag: y.other")
    assert problems.counts["unknown tag: x.unknown"] == len(x_lines) == 3
    assert problems.counts["unknown tag: y.other"] == len(y_lines) == 1
    # reported once: one example line (the first), whatever the chunk size
    assert problems.lines["unknown tag: x.unknown"] == x_lines[:1]
    assert problems.lines["unknown tag: y.other"] == y_lines[:1]


def test_many_unknown_rows_counted_in_full(tmp_path):
    lines = ["time,tag,value,quality"] + [f"{1772427600 + i}.0,z.ghost,1.0,good" for i in range(250)]
    lines.append("1772427900.0,a.speed,1.0,good")
    path = tmp_path / "ghost.csv"
    _write_text(path, lines)
    problems = ReadProblems()
    got = _read_all(path, problems=problems)
    assert problems.counts == {"unknown tag: z.ghost": 250}
    assert problems.lines["unknown tag: z.ghost"] == [2]
    assert got.ref.tolist() == [252]


def test_problem_lines_in_file_order(tmp_path):
    # "the first few of each" (ReadProblems docstring): the kept examples are the first bad lines in the file,
    # whatever made each row bad (wrong column count vs unparsable time)
    lines = ["time,tag,value,quality", "not-a-time,a.speed,1.0,good"] + ["short,row"] * 30
    path = tmp_path / "order.csv"
    _write_text(path, lines)
    problems = ReadProblems(keep=5)
    _read_all(path, problems=problems)
    assert problems.counts == {"malformed": 31}
    assert problems.lines["malformed"] == [2, 3, 4, 5, 6]


def test_problem_lines_keep_only_the_first_few_but_count_all(tmp_path):
    lines = ["time,tag,value,quality"] + ["garbage"] * 50
    path = tmp_path / "garbage.csv"
    _write_text(path, lines)
    problems = ReadProblems(keep=20)
    assert len(_read_all(path, problems=problems)) == 0
    assert problems.counts == {"malformed": 50}
    assert problems.lines["malformed"] == list(range(2, 22))
