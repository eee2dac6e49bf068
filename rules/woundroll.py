"""Wound-roll geometry, winding taper, and the roll-build checks.

Geometry is conservation of annulus area: a roll of diameter D on a core Dc holds
``L = pi (D^2 - Dc^2) / (4 t)`` of web with *effective stack caliper* t — the
thickness one wrap adds to the radius, air and compression included, which is not
the caliper a micrometer gives for one ply. So the checks calibrate t from the roll
itself and show how far the measured diameter is from the prediction, with a band
that says how much that prediction can be trusted.
"""

from __future__ import annotations

import itertools
from collections.abc import Iterator
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike
from spanwatch.rules.base import (
    MOVING_STATES,
    AlarmDefaults,
    Block,
    CheckResult,
    LineState,
    Reason,
    combine_reasons,
    finalise,
)
from spanwatch.rules.linemodel import LineModel
from spanwatch.rules.windows import Lagged, RollingMean

# --- pure geometry -------------------------------------------------------------------


def wound_length(diameter: ArrayLike, core_diameter: ArrayLike, caliper: ArrayLike) -> np.ndarray:
    """Web length on a roll, m: ``L = pi (D^2 - Dc^2) / (4 t)``.

    Assumptions: every wrap adds the same effective caliper t; concentric wraps.
    Source: conservation of annulus area (any web-handling text, e.g. Roisum,
    *The Mechanics of Winding*, TAPPI Press 1994). NaN where t <= 0.

    >>> round(float(wound_length(1.0, 0.0762, 25.4e-6)))
    30742
    """
    d, dc, t = (np.asarray(x, dtype=float) for x in (diameter, core_diameter, caliper))
    with np.errstate(all="ignore"):
        out = np.pi * (d**2 - dc**2) / (4.0 * t)
    return np.where(t > 0, out, np.nan)


def wound_diameter(length: ArrayLike, core_diameter: ArrayLike, caliper: ArrayLike) -> np.ndarray:
    """Diameter of a rewind after winding ``length``: ``D = sqrt(Dc^2 + 4 L t / pi)``.

    Inverse of :func:`wound_length` (same source). NaN where the argument of the root is negative.
    """
    with np.errstate(all="ignore"):
        arg = np.asarray(core_diameter, dtype=float) ** 2 + 4.0 * np.asarray(length, dtype=float) * \
            np.asarray(caliper, dtype=float) / np.pi
        return np.where(arg >= 0, np.sqrt(np.abs(arg)), np.nan)


def unwound_diameter(length: ArrayLike, start_diameter: ArrayLike, caliper: ArrayLike) -> np.ndarray:
    """Diameter of an unwind after paying out ``length``: ``D = sqrt(D0^2 - 4 L t / pi)``.

    NaN once more web is asked for than the roll held (argument below zero). Same source as
    :func:`wound_length`.
    """
    return wound_diameter(-np.asarray(length, dtype=float), start_diameter, caliper)


def diameter_from_speed(web_speed: ArrayLike, rev_per_s: ArrayLike) -> np.ndarray:
    """Roll diameter from surface speed and rotation: ``D = V / (pi n)``, n in rev/s.

    NaN where n is zero or not finite (a stopped roll tells nothing about its size), or
    where the result is not finite. Source: kinematics of rolling without slip (the roll
    takes up one circumference of web per turn).
    """
    v, n = np.asarray(web_speed, dtype=float), np.asarray(rev_per_s, dtype=float)
    with np.errstate(all="ignore"):
        d = np.abs(v) / (np.pi * np.abs(n))
    return np.where(np.isfinite(d) & np.isfinite(n) & (n != 0), d, np.nan)


def effective_caliper(diameter: ArrayLike, start_diameter: ArrayLike, length: ArrayLike) -> np.ndarray:
    """Effective stack caliper from two diameters and the length between them, m.

    ``t = pi |D^2 - D0^2| / (4 L)``: the secant form of :func:`wound_length`, valid for
    a rewind (D grows) and an unwind (D shrinks). NaN where L <= 0. Same source as
    :func:`wound_length`.
    """
    d, d0, ln = (np.asarray(x, dtype=float) for x in (diameter, start_diameter, length))
    with np.errstate(all="ignore"):
        t = np.pi * np.abs(d**2 - d0**2) / (4.0 * ln)
    return np.where(ln > 0, t, np.nan)


