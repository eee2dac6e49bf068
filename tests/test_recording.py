"""Recordings (connectors/recording.py): round trip, ISO 8601 times, and bad rows counted with line numbers.

Times are checked against Python's own ISO 8601 parser (``datetime.fromisoformat``), which is
independent of the vectorised numpy parser the reader uses for speed.
"""

from __future__ import annotations

import gzip
import math
import re
import subprocess
import sys
import tempfile
import zlib
from collections import Counter
from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from spanwatch.connectors.recording import (
    ReadProblems,
    RecordingError,
    parse_times,
    read_recording,
    write_recording,
)
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


def test_long_column_matches_python_parser():
    # more rows than the vectorised parser takes in one pass, every offset form, a few unreadable
    rng = np.random.default_rng(3)
    n = 70_000
    t = 1_772_427_600 + rng.integers(0, 10**6, n) * 1e-3 * 37
    minutes = [0, 60, -330, 345, 840]  # Z, +01:00, -05:30, +05:45, +14:00

    def stamp(x: float, i: int) -> str:
        dt = datetime.fromtimestamp(x, timezone(timedelta(minutes=minutes[i % 5])))
        text = dt.isoformat(timespec=("milliseconds", "microseconds", "seconds")[i % 3])
        return text.replace("+00:00", "Z")

    col = [stamp(x, i) for i, x in enumerate(t)]
    for i in range(0, n, 9973):
        col[i] = col[i].replace("T", "X", 1).replace("-", "/", 1)  # unreadable
    got, ok = parse_times(col)
    want = []
    for s in col:
        try:
            want.append(datetime.fromisoformat(s).timestamp())
        except ValueError:
            want.append(math.nan)
    want = np.array(want)
    np.testing.assert_array_equal(ok, np.isfinite(want))
    np.testing.assert_allclose(got[ok], want[ok], rtol=0, atol=1e-6)


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


# --- bad bytes: every row that is still well-formed is used --------------------------------------------------------
# The reference for "well-formed" below is written independently of the reader: Python's own UTF-8 decoder, float()
# and datetime.fromisoformat (ISO 8601 with a UTC offset) applied line by line, where a line ends at LF (a CR before it
# is part of the line ending). The reader's documented rules it restates: 3 or 4 comma-separated fields (the
# quality column may be left off a row), a non-empty tag, a quality word, a time within 1970..2200 and not alone more
# than a day away from the rows around it ("bad time"), a known tag.

HEADER4 = b"time,tag,value,quality"
QUALITY_WORDS = {"good": 0, "uncertain": 1, "bad": 2, "0": 0, "1": 1, "2": 2, "": 0}
JUMP = 86_400.0  # read_recording's default time_jump
T_MIN, T_MAX = 0.0, 7_258_118_400.0  # 1970-01-01 and 2200-01-01 (UTC), epoch seconds


def _ref_time(text: str) -> float | None:
    text = text.strip()
    try:
        return float(text)
    except ValueError:
        pass
    try:
        dt = datetime.fromisoformat(text)
    except ValueError:
        return None
    if dt.tzinfo is None or dt.utcoffset() is None:
        return None
    try:
        return dt.timestamp()
    except (OverflowError, ValueError, OSError):
        return None


