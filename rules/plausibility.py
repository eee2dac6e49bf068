"""Sensor plausibility per tag: out of range, bad quality, stale, frozen.

These checks read the raw tag frames (held value in SI, quality code, age of the
last sample) rather than derived signals, and are what makes the other checks
honest: a signal that fails one of these is not ``ok``, and every check that reads
it marks its frames INPUT_BAD instead of computing on it.

Each kind evaluates all its tags at once (its ``batch``) on the tags x frames matrices of the
block's raw tag frames, with one parameter per tag as a column vector; a check's own ``update`` is
that batch of one, so both give the same answer by construction.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import ClassVar

import numpy as np
from spanwatch.rules.base import (
    MOVING_STATES,
    QUALITY_GOOD,
    QUALITY_NONE,
    AlarmDefaults,
    Block,
    CheckResult,
    Reason,
    TagFrames,
)
from spanwatch.rules.linemodel import LineModel
from spanwatch.rules.stacked import (
    Stacked,
    StackedBatch,
    column,
    combine_rows,
    finalise_rows,
    forward_fill_rows,
)


def _flag(unit: str, priority: str, on: float, off: float, cause: str, consequence: str, action: str
          ) -> AlarmDefaults:
    return AlarmDefaults(direction="high", unit=unit, warning=None, alarm=0.5, deadband=0.0, on_delay=on,
                         off_delay=off, priority=priority, warning_priority=priority, cause=cause,
                         consequence=consequence, action=action)


RANGE_DEFAULTS = _flag("flag", "low", 2.0, 5.0,
                       "Signal outside its plausible range: sensor fault, wiring, scaling, or a real extreme.",
                       "Checks that read this signal are invalid while it lasts.",
                       "Check the transmitter, its scaling and wiring.")
QUALITY_DEFAULTS = _flag("flag", "low", 2.0, 5.0,
                         "Source reports bad or uncertain quality for this tag.",
                         "Checks that read this signal are invalid while it lasts.",
                         "Check the device and the connection named by the source's status.")
STALE_DEFAULTS = _flag("flag", "medium", 0.0, 2.0,
                       "No new sample within the stale limit: connection lost, device stopped, or the "
                       "server stopped updating the tag.",
                       "Checks that read this signal are invalid; faults on that object go unseen.",
                       "Check the connector state and the source device.")
FROZEN_DEFAULTS = _flag("flag", "low", 0.0, 5.0,
                        "Signal has not changed while the line runs: sensor stuck, held value in the PLC.",
                        "Checks that read this signal compute on a stale truth.",
                        "Check the sensor; compare with a manual reading.")


def out_of_range(value: np.ndarray, low: float, high: float) -> np.ndarray:
    """True where value is outside [low, high] or not finite."""
    with np.errstate(invalid="ignore"):
        return ~((value >= low) & (value <= high) & np.isfinite(value))


class _TagCheck(Stacked):
    """One plausibility check of one tag; its ``update`` is its kind's batch (:class:`_TagBatch`) of one."""

    rests_on: ClassVar[str] = "the configured range, sample period and stale limit describe the sensor"

    def __init__(self, object_id: str, *, source: str | None = None) -> None:
        self.object_id = object_id
        self.source = source  # while its source is lost, the source's own alarm speaks for the tag
        self.inputs: tuple[str, ...] = ()


