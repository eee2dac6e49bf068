"""Every check kind spanwatch knows: the one registration of each.

Adding a check kind is one module in ``rules/`` (its physics as pure functions and a check
class with ``kind``, ``rests_on``, ``defaults``, ``for_line``, ``update`` and ``reset``; see
:class:`spanwatch.rules.base.Check`) and one line in :data:`CHECK_CLASSES`. A kind that reads
other checks' results (a drift detector) goes in :data:`DERIVED_CLASSES`: its ``for_line(line,
sources)`` receives the checks it may read, and its checks run after them. The application
builds every check a line supports with :func:`checks_for`.
"""

from __future__ import annotations

from spanwatch.rules.base import Check, CheckKind
from spanwatch.rules.driftcheck import DriftCheck
from spanwatch.rules.drivefault import DriveFaultCheck
from spanwatch.rules.linemodel import LineModel
from spanwatch.rules.plausibility import TagFrozenCheck, TagQualityCheck, TagRangeCheck, TagStaleCheck
from spanwatch.rules.rollcaliper import RollCaliperCheck
from spanwatch.rules.runout import RollerRunoutCheck, RunoutCheck
from spanwatch.rules.slip import IdlerLagCheck, SlipCheck
from spanwatch.rules.sourcehealth import SourceLostCheck
from spanwatch.rules.span import DrawCheck
from spanwatch.rules.tensionzero import TensionZeroCheck
from spanwatch.rules.traction import NoDriveCheck, TractionCheck
from spanwatch.rules.woundroll import LengthRateCheck, RollDiameterCheck, SpeedDiameterCheck

CHECK_CLASSES: tuple[CheckKind, ...] = (
    TractionCheck,
    NoDriveCheck,
    SlipCheck,
    IdlerLagCheck,
    DriveFaultCheck,
    DrawCheck,
    TensionZeroCheck,
    RollDiameterCheck,
    SpeedDiameterCheck,
    LengthRateCheck,
    RunoutCheck,
    RollerRunoutCheck,
    TagStaleCheck,
    TagQualityCheck,
    TagRangeCheck,
    TagFrozenCheck,
    SourceLostCheck,
)

DERIVED_CLASSES = (RollCaliperCheck, DriftCheck)

CHECK_KINDS: dict[str, CheckKind] = {}
for _cls in (*CHECK_CLASSES, *DERIVED_CLASSES):
    CHECK_KINDS.setdefault(_cls.kind, _cls)


def source_checks(line: LineModel) -> list[Check]:
    """The checks of :data:`CHECK_CLASSES` the line supports, in that order (disabled ones too)."""
    return [c for cls in CHECK_CLASSES for c in cls.for_line(line)]


def checks_for(line: LineModel) -> list[Check]:
    """Every check the line supports: :func:`source_checks`, then the derived kinds that read them."""
    base = source_checks(line)
    derived: list[Check] = list(RollCaliperCheck.for_line(line, base))
    if line.drift.enabled:
        derived += DriftCheck.for_line(line, base)
    return base + derived