def reference_read(data: bytes, known: tuple[str, ...] = TAGS) -> dict[int, tuple]:
    """Line number -> ("used", tag, t, value, quality) | ("malformed",) | ("bad time",) | ("unknown", tag)."""
    lines = data.split(b"\n")
    if lines and lines[-1] == b"":
        lines.pop()  # the LF that ends the last line does not start another
    header = lines[0].removesuffix(b"\r")
    width = 4 if header == HEADER4 else 3
    out: dict[int, tuple] = {}
    timed: list[tuple[int, float]] = []  # (line, time) of rows whose time parsed and is finite and in range
    for no, raw in enumerate(lines[1:], start=2):
        raw = raw.removesuffix(b"\r")
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError:
            out[no] = ("malformed",)
            continue
        fields = text.split(",")
        if len(fields) == 3 and width == 4:
            fields.append("")
        if len(fields) != width:
            out[no] = ("malformed",)
            continue
        t = _ref_time(fields[0])
        if t is not None and math.isfinite(t) and T_MIN <= t < T_MAX:
            timed.append((no, t))
        try:
            value = float(fields[2])
        except ValueError:
            value = None
        tag = fields[1].strip().strip('"')
        q = QUALITY_WORDS.get(fields[3].strip().lower(), -1) if width == 4 else 0
        if t is None or value is None or q < 0 or not tag:
            out[no] = ("malformed",)
        elif not (math.isfinite(t) and T_MIN <= t < T_MAX):
            out[no] = ("bad time",)
        elif tag not in known:
            out[no] = ("unknown", tag)
        else:
            out[no] = ("used", tag, t, value, 2 if not math.isfinite(value) else q)
    # a time alone more than a day away from both its neighbours (which are within a day of each other)
    for k in range(1, len(timed) - 1):
        (_, left), (no, t), (_, right) = timed[k - 1], timed[k], timed[k + 1]
        if abs(t - left) > JUMP and abs(right - t) > JUMP and abs(right - left) <= JUMP and out[no][0] != "malformed":
            out[no] = ("bad time",)
    return out


def _check_against_reference(data: bytes, got: SampleBatch, problems: ReadProblems, known=TAGS) -> None:
    want = reference_read(data, known)
    used = {no: r for no, r in want.items() if r[0] == "used"}
    assert sorted(got.ref.tolist()) == sorted(used), "exactly the well-formed rows are used"
    for ref, tag, t, value, quality in zip(got.ref.tolist(), got.tag, got.t, got.value, got.quality, strict=True):
        _, wtag, wt, wvalue, wq = used[ref]
        assert known[int(tag)] == wtag
        assert t == pytest.approx(wt, abs=1e-6)
        assert (value == wvalue) or (math.isnan(value) and math.isnan(wvalue))
        assert quality == wq
    for reason, kind in (("malformed", "malformed"), ("bad time", "bad time")):
        lines = [no for no, r in want.items() if r[0] == kind]
        assert problems.counts.get(reason, 0) == len(lines), reason
        assert problems.lines.get(reason, []) == lines[: problems.keep], f"{reason}: true line numbers, file order"
    unknown = Counter(r[1] for r in want.values() if r[0] == "unknown")
    assert {k.removeprefix("unknown tag: "): v for k, v in problems.counts.items()
            if k.startswith("unknown tag: ")} == unknown
    nonfinite = [no for no, r in used.items() if not math.isfinite(r[3])]
    assert problems.counts.get("non-finite value", 0) == len(nonfinite)