def taper_tension(diameter: ArrayLike, t0: ArrayLike, k: ArrayLike, core_diameter: ArrayLike,
                  max_diameter: ArrayLike | None = None, model: str = "hyperbolic") -> np.ndarray:
    """Winding tension setpoint with taper, same unit as t0.

    ``"linear"``:     T(D) = T0 (1 - k (D - Dc) / (Dmax - Dc))
    ``"hyperbolic"``: T(D) = T0 (1 - k (1 - Dc / D)); k = 1 is constant torque, T0 Dc / D.

    Conventions vary between drive vendors and texts (from memory), so the model is named
    in the configuration. Source of the practice: Roisum, *The Mechanics of Winding* (1994).
    """
    d, dc = np.asarray(diameter, dtype=float), np.asarray(core_diameter, dtype=float)
    t0, k = np.asarray(t0, dtype=float), np.asarray(k, dtype=float)
    if model == "hyperbolic":
        with np.errstate(all="ignore"):
            return t0 * (1.0 - k * (1.0 - dc / d))
    if model == "linear":
        if max_diameter is None:
            raise ValueError("linear taper needs max_diameter")
        dm = np.asarray(max_diameter, dtype=float)
        with np.errstate(all="ignore"):
            return t0 * (1.0 - k * (d - dc) / (dm - dc))
    raise ValueError(f"expected taper model 'linear' or 'hyperbolic', got {model!r}")


def wound_on_tension(web_tension: ArrayLike, nip_load: ArrayLike, mu_k: ArrayLike) -> np.ndarray:
    """Wound-on tension with a nip, per unit width: ``WOT = T_w + mu_k N``.

    Centre winding, undriven nip, moderate nip loads. Sources: J. D. Pfeiffer, "Mechanics
    of a rolling nip on paper webs", Tappi 51(8), 1968; J. K. Good, Z. Wu and M. W. R.
    Fikes, "The internal stresses in wound rolls with the presence of a nip roller", ASME
    J. Appl. Mech. 61(1):182-185, 1994 (titles and volumes from memory).
    """
    with np.errstate(all="ignore"):
        return np.asarray(web_tension, dtype=float) + np.asarray(mu_k, dtype=float) * np.asarray(nip_load, dtype=float)


# --- checks --------------------------------------------------------------------------

ROLL_DEFAULTS = AlarmDefaults(
    direction="abs",
    unit="x band",
    warning=1.0,
    alarm=2.0,
    deadband=0.2,
    on_delay=5.0,
    off_delay=10.0,
    priority="medium",
    warning_priority="low",
    cause="Measured roll diameter departs from the diameter the wound length and the calibrated stack "
    "caliper predict: caliper change in the web, a roll winding soft or hard, a length counter or "
    "diameter sensor fault.",
    consequence="Roll built wrong: soft or telescoped rolls, wrong length on the roll, a customer claim.",
    action="Check web caliper at the last gauge; check winding tension and taper; verify length counter "
    "and diameter sensor.",
    response_time=300.0,
)

SPEED_DIAMETER_DEFAULTS = AlarmDefaults(
    direction="abs",
    unit="%",
    warning=0.02,
    alarm=0.05,
    deadband=0.005,
    on_delay=5.0,
    off_delay=10.0,
    priority="medium",
    warning_priority="low",
    cause="Diameter sensor disagrees with the diameter computed from web speed and roll rpm: sensor stuck, "
    "dirty or misaligned, or an rpm feedback fault.",
    consequence="Taper and inertia compensation run on a wrong diameter: roll builds with the wrong "
    "tension profile; tension upsets at speed changes.",
    action="Inspect the diameter sensor; compare with a tape measurement at the next stop.",
)

LENGTH_RATE_DEFAULTS = AlarmDefaults(
    direction="abs",
    unit="%",
    warning=0.01,
    alarm=0.03,
    deadband=0.003,
    on_delay=10.0,
    off_delay=10.0,
    priority="low",
    warning_priority="low",
    cause="Length counter advances at a rate different from the web speed: encoder wheel slipping or "
    "worn, wrong pulse scaling, counter resets.",
    consequence="Rolls with the wrong length; roll-build checks drift.",
    action="Check the measuring wheel and its pulses-per-metre setting.",
)


