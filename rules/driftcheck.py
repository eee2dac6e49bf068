"""Drift detection on the residuals of the physics checks: the ``drift`` check kind.

A fixed limit catches a roller that is already slipping; a drift detector hears, long before a
limit, that a residual is creeping away from what it was in good running: a load cell losing its
gain, an idler bearing dragging, a roller glazing, the wound roll's effective caliper changing.

Each :class:`DriftCheck` watches one residual stream of one check object (the residual is computed
by the check that owns the physics and read from :attr:`Block.results`; see :data:`RESIDUALS`):

* it runs only in the line states where the residual means something (steady running for most),
  and only on frames the source check marks valid;
* it decimates the residual into batch means (the residuals are strongly autocorrelated at
  20-50 Hz) and learns a baseline (mean, sigma, lag-1 autocorrelation) from a configurable stretch
  of good running, never while an alarm of the same object stands;
* baselines are kept per operating point (a band of line speed): the air film, idler lag and
  draw all move with speed, so a speed change is a new operating point, not a drift; returning to a
  known speed reuses its baseline;
* it re-learns after a grade change (the line's ``grade_tag``), after a roll change of a winder it
  depends on, and when a drift alarm of its own is acknowledged (the operator has seen the change;
  the new level is the new normal);
* its detector (fixed-reference tabular CUSUM by default; EWMA or river's ADWIN / Page-Hinkley
  where configured) is designed from the engineer's terms: the shift to detect in sigmas and the
  line's acceptable false-alarm interval (see :mod:`spanwatch.rules.drift.design`).

Its value is the detector's statistic (1.0 = drift detected); its extras give the estimated change
time, the size of the change in the residual's own unit, and the baseline. The alarm is of its own
kind, advisory by default, and blames what the source check blames.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass, fields
from typing import ClassVar

import numpy as np
from spanwatch.rules.base import AlarmDefaults, Block, Check, CheckResult, LineState, Reason, blames_of, state_mask
from spanwatch.rules.drift import Baseline, DriftMonitor, DriftOutput
from spanwatch.rules.drift.design import arl0_for
from spanwatch.rules.linemodel import DriftSettings, LineModel

RUNNING = (LineState.RUNNING,)


@dataclass(frozen=True)
class Residual:
    """A residual stream a drift detector may watch: ``source`` check kind, ``field`` (``value`` or an extra),
    its ``unit`` as a person reads it, the line ``states`` where it means something, the smallest sigma worth
    believing (``sigma_floor``, in the field's SI unit: a near-constant baseline must not make every tiny change
    a drift), and the winders whose roll change re-learns it (``"*"``: the winder the source check is on)."""

    source: str
    field: str
    unit: str
    sigma_floor: float
    states: tuple[LineState, ...] = RUNNING
    roll_change: tuple[str, ...] = ()
    label: str = ""
    enabled: bool = True  # watched unless the config says otherwise

    @property
    def name(self) -> str:
        return self.label or (self.source if self.field == "value" else f"{self.source}.{self.field}")


# The residuals watched by default. Floors: common practice, no source (about a tenth of a typical alarm band).
RESIDUALS: tuple[Residual, ...] = (
    Residual("traction", "utilisation", "share of capacity", 0.01, label="traction"),
    Residual("traction", "mu_demonstrated", "COF", 0.005, label="traction.mu"),
    Residual("slip", "value", "%", 2e-4),
    Residual("idler_lag", "value", "%", 2e-4),
    Residual("draw", "residual", "N/m", 1.0, label="draw"),
    Residual("draw", "ratio", "x predicted", 0.002, label="draw.gain"),
    # not watched by default: its expected error grows along the roll with the calibration's slope error (the
    # check's band grows with it), so it is not stationary; the local caliper ratio below is
    Residual("roll_diameter", "residual", "m", 2e-4, roll_change=("*",), label="roll_diameter", enabled=False),
    Residual("roll_diameter", "caliper_ratio", "x calibrated", 0.005, roll_change=("*",), label="caliper"),
    Residual("length_rate", "value", "%", 5e-4, roll_change=("*",)),
    Residual("runout", "value", "% of mean tension", 0.002),
)

DEFAULTS = AlarmDefaults(
    direction="high",
    unit="x threshold",
    warning=None,
    alarm=1.0,
    deadband=0.2,
    on_delay=0.0,
    off_delay=60.0,
    priority="advisory",
    warning_priority="advisory",
    cause="A residual of a physics check has moved away from its level in good running: a sensor losing its "
          "zero or gain, a bearing dragging, a roller glazing, the wound roll's caliper changing.",
    consequence="Left alone, the fixed-limit alarm of the same check follows later: slip, a wrinkle, a soft or "
                "telescoped roll, or a tension the load cell no longer reports truly.",
    action="Look at the named object and the residual's trend; check the load cell (zero at standstill with the "
           "web slack, gain against a known weight), the bearing, the roller surface, the roll. Acknowledge to "
           "accept the new level as normal.",
    response_time=3600.0,
)


def residual_of(object_id: str) -> Residual | None:
    """The residual a drift object id (``<residual name>.<object>``) watches, or None."""
    best = None
    for r in RESIDUALS:
        if object_id.startswith(r.name + ".") and (best is None or len(r.name) > len(best.name)):
            best = r
    return best


def residuals_for(settings: DriftSettings) -> list[tuple[Residual, dict[str, object]]]:
    """The residuals enabled by ``settings``, each with its overrides."""
    out = []
    for r in RESIDUALS:
        over = settings.residuals.get(r.name, {})
        if over.get("enabled", r.enabled):
            out.append((r, over))
    return out


class DriftCheck:
    """A drift detector on one residual stream of one check object (see the module docstring)."""

    kind: ClassVar[str] = "drift"
    rests_on: ClassVar[str] = ("the residual was stationary in the good running its baseline was learnt from, at the "
                               "same operating point (line speed band); batch means nearly independent after the "
                               "AR(1) correction")
    defaults: ClassVar[AlarmDefaults] = DEFAULTS
    detail: ClassVar[tuple[str, ...]] = ("change_time", "shift", "mean", "sigma")  # carried by a raise

    def __init__(self, source: Check, residual: Residual, *, detector: str, period: float, learn: float,
                 shift: float, arl0: float, sigma_floor: float, speed_band: float,
                 params: dict[str, object] | None = None) -> None:
        self.source_key = (source.kind, source.object_id)
        self.residual = residual
        self.object_id = f"{residual.name}.{source.object_id}"
        self.inputs = tuple(source.inputs)
        self.blames = blames_of(source)
        self.detector, self.period, self.learn, self.shift = detector, period, learn, shift
        self.arl0, self.sigma_floor, self.speed_band = arl0, sigma_floor, speed_band
        self.params = dict(params or {})
        self.hold = False  # set by the application while an alarm of the same object stands: learn nothing
        self._baselines: list[tuple[float, Baseline]] = []  # (line speed m/s, baseline learnt there)
        self._speed: float | None = None  # line speed of the current operating point
        self._grade: float | None = None  # the grade in production (``grade/line``), when the line publishes it
        self._monitor = self._new_monitor()

    def _new_monitor(self) -> DriftMonitor:
        return DriftMonitor(self.detector, period=self.period, learn=self.learn, shift=self.shift, arl0=self.arl0,
                            sigma_floor=self.sigma_floor, params=self.params or None)

    @classmethod
    def for_line(cls, line: LineModel, sources: list[Check] | None = None) -> Iterator[DriftCheck]:
        """One per enabled residual and object of its source check kind; ``sources``: the line's other checks."""
        s = line.drift
        if sources is None:
            from spanwatch.rules.catalog import source_checks

            sources = source_checks(line)
        chosen = [(r, over, c) for r, over in residuals_for(s) for c in sources if c.kind == r.source]
        n = max(1, len(chosen))
        for r, over, c in chosen:
            detector = str(over.get("detector", s.detector))
            arl0 = arl0_for(s.false_alarm_interval, s.period, n)
            yield cls(c, r, detector=detector, period=s.period, learn=s.learn,
                      shift=float(over.get("shift", s.shift)),  # type: ignore[arg-type]
                      arl0=arl0, sigma_floor=float(over.get("sigma_floor", r.sigma_floor)),  # type: ignore[arg-type]
                      speed_band=s.speed_band)

    def reset(self) -> None:
        """After a gap: forget the partial batch, keep the baselines."""
        self._monitor.reset()

    def relearn(self) -> None:
        """Forget every baseline (roll change of a winder it depends on, an acknowledged drift): learn again."""
        self._baselines.clear()
        self._monitor.relearn()

    def _operating_point(self, speed: float) -> None:
        """Follow the line speed: a speed outside the current band (relative ``speed_band``) is a new operating
        point; the current baseline is kept for it and a known one is taken back (else it is learnt)."""
        if not math.isfinite(speed) or speed <= 0:
            return
        if self._speed is not None and abs(speed / self._speed - 1.0) <= self.speed_band:
            return
        if self._speed is not None and self._monitor.baseline is not None:
            self._baselines = [(v, b) for v, b in self._baselines if abs(v / self._speed - 1.0) > self.speed_band / 2]
            self._baselines.append((self._speed, self._monitor.baseline))
        self._speed = speed
        self._monitor = self._new_monitor()
        known = min(self._baselines, key=lambda vb: abs(vb[0] / speed - 1.0), default=None)
        if known is not None and abs(known[0] / speed - 1.0) <= self.speed_band / 2:
            self._monitor.use_baseline(known[1])

    def update(self, block: Block) -> CheckResult:
        n = block.n
        res = block.results.get(self.source_key)
        value = np.full(n, np.nan)
        reason = np.full(n, int(Reason.INPUT_BAD), dtype=np.int8)
        extras = {k: np.full(n, np.nan) for k in ("change_time", "shift", "mean", "sigma", "residual")}
        if res is None:
            return CheckResult(value, reason, extras)
        x = res.value if self.residual.field == "value" else res.extras.get(self.residual.field)
        if x is None:
            return CheckResult(value, reason, extras)
        grade = block.signals.get("grade/line")
        if grade is not None and grade.ok.any():
            g = grade.value[grade.ok]
            if (self._grade is not None and g[0] != self._grade) or (g[1:] != g[:-1]).any():
                self.relearn()  # a new grade: its residuals have levels of their own
            self._grade = float(g[-1])
        for w in self.residual.roll_change:
            starts = block.roll_start.get(self.source_key[1] if w == "*" else w)
            if starts is not None and starts.any():
                self.relearn()
        ok = res.valid & state_mask(block.line_state, self.residual.states) & np.isfinite(x)
        if self.hold and self._monitor.learning:
            ok = np.zeros(n, dtype=bool)
        xs = np.where(ok, x, np.nan)
        parts = [self._monitor.update(block.t[a:b], xs[a:b], ok[a:b]) if point is None else
                 self._at(point, block.t[a:b], xs[a:b], ok[a:b]) for a, b, point in self._pieces(block, ok)]
        out = parts[0] if len(parts) == 1 else DriftOutput(
            *(np.concatenate([getattr(p, f.name) for p in parts]) for f in fields(DriftOutput)))
        reason = np.where(ok, out.state, np.where(res.valid, int(Reason.LINE_STATE), res.reason)).astype(np.int8)
        value = np.where(reason == int(Reason.OK), out.value, np.nan)
        extras = {"change_time": out.change_time, "shift": out.shift, "mean": out.mean, "sigma": out.sigma,
                  "residual": xs}
        return CheckResult(value, reason, extras)

    def _at(self, speed: float, t: np.ndarray, x: np.ndarray, ok: np.ndarray) -> DriftOutput:
        self._operating_point(speed)
        return self._monitor.update(t, x, ok)

    def _pieces(self, block: Block, ok: np.ndarray) -> list[tuple[int, int, float | None]]:
        """The block cut where the operating point changes: (start, end, line speed there or None to keep it).

        A speed change passes through frames the residual does not use (accelerating, settling), so each run of
        usable frames has one operating point (the line speed at its middle frame); runs in the same band as the
        one before are not cut, so the result does not depend on how the frames were cut into blocks."""
        n = block.n
        if not ok.any():
            return [(0, n, None)]
        edges = np.flatnonzero(np.diff(np.concatenate(([False], ok, [False])).astype(np.int8)))
        starts, ends = edges[0::2], edges[1::2]
        speed = block.signal("speed/web").value
        cuts: list[tuple[int, float]] = []
        current = self._speed
        for a, b in zip(starts, ends, strict=True):
            v = float(speed[(a + b - 1) // 2])
            if not math.isfinite(v) or v <= 0:
                continue
            if current is None or abs(v / current - 1.0) > self.speed_band:
                cuts.append((int(a), v))
                current = v
        if not cuts:
            return [(0, n, None)]
        out: list[tuple[int, int, float | None]] = [(0, cuts[0][0], None)] if cuts[0][0] > 0 else []
        for i, (a, v) in enumerate(cuts):
            out.append((a, cuts[i + 1][0] if i + 1 < len(cuts) else n, v))
        return out