def _plain_file(n: int, *, iso: bool = True, seed: int = 0) -> bytes:
    rng = np.random.default_rng(seed)
    t0 = 1_772_427_600.0
    rows = [HEADER4.decode()]
    for i in range(n):
        t = t0 + i * 0.25
        stamp = (datetime.fromtimestamp(t, UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")
                 if iso else f"{t:.3f}")
        rows.append(f"{stamp},{TAGS[i % 3]},{rng.normal(100, 20):.6g},{('good', 'bad', 'uncertain', '')[i % 4]}")
    return ("\n".join(rows) + "\n").encode()


def test_invalid_utf8_byte_costs_only_its_own_row(tmp_path):
    # Seen: one invalid UTF-8 byte dropped every row after it (and the wrong line number was reported).
    data = _plain_file(5000)
    lines = data.split(b"\n")
    lines[2500] = lines[2500][:30] + b"\xff" + lines[2500][30:]  # line 2501 (the header is line 1)
    damaged = b"\n".join(lines)
    path = tmp_path / "utf8.csv"
    path.write_bytes(damaged)
    for chunk_rows in (7, 1000, 200_000):
        problems = ReadProblems()
        got = _read_all(path, chunk_rows=chunk_rows, problems=problems)
        assert problems.counts == {"malformed": 1}
        assert problems.lines["malformed"] == [2501]
        assert len(got) == 4999
        _check_against_reference(damaged, got, problems)


@pytest.mark.parametrize("stamp", ["nan", "inf", "-inf", "1e30", "-1e30", "1e308", "-5", "9999-12-31T23:59:59Z",
                                   "0001-01-01T00:00:00Z", "2230-01-01T00:00:00+01:00"])
def test_absurd_times_are_counted_as_bad_time(tmp_path, stamp):
    # Seen: a time of 1e30 crashed the replay. NaN, infinite and absurd times are counted, the other rows used.
    lines = _plain_file(40).decode().splitlines()
    lines[21] = f"{stamp},a.speed,1.0,good"
    path = tmp_path / "t.csv"
    data = ("\n".join(lines) + "\n").encode()
    path.write_bytes(data)
    problems = ReadProblems()
    got = _read_all(path, chunk_rows=5, problems=problems)
    assert problems.counts == {"bad time": 1}
    assert problems.lines["bad time"] == [22]
    assert len(got) == 39
    _check_against_reference(data, got, problems)


@pytest.mark.parametrize("chunk_rows", [1, 2, 5, 200_000])
def test_one_time_far_from_its_neighbours_is_bad_time(tmp_path, chunk_rows):
    # One row a year ahead in the middle of a file (a clock glitch) is counted; a real gap of two days
    # between two runs of rows is not.
    lines = _plain_file(30).decode().splitlines()
    lines[10] = "2027-03-02T05:00:00.000Z,b.tension,1.0,good"  # a year after its neighbours
    later = [f"{1_772_427_600 + 2 * 86_400 + i}.5,c.diameter,2.0,good" for i in range(5)]  # two days later
    data = ("\n".join(lines + later) + "\n").encode()
    path = tmp_path / "jump.csv"
    path.write_bytes(data)
    problems = ReadProblems()
    got = _read_all(path, chunk_rows=chunk_rows, problems=problems)
    assert problems.counts == {"bad time": 1}
    assert problems.lines["bad time"] == [11]
    assert len(got) == 29 + 5
    _check_against_reference(data, got, problems)


def test_misaligned_rows_in_one_chunk_are_not_merged(tmp_path):
    # One row with an extra field and another with one field too few: the total number of fields of the
    # chunk is right, but no row may be made of parts of two lines.
    data = (HEADER4 + b"\n1772427600.0,a.speed,1.0,good,2\n1772427600.5,a.speed,3.0\n1772427601.0,b.tension,4.0,bad\n")
    path = tmp_path / "mis.csv"
    path.write_bytes(data)
    problems = ReadProblems()
    got = _read_all(path, problems=problems)
    assert problems.counts == {"malformed": 1}
    assert problems.lines["malformed"] == [2]
    assert got.ref.tolist() == [3, 4]
    assert got.value.tolist() == [3.0, 4.0]
    assert got.quality.tolist() == [0, 2]


@pytest.mark.parametrize("stamp", ["now", "today", "NaT", "2026-03Z", "2026Z", "2026-03-02Z", "+12026-03-02T05:00:00Z",
                                   "2026-03-02T05:00:00+24:00", "2026-03-02T05:00:00+1:00",
                                   "2026-02-30T00:00:00Z", "2026-03-02T05:00:60Z", "0000-01-01T00:00:00Z"])
def test_times_python_refuses_are_refused(stamp):
    # numpy's datetime parser accepts some of these ("now", "today", "NaT", "2026-03"); Python's ISO 8601 parser,
    # the reference, does not, and neither may the reader.
    _, ok = parse_times([stamp, "2026-03-02T05:00:00Z"])
    assert ok.tolist() == [False, True]


@pytest.mark.parametrize("stamp", ["2026-03-02T05:00:00.1234567Z", "2026-03-02t05:00:00Z", "2026-03-02T05:00:00.Z",
                                   "2026-03-02T05Z", "20260302T050000Z", "2026-03-02T05:00:00+05:00:30",
                                   "2026-03-02T05:00:00-00:00", " 2026-03-02T05:00:00.5Z ", "2026-03-02T05:00:00+05"])
def test_times_python_reads_are_read_alike(stamp):
    got, ok = parse_times([stamp, "2026-03-02T05:00:00Z"])
    assert ok.tolist() == [True, True]
    assert got[0] == pytest.approx(datetime.fromisoformat(stamp.strip()).timestamp(), abs=1e-6)


def test_line_without_end_and_a_very_long_line(tmp_path):
    data = _plain_file(10)
    lines = data.split(b"\n")
    lines[4] = b"9" * 3_000_000  # one 3 MB line of digits: counted, not held in memory as a row
    damaged = b"\n".join(lines).rstrip(b"\n")  # and the last line has no LF
    path = tmp_path / "long.csv"
    path.write_bytes(damaged)
    problems = ReadProblems()
    got = _read_all(path, chunk_rows=3, problems=problems)
    assert problems.counts == {"malformed": 1}
    assert problems.lines["malformed"] == [5]
    assert len(got) == 9 and got.ref.max() == 11


# --- fuzz: random damage to valid files (hypothesis) ---------------------------------------------------------------

_FUZZ = settings(deadline=None, max_examples=300, suppress_health_check=[HealthCheck.too_slow],
                 derandomize=False)


@st.composite
def damaged_csv(draw) -> tuple[bytes, int]:
    n = draw(st.integers(3, 60))
    data = bytearray(_plain_file(n, iso=draw(st.booleans()), seed=draw(st.integers(0, 5))))
    header_end = data.index(b"\n") + 1
    for _ in range(draw(st.integers(1, 6))):
        op = draw(st.sampled_from(["flip", "insert", "delete", "truncate", "splice"]))
        pos = draw(st.integers(header_end, max(header_end, len(data) - 1)))
        byte = draw(st.sampled_from([0x00, 0x0A, 0x0D, 0x2C, 0x2E, 0x5F, 0x22, 0x20, 0x2D, 0x3A, 0x5A, 0x7F, 0x80,
                                     0xC3, 0xFF, ord("9"), ord("e"), ord("n")]) | st.integers(0, 255))
        if op == "flip" and pos < len(data):
            data[pos] = byte
        elif op == "insert":
            data[pos:pos] = bytes([byte])
        elif op == "delete" and pos < len(data):
            del data[pos]
        elif op == "truncate":
            del data[pos:]
        elif op == "splice":
            data[pos:pos] = "é,\r\n,ü".encode()[: draw(st.integers(1, 8))]
    return bytes(data), draw(st.sampled_from([1, 2, 3, 7, 200_000]))


@_FUZZ
@given(case=damaged_csv())
def test_fuzz_plain_csv_every_well_formed_row_is_used(case):
    data, chunk_rows = case
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "fuzz.csv"
        path.write_bytes(data)
        problems = ReadProblems(keep=1000)
        got = _read_all(path, chunk_rows=chunk_rows, problems=problems)  # never raises
    _check_against_reference(data, got, problems)
    assert not any(k.startswith("damaged file") for k in problems.counts)


def _complete_lines(text: bytes) -> bytes:
    return text[: text.rfind(b"\n") + 1]


@_FUZZ
@given(n=st.integers(3, 400), cut=st.floats(0.0, 1.0), chunk_rows=st.sampled_from([1, 3, 200_000]))
def test_fuzz_truncated_gzip_uses_the_rows_before_the_damage(n, cut, chunk_rows):
    plain = _plain_file(n)
    gz = gzip.compress(plain, mtime=0)
    k = 2 + int(cut * (len(gz) - 3))  # at least the two magic bytes, strictly shorter than the whole file
    # reference: what zlib (RFC 1951/1952) can decompress from the truncated bytes; every complete line of it is read
    recoverable = zlib.decompressobj(31).decompress(gz[:k])
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "cut.csv.gz"
        path.write_bytes(gz[:k])
        problems = ReadProblems(keep=1000)
        try:
            got = _read_all(path, chunk_rows=chunk_rows, problems=problems)
        except RecordingError as exc:  # not even the header survived: a clear error naming the file
            assert b"\n" not in recoverable
            assert str(path) in str(exc) and "truncated" in str(exc)
            return
    complete = _complete_lines(recoverable)
    _check_against_reference(complete, got, problems)
    damage = {k: v for k, v in problems.counts.items() if k.startswith("damaged file")}
    assert damage == {"damaged file: gzip data truncated": 1}
    assert problems.lines["damaged file: gzip data truncated"] == [complete.count(b"\n") + 1]


@_FUZZ
@given(n=st.integers(3, 200), where=st.floats(0.0, 1.0), byte=st.integers(0, 255),
       chunk_rows=st.sampled_from([1, 3, 200_000]))
def test_fuzz_corrupt_gzip_never_raises_and_accounts_for_every_line(n, where, byte, chunk_rows):
    plain = _plain_file(n)
    gz = bytearray(gzip.compress(plain, mtime=0))
    pos = int(where * (len(gz) - 1))
    gz[pos] = byte
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "bad.csv.gz"
        path.write_bytes(bytes(gz))
        problems = ReadProblems(keep=100_000)
        try:
            got = _read_all(path, chunk_rows=chunk_rows, problems=problems)
        except RecordingError as exc:  # the damage is before the end of the header line
            assert str(path) in str(exc)
            return
    damage = {k: v for k, v in problems.counts.items() if k.startswith("damaged file")}
    if not damage:
        # the CRC-32 and length in the gzip trailer (RFC 1952) matched: the data is the original one
        _check_against_reference(plain, got, problems)
        return
    assert sum(damage.values()) == 1, "the damage is one problem"
    # nothing silently dropped: every line read before the damage is used or counted once
    (damage_line,) = next(v for k, v in problems.lines.items() if k.startswith("damaged file"))
    counted = sum(n for reason, n in problems.counts.items()
                  if not reason.startswith("damaged file") and reason != "non-finite value")
    assert len(got) + counted == damage_line - 2
    listed = [no for reason in ("malformed", "bad time") for no in problems.lines.get(reason, [])]
    assert len(set(listed) | set(got.ref.tolist())) == len(listed) + len(got)
    assert all(2 <= no < damage_line for no in [*listed, *got.ref.tolist()])


@pytest.mark.parametrize("content", [b"time,tag,value,quality\n1772427600.0,a.speed,1.0,good\n", b"", b"\x1f\x00",
                                     b"PK\x03\x04 a zip file"])
def test_gz_name_but_not_gzip_is_one_clear_error(tmp_path, content):
    path = tmp_path / "plain.csv.gz"
    path.write_bytes(content)
    if not content:
        assert list(read_recording(path, TAGS)) == []  # an empty file is empty, whatever its name
        return
    with pytest.raises(RecordingError, match="not gzip") as info:
        list(read_recording(path, TAGS))
    assert str(path) in str(info.value)


def test_gzip_with_two_members_and_trailing_garbage(tmp_path):
    # RFC 1952 section 2.2: a gzip file is a series of members; bytes after the last member are damage
    a, b = _plain_file(10), _plain_file(10, seed=1).split(b"\n", 1)[1]
    path = tmp_path / "multi.csv.gz"
    path.write_bytes(gzip.compress(a) + gzip.compress(b) + b"garbage")
    problems = ReadProblems()
    got = _read_all(path, problems=problems)
    assert len(got) == 20
    assert problems.counts == {"damaged file: data after the gzip stream": 1}
    assert problems.lines["damaged file: data after the gzip stream"] == [22]


def test_unreadable_path_is_a_clear_error(tmp_path):
    with pytest.raises(RecordingError, match="cannot read"):
        list(read_recording(tmp_path, TAGS))  # a directory


# --- spanwatch replay on damaged and empty recordings (the real command line) --------------------------------------

REPO = Path(__file__).resolve().parents[1]
CONFIG = REPO / "config" / "quillmere-q2.toml"


@pytest.fixture(scope="module")
def q2_recording(tmp_path_factory) -> Path:
    """20 s of the example line, simulated (every tag at its sample period), as a plain CSV."""
    from spanwatch.monitor.line import load_line
    from spanwatch.monitor.simline import SimulatedLine
    from spanwatch.monitor.simline.scenario import parse_scenario

    d = tmp_path_factory.mktemp("rec")
    data = {"scenario": {"name": "bad-input", "config": str(CONFIG), "duration": "20 s", "seed": 5},
            "speed": [{"at": "0 s", "to": "300 m/min"}]}
    sc, cfg = parse_scenario(data, d / "s.toml")
    sim = SimulatedLine(load_line(cfg), sc)
    path = d / "q2.csv"
    write_recording(path, [sim.advance(20.0)])
    return path


def replay_cli(recording: Path, tmp_path: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "spanwatch", "replay", str(recording), "--config", str(CONFIG),
                           "--db", str(tmp_path / "h.db"), "--no-progress"], cwd=REPO, capture_output=True, text=True,
                          timeout=300)


