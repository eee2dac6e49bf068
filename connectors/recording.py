"""Recordings: CSV in long form, ``time,tag,value,quality``, optionally gzip-compressed.

* ``time``: ISO 8601 with a UTC offset (``2026-03-02T05:00:00.020Z``,
  ``2026-03-02T06:00:00.02+01:00``) or epoch seconds (``1772427600.02``); read as Python's
  ``float()`` or ``datetime.fromisoformat`` reads it (surrounding blanks allowed).
* ``tag``: the tag name as in the line configuration.
* ``value``: a number in the tag's configured unit, as Python's ``float()`` reads it;
  ``nan``/``inf`` are read and counted, and enter the pipeline as bad-quality samples.
* ``quality``: ``good``, ``uncertain`` or ``bad`` (or 0, 1, 2); empty means good.

A header row is required, ``time,tag,value,quality`` or ``time,tag,value``; fields are
separated by commas and not quoted (tag names cannot contain commas); a line ends at LF
(a CR before it belongs to the line ending). A row may leave off the quality column.

**Bad input is counted, never fatal, never silently dropped.** The file is read as bytes,
in blocks; every line is decoded on its own, so one bad byte costs one row. Each row that
cannot be used is counted under a reason with its true line number (the header is line
1): ``malformed`` (not UTF-8, wrong number of fields, a time, value or quality that
cannot be read, an empty tag, a line longer than :data:`MAX_LINE` bytes), ``bad time``
(NaN, infinite, before 1970 or from 2200 on, or alone more than ``time_jump`` away from
the rows around it while those are close to each other: a clock glitch),
``unknown tag: NAME``, and ``non-finite value`` (those rows are still used, as bad
quality). Damage that ends the reading early (a gzip stream cut short or corrupt, data
after it, a read error) is counted once, as ``damaged file: ...``, at the first line
that could not be read in full; every row before it is used. Only a file that has no
readable header (or cannot be opened, or is named ``.gz`` but is not gzip) raises
:class:`RecordingError`.
"""

from __future__ import annotations

import gzip
import io
import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO

import numpy as np
import pyarrow as pa
from spanwatch.connectors import parquetrec
from spanwatch.connectors.arrowcsv import block_columns
from spanwatch.connectors.rectimes import arrow_times, parse_times, times_of
from spanwatch.rules.samples import QUALITY_CODES, SampleBatch

__all__ = ["HEADER", "ReadProblems", "RecordingError", "parse_times", "read_recording", "write_recording"]

HEADER = ("time", "tag", "value", "quality")
_QUALITY_WORDS = {**QUALITY_CODES, "0": 0, "1": 1, "2": 2, "": 0}

MAX_LINE = 1 << 20  # bytes; a row is about 60 bytes, so a longer line is damage, counted and skipped unread
T_MIN = 0.0  # 1970-01-01T00:00Z: a time before the epoch is no recording of a running line
T_MAX = 7_258_118_400.0  # 2200-01-01T00:00Z; bounds the span a replay can be asked to compute
TIME_JUMP = 86_400.0  # s; a single row a day away from both neighbours is a clock glitch (common practice, no source)
_GZIP_MAGIC = b"\x1f\x8b"  # RFC 1952, section 2.3.1
_MAX_DEFERRED = 100_000  # rows held back for the time-glitch test at most (a run of garbage after the last good time)


class RecordingError(ValueError):
    """A recording that cannot be read at all: it cannot be opened, has no readable header, or is not gzip."""


@dataclass
class ReadProblems:
    """What a reader could not use, by reason, with line numbers (the first few of each).

    ``header`` tells whether a header was read, ``rows`` counts the data lines read after
    it; ``damage`` is the ``damaged file: ...`` reason when the reading ended early, else None.
    """

    counts: dict[str, int] = field(default_factory=dict)
    lines: dict[str, list[int]] = field(default_factory=dict)
    keep: int = 20
    header: bool = False
    rows: int = 0
    damage: str | None = None

    def add(self, reason: str, line_numbers: list[int] | np.ndarray) -> None:
        nums = [int(x) for x in line_numbers]
        if not nums:
            return
        self.counts[reason] = self.counts.get(reason, 0) + len(nums)
        kept = self.lines.setdefault(reason, [])
        kept.extend(nums[: max(0, self.keep - len(kept))])

    def damaged(self, what: str, line: int) -> None:
        """The reading ended at ``line`` because of ``what``: one problem."""
        self.damage = f"damaged file: {what}"
        self.add(self.damage, [line])


