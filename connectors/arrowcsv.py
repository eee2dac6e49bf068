"""The fast path of the CSV reader: a block of whole lines parsed by Apache Arrow's CSV reader.

:func:`block_columns` hands a block of LF-ended lines to ``pyarrow.csv`` (single-threaded, typed columns:
time as text, tag and quality dictionary-encoded, value as float64) and returns its columns only when the
result is certainly what the line-by-line reader of :mod:`spanwatch.connectors.recording` would read: one
row per line, every field of every row read. Any block it cannot vouch for (a row with another number of
fields, a byte that is not UTF-8, a value Arrow cannot read, an empty line, a lone CR, a non-finite value
Python's ``float`` would refuse) returns None, and the caller reads that block line by line, which counts
each bad row with its line number. So the fast path changes the speed, never what is read or counted.

Why the cases hold: with quoting and escapes off and ``newlines_in_values`` false, Arrow splits a block at
LF, CR and CRLF only and never joins lines, so the same number of rows as LFs means the same rows; an empty
line is kept as a row of one field (an error); a value is read by the same correctly rounded decimal
conversion as Python's ``float`` for every finite number (checked by a differential test), and a non-finite
value is checked again against Python's ``float`` on its own text.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
from spanwatch.connectors.rectimes import arrow_times

_NAMES = ("time", "tag", "value", "quality")
_PARSE = pacsv.ParseOptions(delimiter=",", quote_char=False, double_quote=False, escape_char=False,
                            newlines_in_values=False, ignore_empty_lines=False)
_TYPES = {"time": pa.string(), "tag": pa.dictionary(pa.int32(), pa.string()), "value": pa.float64(),
          "quality": pa.dictionary(pa.int32(), pa.string())}
_CONVERT = {w: pacsv.ConvertOptions(column_types={k: _TYPES[k] for k in _NAMES[:w]}, null_values=[],
                                     strings_can_be_null=False, quoted_strings_can_be_null=False, check_utf8=True)
            for w in (3, 4)}


@dataclass
class BlockColumns:
    """The columns of a block: times (epoch s) and whether each was read, values, the distinct tag texts and
    each row's index into them, the same for the quality words (empty when the file has no quality column)."""

    t: np.ndarray
    t_ok: np.ndarray
    value: np.ndarray
    tag_texts: list[str]
    tag_index: np.ndarray
    quality_words: list[str]
    quality_index: np.ndarray
    rows: int


def _dictionary(col: pa.ChunkedArray) -> tuple[list[str], np.ndarray] | None:
    if col.num_chunks != 1:
        return None
    arr = col.chunk(0)
    return arr.dictionary.to_pylist(), arr.indices.to_numpy(zero_copy_only=False).astype(np.int64)


def _python_refuses(part: bytes, rows: np.ndarray) -> bool:
    """Whether Python's ``float`` refuses the value text of any of ``rows`` (0-based lines of ``part``)."""
    ends = np.flatnonzero(np.frombuffer(part, dtype=np.uint8) == 10)
    starts = np.concatenate([[0], ends[:-1] + 1])
    for r in rows.tolist():
        fields = part[starts[r]:ends[r]].split(b",")
        try:
            float(fields[2].decode("ascii"))
        except (ValueError, UnicodeDecodeError, IndexError):
            return True
    return False


def block_columns(part: bytes, width: int) -> BlockColumns | None:
    """Parse ``part`` (whole lines, each ending in LF, no header) of a ``width``-column file (3 or 4); None when
    the block must be read line by line (see the module docstring). ``rows`` of the result is the number of lines.

    Without a CR in the block, Arrow ends a row at LF only, so its rows are the lines; with one, the LFs are
    counted and must equal the rows (a lone CR would have cut a line in two).
    """
    if not part:
        return None
    names = list(_NAMES[:width])
    try:
        table = pacsv.read_csv(
            pa.py_buffer(part),
            read_options=pacsv.ReadOptions(column_names=names, use_threads=False, block_size=len(part) + 1),
            parse_options=_PARSE,
            convert_options=_CONVERT[width])
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError):
        return None
    lines = part.count(b"\n") if b"\r" in part else table.num_rows
    if table.num_rows != lines or any(c.null_count for c in table.columns):
        return None
    value = table.column("value").to_numpy()
    nonfinite = np.flatnonzero(~np.isfinite(value))
    if nonfinite.size and _python_refuses(part, nonfinite):
        return None
    tags = _dictionary(table.column("tag"))
    if tags is None:
        return None
    if width > 3:
        quality = _dictionary(table.column("quality"))
        if quality is None:
            return None
    else:
        quality = ([], np.zeros(0, dtype=np.int64))
    time_col = table.column("time")
    if time_col.num_chunks != 1:
        return None
    t, t_ok = arrow_times(time_col.chunk(0))
    return BlockColumns(t, t_ok, value, tags[0], tags[1], quality[0], quality[1], lines)
