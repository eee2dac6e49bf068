"""Helpers for a check kind that evaluates all its objects at once (see :class:`spanwatch.rules.base.CheckBatch`).

A stacked kind computes on an objects x frames matrix: one row per check object, one column per
frame of the block, so that each row is contiguous and becomes that object's result without a
copy. Per-object parameters are column vectors of shape ``(k, 1)`` that broadcast over the frames.
Every function here is the row-wise twin of a one-object helper in :mod:`spanwatch.rules.base` or
:mod:`spanwatch.rules.windows` and gives, row by row, exactly what that helper gives for one object
(the same elementwise operations in the same order), so a kind's batch and its objects' own
``update`` agree to the bit.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from typing import Any, ClassVar

import numpy as np
from spanwatch.rules.base import Block, CheckResult, Reason, Signal, blank_invalid, combine_reasons


def column(values: Iterable[float]) -> np.ndarray:
    """Per-object parameters as a float column vector ``(k, 1)`` that broadcasts over frames."""
    return np.array(list(values), dtype=float).reshape(-1, 1)


def forward_fill_rows(mask: np.ndarray) -> np.ndarray:
    """Per row, for each frame the index of the last True at or before it (-1 if none).

    The row-wise :func:`spanwatch.rules.windows.forward_fill_index`.
    """
    idx = np.where(mask, np.arange(mask.shape[-1]), -1)
    return np.maximum.accumulate(idx, axis=-1) if idx.size else idx


def signal_rows(block: Block, names: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
    """The signals ``names`` of a block stacked as (value, ok) matrices of shape ``(len(names), n)``.

    A signal the block lacks reads as :meth:`Signal.missing` (NaN, not ok), as :meth:`Block.signal` gives it.
    """
    n = block.n
    value = np.empty((len(names), n))
    ok = np.empty((len(names), n), dtype=bool)
    missing = Signal.missing(n)
    for i, name in enumerate(names):
        s = block.signals.get(name, missing)
        value[i] = s.value
        ok[i] = s.ok
    return value, ok


def finalise_rows(value: np.ndarray, reason: np.ndarray, **extras: np.ndarray) -> list[CheckResult]:
    """The row-wise :func:`spanwatch.rules.base.finalise`: one result per row of ``value`` (objects x frames).

    Non-finite values on valid frames become OUT_OF_DOMAIN, invalid frames are blanked; each extra is a matrix
    of the same shape (or a row vector ``(1, n)`` shared by every object) whose row goes with the object.
    """
    value, reason = blank_invalid(value, reason)
    k = value.shape[0]
    rows = {name: (e if e.shape[0] == k else np.broadcast_to(e, value.shape)) for name, e in extras.items()}
    return [CheckResult(value=value[i], reason=reason[i], extras={name: e[i] for name, e in rows.items()})
            for i in range(k)]


def combine_rows(*pairs: tuple[np.ndarray, Reason], shape: tuple[int, int]) -> np.ndarray:
    """The row-wise :func:`spanwatch.rules.base.combine_reasons`: first failing condition wins, per object and
    frame. A mask may be ``(n,)`` (the same frames fail for every object) or ``(k, n)``."""
    return combine_reasons(*pairs, n=shape)


Carried = float | bool | int


class Slots:
    """What the checks of a stacked kind carry from one block to the next: one array per quantity, one slot (a
    row) per check. ``spec`` gives each quantity's fresh value (its dtype follows: bool, int or float) and the
    shape of one check's share (``()`` for one number, ``(w,)`` for a window's tail)."""

    def __init__(self, k: int, spec: Mapping[str, tuple[Carried, tuple[int, ...]]]) -> None:
        self.spec = dict(spec)
        self.a = {name: np.full((k, *shape), v, dtype=_dtype(v)) for name, (v, shape) in self.spec.items()}

    def reset(self, rows: slice) -> None:
        """Return the slots ``rows`` to their fresh values."""
        for name, (v, _) in self.spec.items():
            self.a[name][rows] = v


def _dtype(v: Carried) -> type:
    return bool if isinstance(v, bool) else int if isinstance(v, int) else float


class StackedBatch:
    """The base of a stacked kind's batch: ``checks`` in order, evaluated together by ``update``.

    A batch made for a kind's objects (``alone`` False) takes over their carried state (:class:`Slots`): each
    check then keeps a slot of the batch's slots, so its own ``update`` and ``reset`` still act on the same
    state; the batch of one a check runs alone (``alone`` True) uses that check's slot wherever it is. The kind
    names its carried numbers and their fresh values in ``carries``, or overrides :meth:`carried` (empty:
    nothing carried).
    """

    carries: ClassVar[Mapping[str, Carried]] = {}

    def __init__(self, checks: Sequence[Any], *, alone: bool = False) -> None:
        self.checks = tuple(checks)
        self.alone = alone
        self.slots: Slots | None = None
        spec = self.carried(self.checks[0]) if self.checks else {}
        if spec and not alone:
            self.slots = Slots(len(self.checks), spec)
            for i, c in enumerate(self.checks):
                for name, arr in self.slots.a.items():
                    arr[i] = c._slots.a[name][c._slot]
                c._slots, c._slot = self.slots, i
        self.carrying = bool(spec)

    @classmethod
    def carried(cls, check: Any) -> dict[str, tuple[Carried, tuple[int, ...]]]:
        """What ``check`` carries: each quantity's fresh value and the shape of one check's share."""
        return {name: (v, ()) for name, v in cls.carries.items()}

    def where(self) -> tuple[Slots, slice]:
        """The slots this batch's state lives in and its rows there."""
        if self.alone:
            c = self.checks[0]
            return c._slots, slice(c._slot, c._slot + 1)
        assert self.slots is not None
        return self.slots, slice(None)

    def reset(self) -> None:
        """Forget what the checks carry from one block to the next."""
        if self.carrying:
            slots, rows = self.where()
            slots.reset(rows)

    def update(self, block: Block) -> list[CheckResult]:
        raise NotImplementedError