def _open_text(path: Path, mode: str) -> tuple[IO[str], IO[bytes]]:
    """Open a (gzip) text file; also return the raw file, whose position tells the progress."""
    raw = open(path, mode + "b")  # noqa: SIM115
    inner: IO[bytes] = gzip.GzipFile(fileobj=raw, mode=mode + "b") if path.suffix == ".gz" else raw  # type: ignore[assignment]
    return io.TextIOWrapper(inner, encoding="utf-8", newline=""), raw


# --- bytes: plain or gzip, stopping at damage ----------------------------------------------------------------------


class _Bytes:
    """The bytes of a recording, decompressed when its name ends in ``.gz``; ``damage`` says why they ended early."""

    def __init__(self, path: Path) -> None:
        self.path = path
        try:
            self.raw: IO[bytes] = open(path, "rb")  # noqa: SIM115
        except OSError as exc:
            raise RecordingError(f"{path}: cannot read the recording ({exc.strerror or exc})") from None
        self.gzip = path.suffix == ".gz"
        self.damage: str | None = None

    def close(self) -> None:
        self.raw.close()

    def tell(self) -> int:
        try:
            return self.raw.tell()
        except OSError:
            return 0

    def _read(self, size: int) -> bytes:
        try:
            return self.raw.read(size)
        except OSError as exc:
            self.damage = f"read error ({exc.strerror or exc})"
            return b""

    def blocks(self, size: int) -> Iterator[bytes]:
        """Blocks of at most ``size`` bytes (decompressed), until the end or the damage."""
        if not self.gzip:
            while block := self._read(size):
                yield block
            return
        yield from self._gunzip(size)

    def _gunzip(self, size: int) -> Iterator[bytes]:
        """Decompress member after member (RFC 1952 section 2.2), output bounded per call; never raises zlib.error."""
        pending = self._read(max(size, 2))
        if not pending:
            return  # an empty file
        if pending[:2] != _GZIP_MAGIC:
            raise RecordingError(f"{self.path}: not gzip-compressed although its name ends in .gz "
                                 f"(it starts with {pending[:8]!r})")
        d = zlib.decompressobj(31)  # 16 + 15: a gzip header and trailer (CRC-32 and length are checked)
        full = False  # the last call filled its output: zlib may hold more without new input
        while True:
            if not pending and not full:
                pending = self._read(size)
                if not pending:
                    if self.damage is None:
                        self.damage = "gzip data truncated"
                    return
            try:
                out = d.decompress(pending, size)
            except zlib.error as exc:
                self.damage = f"gzip data corrupt ({str(exc).removeprefix('Error -3 while decompressing data: ')})"
                return
            pending, full = d.unconsumed_tail, len(out) == size
            if out:
                yield out
            if d.eof:
                pending, full = d.unused_data.lstrip(b"\x00"), False  # zero padding after a member is allowed
                while len(pending) < 2:
                    more = self._read(size)
                    if not more:
                        break
                    pending = (pending + more).lstrip(b"\x00")
                if not pending:
                    return
                if pending[:2] != _GZIP_MAGIC:
                    self.damage = "data after the gzip stream"
                    return
                d = zlib.decompressobj(31)


def _parse_values(col: list[str]) -> tuple[np.ndarray, np.ndarray]:
    try:
        return np.array(col, dtype=float), np.ones(len(col), dtype=bool)
    except ValueError:
        out = np.full(len(col), np.nan)
        ok = np.ones(len(col), dtype=bool)
        for i, s in enumerate(col):
            try:
                out[i] = float(s)
            except ValueError:
                ok[i] = False
        return out, ok


def _codes(col: list[str]) -> tuple[list[str], np.ndarray]:
    """Distinct strings in first-seen order and each row's index into them (tags and quality words repeat)."""
    lookup = {s: i for i, s in enumerate(dict.fromkeys(col))}
    return list(lookup), np.fromiter(map(lookup.__getitem__, col), dtype=np.int64, count=len(col))


# --- rows ------------------------------------------------------------------------------------------------------------


