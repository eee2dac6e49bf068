"""Recordings in Apache Parquet: the same four columns as the CSV form, typed and compressed.

Apache Parquet is an open columnar file format (https://parquet.apache.org/docs/file-format/). A spanwatch
recording in it has the columns of the CSV long form:

* ``time``: ``timestamp[us, tz=UTC]`` (microseconds since the epoch, UTC);
* ``tag``: the tag name, dictionary-encoded text;
* ``value``: ``double``, in the tag's configured unit (NaN and infinities allowed, counted on reading);
* ``quality``: ``good``, ``uncertain`` or ``bad``, dictionary-encoded text.

Rows are written in time order, in time slices of ``row_group_seconds`` (60 s by default), one Parquet row
group each, with zstd compression (the values byte-stream split) and a CRC-32 checksum on every data page; a
reader streams the file row group by row group.

Reading accepts what another tool may write with the same column names: ``time`` as a timestamp with a time
zone (any unit), as epoch seconds (a floating-point column) or as ISO 8601 text; ``tag`` and ``quality`` as text
(``quality`` may be missing: every row good, or an integer column: 0 good, 1 uncertain, 2 bad); ``value`` as any
number. A column of another type is a :class:`~spanwatch.connectors.recording.RecordingError` naming it.

A row group that cannot be read (a page whose checksum fails, compressed data that does not decompress) costs
its own rows only: they are counted under ``damaged file: row group K unreadable`` and the reading goes on with
the next row group. A file whose footer cannot be read (not Parquet, cut short: a writer killed before it
closed the file) is a RecordingError.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from spanwatch.rules.samples import SampleBatch

ROW_GROUP_SECONDS = 60.0
FORMAT = b"spanwatch recording 1"
SCHEMA = pa.schema([("time", pa.timestamp("us", tz="UTC")), ("tag", pa.dictionary(pa.int32(), pa.string())),
                    ("value", pa.float64()), ("quality", pa.dictionary(pa.int8(), pa.string()))],
                   metadata={b"format": FORMAT})
_PER_SECOND = {"s": 1.0, "ms": 1e3, "us": 1e6, "ns": 1e9}
_QUALITY_NAMES = pa.array(["good", "uncertain", "bad"], type=pa.string())
# what reading may meet besides a damaged file: pyarrow's own errors, a Thrift footer that decodes to nonsense
READ_ERRORS = (pa.ArrowException, OSError, ValueError, MemoryError, IndexError, EOFError, KeyError, TypeError)


class ParquetWriter:
    """Write sample batches to a Parquet recording, one row group per ``row_group_seconds`` of data time.

    Rows are kept in memory until their time slice is complete (a slice is [k * row_group_seconds,
    (k + 1) * row_group_seconds) of epoch time), so memory stays bounded by one slice of the line's data.
    Batches must come in time order between slices (a simulator's or a recorder's chunks do).
    """

    def __init__(self, path: str | Path, *, row_group_seconds: float = ROW_GROUP_SECONDS) -> None:
        self.path = Path(path)
        self.slice = row_group_seconds
        self._writer = pq.ParquetWriter(self.path, SCHEMA, compression="zstd", write_page_checksum=True,
                                        use_dictionary=["tag", "quality"], use_byte_stream_split=["value"],
                                        write_statistics=["time"])
        self._pending: list[SampleBatch] = []
        self._pending_slice: float | None = None
        self.rows = 0

    def write(self, batch: SampleBatch) -> None:
        if not len(batch):
            return
        b = batch.sorted_by_time()
        slices = np.floor(b.t / self.slice)
        cuts = np.flatnonzero(np.diff(slices)) + 1
        for part, first in zip(np.split(np.arange(len(b)), cuts), np.concatenate([[0], cuts]), strict=True):
            k = float(slices[first])
            if self._pending_slice is not None and k != self._pending_slice:
                self._flush()
            self._pending_slice = k
            self._pending.append(_take(b, part))

    def _flush(self) -> None:
        if not self._pending:
            return
        b = SampleBatch.concat(self._pending) if len(self._pending) > 1 else self._pending[0]
        self._pending, self._pending_slice = [], None
        self._writer.write_table(to_table(b), row_group_size=max(1, len(b)))
        self.rows += len(b)

    def close(self) -> None:
        self._flush()
        self._writer.close()

    def __enter__(self) -> ParquetWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _take(b: SampleBatch, idx: np.ndarray) -> SampleBatch:
    return SampleBatch(b.tags, b.tag[idx], b.t[idx], b.value[idx], b.quality[idx], b.ref[idx])


def to_table(b: SampleBatch) -> pa.Table:
    """A sample batch as a table of the recording's schema (times rounded to whole microseconds)."""
    us = np.round(b.t * 1e6).astype(np.int64)
    tags = pa.DictionaryArray.from_arrays(pa.array(b.tag, type=pa.int32()), pa.array(list(b.tags), type=pa.string()))
    quality = pa.DictionaryArray.from_arrays(pa.array(np.clip(b.quality, 0, 2).astype(np.int8)), _QUALITY_NAMES)
    return pa.table([pa.array(us, type=pa.timestamp("us", tz="UTC")), tags, pa.array(b.value, type=pa.float64()),
                     quality], schema=SCHEMA)


