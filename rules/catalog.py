"""Every check kind spanwatch knows, by name. Adding a check: one module in rules/, one line here,
one builder in monitor/checkset.py."""

from __future__ import annotations

from spanwatch.rules.plausibility import TagFrozenCheck, TagQualityCheck, TagRangeCheck, TagStaleCheck
from spanwatch.rules.runout import RunoutCheck
from spanwatch.rules.slip import IdlerLagCheck, SlipCheck
from spanwatch.rules.span import DrawCheck
from spanwatch.rules.traction import NoDriveCheck, TractionCheck
from spanwatch.rules.woundroll import LengthRateCheck, RollDiameterCheck, SpeedDiameterCheck

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