@dataclass
class _Rows:
    """Parsed rows of the right shape, before they are judged (a time of a later row may still matter)."""

    line: np.ndarray  # int64 line numbers
    t: np.ndarray  # float64, NaN where not parsed
    t_ok: np.ndarray  # time parsed
    value: np.ndarray
    v_ok: np.ndarray
    tag: np.ndarray  # int32 index into the known tags; -1 unknown, -2 empty
    name: np.ndarray  # object: the tag names as written (stripped)
    quality: np.ndarray  # int8, -1 not a quality word

    @staticmethod
    def empty() -> _Rows:
        e = np.zeros(0, dtype=bool)
        return _Rows(np.zeros(0, np.int64), np.zeros(0), e, np.zeros(0), e, np.zeros(0, np.int32),
                     np.zeros(0, dtype=object), np.zeros(0, np.int8))

    def __len__(self) -> int:
        return len(self.line)

    def take(self, sel: np.ndarray | slice) -> _Rows:
        return _Rows(self.line[sel], self.t[sel], self.t_ok[sel], self.value[sel], self.v_ok[sel], self.tag[sel],
                     self.name[sel], self.quality[sel])

    def then(self, other: _Rows) -> _Rows:
        if not len(self):
            return other
        return _Rows(*(np.concatenate([getattr(self, f), getattr(other, f)]) for f in
                       ("line", "t", "t_ok", "value", "v_ok", "tag", "name", "quality")))


def _columns(text: str, nums: np.ndarray, width: int) -> tuple[list[list[str]], np.ndarray, np.ndarray]:
    """Split LF-ended lines into ``width`` columns; returns (columns, line numbers kept, line numbers malformed).

    Fast path: one split of the whole chunk, with a marker field after every line; it is
    taken only when every marker falls where a line of ``width`` fields puts it, so no row
    is ever made of parts of two lines. Otherwise per line: a row with the wrong number of
    fields is malformed (a 3-field row where a quality column exists is fine: quality
    empty, i.e. good).
    """
    n = len(nums)
    text = text.replace("\r\n", "\n")
    fields = text.replace("\n", ",\n,").split(",")
    if len(fields) == n * (width + 1) + 1 and fields[width::width + 1].count("\n") == n:
        return [fields[k:-1:width + 1] for k in range(width)], nums, nums[:0]
    rows = [ln.split(",") for ln in text.split("\n")[:n]]
    ok = np.array([len(r) == width or (width == 4 and len(r) == 3) for r in rows], dtype=bool)
    rows = [r if len(r) == width else [*r, ""] for r, good in zip(rows, ok, strict=True) if good]
    if not rows:
        return [[] for _ in range(width)], nums[ok], nums[~ok]
    return [list(c) for c in zip(*rows, strict=True)], nums[ok], nums[~ok]


def _parse_rows(cols: list[list[str]], lines: np.ndarray, index: dict[str, int]) -> _Rows:
    n = len(cols[0])
    if n == 0:
        return _Rows.empty()
    t, t_ok = times_of(cols[0])
    value, v_ok = _parse_values(cols[2])
    distinct, inv = _codes(cols[1])
    words, q_inv = _codes(cols[3]) if len(cols) > 3 else ([], np.zeros(0, dtype=np.int64))
    return _rows_of(lines, t, t_ok, value, v_ok, distinct, inv, words, q_inv, index)


def _rows_of(lines: np.ndarray, t: np.ndarray, t_ok: np.ndarray, value: np.ndarray, v_ok: np.ndarray,
             tag_texts: list[str], tag_index: np.ndarray, quality_words: list[str], quality_index: np.ndarray,
             index: dict[str, int]) -> _Rows:
    """Rows from their columns, the tags and quality words given as distinct texts and each row's index into them
    (no quality words: every row good, a file without the quality column)."""
    names = [s.strip().strip('"') for s in tag_texts]
    tag = np.array([index.get(s, -2 if s == "" else -1) for s in names], dtype=np.int32)[tag_index]
    name = np.array(names, dtype=object)[tag_index]
    if quality_words:
        codes = np.array([_QUALITY_WORDS.get(q.strip().lower(), -1) for q in quality_words], dtype=np.int8)
        quality = codes[quality_index]
    else:
        quality = np.zeros(len(lines), dtype=np.int8)
    return _Rows(lines, t, t_ok, value, v_ok, tag, name, quality)


