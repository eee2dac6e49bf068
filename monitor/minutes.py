"""Each check's value per minute: frames, valid frames, and the least, mean and greatest valid value.

The pipeline hands every block's check results to a :class:`MinuteAccumulator` (a checks x frames matrix of values
and one of validity, reason OK). Frames are grouped by the minute they fall in, ``floor(t / 60)`` (epoch s, so the
minutes of every run and line line up); per group and check, numpy's ``reduceat`` gives the counts, sums, minima
and maxima of a whole block at once, and the open minute carries them across blocks. A minute's rows are emitted
once it is complete: when a frame of a later minute arrives, or when the pipeline has computed every frame before
the minute's end (:meth:`MinuteAccumulator.complete_before`); :meth:`MinuteAccumulator.flush` gives the partial
minute at the end of a run. A gap (no frames) just leaves minutes out, and a minute cut by a gap holds the frames it
had.

The mean is the sum of the valid values over their count, accumulated in float64.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from spanwatch.connectors.history.trends import MINUTE, CheckMinute


class MinuteAccumulator:
    """The open minute of every check of a line, and the rows of the minutes completed (see the module)."""

    def __init__(self, units: dict[tuple[str, str], str], period: float = MINUTE) -> None:
        self.units = units  # (kind, object) -> the unit of its value
        self.period = period
        self.keys: list[tuple[str, str]] = []
        self._minute: float | None = None  # index (floor(t / period)) of the open minute
        self._n = 0
        self._valid = self._sum = self._min = self._max = np.zeros(0)  # per check; min and max NaN while none

    def push(self, t: np.ndarray, keys: Sequence[tuple[str, str]], values: np.ndarray,
             valid: np.ndarray) -> list[CheckMinute]:
        """Take one block: frame times ``t`` (increasing), checks ``keys``, ``values`` and ``valid`` of shape
        (checks, frames). Returns the rows of the minutes this block completed."""
        out: list[CheckMinute] = []
        if t.size == 0:
            return out
        if list(keys) != self.keys:  # another set of checks: what was open is complete as it is
            out += self.flush()
            self.keys = list(keys)
        m = np.floor(t / self.period)
        starts = np.flatnonzero(np.r_[True, m[1:] != m[:-1]])
        minutes = m[starts]
        sizes = np.diff(np.r_[starts, t.size])
        cnt = np.add.reduceat(valid, starts, axis=1, dtype=np.int64)
        tot = np.add.reduceat(np.where(valid, values, 0.0), starts, axis=1)
        blanked = np.where(valid, values, np.nan)  # fmin and fmax skip NaN: NaN only where a group has no valid frame
        lo = np.fmin.reduceat(blanked, starts, axis=1)
        hi = np.fmax.reduceat(blanked, starts, axis=1)
        for g, minute in enumerate(minutes):
            if self._minute is not None and minute != self._minute:
                out += self._close()
            if self._minute is None:
                self._minute, self._n = float(minute), 0
                k = len(self.keys)
                self._valid, self._sum = np.zeros(k, np.int64), np.zeros(k)
                self._min, self._max = np.full(k, np.nan), np.full(k, np.nan)
            self._n += int(sizes[g])
            self._valid += cnt[:, g]
            self._sum += tot[:, g]
            np.fmin(self._min, lo[:, g], out=self._min)
            np.fmax(self._max, hi[:, g], out=self._max)
        return out

    def complete_before(self, next_t: float) -> list[CheckMinute]:
        """The open minute's rows when no frame before ``next_t`` (epoch s) is still to come and it ends by then."""
        if self._minute is not None and next_t >= (self._minute + 1) * self.period:
            return self._close()
        return []

    def flush(self) -> list[CheckMinute]:
        """The open minute's rows, complete or not (the end of a run)."""
        return self._close() if self._minute is not None else []

    def _close(self) -> list[CheckMinute]:
        assert self._minute is not None
        t0 = self._minute * self.period
        n = self._n
        some = self._valid > 0
        mean = np.divide(self._sum, self._valid, out=np.full(self._sum.shape, np.nan), where=some)
        rows = [CheckMinute(kind, obj, t0, n, int(v), float(lo) if ok else None, float(mu) if ok else None,
                            float(hi) if ok else None, self.units.get((kind, obj), ""))
                for (kind, obj), v, lo, mu, hi, ok in zip(self.keys, self._valid.tolist(), self._min.tolist(),
                                                          mean.tolist(), self._max.tolist(), some.tolist(),
                                                          strict=True)]
        self._minute = None
        return rows
