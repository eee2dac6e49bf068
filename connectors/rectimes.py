"""Times of a recording: ISO 8601 with a UTC offset or epoch seconds, read as Python reads them, but vectorised.

:func:`iso_matrix` parses the common form ``YYYY-MM-DD[T ]HH:MM:SS[.f{1,6}](Z|+HH:MM|-HH:MM)`` on a byte
matrix (one row per time); it gives what ``datetime.fromisoformat(s).timestamp()`` gives on that form, and
says which rows it could not read, which the callers then read one by one with Python's own parsers
(:func:`parse_one`). :func:`times_of` does this for a list of Python strings, :func:`arrow_times` for an
Apache Arrow string column straight from its buffers (no Python string is made for a row of the common form).
"""

from __future__ import annotations

from datetime import datetime
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import pyarrow as pa

_DIGITS = [0, 1, 2, 3, 5, 6, 8, 9, 11, 12, 14, 15, 17, 18]  # YYYY-MM-DDTHH:MM:SS


_T_MIN, _T_MAX = 0.0, 7_258_118_400.0  # 1970 and 2200 (the reader's own bounds of a usable time)
_ISO_SLICE = 32_768  # rows per pass of the vectorised parser: bounds its temporary arrays (a few MB)


def _iso_fast(col: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_iso_slice` over slices of the column."""
    if len(col) <= _ISO_SLICE:
        return _iso_slice(col)
    parts = [_iso_slice(col[i:i + _ISO_SLICE]) for i in range(0, len(col), _ISO_SLICE)]
    return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])


def _iso_slice(col: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """:func:`iso_matrix` on Python strings; (epoch seconds, ok)."""
    n = len(col)
    t = np.full(n, np.nan)
    ok_all = np.zeros(n, dtype=bool)
    lens = np.fromiter(map(len, col), dtype=np.int64, count=n)
    idx = np.flatnonzero((lens >= 20) & (lens <= 32))  # the shortest and the longest of the form
    if not idx.size:
        return t, ok_all
    sub = col if idx.size == n else [col[i] for i in idx.tolist()]
    try:
        a = np.array(sub, dtype="S")
    except UnicodeEncodeError:  # non-ASCII in some rows: those are for the slow path
        keep = np.array([s.isascii() for s in sub], dtype=bool)
        idx = idx[keep]
        if not idx.size:
            return t, ok_all
        sub = [col[i] for i in idx.tolist()]
        a = np.array(sub, dtype="S")
    m, w = len(sub), a.dtype.itemsize
    c = a.view(np.uint8).reshape(m, w)
    length = np.char.str_len(a).astype(np.int64)
    t_sub, ok = iso_matrix(c, length)
    ok &= length == lens[idx]  # numpy drops trailing NULs: such a row is not of the form
    t[idx[ok]] = t_sub[ok]
    ok_all[idx[ok]] = True
    return t, ok_all


def iso_matrix(c: np.ndarray, length: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Vectorised ``YYYY-MM-DD[T ]HH:MM:SS[.f{1,6}](Z|+HH:MM|-HH:MM)`` on a byte matrix; (epoch seconds, ok).

    ``c`` holds one time per row as ASCII bytes (uint8, shape (m, w), bytes past a row's ``length`` ignored).
    Rows not of exactly this form are not ok (the caller parses them one by one with Python's own
    parser). On this form the result equals ``datetime.fromisoformat(s).timestamp()``: the same field
    ranges are checked, and the time is formed as whole microseconds before one division, as
    ``timedelta.total_seconds`` does.
    """
    m, w = c.shape
    t = np.full(m, np.nan)
    if m == 0 or w < 20:
        return t, np.zeros(m, dtype=bool)
    ok = (length >= 20) & (length <= 32)
    d = c - np.uint8(48)  # uint8, wrapping: a digit is 0..9, any other byte 10 or more
    dig = d <= 9
    ok &= (dig[:, _DIGITS].all(axis=1) & (c[:, 4] == 45) & (c[:, 7] == 45) & ((c[:, 10] == 84) | (c[:, 10] == 32))
           & (c[:, 13] == 58) & (c[:, 16] == 58))
    rows = np.arange(m)
    same = int(length[0]) if (length == length[0]).all() else None  # one width (the usual case): column slices

    def at(delta: int) -> tuple[np.ndarray, np.ndarray]:
        """The byte and its digit value at position ``length + delta`` of each row."""
        if same is not None:
            p = min(max(same + delta, 0), w - 1)
            return c[:, p], d[:, p].astype(np.int64)
        pos = np.clip(length + delta, 0, w - 1)
        return c[rows, pos], d[rows, pos].astype(np.int64)

    zulu = at(-1)[0] == 90
    sign_c, colon_c = at(-6)[0], at(-3)[0]
    oh1, oh2, om1, om2 = (at(-6 + k)[1] for k in (1, 2, 4, 5))
    odig = (oh1 <= 9) & (oh2 <= 9) & (om1 <= 9) & (om2 <= 9)
    offset_ok = ((sign_c == 43) | (sign_c == 45)) & (colon_c == 58) & odig
    stem = np.where(zulu, length - 1, np.where(offset_ok, length - 6, -1))
    # fraction: a '.' at 19, then 1 to 6 digits up to the offset
    fpos = np.arange(20, 26)
    frac_d = np.zeros((m, 6), dtype=np.int64)
    frac_dig = np.zeros((m, 6), dtype=bool)
    k = max(0, min(w, 26) - 20)
    frac_d[:, :k] = d[:, 20:20 + k]
    frac_dig[:, :k] = dig[:, 20:20 + k]
    need = fpos[None, :] < stem[:, None]
    dot = c[:, 19] == 46
    ok &= (stem == 19) | ((stem >= 21) & (stem <= 26) & dot & (~need | frac_dig).all(axis=1))
    if not ok.any():
        return t, ok
    us = (np.where(need, frac_d, 0) * 10 ** (25 - fpos)).sum(axis=1)

    def num(*cols: int) -> np.ndarray:
        out = np.zeros(m, dtype=np.int64)
        for j in cols:
            out = out * 10 + d[:, j]
        return out

    year, month, day = num(0, 1, 2, 3), num(5, 6), num(8, 9)
    hour, minute, second = num(11, 12), num(14, 15), num(17, 18)
    off_h, off_m = oh1 * 10 + oh2, om1 * 10 + om2
    off = np.where(zulu, 0, np.where(sign_c == 45, -1, 1) * (off_h * 3600 + off_m * 60))
    ok &= ((year >= 1) & (month >= 1) & (month <= 12) & (day >= 1) & (hour <= 23) & (minute <= 59) & (second <= 59)
           & (zulu | ((off_h <= 23) & (off_m <= 59))))
    months = np.where(ok, (year - 1970) * 12 + month - 1, 0).astype("datetime64[M]")
    day0 = months.astype("datetime64[D]").astype(np.int64)
    in_month = (months + 1).astype("datetime64[D]").astype(np.int64) - day0
    ok &= day <= in_month
    seconds = (day0 + day - 1) * 86_400 + hour * 3600 + minute * 60 + second - off
    t[ok] = (seconds[ok] * 1_000_000 + us[ok]) / 1e6
    return t, ok


def parse_one(text: str) -> tuple[float, bool]:
    """One time by Python's own parsers: (epoch seconds, parsed)."""
    text = text.strip()
    try:
        return float(text), True
    except ValueError:
        pass
    try:
        dt = datetime.fromisoformat(text)
    except ValueError:
        return np.nan, False
    if dt.tzinfo is None or dt.utcoffset() is None:
        return np.nan, False  # a time without an offset is ambiguous: refuse it
    try:
        return dt.timestamp(), True
    except (OverflowError, ValueError, OSError):
        return np.nan, False


def times_of(col: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """(epoch seconds, parsed); parsed rows may still be NaN or infinite (``"nan"``, ``"inf"``)."""
    n = len(col)
    try:
        return np.array(col, dtype=float), np.ones(n, dtype=bool)
    except ValueError:
        pass
    t, ok = _iso_fast(col)
    for i in np.flatnonzero(~ok).tolist():
        t[i], ok[i] = parse_one(col[i])
    return t, ok


def parse_times(col: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Parse a column of times; returns (epoch seconds, ok mask). Vectorised on the common forms.

    ok is False for a time that cannot be read, has no UTC offset, or is NaN or infinite.
    """
    t, parsed = times_of(col)
    return t, parsed & np.isfinite(t)


def _uniform_zulu(arr: pa.Array, data: np.ndarray, offsets: np.ndarray, lens: np.ndarray) -> np.ndarray | None:
    """Epoch seconds of a column whose every row is ``YYYY-MM-DD[T ]HH:MM:SS[.f{1,6}]Z`` of one width (what
    :func:`spanwatch.connectors.recording.write_recording` writes), by Arrow's own cast; None for any other column.

    The separators are checked on column slices (cheap at one width); Arrow's ISO 8601 parser then requires
    a digit at every other place and checks the field ranges (a 30 February, an hour 24 or a second 60 fail
    the whole cast), and forms the time in whole microseconds, which is what Python's
    ``datetime.fromisoformat(s).timestamp()`` gives on this form. A time before 1970 or from 2200 on goes back
    to the general path, which tells a malformed year from a bad time.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    width = int(lens[0])
    if not 20 <= width <= 27 or width == 21 or not (lens == width).all():
        return None
    c = data[offsets[0]: offsets[-1]].reshape(-1, width)
    ok = (c[:, width - 1] == 90) & (c[:, 4] == 45) & (c[:, 7] == 45) & ((c[:, 10] == 84) | (c[:, 10] == 32))
    ok &= (c[:, 13] == 58) & (c[:, 16] == 58)
    if width > 20:
        ok &= c[:, 19] == 46
    if not ok.all():
        return None
    try:
        us = pc.cast(arr, pa.timestamp("us", tz="UTC")).cast(pa.int64()).to_numpy(zero_copy_only=False)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None
    t = us / 1e6
    if not ((t >= _T_MIN) & (t < _T_MAX)).all():
        return None
    return t


def arrow_times(arr: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """:func:`times_of` for an Arrow string column without nulls: (epoch seconds, parsed).

    Rows of the common ISO form are parsed from the column's bytes by :func:`iso_matrix`; the rest are
    tried as numbers all at once (Arrow's cast, which reads a finite number as Python's ``float`` does),
    and what is still left (a non-finite number, another ISO form, garbage) one by one by :func:`parse_one`.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    n = len(arr)
    t = np.full(n, np.nan)
    ok = np.zeros(n, dtype=bool)
    if n == 0:
        return t, ok
    off_type = np.int64 if arr.type == pa.large_string() else np.int32
    bufs = arr.buffers()
    offsets = np.frombuffer(bufs[1], dtype=off_type)[arr.offset: arr.offset + n + 1].astype(np.int64)
    data = np.frombuffer(bufs[2], dtype=np.uint8) if bufs[2] is not None and bufs[2].size else np.zeros(1, np.uint8)
    lens = np.diff(offsets)
    fast = _uniform_zulu(arr, data, offsets, lens)
    if fast is not None:
        return fast, np.ones(n, dtype=bool)
    for a in range(0, n, _ISO_SLICE):
        b = min(n, a + _ISO_SLICE)
        ln = lens[a:b]
        if ln[0] >= 20 and ln[0] <= 32 and (ln == ln[0]).all() and offsets[b] - offsets[a] == (b - a) * ln[0]:
            c = data[offsets[a]: offsets[b]].reshape(b - a, int(ln[0]))  # one width: a view, no copy
            ts, oks = iso_matrix(c, ln)
            t[a:b], ok[a:b] = ts, oks
            continue
        sel = np.flatnonzero((ln >= 20) & (ln <= 32))
        if not sel.size:
            continue
        width = int(ln[sel].max())
        pos = offsets[a:b][sel][:, None] + np.arange(width)[None, :]
        inside = np.arange(width)[None, :] < ln[sel][:, None]
        c = np.where(inside, data[np.minimum(pos, data.size - 1)], 0).astype(np.uint8)
        ts, oks = iso_matrix(c, ln[sel])
        t[a + sel], ok[a + sel] = ts, oks
    rest = np.flatnonzero(~ok)
    if rest.size:
        try:
            num = pc.cast(arr.take(pa.array(rest)), pa.float64()).to_numpy(zero_copy_only=False)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            num = None
        if num is not None and np.isfinite(num).all():
            t[rest], ok[rest] = num, True
        else:
            for i in rest.tolist():
                t[i], ok[i] = parse_one(arr[i].as_py())
    return t, ok
