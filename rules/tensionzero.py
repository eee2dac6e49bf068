"""A load cell's zero: what it reads at standstill with the web slack.

With the line stopped and the web slack (cut for a roll change, or let down), the true tension in the zone is
nil, so whatever the zone's load cell reads then is its zero offset: a load cell losing its zero (drift of the
amplifier, a mounting bolt, temperature) shows there before it corrupts every tension the checks read in
running. The check judges only such frames: line stopped, and a reading below a small share of the zone's
setpoint (``SLACK_SHARE``; a web under tension at standstill reads near its setpoint, far above it).

Value: the reading as a share of the zone's setpoint (signed), so one default limit suits every zone. The
limits (3 % warning, 6 % alarm of the setpoint) and the 10 % slack share are common practice, no source: a
load-cell pair calibrated to about 1 % of its range reads within a few per cent of a typical setpoint at zero.
Assumptions: the web is really slack when the reading is that low at standstill (no wrap that still carries
tension), and the line state says stopped.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import ClassVar

import numpy as np
from spanwatch.rules.base import AlarmDefaults, Block, CheckResult, LineState, Reason
from spanwatch.rules.linemodel import LineModel
from spanwatch.rules.stacked import Stacked, StackedBatch, column, combine_rows, finalise_rows, signal_rows

SLACK_SHARE = 0.1  # a reading below this share of the setpoint at standstill: the web is slack

DEFAULTS = AlarmDefaults(
    direction="abs",
    unit="% of setpoint",
    warning=0.03,
    alarm=0.06,
    deadband=0.005,
    on_delay=5.0,
    off_delay=0.0,
    priority="low",
    warning_priority="low",
    cause="With the line stopped and the web slack the zone's load cell does not read zero: its zero has "
          "drifted (amplifier, temperature, a loose mounting), or something rests on the roller.",
    consequence="Every tension read in running is off by the same amount: the tension loops hold the wrong "
                "tension and the traction and draw checks judge from a false reading.",
    action="With the web slack, check what rests on the load-cell roller, then re-zero the load cell "
           "(tare) from the drive or PLC; check its cable and amplifier if it keeps moving.",
    response_time=1800.0,
)


class _ZeroBatch(StackedBatch):
    """The zero of every zone's load cell at once (zones x frames)."""

    def __init__(self, checks: Sequence[TensionZeroCheck], *, alone: bool = False) -> None:
        super().__init__(checks, alone=alone)
        self.signals = [c.signal for c in checks]
        self.setpoint = column(c.setpoint for c in checks)

    def update(self, block: Block) -> list[CheckResult]:
        value, ok = signal_rows(block, self.signals)
        share = value / self.setpoint
        with np.errstate(invalid="ignore"):
            tensioned = ~(np.abs(share) < SLACK_SHARE)
        reason = combine_rows(
            (block.line_state != int(LineState.STOPPED), Reason.LINE_STATE),
            (~ok, Reason.INPUT_BAD),
            (tensioned, Reason.OUT_OF_DOMAIN),
            shape=value.shape,
        )
        return finalise_rows(share, reason)


class TensionZeroCheck(Stacked):
    """The zero of one zone's load cell, judged at standstill with the web slack (see the module docstring)."""

    kind: ClassVar[str] = "tension_zero"
    rests_on: ClassVar[str] = ("the web is slack at standstill when the reading is below 10 % of the setpoint, so "
                               "the true tension is nil")
    defaults: ClassVar[AlarmDefaults] = DEFAULTS
    _batch = _ZeroBatch

    def __init__(self, object_id: str, *, setpoint: float, tag: str, span: str | None) -> None:
        self.object_id = object_id
        self.signal = f"tension/{object_id}"
        self.inputs = (self.signal,)
        self.setpoint = setpoint
        self.blames = tuple(x for x in (object_id, tag, span) if x)

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[TensionZeroCheck]:
        """One per zone with a load cell and a positive setpoint."""
        for z in line.zones:
            if z.tension_tag is not None and z.setpoint is not None and z.setpoint > 0:
                yield cls(z.id, setpoint=z.setpoint, tag=z.tension_tag, span=z.tension_span)
