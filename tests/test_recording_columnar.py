"""The columnar fast path of the CSV reader (Apache Arrow's CSV reader, connectors/arrowcsv.py) reads what the
line-by-line reader reads: the same samples, the same problems on the same lines, on valid files and on files
damaged byte by byte (hypothesis). Times read from Arrow columns are checked against Python's own parsers
(``float`` and ``datetime.fromisoformat``), which are independent of both vectorised paths.
"""

from __future__ import annotations

import math
import tempfile
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pyarrow as pa
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from spanwatch.connectors.arrowcsv import block_columns
from spanwatch.connectors.recording import ReadProblems, read_recording
from spanwatch.connectors.rectimes import arrow_times

TAGS = ("a.speed", "b.tension", "c.diameter")
_SETTINGS = settings(deadline=None, max_examples=250, suppress_health_check=[HealthCheck.too_slow])


def _file(n: int, *, iso: bool, digits: int = 3, seed: int = 0) -> bytes:
    rng = np.random.default_rng(seed)
    rows = ["time,tag,value,quality"]
    for i in range(n):
        t = 1_772_427_600.0 + i * 0.02
        if iso:
            stamp = datetime.fromtimestamp(t, UTC).isoformat(timespec="microseconds")[: 20 + digits]
            stamp = stamp.rstrip(".") + "Z" if digits else stamp[:19] + "Z"
        else:
            stamp = f"{t:.3f}"
        rows.append(f"{stamp},{TAGS[i % 3]},{rng.normal(100, 20):.9g},{('good', 'bad', 'uncertain', '')[i % 4]}")
    return ("\n".join(rows) + "\n").encode()


def _both(data: bytes, chunk_rows: int) -> tuple:
    out = []
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "r.csv"
        path.write_bytes(data)
        for fast in (True, False):
            problems = ReadProblems(keep=10_000)
            batches = list(read_recording(path, TAGS, chunk_rows=chunk_rows, problems=problems, fast=fast))
            cols = [np.concatenate([getattr(b, f) for b in batches]) if batches else np.zeros(0)
                    for f in ("tag", "t", "value", "quality", "ref")]
            out.append((cols, problems.counts, problems.lines, problems.rows))
    return out[0], out[1]


def _assert_same(a, b) -> None:
    for x, y in zip(a[0], b[0], strict=True):
        np.testing.assert_array_equal(x, y)
    assert a[1:] == b[1:]


def test_a_clean_recording_takes_the_fast_path_for_every_block():
    data = _file(300, iso=True)
    body = data[data.index(b"\n") + 1:]
    cols = block_columns(body, 4)
    assert cols is not None and cols.t_ok.all()
    want = [datetime.fromisoformat(line.split(b",")[0].decode()).timestamp() for line in body.splitlines()]
    np.testing.assert_array_equal(cols.t, want)
    assert cols.value.tolist() == [float(line.split(b",")[2]) for line in body.splitlines()]


def test_fast_and_line_by_line_agree_on_clean_files_of_every_time_form():
    for iso, digits in ((True, 0), (True, 1), (True, 3), (True, 6), (False, 3)):
        for chunk_rows in (7, 1000, 200_000):
            a, b = _both(_file(2000, iso=iso, digits=digits), chunk_rows)
            assert len(a[0][1]) == 2000 and not a[1]
            _assert_same(a, b)


def test_a_block_the_fast_path_cannot_vouch_for_is_read_line_by_line():
    data = _file(50, iso=True)
    lines = data.split(b"\n")
    assert block_columns(b"\n".join(lines[1:]), 4) is not None
    stamp = b"2026-03-02T05:00:00.000Z,a.speed"
    # (row, counted as a problem): Python reads "1_0" as 10, a row without its quality field as
    # good, and a tag name with a CR after it as the name (blanks around a name are stripped)
    for bad, counted in ((b"", True), (stamp + b",1.0", False), (b"x,\xff,1,good", True),
                         (stamp + b",nan(1),good", True), (stamp + b",1_0,good", False), (stamp + b"\r,1,good", False)):
        damaged = b"\n".join([*lines[1:20], bad, *lines[20:]])
        assert block_columns(damaged, 4) is None, bad
        a, b = _both(b"\n".join([lines[0], *lines[1:20], bad, *lines[20:]]), 200_000)
        _assert_same(a, b)
        # a bad row is counted, not silently used or dropped
        assert sum(a[1].values()) == counted, bad


@st.composite
def damaged(draw) -> tuple[bytes, int]:
    data = bytearray(_file(draw(st.integers(3, 80)), iso=draw(st.booleans()), digits=draw(st.sampled_from([0, 3, 6])),
                           seed=draw(st.integers(0, 3))))
    start = data.index(b"\n") + 1
    for _ in range(draw(st.integers(0, 6))):
        op = draw(st.sampled_from(["flip", "insert", "delete", "truncate"]))
        pos = draw(st.integers(start, max(start, len(data) - 1)))
        byte = draw(st.sampled_from(b"\x00\n\r,.-:TZ+ 09enaif\x80\xc3\xff") | st.integers(0, 255))
        if op == "flip" and pos < len(data):
            data[pos] = byte
        elif op == "insert":
            data[pos:pos] = bytes([byte])
        elif op == "delete" and pos < len(data):
            del data[pos]
        elif op == "truncate":
            del data[pos:]
    return bytes(data), draw(st.sampled_from([1, 3, 7, 200_000]))


@_SETTINGS
@given(case=damaged())
def test_fuzz_fast_and_line_by_line_read_the_same_from_damaged_bytes(case):
    data, chunk_rows = case
    a, b = _both(data, chunk_rows)
    _assert_same(a, b)


def _python_time(s: str) -> float | None:
    s = s.strip()
    try:
        return float(s)
    except ValueError:
        pass
    try:
        dt = datetime.fromisoformat(s)
    except ValueError:
        return None
    if dt.utcoffset() is None:
        return None
    try:
        return dt.timestamp()
    except (OverflowError, ValueError, OSError):
        return None


@st.composite
def time_texts(draw) -> list[str]:
    base = draw(st.sampled_from(["2026-03-02T05:00:00.020Z", "2026-03-02T05:00:00Z", "2026-03-02 23:59:59.999999Z",
                                 "2024-02-29T12:00:00.5+01:00", "1772427600.02", "2199-12-31T23:59:59.9Z"]))
    n = draw(st.integers(1, 40))
    out = []
    for _ in range(n):
        s = list(base)
        for _ in range(draw(st.integers(0, 2))):
            pos = draw(st.integers(0, len(s) - 1))
            s[pos] = draw(st.sampled_from([*"0123456789 :-+.TZz,x", "", "0", "9Z", "é"]))
        out.append("".join(s))
    return out


@_SETTINGS
@given(texts=time_texts())
def test_fuzz_times_from_an_arrow_column_read_as_python_reads_them(texts):
    t, ok = arrow_times(pa.array(texts, type=pa.string()))
    for s, got, read in zip(texts, t.tolist(), ok.tolist(), strict=True):
        want = _python_time(s)
        assert read == (want is not None), s
        if want is not None and 0.0 <= want < 7_258_118_400.0:  # 1970 to 2200: a time outside is counted as bad
            assert got == want or (math.isnan(got) and math.isnan(want)), s