class _TagBatch(StackedBatch):
    """The checks of one tag kind over the tags x frames matrices of a block (one row per check).

    Each check reads its tag's column of ``block.tags``; a check whose tag's source was silent (the
    ``source_quiet/<source>`` signal, seconds since the source was last silent, at most ``within``) is
    INPUT_BAD there: the source's own alarm speaks for the tag.
    """

    def __init__(self, checks: Sequence[_TagCheck], *, alone: bool = False) -> None:
        super().__init__(checks, alone=alone)
        self._names: tuple[str, ...] | None = None
        self._cols = np.zeros(0, dtype=np.intp)
        groups: dict[str, list[int]] = {}
        for i, c in enumerate(checks):
            if c.source is not None:
                groups.setdefault(c.source, []).append(i)
        self._sources = [(f"source_quiet/{s}", np.array(rows, dtype=np.intp)) for s, rows in groups.items()]

    def _rows(self, frames: np.ndarray, tags: TagFrames) -> np.ndarray:
        """The checks' columns of a frames x tags matrix of ``tags``, as checks x frames."""
        if tags.names is not self._names:
            if tags.names != self._names:
                self._cols = np.array([tags.column(c.object_id) for c in self.checks], dtype=np.intp)
            self._names = tags.names
        return frames.T[self._cols]

    def _source_lost(self, block: Block, within: float | np.ndarray = 0.0) -> np.ndarray:
        """True where a check's source was silent within ``within`` s (a scalar or a (k, 1) column) of the frame."""
        lost = np.zeros((len(self.checks), block.n), dtype=bool)
        for name, rows in self._sources:
            quiet = block.signals.get(name)
            if quiet is None:
                continue
            limit = within[rows] if isinstance(within, np.ndarray) else within
            with np.errstate(invalid="ignore"):
                lost[rows] = quiet.value <= limit
        return lost


class _RangeBatch(_TagBatch):
    def __init__(self, checks: Sequence[TagRangeCheck], *, alone: bool = False) -> None:
        super().__init__(checks, alone=alone)
        self.low, self.high = column(c.low for c in checks), column(c.high for c in checks)

    def update(self, block: Block) -> list[CheckResult]:
        v, q = self._rows(block.tags.value, block.tags), self._rows(block.tags.quality, block.tags)
        flag = out_of_range(v, self.low, self.high) & np.isfinite(v)
        reason = combine_rows((self._source_lost(block) | (q == QUALITY_NONE), Reason.INPUT_BAD), shape=v.shape)
        return finalise_rows(flag.astype(float), reason)


class TagRangeCheck(_TagCheck):
    """Held value outside the tag's configured range (in SI)."""

    kind: ClassVar[str] = "tag_range"
    defaults: ClassVar[AlarmDefaults] = RANGE_DEFAULTS
    _batch = _RangeBatch

    def __init__(self, object_id: str, *, low: float, high: float, source: str | None = None) -> None:
        super().__init__(object_id, source=source)
        self.low, self.high = low, high

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[TagRangeCheck]:
        """One per tag with a range."""
        for t in line.tags.values():
            if t.low > float("-inf") or t.high < float("inf"):
                yield cls(t.name, low=t.low, high=t.high, source=t.source)


class _QualityBatch(_TagBatch):
    def update(self, block: Block) -> list[CheckResult]:
        v, q = self._rows(block.tags.value, block.tags), self._rows(block.tags.quality, block.tags)
        flag = (q != QUALITY_GOOD) | ~np.isfinite(v)
        reason = combine_rows((self._source_lost(block) | (q == QUALITY_NONE), Reason.INPUT_BAD), shape=v.shape)
        return finalise_rows(flag.astype(float), reason)


class TagQualityCheck(_TagCheck):
    """Source quality not good (uncertain or bad), or a non-finite value."""

    kind: ClassVar[str] = "tag_quality"
    defaults: ClassVar[AlarmDefaults] = QUALITY_DEFAULTS
    _batch = _QualityBatch

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[TagQualityCheck]:
        """One per tag."""
        for t in line.tags.values():
            yield cls(t.name, source=t.source)


class _StaleBatch(_TagBatch):
    def __init__(self, checks: Sequence[TagStaleCheck], *, alone: bool = False) -> None:
        super().__init__(checks, alone=alone)
        self.stale_after = column(c.stale_after for c in checks)

    def update(self, block: Block) -> list[CheckResult]:
        age = self._rows(block.tags.age, block.tags)
        flag = ~(age <= self.stale_after)
        with np.errstate(invalid="ignore"):
            warming = age < 0
        lost = self._source_lost(block, self.stale_after)  # no sample for a while: the source's silence?
        reason = combine_rows((lost, Reason.INPUT_BAD), (warming, Reason.WARMING_UP), shape=age.shape)
        return finalise_rows(flag.astype(float), reason, age=age)


