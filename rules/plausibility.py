"""Sensor plausibility per tag: out of range, bad quality, stale, frozen.

These checks read the raw tag frames (held value in SI, quality code, age of the
last sample) rather than derived signals, and are what makes the other checks
honest: a signal that fails one of these is not ``ok``, and every check that reads
it marks its frames INPUT_BAD instead of computing on it.
"""

from __future__ import annotations

from collections.abc import Iterator
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
    combine_reasons,
    finalise,
)
from spanwatch.rules.linemodel import LineModel
from spanwatch.rules.windows import forward_fill_index


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


class _TagCheck:
    rests_on: ClassVar[str] = "the configured range, sample period and stale limit describe the sensor"

    def __init__(self, object_id: str, *, source: str | None = None) -> None:
        self.object_id = object_id
        self.source = source  # while its source is lost, the source's own alarm speaks for the tag
        self.inputs: tuple[str, ...] = ()
        self._col: int | None = None

    def _source_lost(self, block: Block, within: float = 0.0) -> np.ndarray:
        """True on frames where the tag's source was silent (its own alarm speaks for it) within ``within`` s."""
        if self.source is None:
            return np.zeros(block.n, dtype=bool)
        quiet = block.signals.get(f"source_quiet/{self.source}")
        if quiet is None:
            return np.zeros(block.n, dtype=bool)
        with np.errstate(invalid="ignore"):
            return quiet.value <= within

    def reset(self) -> None:
        """Nothing is carried from one block to the next."""

    def _cols(self, block: Block) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        if self._col is None:
            self._col = block.tags.column(self.object_id)
        c = self._col
        return block.tags.value[:, c], block.tags.quality[:, c], block.tags.age[:, c]


class TagRangeCheck(_TagCheck):
    """Held value outside the tag's configured range (in SI)."""

    kind: ClassVar[str] = "tag_range"
    defaults: ClassVar[AlarmDefaults] = RANGE_DEFAULTS

    def __init__(self, object_id: str, *, low: float, high: float, source: str | None = None) -> None:
        super().__init__(object_id, source=source)
        self.low, self.high = low, high

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[TagRangeCheck]:
        """One per tag with a range."""
        for t in line.tags.values():
            if t.low > float("-inf") or t.high < float("inf"):
                yield cls(t.name, low=t.low, high=t.high, source=t.source)

    def update(self, block: Block) -> CheckResult:
        v, q, _ = self._cols(block)
        flag = out_of_range(v, self.low, self.high) & np.isfinite(v)
        reason = combine_reasons((self._source_lost(block) | (q == QUALITY_NONE), Reason.INPUT_BAD), n=block.n)
        return finalise(flag.astype(float), reason)


class TagQualityCheck(_TagCheck):
    """Source quality not good (uncertain or bad), or a non-finite value."""

    kind: ClassVar[str] = "tag_quality"
    defaults: ClassVar[AlarmDefaults] = QUALITY_DEFAULTS

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[TagQualityCheck]:
        """One per tag."""
        for t in line.tags.values():
            yield cls(t.name, source=t.source)

    def update(self, block: Block) -> CheckResult:
        v, q, _ = self._cols(block)
        flag = (q != QUALITY_GOOD) | ~np.isfinite(v)
        reason = combine_reasons((self._source_lost(block) | (q == QUALITY_NONE), Reason.INPUT_BAD), n=block.n)
        return finalise(flag.astype(float), reason)


class TagStaleCheck(_TagCheck):
    """No new sample for more than ``stale_after`` seconds of event time (never-seen tags are stale).

    The age is measured in event time (frames wait for their source's data), so a slow or loaded
    machine does not make tags stale. Frames beyond the newest data of the tag's source are not
    judged (the source's own condition says it is lost), nor are frames of the start-up grace or
    of the start after a gap (age still negative: warming up).
    """

    kind: ClassVar[str] = "tag_stale"
    defaults: ClassVar[AlarmDefaults] = STALE_DEFAULTS

    def __init__(self, object_id: str, *, stale_after: float, source: str | None = None) -> None:
        super().__init__(object_id, source=source)
        self.stale_after = stale_after

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[TagStaleCheck]:
        """One per tag."""
        for t in line.tags.values():
            yield cls(t.name, stale_after=t.stale_after, source=t.source)

    def update(self, block: Block) -> CheckResult:
        _, _, age = self._cols(block)
        flag = ~(age <= self.stale_after)
        with np.errstate(invalid="ignore"):
            warming = age < 0
        lost = self._source_lost(block, within=self.stale_after)  # no sample for a while: the source's silence?
        reason = combine_reasons((lost, Reason.INPUT_BAD), (warming, Reason.WARMING_UP), n=block.n)
        return finalise(flag.astype(float), reason, age=age)


class TagFrozenCheck(_TagCheck):
    """No change larger than ``tolerance`` for ``frozen_after`` seconds of continuous moving-line time.

    A change is counted between consecutive frames, so a slow drift below the tolerance
    per frame counts as frozen; frames where the line does not move reset the timer.
    """

    kind: ClassVar[str] = "tag_frozen"
    defaults: ClassVar[AlarmDefaults] = FROZEN_DEFAULTS

    def __init__(self, object_id: str, *, frozen_after: float, tolerance: float, source: str | None = None) -> None:
        super().__init__(object_id, source=source)
        self.frozen_after, self.tol = frozen_after, tolerance
        self.reset()

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[TagFrozenCheck]:
        """One per tag with a frozen limit."""
        for t in line.tags.values():
            if t.frozen_after is not None:
                yield cls(t.name, frozen_after=t.frozen_after, tolerance=t.frozen_tolerance, source=t.source)

    def reset(self) -> None:
        """Forget the last value and when it last changed."""
        self._last_v = np.nan
        self._last_change_t = np.nan

    def update(self, block: Block) -> CheckResult:
        v, q, _ = self._cols(block)
        prev = np.concatenate([[self._last_v], v[:-1]])
        with np.errstate(invalid="ignore"):
            changed = np.abs(v - prev) > self.tol
        moving = block.in_states(MOVING_STATES)
        changed |= ~moving | ~np.isfinite(prev) | ~np.isfinite(v) | (q == QUALITY_NONE)
        idx = forward_fill_index(changed)
        t_change = np.where(idx >= 0, block.t[np.maximum(idx, 0)], self._last_change_t)
        t_change = np.where(np.isnan(t_change), block.t, t_change)
        still = block.t - t_change
        flag = still >= self.frozen_after
        if block.n:
            self._last_v = float(v[-1])
            self._last_change_t = float(t_change[-1])
        reason = combine_reasons(
            (~moving, Reason.LINE_STATE),
            (self._source_lost(block, within=self.frozen_after) | (q == QUALITY_NONE), Reason.INPUT_BAD),
            n=block.n,
        )
        return finalise(flag.astype(float), reason, unchanged_for=still)