class _Judge:
    """Turns parsed rows into samples and counted problems, holding back the rows after the last good time.

    The glitch test needs each time's next good time, which may be in the next chunk: the
    rows from the chunk's last good time on wait for it (at most ``_MAX_DEFERRED``).
    """

    def __init__(self, known: tuple[str, ...], problems: ReadProblems, time_jump: float) -> None:
        self.known = known
        self.problems = problems
        self.jump = time_jump
        self.rows = _Rows.empty()
        self.malformed = np.zeros(0, np.int64)
        self.left = np.nan  # the last good time before the rows held

    def feed(self, rows: _Rows, malformed: np.ndarray, final: bool) -> SampleBatch:
        rows = self.rows.then(rows)
        malformed = np.concatenate([self.malformed, malformed])
        good_t = rows.t_ok & np.isfinite(rows.t) & (rows.t >= T_MIN) & (rows.t < T_MAX)
        ci = np.flatnonzero(good_t)
        tc = rows.t[ci]
        left = np.concatenate([[self.left], tc[:-1]])
        right = np.concatenate([tc[1:], [np.nan]])
        with np.errstate(invalid="ignore"):
            glitch = (np.abs(tc - left) > self.jump) & (np.abs(right - tc) > self.jump) & (np.abs(right - left)
                                                                                          <= self.jump)
        held = len(rows) - ci[-1] + len(malformed) if ci.size else 0
        if final or not ci.size or held > _MAX_DEFERRED:
            cut = np.iinfo(np.int64).max
            self.left = tc[-1] if ci.size else self.left
        else:
            cut = int(rows.line[ci[-1]])
            self.left = tc[-2] if ci.size > 1 else self.left
        bad_time = ~good_t
        bad_time[ci[glitch]] = True
        k = int(np.searchsorted(rows.line, cut))  # rows are in line order: the rows before the cut are a prefix
        self.rows, self.malformed = rows.take(slice(k, None)), malformed[malformed >= cut]
        rows, bad_time, malformed = rows.take(slice(0, k)), bad_time[:k], malformed[malformed < cut]
        return self._judge(rows, bad_time, malformed)

    def _judge(self, rows: _Rows, bad_time: np.ndarray, malformed: np.ndarray) -> SampleBatch:
        problems = self.problems
        bad = ~rows.t_ok | ~rows.v_ok | (rows.quality < 0) | (rows.tag == -2)
        problems.add("malformed", np.sort(np.concatenate([malformed, rows.line[bad]])))  # in file order
        bad_time &= ~bad
        problems.add("bad time", rows.line[bad_time])
        unknown = (rows.tag < 0) & ~bad & ~bad_time
        if unknown.any():
            by_name: dict[str, list[int]] = {}  # grouped in Python: numpy would drop a trailing NUL of a name
            for name, no in zip(rows.name[unknown].tolist(), rows.line[unknown].tolist(), strict=True):
                by_name.setdefault(name, []).append(no)
            for name in sorted(by_name):
                reason = f"unknown tag: {name}"
                first = [] if reason in problems.lines else by_name[name][:1]  # one example per file
                problems.add(reason, first)
                problems.counts[reason] = problems.counts.get(reason, 0) + len(by_name[name]) - len(first)
        keep = ~bad & ~bad_time & ~unknown
        quality = rows.quality
        nonfinite = keep & ~np.isfinite(rows.value)
        if nonfinite.any():
            problems.add("non-finite value", rows.line[nonfinite])
            quality = np.where(nonfinite, 2, quality).astype(np.int8)
        return SampleBatch(self.known, rows.tag[keep], rows.t[keep], rows.value[keep], quality[keep], rows.line[keep])


# --- the reader ------------------------------------------------------------------------------------------------------


def _header(path: Path, first: bytes) -> int:
    """The number of columns the header announces (3 or 4); RecordingError otherwise."""
    try:
        text = first.decode("utf-8").removeprefix("\ufeff")  # a byte order mark as some spreadsheets write it
    except UnicodeDecodeError:
        text = repr(first[:80])
    header = [h.strip().strip('"').lower() for h in text.rstrip("\r\n").split(",")]
    if header not in (list(HEADER), list(HEADER[:3])):
        raise RecordingError(f"{path}: line 1: expected the header 'time,tag,value,quality' (or 'time,tag,value'), "
                             f"got {','.join(header)[:120]!r}")
    return len(header)


