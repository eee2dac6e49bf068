"""Recordings: CSV in long form, ``time,tag,value,quality``, optionally gzip-compressed.

* ``time``: ISO 8601 with a UTC offset (``2026-03-02T05:00:00.020Z``,
  ``2026-03-02T06:00:00.02+01:00``) or epoch seconds (``1772427600.02``).
* ``tag``: the tag name as in the line configuration.
* ``value``: a number in the tag's configured unit; ``nan``/``inf`` are read and
  counted, and enter the pipeline as bad-quality samples.
* ``quality``: ``good``, ``uncertain`` or ``bad`` (or 0, 1, 2); empty means good.

A header row is required; fields are separated by commas and not quoted (tag names
cannot contain commas). Rows are read in chunks; a row that cannot be read is
counted with its line number and skipped, never fatal.
"""

from __future__ import annotations

import gzip
import io
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import IO

import numpy as np
from spanwatch.rules.samples import QUALITY_CODES, SampleBatch

HEADER = ("time", "tag", "value", "quality")
_QUALITY_WORDS = {**QUALITY_CODES, "0": 0, "1": 1, "2": 2, "": 0}


@dataclass
class ReadProblems:
    """What a reader could not use, by reason, with line numbers (the first few of each)."""

    counts: dict[str, int] = field(default_factory=dict)
    lines: dict[str, list[int]] = field(default_factory=dict)
    keep: int = 20

    def add(self, reason: str, line_numbers: list[int] | np.ndarray) -> None:
        nums = [int(x) for x in line_numbers]
        if not nums:
            return
        self.counts[reason] = self.counts.get(reason, 0) + len(nums)
        kept = self.lines.setdefault(reason, [])
        kept.extend(nums[: max(0, self.keep - len(kept))])


def _open_text(path: Path, mode: str) -> tuple[IO[str], IO[bytes]]:
    """Open a (gzip) text file; also return the raw file, whose position tells the progress."""
    raw = open(path, mode + "b")  # noqa: SIM115
    inner: IO[bytes] = gzip.GzipFile(fileobj=raw, mode=mode + "b") if path.suffix == ".gz" else raw  # type: ignore[assignment]
    return io.TextIOWrapper(inner, encoding="utf-8", newline=""), raw


