"""Each wound roll's calibrated effective caliper against the nominal and against the earlier rolls of its grade.

The roll-diameter check (:mod:`spanwatch.rules.woundroll`) calibrates every roll's effective stack
caliper from its first metres and compares it with the nominal (single-ply caliper x stack factor)
and with the median of the earlier rolls of the same grade on the winder. This check turns that
comparison into an alarm: a roll that winds tighter or looser than its grade does (a new lot, a
changed winding tension or nip, a caliper gauge out of calibration) builds wrong long before its
diameter leaves the band of its own calibration.

Value (x tolerance): ``max(|t / t_nominal - 1| / stack_factor_tolerance, |t / t_grade - 1| / roll_tolerance)``
with ``roll_tolerance`` = 2 x the material's ``caliper_drift`` (the roll-to-roll repeatability of one
grade: common practice, no source). Conservation of annulus area ``L = pi (D^2 - Dc^2) / (4 t)``
(Roisum, *The Mechanics of Winding*, TAPPI Press, 1994; from memory) defines t.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import ClassVar

import numpy as np
from spanwatch.rules.base import AlarmDefaults, Block, Check, CheckResult, Reason, blames_of
from spanwatch.rules.linemodel import LineModel

DEFAULTS = AlarmDefaults(
    direction="high",
    unit="x tolerance",
    warning=None,
    alarm=1.0,
    deadband=0.1,
    on_delay=0.0,
    off_delay=0.0,
    priority="low",
    warning_priority="low",
    cause="This roll's effective caliper, calibrated from its first metres, differs from the nominal (caliper x "
          "stack factor) beyond stack_factor_tolerance, or from the earlier rolls of the same grade beyond twice "
          "caliper_drift: a new lot, a changed winding tension or nip, a diameter or length sensor out of "
          "calibration.",
    consequence="The roll builds harder or softer than its grade should: starring, telescoping, a wrong length "
                "at a given diameter.",
    action="Check the lot and the winding tension and nip against the recipe; check the diameter sensor and the "
           "length counter; correct the stack factor if the new material is right.",
    response_time=900.0,
)


class RollCaliperCheck:
    """A wound roll's calibrated caliper against its nominal and its grade (see the module docstring)."""

    kind: ClassVar[str] = "roll_caliper"
    rests_on: ClassVar[str] = ("the roll's first metres calibrate its caliper (area conservation); the earlier rolls "
                               "of the grade were wound right")
    defaults: ClassVar[AlarmDefaults] = DEFAULTS

    def __init__(self, source: Check, *, nominal_tolerance: float, roll_tolerance: float) -> None:
        self.source_key = (source.kind, source.object_id)
        self.object_id = source.object_id
        self.inputs = tuple(source.inputs)
        self.blames = blames_of(source)
        self.nominal_tolerance, self.roll_tolerance = nominal_tolerance, roll_tolerance

    @classmethod
    def for_line(cls, line: LineModel, sources: list[Check]) -> Iterator[RollCaliperCheck]:
        """One per winder with a roll-diameter check."""
        mat = line.material
        for c in sources:
            if c.kind == "roll_diameter":
                yield cls(c, nominal_tolerance=mat.stack_factor_tolerance, roll_tolerance=2.0 * mat.caliper_drift)

    def reset(self) -> None:
        """Nothing is carried from one block to the next (the roll history is the roll-diameter check's)."""

    def update(self, block: Block) -> CheckResult:
        n = block.n
        res = block.results.get(self.source_key)
        if res is None or "caliper_nominal_dev" not in res.extras:
            return CheckResult(np.full(n, np.nan), np.full(n, int(Reason.INPUT_BAD), dtype=np.int8))
        nominal = np.abs(res.extras["caliper_nominal_dev"]) / self.nominal_tolerance
        grade = np.abs(res.extras["caliper_history_dev"]) / self.roll_tolerance
        value = np.fmax(nominal, grade)  # the grade's comparison is NaN for its first roll: the nominal alone
        known = np.isfinite(value)
        reason = np.where(known, int(Reason.OK),
                          np.where(res.reason == int(Reason.OK), int(Reason.WARMING_UP), res.reason)).astype(np.int8)
        extras = {"nominal_dev": res.extras["caliper_nominal_dev"], "grade_dev": res.extras["caliper_history_dev"]}
        return CheckResult(np.where(known, value, np.nan), reason, extras)
