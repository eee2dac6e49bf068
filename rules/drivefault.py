"""A driven roller's drive reports a fault: its fault bit or fault word, read as a flag.

A drive (inverter, servo amplifier, DC drive) reports a trip or fault on a bit of its status
word or as a non-zero fault code; the PLC passes it on as a tag. The check reports 1.0 while
the tag is non-zero and 0.0 while it is zero. There is no physics here: the point of the check
is the alarm it raises and what that alarm explains. While a drive is faulted its roller no
longer holds its speed or torque, so the traction, no-drive and slip alarms of the roller and
the draw alarms of the zones it bounds are consequences of the fault, not separate faults:
:func:`spanwatch.rules.suppression.derived_rules` suppresses them by design while this alarm is
active (ANSI/ISA-18.2-2016, designed suppression based on the state of other equipment; from
memory).

Line state: valid in every line state, stopped and unknown included. A drive may trip while the
line stands (on enabling, on a motor or cabinet fault) and the operator must know before the
line starts; the fault bit does not depend on the line speed, so there is nothing to gate.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike
from spanwatch.rules.base import AlarmDefaults, Block, CheckResult, Reason
from spanwatch.rules.linemodel import LineModel
from spanwatch.rules.stacked import Stacked, StackedBatch, combine_rows, finalise_rows, signal_rows


def fault_flag(word: ArrayLike) -> np.ndarray:
    """1.0 where a drive's fault bit or fault word is non-zero, 0.0 where it is zero, NaN where not finite.

    Any non-zero code counts (a fault word's bits or a fault number alike); negative values too,
    since a signed 16-bit word with its top bit set reads negative. A convention of drive status
    words (common practice, no source).

    >>> fault_flag([0.0, 1.0, 32.0, -1.0, np.nan]).tolist()
    [0.0, 1.0, 1.0, 1.0, nan]
    """
    w = np.asarray(word, dtype=float)
    return np.where(np.isfinite(w), (w != 0.0).astype(float), np.nan)


DEFAULTS = AlarmDefaults(
    direction="high",
    unit="flag",
    warning=None,
    alarm=0.5,
    deadband=0.0,
    on_delay=0.0,
    off_delay=2.0,
    priority="high",
    warning_priority="high",
    cause="The roller's drive reports a fault (its fault bit or fault word is non-zero).",
    consequence="The roller no longer holds its speed or torque: tension upset, slip, web break.",
    action="Check the drive's fault code and the drive cabinet. Its traction, slip and draw alarms "
    "are suppressed meanwhile.",
    response_time=30.0,
)


class _FaultBatch(StackedBatch):
    """The fault flags of every drive at once (drives x frames)."""

    def __init__(self, checks: Sequence[DriveFaultCheck], *, alone: bool = False) -> None:
        super().__init__(checks, alone=alone)
        self.signals = [c.signal for c in checks]

    def update(self, block: Block) -> list[CheckResult]:
        word, ok = signal_rows(block, self.signals)
        flag = fault_flag(word)
        reason = combine_rows((~(ok & np.isfinite(flag)), Reason.INPUT_BAD), shape=word.shape)
        return finalise_rows(flag, reason)


class DriveFaultCheck(Stacked):
    """The fault bit or word of a driven roller's drive, as a flag (stateless between blocks)."""

    kind: ClassVar[str] = "drive_fault"
    rests_on: ClassVar[str] = "the fault bit is non-zero exactly while the drive is faulted"
    defaults: ClassVar[AlarmDefaults] = DEFAULTS
    _batch = _FaultBatch

    def __init__(self, object_id: str) -> None:
        self.object_id = object_id
        self.signal = f"drive_fault/{object_id}"
        self.inputs = (self.signal,)

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[DriveFaultCheck]:
        """One per driven roller with a fault tag."""
        for r in line.driven_rollers:
            if r.has_fault_tag:
                yield cls(r.id)