def parse_times(col: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Parse a column of times; returns (epoch seconds, ok mask). Vectorised on the common forms."""
    n = len(col)
    out = np.full(n, np.nan)
    try:
        out[:] = np.array(col, dtype=float)
        return out, np.isfinite(out)
    except ValueError:
        pass
    # ISO 8601: split off the offset, parse the rest with numpy in one call per offset.
    offsets: dict[str, list[int]] = {}
    stems: list[str] = []
    for i, s in enumerate(col):
        s = s.strip()
        if s.endswith("Z"):
            stem, off = s[:-1], "+00:00"
        elif len(s) > 6 and s[-6] in "+-" and s[-3] == ":":
            stem, off = s[:-6], s[-6:]
        else:
            stem, off = s, "?"
        stems.append(stem)
        offsets.setdefault(off, []).append(i)
    for off, idx in offsets.items():
        if off == "?":
            for i in idx:
                out[i] = _parse_one(col[i])
            continue
        sign = -1.0 if off[0] == "-" else 1.0
        try:
            shift = sign * (int(off[1:3]) * 3600 + int(off[4:6]) * 60)
        except ValueError:
            continue
        sub = [stems[i] for i in idx]
        try:
            arr = np.array(sub, dtype="datetime64[us]")
            out[idx] = arr.astype("int64") / 1e6 - shift
        except ValueError:
            for i in idx:
                out[i] = _parse_one(col[i])
    return out, np.isfinite(out)


def _parse_one(text: str) -> float:
    try:
        return float(text)
    except ValueError:
        pass
    try:
        dt = datetime.fromisoformat(text.strip())
    except ValueError:
        return np.nan
    if dt.tzinfo is None:
        return np.nan  # a time without an offset is ambiguous: refuse it
    return dt.timestamp()


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


def read_recording(path: str | Path, known_tags: tuple[str, ...], *, chunk_rows: int = 200_000,
                   problems: ReadProblems | None = None, with_position: bool = False
                   ) -> Iterator[SampleBatch] | Iterator[tuple[SampleBatch, int]]:
    """Yield batches of samples from a recording, in file order.

    Rows for tags not in ``known_tags`` are counted under ``unknown tag: NAME`` (once
    per tag in the examples); malformed rows under ``malformed``; values that are NaN
    or infinite under ``non-finite value`` (and still yielded, as bad-quality samples).
    ``ref`` of each sample is its line number in the file (header is line 1).
    With ``with_position``, yields ``(batch, bytes of the file read so far)``.
    """
    path = Path(path)
    problems = problems if problems is not None else ReadProblems()
    index = {name: i for i, name in enumerate(known_tags)}
    fh, raw = _open_text(path, "r")
    with raw, fh:
        first = fh.readline()
        if not first:
            return
        header = [h.strip().strip('"').lower() for h in first.rstrip("\r\n").split(",")]
        if header[:3] != list(HEADER[:3]):
            raise ValueError(f"{path}: line 1: expected the header 'time,tag,value,quality', got {','.join(header)!r}")
        has_q = len(header) >= 4 and header[3] == "quality"
        line_no = 1
        hint = chunk_rows * 48  # bytes: about chunk_rows rows of this format
        while True:
            try:
                lines = fh.readlines(hint)
            except UnicodeDecodeError:
                problems.add("malformed", [line_no + 1])
                break
            if not lines:
                break
            nums = np.arange(line_no + 1, line_no + 1 + len(lines), dtype=np.int64)
            line_no += len(lines)
            cols, kept, malformed = _columns(lines, 4 if has_q else 3, nums)
            batch = _batch(cols, kept, malformed, index, known_tags, problems)
            yield (batch, raw.tell()) if with_position else batch


def _columns(lines: list[str], width: int, nums: np.ndarray) -> tuple[list[list[str]], np.ndarray, np.ndarray]:
    """Split lines into ``width`` columns; returns (columns, line numbers kept, line numbers malformed).

    Fast path: one split of the whole chunk when every line has ``width`` fields.
    Otherwise per line: rows with the wrong number of fields are counted as malformed
    (a 3-field row where a quality column exists is fine: quality empty, i.e. good).
    """
    text = "".join(lines).replace("\r\n", "\n")
    fields = text.replace("\n", ",").split(",")
    if text.endswith("\n") and len(fields) == width * len(lines) + 1:
        return [fields[k:-1:width] for k in range(width)], nums, nums[:0]
    rows = [ln.rstrip("\r\n").split(",") for ln in lines]
    ok = np.array([len(r) == width or (width == 4 and len(r) == 3) for r in rows], dtype=bool)
    rows = [r if len(r) == width else [*r, ""] for r, good in zip(rows, ok, strict=True) if good]
    if not rows:
        return [[] for _ in range(width)], nums[ok], nums[~ok]
    return [list(c) for c in zip(*rows, strict=True)], nums[ok], nums[~ok]


def _batch(cols: list[list[str]], lines: np.ndarray, bad_shape: np.ndarray, index: dict[str, int],
           known: tuple[str, ...], problems: ReadProblems) -> SampleBatch:
    malformed = [bad_shape]
    if not cols[0]:
        problems.add("malformed", np.sort(np.concatenate(malformed)))
        return SampleBatch.empty(known)
    rows_n = len(cols[0])
    times, t_ok = parse_times(list(cols[0]))
    vals, v_ok = _parse_values(list(cols[2]))
    # tags and quality words repeat: look each distinct string up once
    raw_tags, tag_inv = np.unique(np.asarray(cols[1], dtype=object).astype(str), return_inverse=True)
    names = np.array([t.strip().strip('"') for t in raw_tags], dtype=object)
    tag_idx = np.array([index.get(t, -1) for t in names], dtype=np.int32)[tag_inv]
    empty_tag = np.array([t == "" for t in names], dtype=bool)[tag_inv]
    tags = names[tag_inv]
    if len(cols) > 3:
        raw_q, q_inv = np.unique(np.asarray(cols[3], dtype=object).astype(str), return_inverse=True)
        qual = np.array([_QUALITY_WORDS.get(q.strip().lower(), -1) for q in raw_q], dtype=np.int8)[q_inv]
    else:
        qual = np.zeros(rows_n, dtype=np.int8)
    bad = ~t_ok | ~v_ok | (qual < 0) | empty_tag
    malformed.append(lines[bad])
    problems.add("malformed", np.sort(np.concatenate(malformed)))  # in file order
    unknown = (tag_idx < 0) & ~bad
    if unknown.any():
        for name in sorted({tags[i] for i in np.flatnonzero(unknown)}):
            sel = unknown & (tags == name)
            reason = f"unknown tag: {name}"
            first = [] if reason in problems.lines else lines[sel][:1]  # one example per file
            problems.add(reason, first)
            problems.counts[reason] = problems.counts.get(reason, 0) + int(sel.sum()) - len(first)
    keep = ~bad & ~unknown
    nonfinite = keep & ~np.isfinite(vals)
    if nonfinite.any():
        problems.add("non-finite value", lines[nonfinite])
        qual = np.where(nonfinite, 2, qual).astype(np.int8)
    return SampleBatch(known, tag_idx[keep], times[keep], vals[keep], qual[keep], lines[keep])


def write_recording(path: str | Path, batches: Iterator[SampleBatch] | list[SampleBatch], *,
                    time_format: str = "iso") -> int:
    """Write batches as a long-form CSV (gzip if the name ends in .gz); returns the number of rows."""
    path = Path(path)
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
