"""Recordings: CSV in long form, ``time,tag,value,quality``, optionally gzip-compressed.

* ``time``: ISO 8601 with a UTC offset (``2026-03-02T05:00:00.020Z``,
  ``2026-03-02T06:00:00.02+01:00``) or epoch seconds (``1772427600.02``).
* ``tag``: the tag name as in the line configuration.
* ``value``: a number in the tag's configured unit; ``nan``/``inf`` are read and
  counted, and enter the pipeline as bad-quality samples.
* ``quality``: ``good``, ``uncertain`` or ``bad`` (or 0, 1, 2); empty means good.

A header row is required. Rows are read in chunks; a row that cannot be read is
counted with its line number and skipped, never fatal.
"""

from __future__ import annotations

import csv
import gzip
import io
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import IO

import numpy as np

from connectors.base import QUALITY_CODES, SampleBatch

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
        reader = csv.reader(fh)
        try:
            header = next(reader)
        except StopIteration:
            return
        header = [h.strip().lower() for h in header]
        if header[:3] != list(HEADER[:3]):
            raise ValueError(f"{path}: line 1: expected the header 'time,tag,value,quality', got {','.join(header)!r}")
        has_q = len(header) >= 4 and header[3] == "quality"
        done = False
        while not done:
            rows: list[list[str]] = []
            nums: list[int] = []
            while len(rows) < chunk_rows:
                try:
                    row = next(reader)
                except StopIteration:
                    done = True
                    break
                except csv.Error:
                    problems.add("malformed", [reader.line_num])
                    continue
                rows.append(row)
                nums.append(reader.line_num)
            if rows:
                batch = _batch(rows, np.array(nums, dtype=np.int64), has_q, index, known_tags, problems)
                yield (batch, raw.tell()) if with_position else batch


def _batch(rows: list[list[str]], lines: np.ndarray, has_q: bool, index: dict[str, int], known: tuple[str, ...],
           problems: ReadProblems) -> SampleBatch:
    width = 4 if has_q else 3
    shaped = [len(r) == width or (len(r) == 3 and has_q) for r in rows]
    shape_ok = np.array(shaped, dtype=bool)
    if not shape_ok.all():
        problems.add("malformed", lines[~shape_ok])
        rows = [r for r, ok in zip(rows, shaped, strict=True) if ok]
        lines = lines[shape_ok]
    if not rows:
        return SampleBatch.empty(known)
    times, t_ok = parse_times([r[0] for r in rows])
    tags = [r[1].strip() for r in rows]
    vals, v_ok = _parse_values([r[2] for r in rows])
    qual = np.array([_QUALITY_WORDS.get(r[3].strip().lower() if len(r) > 3 else "", -1) for r in rows], dtype=np.int8)
    tag_idx = np.array([index.get(t, -1) for t in tags], dtype=np.int32)
    bad = ~t_ok | ~v_ok | (qual < 0) | np.array([t == "" for t in tags])
    if bad.any():
        problems.add("malformed", lines[bad])
    unknown = (tag_idx < 0) & ~bad
    if unknown.any():
        for name in sorted({tags[i] for i in np.flatnonzero(unknown)}):
            sel = unknown & np.array([t == name for t in tags])
            problems.add(f"unknown tag: {name}", lines[sel][:1])
            problems.counts[f"unknown tag: {name}"] += int(sel.sum()) - 1
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
