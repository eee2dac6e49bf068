"""Span tension from draw: the first-order span equation and the draw-versus-tension check.

Tensions here are per unit width (N/m) and the web stiffness is ``Et = E * caliper``
(N/m), the per-width form of E*A.

Sources: Whitworth & Harrison (1983); Shin, *Tension Control* (TAPPI Press, 2000);
Pagilla, Siraskar & Dwivedula, IEEE Trans. Control Syst. Technol. 15(1), 2007.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike
from spanwatch.rules.base import AlarmDefaults, Block, CheckResult, LineState, Reason, combine_reasons, finalise
from spanwatch.rules.linemodel import LineModel
from spanwatch.rules.windows import RollingMean


def span_tension_rate(t2: ArrayLike, t1: ArrayLike, v1: ArrayLike, v2: ArrayLike, et: ArrayLike,
                      length: ArrayLike) -> np.ndarray:
    """dT2/dt of a span, N/m/s: ``L dT2/dt = Et (V2 - V1) + V1 T1 - V2 T2``.

    T2 tension of this span; T1 tension of the span entering the upstream roller; V1, V2
    surface speeds of the upstream and downstream rollers; Et = E * caliper (per width);
    L span length. Assumptions: no slip on either roller, uniform strain along the span,
    linear elastic web, constant span length, small strain.

    Source: Whitworth & Harrison (1983); Shin, *Tension Control* (TAPPI Press, 2000);
    Pagilla, Siraskar & Dwivedula, IEEE Trans. Control Syst. Technol. 15(1), 2007.
    """
    t2, t1 = np.asarray(t2, dtype=float), np.asarray(t1, dtype=float)
    v1, v2 = np.asarray(v1, dtype=float), np.asarray(v2, dtype=float)
    with np.errstate(all="ignore"):
        return (np.asarray(et, dtype=float) * (v2 - v1) + v1 * t1 - v2 * t2) / np.asarray(length, dtype=float)


def steady_span_tension(t1: ArrayLike, v1: ArrayLike, v2: ArrayLike, et: ArrayLike) -> np.ndarray:
    """Steady-state downstream tension from the draw: ``T2 = (Et (V2 - V1) + V1 T1) / V2``.

    The fixed point of :func:`span_tension_rate` (same sources and assumptions); it is
    reached with a time constant of about L / V. NaN where V2 <= 0 or an input is not finite.

    >>> round(float(steady_span_tension(100.0, 1.0, 1.001, 66000.0)), 2)
    165.83
    """
    t1 = np.asarray(t1, dtype=float)
    v1, v2 = np.asarray(v1, dtype=float), np.asarray(v2, dtype=float)
    with np.errstate(all="ignore"):
        t2 = (np.asarray(et, dtype=float) * (v2 - v1) + v1 * t1) / v2
    return np.where((v2 > 0) & np.isfinite(t2), t2, np.nan)


def draw_for_tension(t1: ArrayLike, t2: ArrayLike, et: ArrayLike) -> np.ndarray:
    """Speed ratio V2 / V1 that makes the steady span tension T2 from T1: ``(Et - T1) / (Et - T2)``.

    The inverse of :func:`steady_span_tension` (used by the simulator to set draws); same
    sources and assumptions.

    >>> round(float(draw_for_tension(100.0, 165.83, 66000.0)), 6)
    1.001
    """
    et = np.asarray(et, dtype=float)
    with np.errstate(all="ignore"):
        return (et - np.asarray(t1, dtype=float)) / (et - np.asarray(t2, dtype=float))


def draw_band(t1: ArrayLike, v1: ArrayLike, v2: ArrayLike, et: ArrayLike, *, modulus_tol: float,
              ratio_tol: float, t1_acc: ArrayLike, t2_acc: ArrayLike) -> np.ndarray:
    """Tolerance band of the steady-state prediction, N/m (root sum of squares of the bounds).

    Terms: modulus uncertainty ``modulus_tol * Et (V2 - V1) / V2``; encoder ratio
    uncertainty ``Et * ratio_tol``; the two load-cell accuracies (T1 scaled by V1 / V2).

    Source: the law of propagation of uncertainty for uncorrelated inputs (JCGM 100:2008,
    the GUM, eq. 10) applied to :func:`steady_span_tension`, with the ratio term's
    sensitivity (Et - T1) V1^2 / V2^2 taken as Et (T1 << Et, small draw). Which error
    sources are counted is common practice, no source.
    """
    v1, v2, et = np.asarray(v1, dtype=float), np.asarray(v2, dtype=float), np.asarray(et, dtype=float)
    with np.errstate(all="ignore"):
        e_mod = modulus_tol * et * (v2 - v1) / v2
        e_t1 = np.asarray(t1_acc, dtype=float) * v1 / v2
        return np.sqrt(e_mod**2 + (et * ratio_tol) ** 2 + e_t1**2 + np.asarray(t2_acc, dtype=float) ** 2)


DEFAULTS = AlarmDefaults(
    direction="abs",
    unit="x band",
    warning=1.0,
    alarm=2.0,
    deadband=0.2,
    on_delay=5.0,
    off_delay=10.0,
    priority="medium",
    warning_priority="low",
    cause="Measured span tension departs from what the draw predicts: a roller slipping, a modulus "
    "different from the configured one (new web lot), a load cell out of calibration, or an encoder fault.",
    consequence="Tension control is not doing what the draw settings say; slip or a wrong tension "
    "leads to wrinkles, neck-in or a web break.",
    action="Compare with the traction and slip checks; verify the load cell with a calibration weight; "
    "confirm the web lot's modulus.",
)


class DrawCheck:
    """Draw-versus-tension residual of a tension zone bounded by two driven rollers.

    Inputs are averaged over ``window`` seconds; valid only after the line has run
    steadily (RUNNING, which includes the settle time after a speed change) for a
    whole window.
    """

    kind: ClassVar[str] = "draw"
    rests_on: ClassVar[str] = ("steady state, no slip at either bounding roller, linear elastic web with "
                               "the configured modulus and nominal caliper, idlers without drag")
    defaults: ClassVar[AlarmDefaults] = DEFAULTS

    def __init__(self, object_id: str, *, zone_up: str, roller_up: str, roller_down: str, et: float,
                 modulus_tol: float, ratio_tol: float, t1_acc: tuple[float, float],
                 t2_acc: tuple[float, float], window_frames: int, min_speed: float) -> None:
        self.object_id = object_id
        self.names = (f"tension/{zone_up}", f"tension/{object_id}", f"speed/{roller_up}", f"speed/{roller_down}")
        self.inputs = self.names
        self.drives = (roller_up, roller_down)  # the drives that set its draw (a fault of either suppresses it)
        self.et, self.modulus_tol, self.ratio_tol = et, modulus_tol, ratio_tol
        self.t1_acc, self.t2_acc = t1_acc, t2_acc
        self.min_speed = min_speed
        self.window_frames = window_frames
        self.reset()

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[DrawCheck]:
        """One per zone between two driven rollers with load cells in it and upstream of it and both encoders."""
        s, mat = line.settings, line.material
        for z in line.zones:
            if line.is_winder(z.upstream) or line.is_winder(z.downstream) or z.tension_tag is None:
                continue
            zb = line.zone_before(z.upstream)
            if zb is None or zb.tension_tag is None:
                continue
            if not (line.has_signal(f"speed/{z.upstream}") and line.has_signal(f"speed/{z.downstream}")):
                continue
            yield cls(z.id, zone_up=zb.id, roller_up=z.upstream, roller_down=z.downstream,
                      et=mat.modulus * mat.caliper, modulus_tol=mat.modulus_tolerance,
                      ratio_tol=s.encoder_ratio_tolerance, t1_acc=zb.tension_accuracy, t2_acc=z.tension_accuracy,
                      window_frames=s.frames(s.check_window), min_speed=s.thread_speed)

    def reset(self) -> None:
        """Forget the averaging windows (the next window must fill again)."""
        self._means = [RollingMean(self.window_frames) for _ in range(4)]
        self._steady = RollingMean(self.window_frames)

    def update(self, block: Block) -> CheckResult:
        sig = [block.signal(n) for n in self.names]
        avg = [m.update(s.value, s.ok) for m, s in zip(self._means, sig, strict=True)]
        (t1, ok1), (t2, ok2), (v1, okv1), (v2, okv2) = avg
        running = block.line_state == int(LineState.RUNNING)
        _, steady = self._steady.update(running.astype(float), running)
        pred = steady_span_tension(t1, v1, v2, self.et)
        acc1 = self.t1_acc[0] + self.t1_acc[1] * np.abs(t1)
        acc2 = self.t2_acc[0] + self.t2_acc[1] * np.abs(t2)
        band = draw_band(t1, v1, v2, self.et, modulus_tol=self.modulus_tol, ratio_tol=self.ratio_tol,
                         t1_acc=acc1, t2_acc=acc2)
        resid = t2 - pred
        with np.errstate(invalid="ignore", divide="ignore"):
            et_eff = (t2 * v2 - v1 * t1) / (v2 - v1)
        et_eff = np.where(np.abs(v2 - v1) > 1e-4 * np.abs(v2), et_eff, np.nan)
        reason = combine_reasons(
            (~steady, Reason.LINE_STATE),
            (~(ok1 & ok2 & okv1 & okv2), Reason.INPUT_BAD),
            ((v1 <= self.min_speed) | (v2 <= self.min_speed), Reason.OUT_OF_DOMAIN),
            n=block.n,
        )
        with np.errstate(invalid="ignore", divide="ignore"):
            value = resid / band
        return finalise(value, reason, residual=resid, band=band, predicted=pred, stiffness_eff=et_eff)