class RollDiameterCheck:
    """Measured roll diameter against the diameter predicted from wound length (calibrated caliper).

    Per roll: from the roll start (or the start of monitoring), the first
    ``calibration_length`` metres fit ``D^2 = D0^2 + s (4 t / pi) dL`` (s = +1 rewind,
    -1 unwind) by least squares, giving D0 and the effective stack caliper t. After
    that the fit is frozen and the check reports ``(D_meas - D_pred) / band`` where the
    band combines the caliper uncertainty (calibration plus an allowed drift), the
    diameter sensor accuracy and the length counter accuracy.
    """

    kind: ClassVar[str] = "roll_diameter"
    rests_on: ClassVar[str] = ("every wrap adds the same effective caliper (calibrated on this roll); "
                               "length counter and diameter sensor accurate to their configured accuracy")
    defaults: ClassVar[AlarmDefaults] = ROLL_DEFAULTS

    def __init__(self, object_id: str, *, rewind: bool, core_diameter: float, nominal_caliper: float,
                 stack_factor: float, calibration_length: float, caliper_drift: float,
                 diameter_acc: tuple[float, float], length_acc: tuple[float, float]) -> None:
        self.object_id = object_id
        self.d_name, self.l_name = f"diameter/{object_id}", f"length/{object_id}"
        self.inputs = (self.d_name, self.l_name)
        self.sign = 1.0 if rewind else -1.0
        self.core = core_diameter
        self.t_prior = nominal_caliper * stack_factor
        self.cal_len = calibration_length
        self.drift = caliper_drift
        self.d_acc, self.l_acc = diameter_acc, length_acc
        self.reset()

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[RollDiameterCheck]:
        """One per winder with a diameter (measured or from speed) and a length counter."""
        mat = line.material
        for w in line.winders_in_path:
            if line.has_signal(f"diameter/{w.id}") and line.has_signal(f"length/{w.id}"):
                yield cls(w.id, rewind=w.rewind, core_diameter=w.core_diameter, nominal_caliper=mat.caliper,
                          stack_factor=mat.stack_factor, calibration_length=w.calibration_length,
                          caliper_drift=mat.caliper_drift, diameter_acc=w.diameter_accuracy,
                          length_acc=w.length_accuracy)

    def reset(self) -> None:
        """Start a new roll: forget the calibration."""
        self.l0: float | None = None
        self.sums = np.zeros(5)  # n, sum x, sum y, sum xx, sum xy   (x = dL, y = D^2)
        self.fit: tuple[float, float, float] | None = None  # a = D0^2, b = slope, sigma_t

    @property
    def caliper(self) -> tuple[float, float] | None:
        """(effective caliper, its 1-sigma uncertainty) once calibrated, m."""
        if self.fit is None:
            return None
        return self.sign * self.fit[1] * np.pi / 4.0, self.fit[2]

    def update(self, block: Block) -> CheckResult:
        n = block.n
        d, ln = block.signal(self.d_name), block.signal(self.l_name)
        starts = block.roll_start.get(self.object_id, np.zeros(n, dtype=bool))
        settling = block.roll_settling.get(self.object_id, np.zeros(n, dtype=bool))
        finite = np.isfinite(d.value) & np.isfinite(ln.value)
        with np.errstate(invalid="ignore"):
            usable = d.ok & ln.ok & finite & ~settling & (d.value > 0)
        value = np.full(n, np.nan)
        resid = np.full(n, np.nan)
        band = np.full(n, np.nan)
        t_eff = np.full(n, np.nan)
        warming = np.ones(n, dtype=bool)
        # Split at roll starts; each segment continues the state of the one before it.
        cuts = np.flatnonzero(starts)
        bounds = [0, *[int(c) for c in cuts if c > 0], n]
        with np.errstate(all="ignore"):  # huge but finite inputs give inf, marked invalid by finalise
            for lo, hi in itertools.pairwise(bounds):
                if starts[lo]:
                    self.reset()
                self._segment(slice(lo, hi), block.t, d.value, ln.value, usable, value, resid, band, t_eff,
                              warming)
        reason = combine_reasons(
            (settling, Reason.ROLL_CHANGE),
            (~(d.ok & ln.ok & finite), Reason.INPUT_BAD),
            (~usable, Reason.OUT_OF_DOMAIN),
            (warming, Reason.WARMING_UP),
            n=n,
        )
        return finalise(value, reason, residual=resid, band=band, caliper_eff=t_eff)

    def _segment(self, sl: slice, t: np.ndarray, d: np.ndarray, ln: np.ndarray, usable: np.ndarray,
                 value: np.ndarray, resid: np.ndarray, band: np.ndarray, t_eff: np.ndarray,
                 warming: np.ndarray) -> None:
        idx = np.flatnonzero(usable[sl]) + sl.start
        if idx.size == 0:
            return
        if self.l0 is None:
            self.l0 = float(ln[idx[0]])
        x = ln[idx] - self.l0
        y = d[idx] ** 2
        if self.fit is None:
            # Accumulate until the calibration length is reached, then fit and freeze.
            done = np.flatnonzero(np.abs(x) >= self.cal_len)
            k = int(done[0]) if done.size else idx.size
            xs, ys = x[:k], y[:k]
            self.sums += [k, xs.sum(), ys.sum(), (xs * xs).sum(), (xs * ys).sum()]
            if not done.size:
                return
            self._fit(float(d[idx[k]]), abs(float(x[k])))
            idx, x = idx[k:], x[k:]
        a, b, sig_t = self.fit  # type: ignore[misc]
        with np.errstate(invalid="ignore"):
            pred = np.sqrt(np.maximum(a + b * x, 0.0))
        t_cal = self.sign * b * np.pi / 4.0
        sig_total = np.hypot(sig_t, self.drift * t_cal)
        with np.errstate(invalid="ignore", divide="ignore"):
            dd_dt = 2.0 * np.abs(x) / (np.pi * pred)
            dd_dl = 2.0 * t_cal / (np.pi * pred)
        sd = self.d_acc[0] + self.d_acc[1] * d[idx]
        sl_ = self.l_acc[0] + self.l_acc[1] * np.abs(x)
        bnd = np.sqrt((dd_dt * sig_total) ** 2 + sd**2 + (dd_dl * sl_) ** 2)
        r = d[idx] - pred
        resid[idx], band[idx], t_eff[idx] = r, bnd, t_cal
        with np.errstate(invalid="ignore", divide="ignore"):
            value[idx] = r / bnd
        warming[idx] = False

    def _fit(self, d_end: float, span: float) -> None:
        n, sx, sy, sxx, sxy = self.sums
        det = n * sxx - sx * sx
        if n < 3 or det <= 0:
            b = self.sign * 4.0 * self.t_prior / np.pi
            a = (sy - b * sx) / max(n, 1.0)
        else:
            b = (n * sxy - sx * sy) / det
            a = (sy - b * sx) / n
        # Caliper uncertainty from the sensors over the calibration length (not from the
        # number of samples, which are strongly correlated): t = pi |D^2 - D0^2| / (4 L).
        sd = self.d_acc[0] + self.d_acc[1] * d_end
        d0 = np.sqrt(max(a, 0.0))
        sig_t = np.pi / (4.0 * span) * np.hypot(2.0 * d_end * sd, 2.0 * d0 * sd)
        t_cal = abs(b) * np.pi / 4.0
        sig_t = float(np.hypot(sig_t, t_cal * (self.l_acc[1] + self.l_acc[0] / span)))
        self.fit = (float(a), float(b), sig_t)


