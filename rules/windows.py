"""Vectorised sliding-window helpers that carry their history from one block to the next.

Checks see the signal in blocks; a window that spans a block boundary needs the tail
of the previous block. :class:`RollingMean` keeps exactly that tail.
"""

from __future__ import annotations

import numpy as np


def forward_fill_index(mask: np.ndarray) -> np.ndarray:
    """For each position, the index of the last True at or before it (-1 if none)."""
    idx = np.where(mask, np.arange(mask.shape[0]), -1)
    return np.maximum.accumulate(idx) if idx.size else idx


class RollingMean:
    """Mean of the last ``w`` frames and whether all of them were usable.

    ``update(x, ok)`` returns ``(mean, all_ok)`` for each frame of the block, using the
    carried tail of earlier blocks; frames with fewer than ``w`` predecessors are not
    all_ok. Non-usable frames count as zero in the sum and poison all_ok for ``w``
    frames, so a NaN never leaks into a mean that is reported as valid.
    """

    def __init__(self, w: int) -> None:
        self.w = max(1, int(w))
        self._x = np.zeros(0)
        self._ok = np.zeros(0, dtype=bool)

    def update(self, x: np.ndarray, ok: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        n = x.shape[0]
        ok = ok & np.isfinite(x)
        xs = np.concatenate([self._x, np.where(ok, x, 0.0)])
        oks = np.concatenate([self._ok, ok])
        m = self._x.shape[0]
        c = np.concatenate([[0.0], np.cumsum(xs)])
        cb = np.concatenate([[0], np.cumsum(~oks)])
        end = np.arange(m + 1, m + n + 1)
        start = end - self.w
        enough = start >= 0
        start = np.maximum(start, 0)
        mean = (c[end] - c[start]) / self.w
        all_ok = enough & ((cb[end] - cb[start]) == 0)
        keep = self.w - 1
        self._x = xs[-keep:] if keep else xs[:0]
        self._ok = oks[-keep:] if keep else oks[:0]
        return mean, all_ok

    def reset(self) -> None:
        self._x = np.zeros(0)
        self._ok = np.zeros(0, dtype=bool)


class Lagged:
    """The value ``k`` frames ago (NaN / not-ok until ``k`` frames have been seen)."""

    def __init__(self, k: int) -> None:
        self.k = max(1, int(k))
        self._x = np.full(self.k, np.nan)
        self._ok = np.zeros(self.k, dtype=bool)

    def update(self, x: np.ndarray, ok: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        xs = np.concatenate([self._x, x])
        oks = np.concatenate([self._ok, ok])
        n = x.shape[0]
        out, out_ok = xs[:n], oks[:n]
        self._x, self._ok = xs[-self.k:], oks[-self.k:]
        return out, out_ok
