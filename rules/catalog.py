"""Every check kind spanwatch knows, by name. Adding a check: one module in rules/, one line here,
one builder in monitor/checkset.py."""

from __future__ import annotations

from rules.plausibility import TagFrozenCheck, TagQualityCheck, TagRangeCheck, TagStaleCheck
from rules.runout import RunoutCheck
from rules.slip import IdlerLagCheck, SlipCheck
from rules.span import DrawCheck
from rules.traction import NoDriveCheck, TractionCheck
from rules.woundroll import LengthRateCheck, RollDiameterCheck, SpeedDiameterCheck

CHECK_CLASSES = (
    TractionCheck,
    NoDriveCheck,
    SlipCheck,
    IdlerLagCheck,
    DrawCheck,
    RollDiameterCheck,
    SpeedDiameterCheck,
    LengthRateCheck,
    RunoutCheck,
    TagRangeCheck,
    TagQualityCheck,
    TagStaleCheck,
    TagFrozenCheck,
)

CHECK_KINDS = {cls.kind: cls for cls in CHECK_CLASSES}