class SpeedDiameterCheck:
    """Diameter sensor against the diameter from web speed and roll rotation, ``D = V / (pi n)``."""

    kind: ClassVar[str] = "speed_diameter"
    rests_on: ClassVar[str] = ("no slip between web and roll surface; web speed reference equals the roll "
                               "surface speed in steady running")
    defaults: ClassVar[AlarmDefaults] = SPEED_DIAMETER_DEFAULTS

    def __init__(self, object_id: str, *, window_frames: int, min_rev_per_s: float) -> None:
        self.object_id = object_id
        self.names = (f"diameter/{object_id}", f"rotation/{object_id}", "speed/web")
        self.inputs = self.names
        self.window_frames = window_frames
        self.min_n = min_rev_per_s
        self.reset()

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[SpeedDiameterCheck]:
        """One per winder with both a diameter sensor and an rpm tag."""
        s = line.settings
        for w in line.winders_in_path:
            if w.has_diameter_sensor and w.has_rpm:
                yield cls(w.id, window_frames=s.frames(s.check_window),
                          min_rev_per_s=s.thread_speed / (np.pi * w.max_diameter))

    def reset(self) -> None:
        """Forget the averaging windows."""
        self._means = [RollingMean(self.window_frames) for _ in range(3)]

    def update(self, block: Block) -> CheckResult:
        sigs = [block.signal(n) for n in self.names]
        (d, okd), (rot, okn), (v, okv) = (m.update(s.value, s.ok) for m, s in zip(self._means, sigs, strict=True))
        d_speed = diameter_from_speed(v, rot)
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = d / d_speed - 1.0
        settling = block.roll_settling.get(self.object_id, np.zeros(block.n, dtype=bool))
        with np.errstate(invalid="ignore"):
            no_roll = (np.abs(rot) < self.min_n) | ~(d > 0)
        reason = combine_reasons(
            (~block.in_states((LineState.RUNNING,)), Reason.LINE_STATE),
            (settling, Reason.ROLL_CHANGE),
            (~(okd & okn & okv), Reason.INPUT_BAD),
            (no_roll, Reason.OUT_OF_DOMAIN),
            n=block.n,
        )
        return finalise(rel, reason, diameter_speed=d_speed)


