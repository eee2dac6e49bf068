"""Speed slip of driven rollers and lag of idlers: surface speed against web speed.

A roller that grips the web moves its surface at web speed (driven rollers at web
speed times their commanded draw). A driven roller that slips runs away from the
web; an idler that lags has lost the traction it needs against bearing drag and
inertia (an air film, a loss of wrap, a seized bearing).
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike
from spanwatch.rules.base import AlarmDefaults, Block, CheckResult, LineState, Reason
from spanwatch.rules.linemodel import LineModel
from spanwatch.rules.stacked import Stacked, StackedBatch, column, combine_rows, finalise_rows, signal_rows


def surface_speed(rev_per_s: ArrayLike, diameter: ArrayLike) -> np.ndarray:
    """Surface speed of a roller or roll, m/s: ``V = pi * D * n`` (n in rev/s).

    Assumes the web rides on the outer surface with no creep (thin web, no strain
    gradient through the thickness). Source: kinematics of rolling without slip (one
    circumference of web per turn).

    >>> round(float(surface_speed(1.0, 0.1)), 4)
    0.3142
    """
    with np.errstate(all="ignore"):
        return np.pi * np.asarray(diameter, dtype=float) * np.asarray(rev_per_s, dtype=float)


def slip_ratio(v_roller: ArrayLike, v_web: ArrayLike, draw: ArrayLike = 0.0, min_speed: float = 0.0) -> np.ndarray:
    """Relative speed slip: ``s = V_roller / (V_web * (1 + draw)) - 1``.

    ``draw`` is the roller's commanded speed offset relative to the web-speed reference
    (0.002 for +0.2 %). Positive s: the roller surface runs ahead of the web. NaN where
    |V_web| <= min_speed or an input (or the expected speed) is not finite. A definition
    (common practice, no source).

    >>> round(float(slip_ratio(1.02, 1.0)), 4)
    0.02
    """
    vr = np.asarray(v_roller, dtype=float)
    vw = np.asarray(v_web, dtype=float)
    with np.errstate(all="ignore"):
        expected = vw * (1.0 + np.asarray(draw, dtype=float))
        s = vr / expected - 1.0
        ok = (np.abs(vw) > min_speed) & np.isfinite(s) & np.isfinite(vw) & np.isfinite(vr) & np.isfinite(expected)
    return np.where(ok, s, np.nan)


SLIP_DEFAULTS = AlarmDefaults(
    direction="abs",
    unit="%",
    warning=0.005,
    alarm=0.02,
    deadband=0.001,
    on_delay=1.0,
    off_delay=5.0,
    priority="high",
    warning_priority="medium",
    cause="Driven roller surface speed departs from the web speed: traction lost (air film, low COF, "
    "too high a tension ratio), or a speed feedback fault.",
    consequence="Scratched web, tension upset, wrinkles; the draw no longer sets the span tension.",
    action="Reduce line speed or the tension ratio across the roller; check covering and encoder.",
)

LAG_DEFAULTS = AlarmDefaults(
    direction="high",
    unit="%",
    warning=0.01,
    alarm=0.03,
    deadband=0.002,
    on_delay=2.0,
    off_delay=5.0,
    priority="medium",
    warning_priority="low",
    cause="Idler turns slower than the web: bearing drag, air film at speed, or lost wrap.",
    consequence="Web scratches on the idler; added drag raises downstream tension.",
    action="Check the idler bearing and that it turns freely; check the wrap; consider a grooved idler.",
)


class _SpeedBatch(StackedBatch):
    """Roller surface speeds against the web speed, all rollers of a kind at once (rollers x frames)."""

    def __init__(self, checks: Sequence[SlipCheck | IdlerLagCheck], *, alone: bool = False) -> None:
        super().__init__(checks, alone=alone)
        self.speeds = [c.speed for c in checks]
        self.draw = column(getattr(c, "draw", 0.0) for c in checks)
        self.min_speed = column(c.min_speed for c in checks)

    def _rows(self, block: Block) -> tuple[np.ndarray, np.ndarray]:
        """Per roller and frame: speed slip against the web speed (the commanded draw included) and the reason."""
        vr, vr_ok = signal_rows(block, self.speeds)
        vw = block.signal("speed/web")
        s = slip_ratio(vr, vw.value, self.draw, self.min_speed)
        reason = combine_rows(
            (~block.in_states((LineState.RUNNING,)), Reason.LINE_STATE),
            (~(vr_ok & vw.ok), Reason.INPUT_BAD),
            (np.abs(vw.value) <= self.min_speed, Reason.OUT_OF_DOMAIN),
            shape=vr.shape,
        )
        return s, reason


class _SlipBatch(_SpeedBatch):
    def update(self, block: Block) -> list[CheckResult]:
        s, reason = self._rows(block)
        return finalise_rows(s, reason)


class _LagBatch(_SpeedBatch):
    def update(self, block: Block) -> list[CheckResult]:
        s, reason = self._rows(block)
        return finalise_rows(-s, reason)


class SlipCheck(Stacked):
    """Speed slip of a driven roller against the web speed (valid while the line runs)."""

    kind: ClassVar[str] = "slip"
    rests_on: ClassVar[str] = ("roller encoder and web-speed reference agree at no slip after the "
                               "commanded draw; diameter of the roller is its configured value")
    defaults: ClassVar[AlarmDefaults] = SLIP_DEFAULTS
    _batch = _SlipBatch

    def __init__(self, object_id: str, *, draw: float, min_speed: float, blames: tuple[str, ...] = ()) -> None:
        self.object_id = object_id
        self.speed = f"speed/{object_id}"
        self.inputs = (self.speed, "speed/web")
        self.drives = (object_id,)  # the drive it assumes healthy (a drive fault suppresses it)
        self.blames = blames or (object_id,)  # the roller and its encoder's tag
        self.draw, self.min_speed = draw, min_speed

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[SlipCheck]:
        """One per driven roller with an encoder of its own (not the one that gives the web speed)."""
        for r in line.rollers_in_path:
            if r.driven and r.has_encoder and r.id != line.settings.web_speed_from:
                yield cls(r.id, draw=r.draw, min_speed=line.settings.thread_speed,
                          blames=tuple(x for x in (r.id, r.speed_tag) if x))


class IdlerLagCheck(Stacked):
    """Lag of an idler with an encoder: ``(V_web - V_idler) / V_web`` (positive = lagging)."""

    kind: ClassVar[str] = "idler_lag"
    rests_on: ClassVar[str] = "idler diameter is its configured value; web speed reference is true web speed"
    defaults: ClassVar[AlarmDefaults] = LAG_DEFAULTS
    _batch = _LagBatch

    def __init__(self, object_id: str, *, min_speed: float, blames: tuple[str, ...] = ()) -> None:
        self.object_id = object_id
        self.speed = f"speed/{object_id}"
        self.inputs = (self.speed, "speed/web")
        self.blames = blames or (object_id,)  # the idler and its encoder's tag
        self.min_speed = min_speed

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[IdlerLagCheck]:
        """One per idler with an encoder (not the one that gives the web speed)."""
        for r in line.rollers_in_path:
            if not r.driven and r.has_encoder and r.id != line.settings.web_speed_from:
                yield cls(r.id, min_speed=line.settings.thread_speed,
                          blames=tuple(x for x in (r.id, r.speed_tag) if x))