class TagStaleCheck(_TagCheck):
    """No new sample for more than ``stale_after`` seconds of event time (never-seen tags are stale).

    The age is measured in event time (frames wait for their source's data), so a slow or loaded
    machine does not make tags stale. Frames beyond the newest data of the tag's source are not
    judged (the source's own condition says it is lost), nor are frames of the start-up grace or
    of the start after a gap (age still negative: warming up).
    """

    kind: ClassVar[str] = "tag_stale"
    defaults: ClassVar[AlarmDefaults] = STALE_DEFAULTS
    _batch = _StaleBatch

    def __init__(self, object_id: str, *, stale_after: float, source: str | None = None) -> None:
        super().__init__(object_id, source=source)
        self.stale_after = stale_after

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[TagStaleCheck]:
        """One per tag."""
        for t in line.tags.values():
            yield cls(t.name, stale_after=t.stale_after, source=t.source)


class _FrozenBatch(_TagBatch):
    """Frozen checks over the tags x frames matrix; each carries its last value and when it last changed (epoch s;
    NaN: not known)."""

    carries: ClassVar[dict[str, float | bool]] = {"last_v": np.nan, "last_change_t": np.nan}

    def __init__(self, checks: Sequence[TagFrozenCheck], *, alone: bool = False) -> None:
        super().__init__(checks, alone=alone)
        self.frozen_after = column(c.frozen_after for c in checks)
        self.tol = column(c.tol for c in checks)

    def update(self, block: Block) -> list[CheckResult]:
        v, q = self._rows(block.tags.value, block.tags), self._rows(block.tags.quality, block.tags)
        slots, rows = self.where()
        last_v, last_change_t = slots.a["last_v"], slots.a["last_change_t"]
        t = block.t
        prev = np.concatenate([last_v[rows, None], v[:, :-1]], axis=1)
        with np.errstate(invalid="ignore"):
            changed = np.abs(v - prev) > self.tol
        moving = block.in_states(MOVING_STATES)
        none = q == QUALITY_NONE
        changed |= ~moving | ~np.isfinite(prev) | ~np.isfinite(v) | none
        idx = forward_fill_rows(changed)
        t_change = np.where(idx >= 0, t[np.maximum(idx, 0)], last_change_t[rows, None])
        t_change = np.where(np.isnan(t_change), t, t_change)
        still = t - t_change
        flag = still >= self.frozen_after
        if block.n:
            last_v[rows] = v[:, -1]
            last_change_t[rows] = t_change[:, -1]
        reason = combine_rows(
            (~moving, Reason.LINE_STATE),
            (self._source_lost(block, self.frozen_after) | none, Reason.INPUT_BAD),
            shape=v.shape,
        )
        return finalise_rows(flag.astype(float), reason, unchanged_for=still)


class TagFrozenCheck(_TagCheck):
    """No change larger than ``tolerance`` for ``frozen_after`` seconds of continuous moving-line time.

    A change is counted between consecutive frames, so a slow drift below the tolerance
    per frame counts as frozen; frames where the line does not move reset the timer.
    """

    kind: ClassVar[str] = "tag_frozen"
    defaults: ClassVar[AlarmDefaults] = FROZEN_DEFAULTS
    _batch = _FrozenBatch

    def __init__(self, object_id: str, *, frozen_after: float, tolerance: float, source: str | None = None) -> None:
        super().__init__(object_id, source=source)
        self.frozen_after, self.tol = frozen_after, tolerance
        self._init_slots()

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[TagFrozenCheck]:
        """One per tag with a frozen limit."""
        for t in line.tags.values():
            if t.frozen_after is not None:
                yield cls(t.name, frozen_after=t.frozen_after, tolerance=t.frozen_tolerance, source=t.source)
