"""A live source lost or behind: one condition of the source instead of one stale alarm per tag.

Frames are computed in event time (see :mod:`spanwatch.monitor.watermarks`): while a source
delivers, frames wait for its data. A source that has delivered nothing for its ``lost_after``
time stops holding them back. For every frame the pipeline gives the check the signal
``source_lag/<source>``: how long before that frame the source's freshest tag last had a
sample, beyond that tag's sample period, in seconds (0 while its data is there). The tags of a lost source are not
judged stale meanwhile (their plausibility checks are invalid on those frames); this check raises
the one alarm for all of them.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import ClassVar

import numpy as np
from spanwatch.rules.base import AlarmDefaults, Block, CheckResult, Reason, combine_reasons, finalise
from spanwatch.rules.linemodel import LineModel

DEFAULTS = AlarmDefaults(
    direction="high",
    unit="s",
    warning=None,
    alarm=0.5,
    deadband=0.0,
    on_delay=0.0,
    off_delay=2.0,
    priority="high",
    warning_priority="high",
    cause="The source delivers no data: connection lost, server or broker stopped, network down, or the "
          "device stopped publishing.",
    consequence="Every check that reads a tag of this source is blind: traction, draw and roll faults go unseen.",
    action="Check the connector state in /healthz and the source device, its network and its server or broker.",
    response_time=60.0,
)


class SourceLostCheck:
    """Seconds a live source's data is behind the frame time (0 while it delivers)."""

    kind: ClassVar[str] = "source_lost"
    rests_on: ClassVar[str] = ("the source's timestamps follow its own clock; a source silent for its lost-after "
                               "time is lost, not merely slow")
    defaults: ClassVar[AlarmDefaults] = DEFAULTS

    def __init__(self, object_id: str) -> None:
        self.object_id = object_id
        self.signal_name = f"source_lag/{object_id}"
        self.inputs = (self.signal_name,)

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[SourceLostCheck]:
        """One per live source of the line (none for a recording)."""
        for s in line.sources:
            yield cls(s)

    def reset(self) -> None:
        """Nothing is carried from one block to the next."""

    def update(self, block: Block) -> CheckResult:
        lag = block.signals.get(self.signal_name)
        if lag is None:
            return finalise(np.full(block.n, np.nan), np.full(block.n, int(Reason.INPUT_BAD), dtype=np.int8))
        reason = combine_reasons((~np.isfinite(lag.value), Reason.INPUT_BAD), n=block.n)
        return finalise(lag.value, reason)