def read_recording(path: str | Path, known_tags: tuple[str, ...], *, chunk_rows: int = 200_000,
                   problems: ReadProblems | None = None, with_position: bool = False,
                   time_jump: float = TIME_JUMP, fast: bool = True
                   ) -> Iterator[SampleBatch] | Iterator[tuple[SampleBatch, int]]:
    """Yield batches of samples from a recording, in file order (see the module docstring for what is counted).

    Rows for tags not in ``known_tags`` are counted under ``unknown tag: NAME`` (one
    example line per tag); ``ref`` of each sample is its line number in the file (header
    is line 1). Chunks are about ``chunk_rows`` rows. With ``with_position``, yields
    ``(batch, bytes of the file read so far)``. Raises :class:`RecordingError` only when
    the file cannot be opened or has no readable header. ``fast`` False reads every block line by line
    instead of by Arrow's CSV reader (the same result, slower: the tests compare the two).
    """
    path = Path(path)
    problems = problems if problems is not None else ReadProblems()
    index = {name: i for i, name in enumerate(known_tags)}
    if is_parquet(path):
        yield from _read_parquet(path, index, known_tags, problems, with_position, time_jump, chunk_rows)
        return
    src = _Bytes(path)
    try:
        yield from _read(src, path, index, known_tags, max(64, chunk_rows * 48), problems, with_position, time_jump,
                         fast)
    finally:
        src.close()


def _read(src: _Bytes, path: Path, index: dict[str, int], known: tuple[str, ...], block: int,
          problems: ReadProblems, with_position: bool, time_jump: float, fast: bool = True
          ) -> Iterator[SampleBatch] | Iterator[tuple[SampleBatch, int]]:
    blocks = src.blocks(block)
    buf = b""
    for b in blocks:  # the header line
        buf += b
        if b"\n" in buf or len(buf) > MAX_LINE:
            break
    if not buf:
        if src.damage:
            raise RecordingError(f"{path}: {src.damage} before the header (line 1)")
        return
    end = buf.find(b"\n")
    if end < 0 and (src.damage or len(buf) > MAX_LINE):
        raise RecordingError(f"{path}: {src.damage or 'no line end'} within the header (line 1)")
    first, buf = (buf, b"") if end < 0 else (buf[:end], buf[end + 1:])
    width = _header(path, first)
    problems.header = True
    judge = _Judge(known, problems, time_jump)
    line_no = 1
    skipping = False  # within a line longer than MAX_LINE
    done = False
    while not done:
        b = next(blocks, None)
        if b is None:
            done = True
            if src.damage is None and buf and not buf.endswith(b"\n") and not skipping:
                buf += b"\n"  # the last line has no LF
        else:
            buf += b
        if skipping:
            end = buf.find(b"\n")
            if end < 0:
                buf = b""
                if not done:
                    continue
            else:
                buf, skipping = buf[end + 1:], False
        cut = buf.rfind(b"\n")
        if cut < 0:
            if len(buf) > MAX_LINE:  # a line too long to be a row: count it, skip to its end unread
                line_no += 1
                problems.rows += 1
                judge.feed(_Rows.empty(), np.array([line_no], dtype=np.int64), final=False)
                buf, skipping = b"", True
            if not done:
                continue
            part = b""
        else:
            part, buf = buf[: cut + 1], buf[cut + 1:]
        batch, lines = _chunk(part, line_no, width, index, judge, problems, final=done, fast=fast)
        line_no += lines
        if done and src.damage is not None:
            problems.damaged(src.damage, line_no + 1)
        if len(batch) or part:
            yield (batch, src.tell()) if with_position else batch


def is_parquet(path: Path) -> bool:
    """Whether a recording is read as Parquet: by its name (``.parquet``)."""
    return path.suffix.lower() == ".parquet"


def _read_parquet(path: Path, index: dict[str, int], known: tuple[str, ...], problems: ReadProblems,
                  with_position: bool, time_jump: float, chunk_rows: int
                  ) -> Iterator[SampleBatch] | Iterator[tuple[SampleBatch, int]]:
    """A Parquet recording, row groups a few at a time, judged as the CSV rows are; ``ref`` is the row number
    (the first row is 1). A row group that cannot be read is counted (its rows) and skipped."""
    try:
        pf = parquetrec.open_parquet(path)
    except OSError as exc:
        raise RecordingError(f"{path}: cannot read the recording ({exc.strerror or exc})") from None
    except ValueError as exc:
        raise RecordingError(f"{path}: {exc}") from None
    problem = parquetrec.column_problem(pf.schema_arrow)
    if problem is not None:
        raise RecordingError(f"{path}: column {problem[0]}: expected {problem[1]}")
    columns = [c for c in HEADER if c in pf.schema_arrow.names]
    problems.header = True
    judge = _Judge(known, problems, time_jump)
    position = 0
    for part in parquetrec.parts(pf, columns, max(1, chunk_rows)):
        problems.rows += part.rows
        position = part.position
        if part.table is None:
            reason = f"damaged file: unreadable row group ({part.error})"
            problems.add(reason, [part.first_row])
            problems.counts[reason] += part.rows - 1
            problems.damage = problems.damage or reason
            continue
        rows = _parquet_rows(part.table, part.first_row, index)
        batch = judge.feed(rows, np.zeros(0, np.int64), final=False)
        if len(batch):
            yield (batch, position) if with_position else batch
    batch = judge.feed(_Rows.empty(), np.zeros(0, np.int64), final=True)
    if len(batch):
        yield (batch, position) if with_position else batch