def _replayed_samples(out: str) -> int:
    m = re.search(r"replayed (\d+) samples", out)
    assert m, out
    return int(m.group(1))


def test_replay_with_an_invalid_byte_uses_every_other_row(q2_recording, tmp_path):
    lines = q2_recording.read_bytes().split(b"\n")
    middle = len(lines) // 2
    lines[middle] = b"\xff" + lines[middle]
    path = tmp_path / "utf8.csv"
    path.write_bytes(b"\n".join(lines))
    proc = replay_cli(path, tmp_path)
    assert proc.returncode == 0, proc.stderr
    rows = len(lines) - 2  # without the header and the empty string after the last LF
    assert _replayed_samples(proc.stdout) == rows - 1
    assert f"input: *: 1 x malformed (lines {middle + 1})" in proc.stdout


def test_replay_of_a_truncated_gzip_uses_the_rows_before_and_says_so(q2_recording, tmp_path):
    gz = gzip.compress(q2_recording.read_bytes(), mtime=0)
    path = tmp_path / "cut.csv.gz"
    path.write_bytes(gz[: len(gz) // 2])
    complete = _complete_lines(zlib.decompressobj(31).decompress(gz[: len(gz) // 2]))
    proc = replay_cli(path, tmp_path)
    assert proc.returncode == 0, proc.stderr
    n_lines = complete.count(b"\n")
    assert _replayed_samples(proc.stdout) == n_lines - 1
    assert f"input: *: 1 x damaged file: gzip data truncated (lines {n_lines + 1})" in proc.stdout


@pytest.mark.parametrize(("content", "said"), [
    (b"", "empty"),
    (b"time,tag,value,quality\n", "only the header"),
    (b"time,tag,value,quality\r\n\r\n", "none of its 1 row"),
    (b"time,tag,value,quality\n1772427600,q2.nothing,1.0,good\nnot,a,row,at all\n", "none of its 2 rows"),
])
def test_replay_of_a_recording_without_samples_exits_2(tmp_path, content, said):
    path = tmp_path / "nothing.csv"
    path.write_bytes(content)
    proc = replay_cli(path, tmp_path)
    assert proc.returncode == 2, proc.stdout
    message = " ".join(proc.stderr.split())
    assert str(path) in message and said in message and "Traceback" not in message


@pytest.mark.parametrize("content", [b"time,tag,value,quality\n1,a,2,good\n", b"\x1f\x8b\x08\x00garbage"])
def test_replay_of_a_gz_that_is_not_gzip_or_dies_in_the_header_exits_2(tmp_path, content):
    path = tmp_path / "bad.csv.gz"
    path.write_bytes(content)
    proc = replay_cli(path, tmp_path)
    assert proc.returncode == 2, proc.stdout
    message = " ".join(proc.stderr.split())
    assert str(path) in message and "Traceback" not in message and "Aborted" not in message


def test_replay_with_a_time_of_1e30_counts_it(q2_recording, tmp_path):
    lines = q2_recording.read_text(encoding="utf-8").splitlines()
    tag = lines[5].split(",")[1]
    lines.insert(300, f"1e30,{tag},1.0,good")  # becomes line 301
    path = tmp_path / "t.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    proc = replay_cli(path, tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert _replayed_samples(proc.stdout) == len(lines) - 2
    assert "input: *: 1 x bad time (lines 301)" in proc.stdout