class Stacked:
    """Mixin of a check class whose kind is evaluated stacked: ``batch`` builds its :class:`StackedBatch`
    (the class attribute ``_batch``), and the check's own ``update`` is that batch of one, so one
    implementation serves both."""

    _batch: ClassVar[type[StackedBatch]]

    def _init_slots(self) -> None:
        """Fresh carried state of a check on its own (call from ``__init__`` when the kind carries any)."""
        self._slots, self._slot = Slots(1, self._batch.carried(self)), 0

    @classmethod
    def batch(cls, checks: Sequence[Any]) -> StackedBatch:
        """All the checks of this kind, evaluated together."""
        return cls._batch(checks)

    def update(self, block: Block) -> CheckResult:
        alone = self.__dict__.get("_alone")
        if alone is None:
            alone = self._alone = self._batch((self,), alone=True)
        return alone.update(block)[0]

    def reset(self) -> None:
        """Forget what this check carries from one block to the next (nothing, for a kind that carries nothing)."""
        slots = self.__dict__.get("_slots")
        if slots is not None:
            slots.reset(slice(self._slot, self._slot + 1))


def rolling_mean_rows(x: np.ndarray, ok: np.ndarray, tail_x: np.ndarray, tail_ok: np.ndarray, filled: np.ndarray,
                      w: int) -> tuple[np.ndarray, np.ndarray]:
    """The row-wise :class:`spanwatch.rules.windows.RollingMean` (window ``w`` frames): per row and frame the mean of
    the last ``w`` frames and whether all of them were usable.

    The carried tail of each row lives in ``tail_x`` / ``tail_ok`` (rows x ``w - 1`` buffers, the last
    ``filled`` columns in use; every row has seen the same frames, so one count serves all) and is updated in
    place, as is ``filled`` (one count per row, all equal).
    """
    keep = w - 1
    m = int(filled[0]) if filled.size else 0
    if filled.size and (filled != m).any():
        raise ValueError("windows evaluated together must have seen the same frames")
    n = x.shape[-1]
    ok = ok & np.isfinite(x)
    xs = np.concatenate([tail_x[:, keep - m:], np.where(ok, x, 0.0)], axis=1)
    oks = np.concatenate([tail_ok[:, keep - m:], ok], axis=1)
    rows = xs.shape[0]
    c = np.concatenate([np.zeros((rows, 1)), np.cumsum(xs, axis=1)], axis=1)
    cb = np.concatenate([np.zeros((rows, 1), dtype=np.intp), np.cumsum(~oks, axis=1)], axis=1)
    end = np.arange(m + 1, m + n + 1)
    start = end - w
    enough = start >= 0
    start = np.maximum(start, 0)
    mean = (c[:, end] - c[:, start]) / w
    all_ok = enough & ((cb[:, end] - cb[:, start]) == 0)
    new = min(keep, m + n)
    if new:
        tail_x[:, keep - new:] = xs[:, xs.shape[1] - new:]
        tail_ok[:, keep - new:] = oks[:, oks.shape[1] - new:]
    filled[:] = new
    return mean, all_ok