def _parquet_rows(table: pa.Table, first_row: int, index: dict[str, int]) -> _Rows:
    n = table.num_rows
    lines = np.arange(first_row, first_row + n, dtype=np.int64)
    got = parquetrec.times(table.column("time"))
    t, t_ok = arrow_times(got) if not isinstance(got, tuple) else got
    value, v_ok = parquetrec.values(table.column("value"))
    tag_texts, tag_index = parquetrec.texts(table.column("tag"))
    if "quality" in table.column_names:
        words, q_index = parquetrec.texts(table.column("quality"))
    else:
        words, q_index = [], np.zeros(0, dtype=np.int64)
    return _rows_of(lines, t, t_ok, value, v_ok, tag_texts, tag_index, words, q_index, index)


def _chunk(part: bytes, line_no: int, width: int, index: dict[str, int], judge: _Judge, problems: ReadProblems,
           final: bool, fast: bool = True) -> tuple[SampleBatch, int]:
    """One block of whole lines (each ending in LF) -> (the samples that are ready, the number of lines); problems
    counted. Arrow's CSV reader takes the block where it can vouch for it (:mod:`spanwatch.connectors.arrowcsv`),
    else it is read line by line."""
    cols = block_columns(part, width) if fast else None
    n = cols.rows if cols is not None else part.count(b"\n")
    problems.rows += n
    nums = np.arange(line_no + 1, line_no + 1 + n, dtype=np.int64)
    if cols is not None:
        rows = _rows_of(nums, cols.t, cols.t_ok, cols.value, np.ones(n, dtype=bool), cols.tag_texts, cols.tag_index,
                        cols.quality_words, cols.quality_index, index)
        return judge.feed(rows, nums[:0], final), n
    try:
        text = part.decode("utf-8")
        not_utf8 = nums[:0]
    except UnicodeDecodeError:  # decode line by line: one bad byte costs one row
        good: list[str] = []
        ok = np.ones(n, dtype=bool)
        for i, piece in enumerate(part.split(b"\n")[:n]):
            try:
                good.append(piece.decode("utf-8"))
            except UnicodeDecodeError:
                ok[i] = False
        text = "".join(s + "\n" for s in good)
        not_utf8, nums = nums[~ok], nums[ok]
    cols_, kept, bad_shape = _columns(text, nums, width)
    rows = _parse_rows(cols_, kept, index)
    return judge.feed(rows, np.sort(np.concatenate([not_utf8, bad_shape])), final), n


def write_recording(path: str | Path, batches: Iterator[SampleBatch] | list[SampleBatch], *,
                    time_format: str = "iso") -> int:
    """Write batches as a long-form CSV (gzip if the name ends in .gz) or, for a name ending in ``.parquet``, as a
    Parquet recording (:mod:`spanwatch.connectors.parquetrec`; ``time_format`` does not apply); returns the number
    of rows."""
    path = Path(path)
    if is_parquet(path):
        return parquetrec.write_parquet(path, batches)
    rows = 0
    quality_names = np.array(["good", "uncertain", "bad"])
    fh, raw = _open_text(path, "w")
    with raw, fh:
        fh.write(",".join(HEADER) + "\n")
        for b in batches:
            if len(b) == 0:
                continue
            b = b.sorted_by_time()
            if time_format == "iso":
                ts = np.datetime_as_string(np.round(b.t * 1e3).astype("int64").astype("datetime64[ms]"),
                                           unit="ms", timezone="UTC")
            elif time_format == "epoch":
                ts = np.char.mod("%.3f", b.t)
            else:
                raise ValueError(f"expected time_format 'iso' or 'epoch', got {time_format!r}")
            names = np.array(b.tags, dtype=object)[b.tag]
            vals = np.char.mod("%.10g", b.value)
            qs = quality_names[np.clip(b.quality, 0, 2)]
            fh.write("\n".join(f"{t},{n},{v},{q}" for t, n, v, q in zip(ts, names, vals, qs, strict=True)))
            fh.write("\n")
            rows += len(b)
    return rows