def write_parquet(path: str | Path, batches: Iterable[SampleBatch], *,
                  row_group_seconds: float = ROW_GROUP_SECONDS) -> int:
    """Write batches as a Parquet recording; returns the number of rows."""
    with ParquetWriter(path, row_group_seconds=row_group_seconds) as w:
        for b in batches:
            w.write(b)
    return w.rows


@dataclass
class Part:
    """What one read of row groups gave: the table (None when they could not be read), the number of the first
    row (1-based), how many rows the file's footer says they hold, and the error when they could not be read."""

    table: pa.Table | None
    first_row: int
    rows: int
    groups: tuple[int, ...]
    error: str | None
    position: int


def open_parquet(path: Path) -> pq.ParquetFile:
    """The file's footer read; ValueError with a one-line reason when it cannot be."""
    try:
        return pq.ParquetFile(path, page_checksum_verification=True)
    except READ_ERRORS as exc:
        raise ValueError(f"not a readable Parquet file ({_short(exc)})") from None


def _short(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return text[:160]


def parts(pf: pq.ParquetFile, columns: list[str], rows_per_read: int) -> Iterator[Part]:
    """Row groups read a few at a time (about ``rows_per_read`` rows); a read that fails is retried group by
    group, so a damaged group costs its own rows only."""
    meta = pf.metadata
    sizes = [meta.row_group(i).num_rows for i in range(meta.num_row_groups)]
    compressed = [sum(meta.row_group(i).column(j).total_compressed_size for j in range(meta.num_columns))
                  for i in range(meta.num_row_groups)]
    first = 1
    i = 0
    position = 0
    while i < len(sizes):
        j, n = i, 0
        while j < len(sizes) and (n == 0 or n + sizes[j] <= rows_per_read):
            n += sizes[j]
            j += 1
        groups = list(range(i, j))
        try:
            table = pf.read_row_groups(groups, columns=columns, use_threads=False)
            if table.num_rows != n:
                raise ValueError(f"{table.num_rows} rows where the footer says {n}")
            position += sum(compressed[i:j])
            yield Part(table, first, n, tuple(groups), None, position)
        except READ_ERRORS as exc:
            if len(groups) == 1:
                position += compressed[i]
                yield Part(None, first, n, (i,), _short(exc), position)
            else:
                start = first
                for g in groups:  # find the damaged group(s): each costs its own rows only
                    position += compressed[g]
                    yield _one(pf, columns, g, start, sizes[g], position)
                    start += sizes[g]
        first += n
        i = j


def _one(pf: pq.ParquetFile, columns: list[str], g: int, first: int, n: int, position: int) -> Part:
    try:
        table = pf.read_row_groups([g], columns=columns, use_threads=False)
        if table.num_rows != n:
            raise ValueError(f"{table.num_rows} rows where the footer says {n}")
    except READ_ERRORS as exc:
        return Part(None, first, n, (g,), _short(exc), position)
    return Part(table, first, n, (g,), None, position)


# --- columns -> numpy ------------------------------------------------------------------------------------------------


def column_problem(schema: pa.Schema) -> tuple[str, str] | None:
    """(column, what was expected) for the first column a recording cannot be read with, or None."""
    want = {"time": "a timestamp with a time zone, epoch seconds (floating point) or ISO 8601 text",
            "tag": "text", "value": "numbers"}
    for name in ("time", "tag", "value"):
        if name not in schema.names:
            return name, f"a column {name!r} ({want[name]}); the file has {', '.join(schema.names) or 'none'}"
    t = schema.field("time").type
    if not ((pa.types.is_timestamp(t) and t.tz is not None) or pa.types.is_floating(t) or _is_text(t)):
        return "time", f"{want['time']}, got {t}"
    if not _is_text(schema.field("tag").type):
        return "tag", f"text, got {schema.field('tag').type}"
    v = schema.field("value").type
    if not (pa.types.is_floating(v) or pa.types.is_integer(v)):
        return "value", f"numbers, got {v}"
    if "quality" in schema.names:
        q = schema.field("quality").type
        if not (_is_text(q) or pa.types.is_integer(q)):
            return "quality", f"text (good, uncertain, bad) or codes 0, 1, 2, got {q}"
    return None


def _is_text(t: pa.DataType) -> bool:
    if pa.types.is_dictionary(t):
        t = t.value_type
    return pa.types.is_string(t) or pa.types.is_large_string(t)


def _plain(col: pa.ChunkedArray) -> pa.Array:
    return col.combine_chunks() if col.num_chunks != 1 else col.chunk(0)


def times(col: pa.ChunkedArray) -> tuple[np.ndarray, np.ndarray] | pa.Array:
    """(epoch seconds, usable) of a timestamp or number column; a text column is returned as one plain array
    for the caller's ISO 8601 parser."""
    t = col.type
    if _is_text(t):
        return _plain(col.cast(pa.string()).fill_null(""))
    ok = ~np.asarray(col.is_null().to_numpy(zero_copy_only=False), dtype=bool)
    if pa.types.is_timestamp(t):  # whole units since the epoch, one division (exact for us below 2**53)
        raw = np.asarray(col.cast(pa.int64()).fill_null(0).to_numpy(), dtype=np.int64)
        return raw / _PER_SECOND[t.unit], ok
    return np.asarray(col.cast(pa.float64()).fill_null(np.nan).to_numpy(), dtype=float), ok


def values(col: pa.ChunkedArray) -> tuple[np.ndarray, np.ndarray]:
    """(value as float64, present)."""
    ok = ~np.asarray(col.is_null().to_numpy(zero_copy_only=False), dtype=bool)
    return np.asarray(col.cast(pa.float64()).fill_null(np.nan).to_numpy(), dtype=float), ok


def texts(col: pa.ChunkedArray) -> tuple[list[str], np.ndarray]:
    """A text column as its distinct texts and each row's index into them (a missing text reads as "")."""
    if pa.types.is_integer(col.type):  # quality codes
        codes = np.asarray(col.cast(pa.int64()).fill_null(0).to_numpy(), dtype=np.int64)
        words = ["good", "uncertain", "bad"]
        return [*words, "?"], np.where((codes >= 0) & (codes <= 2), codes, 3)
    if not pa.types.is_dictionary(col.type):
        col = pa.chunked_array([c.cast(pa.string()).fill_null("") for c in col.chunks], type=pa.string())
        col = col.dictionary_encode()
    col = col.unify_dictionaries()
    if col.num_chunks == 0:
        return [], np.zeros(0, dtype=np.int64)
    dictionary = col.chunk(0).dictionary
    words = [("" if w is None else w) for w in dictionary.to_pylist()]
    nulls = len(words)
    parts = [np.asarray(c.indices.fill_null(nulls).to_numpy(zero_copy_only=False), dtype=np.int64)
             for c in col.chunks]
    return [*words, ""], np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)