class LengthRateCheck:
    """Length counter rate against web speed: ``(dL/dt) / V_web - 1`` over a sliding window."""

    kind: ClassVar[str] = "length_rate"
    rests_on: ClassVar[str] = "web speed reference is true web speed at the length counter"
    defaults: ClassVar[AlarmDefaults] = LENGTH_RATE_DEFAULTS

    def __init__(self, object_id: str, *, window_frames: int, min_speed: float) -> None:
        self.object_id = object_id
        self.names = (f"length/{object_id}", "speed/web")
        self.inputs = self.names
        self.window_frames = window_frames
        self.min_speed = min_speed
        self.reset()

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[LengthRateCheck]:
        """One per winder with a length counter."""
        s = line.settings
        for w in line.winders_in_path:
            if line.has_signal(f"length/{w.id}"):
                yield cls(w.id, window_frames=s.frames(s.check_window), min_speed=s.thread_speed)

    def reset(self) -> None:
        """Forget the windows."""
        self._lag_l = Lagged(self.window_frames)
        self._lag_t = Lagged(self.window_frames)
        self._mean_v = RollingMean(self.window_frames)

    def update(self, block: Block) -> CheckResult:
        ln, v = block.signal(self.names[0]), block.signal(self.names[1])
        l_old, ok_old = self._lag_l.update(ln.value, ln.ok)
        t_old, _ = self._lag_t.update(block.t, np.ones(block.n, dtype=bool))
        # The mean over the w frames ending at the frame before this one matches the
        # interval (t - w dt, t] of the length difference.
        vbar, okv = self._mean_v.update(v.value, v.ok)
        with np.errstate(invalid="ignore", divide="ignore"):
            rate = (ln.value - l_old) / (block.t - t_old)
            rel = rate / vbar - 1.0
        settling = block.roll_settling.get(self.object_id, np.zeros(block.n, dtype=bool))
        reason = combine_reasons(
            (~block.in_states((LineState.RUNNING,)), Reason.LINE_STATE),
            (settling, Reason.ROLL_CHANGE),
            (~(ln.ok & ok_old & okv), Reason.INPUT_BAD),
            (np.abs(vbar) <= self.min_speed, Reason.OUT_OF_DOMAIN),
            (rate < 0, Reason.ROLL_CHANGE),
            n=block.n,
        )
        return finalise(rel, reason, length_rate=rate)


__all__ = [
    "MOVING_STATES",
    "LengthRateCheck",
    "RollDiameterCheck",
    "SpeedDiameterCheck",
    "diameter_from_speed",
    "effective_caliper",
    "taper_tension",
    "unwound_diameter",
    "wound_diameter",
    "wound_length",
    "wound_on_tension",
]
