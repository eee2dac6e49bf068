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
import math
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


# A calibrated effective caliper outside these multiples of the single-ply caliper is no stack of this web: a
# wound stack is a little thicker than its plies (air between wraps), never half or three times (the range the
# line file allows for stack_factor; common practice, no source). Such a calibration comes from a frozen
# diameter or a miscounting length, and the roll is not judged on it.
PLAUSIBLE_STACK = (0.5, 3.0)
ROLL_HISTORY = 20  # calibrated calipers of earlier rolls kept per winder
MAX_LOCAL_SAMPLES = 100_000  # samples kept for the local slope (bounds memory on a very slow line)


def local_slope(x: np.ndarray, y: np.ndarray, start: np.ndarray) -> np.ndarray:
    """Least-squares slope of y on x over the samples ``start[k] .. k`` for every k (prefix sums).

    The local d(D^2)/dL of a roll: over a window of the last N metres it is ``+-4 t_local / pi``,
    so its ratio to the calibrated slope is the ratio of the local effective caliper to the
    calibrated one (:func:`wound_length`, same source). NaN where the window holds fewer than
    three samples or no spread in x.

    >>> xs = np.arange(10.0); [round(float(v), 6) for v in local_slope(xs, 3 * xs + 1, np.zeros(10, int))[2:4]]
    [3.0, 3.0]
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.size == 0:
        return np.zeros(0)
    xc, yc = x - x[0], y - y[0]
    def prefix(v: np.ndarray) -> np.ndarray:
        return np.concatenate([[0.0], np.cumsum(v)])
    s1, sx, sy, sxx, sxy = (prefix(v) for v in (np.ones_like(xc), xc, yc, xc * xc, xc * yc))
    end = np.arange(1, x.size + 1)
    st = np.asarray(start, dtype=int)
    n = s1[end] - s1[st]
    ax, ay = sx[end] - sx[st], sy[end] - sy[st]
    axx, axy = sxx[end] - sxx[st], sxy[end] - sxy[st]
    with np.errstate(all="ignore"):
        det = n * axx - ax * ax
        slope = (n * axy - ax * ay) / det
    return np.where((n >= 3) & (det > 1e-12 * np.maximum(n * axx, 1e-300)) & np.isfinite(slope), slope, np.nan)


class RollDiameterCheck:
    """Measured roll diameter against the diameter predicted from wound length (calibrated caliper).

    Per roll: from the roll start (or the start of monitoring), the first
    ``calibration_length`` metres fit ``D^2 = D0^2 + s (4 t / pi) dL`` (s = +1 rewind,
    -1 unwind) by least squares, giving D0 and the effective stack caliper t. After
    that the fit is frozen and the check reports ``(D_meas - D_pred) / band`` where the
    band combines the caliper uncertainty (calibration plus an allowed drift), the
    diameter sensor accuracy and the length counter accuracy.

    What the calibration and the roll say beyond the residual (extras, per frame):

    - ``implausible`` = 1: the calibrated caliper is outside :data:`PLAUSIBLE_STACK` times the
      single-ply caliper (a frozen diameter or a miscounting length calibrated it): the roll is
      OUT_OF_DOMAIN, never judged on it.
    - ``past_empty`` = 1: the predicted D^2 falls below the core's (an unwind whose length counter
      has paid out more than the roll held): OUT_OF_DOMAIN, not a prediction of zero.
    - ``caliper_nominal_dev``: calibrated caliper / (caliper x stack_factor) - 1;
      ``caliper_history_dev``: calibrated caliper / median of the earlier rolls of the same grade
      (``grade/line``, from the line's ``grade_tag``; one grade when the line publishes none) on this
      winder - 1 (NaN for the first roll of a grade); ``caliper_flag`` = 1 where either departs by
      more than the material's ``stack_factor_tolerance``. The history is the check's state: kept
      from roll to roll, forgotten by ``reset`` (a gap, a new run).
    - ``caliper_ratio``: the local effective caliper (least-squares slope of D^2 against length over
      the last ``local_length`` metres, :func:`local_slope`) over the calibrated one: 1 while the
      roll builds as calibrated; a caliper change within the roll moves it (a drift detector can
      watch it).
    """

    kind: ClassVar[str] = "roll_diameter"
    rests_on: ClassVar[str] = ("every wrap adds the same effective caliper (calibrated on this roll); "
                               "length counter and diameter sensor accurate to their configured accuracy")
    defaults: ClassVar[AlarmDefaults] = ROLL_DEFAULTS

    def __init__(self, object_id: str, *, rewind: bool, core_diameter: float, nominal_caliper: float,
                 stack_factor: float, calibration_length: float, caliper_drift: float,
                 diameter_acc: tuple[float, float], length_acc: tuple[float, float],
                 stack_factor_tolerance: float = 0.1, local_length: float | None = None,
                 blames: tuple[str, ...] = ()) -> None:
        self.object_id = object_id
        self.d_name, self.l_name = f"diameter/{object_id}", f"length/{object_id}"
        self.inputs = (self.d_name, self.l_name)
        self.blames = blames or (object_id,)
        self.sign = 1.0 if rewind else -1.0
        self.core = core_diameter
        self.single_ply = nominal_caliper
        self.t_prior = nominal_caliper * stack_factor
        self.tolerance = stack_factor_tolerance
        self.cal_len = calibration_length
        self.local_len = local_length if local_length is not None else calibration_length
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
                          length_acc=w.length_accuracy, stack_factor_tolerance=mat.stack_factor_tolerance,
                          blames=tuple(x for x in (w.id, w.diameter_tag or w.rpm_tag, w.length_tag) if x))

    def reset(self) -> None:
        """Forget everything: this roll's calibration and the calipers of the earlier rolls."""
        self.history: list[tuple[float, float]] = []  # (grade, calibrated caliper) of the earlier rolls
        self.grade = math.nan  # the grade in production (``grade/line``; NaN: the line publishes none)
        self.fit: tuple[float, float, float] | None = None
        self._new_roll()

    def _new_roll(self) -> None:
        """Start a new roll: keep the last roll's plausible calibration in the history, forget the rest."""
        if self.fit is not None and not self.implausible:
            self.history = [*self.history, (self.roll_grade, self.sign * self.fit[1] * np.pi / 4.0)][-ROLL_HISTORY:]
        self.roll_grade = self.grade
        self.l0: float | None = None
        self.sums = np.zeros(5)  # n, sum x, sum y, sum xx, sum xy   (x = dL, y = D^2)
        self.fit = None  # a = D0^2, b = slope, sigma_t
        self.implausible = False
        self.devs = (np.nan, np.nan, 0.0)  # nominal, history, flag
        self._tx = np.zeros(0)  # the roll's last samples (x, y) for the local slope
        self._ty = np.zeros(0)

    @property
    def caliper(self) -> tuple[float, float] | None:
        """(effective caliper, its 1-sigma uncertainty) once calibrated, m."""
        if self.fit is None:
            return None
        return self.sign * self.fit[1] * np.pi / 4.0, self.fit[2]

    def update(self, block: Block) -> CheckResult:
        n = block.n
        grade = block.signals.get("grade/line")
        if grade is not None and grade.ok.any():
            self.grade = float(grade.value[grade.ok][-1])
        d, ln = block.signal(self.d_name), block.signal(self.l_name)
        starts = block.roll_start.get(self.object_id, np.zeros(n, dtype=bool))
        settling = block.roll_settling.get(self.object_id, np.zeros(n, dtype=bool))
        finite = np.isfinite(d.value) & np.isfinite(ln.value)
        with np.errstate(invalid="ignore"):
            usable = d.ok & ln.ok & finite & ~settling & (d.value > 0)
        out = {k: np.full(n, np.nan) for k in ("value", "residual", "band", "caliper_eff", "caliper_ratio",
                                               "caliper_nominal_dev", "caliper_history_dev", "caliper_flag")}
        flags = {k: np.zeros(n, dtype=bool) for k in ("implausible", "past_empty")}
        warming = np.ones(n, dtype=bool)
        # Split at roll starts; each segment continues the state of the one before it.
        cuts = np.flatnonzero(starts)
        bounds = [0, *[int(c) for c in cuts if c > 0], n]
        with np.errstate(all="ignore"):  # huge but finite inputs give inf, marked invalid by finalise
            for lo, hi in itertools.pairwise(bounds):
                if starts[lo]:
                    self._new_roll()
                self._segment(slice(lo, hi), d.value, ln.value, usable, out, flags, warming)
        reason = combine_reasons(
            (settling, Reason.ROLL_CHANGE),
            (~(d.ok & ln.ok & finite), Reason.INPUT_BAD),
            (~usable | flags["implausible"] | flags["past_empty"], Reason.OUT_OF_DOMAIN),
            (warming, Reason.WARMING_UP),
            n=n,
        )
        value = out.pop("value")
        return finalise(value, reason, **out, implausible=flags["implausible"].astype(float),
                        past_empty=flags["past_empty"].astype(float))

    def _local_ratio(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """caliper_ratio for the new samples (x, y): local slope over the last ``local_len`` metres / calibrated."""
        xs, ys = np.concatenate([self._tx, x]), np.concatenate([self._ty, y])
        ax = np.abs(xs)
        start = np.searchsorted(ax, ax - self.local_len, side="left")
        m = self._tx.size
        full = ax[m:] - ax[start[m:]] >= 0.9 * self.local_len
        slope = local_slope(xs, ys, start)[m:]
        keep = int(start[-1]) if xs.size else 0
        keep = max(keep, xs.size - MAX_LOCAL_SAMPLES)
        self._tx, self._ty = xs[keep:], ys[keep:]
        if self.fit is None or self.implausible:
            return np.full(x.size, np.nan)
        return np.where(full, slope / self.fit[1], np.nan)

    def _segment(self, sl: slice, d: np.ndarray, ln: np.ndarray, usable: np.ndarray, out: dict[str, np.ndarray],
                 flags: dict[str, np.ndarray], warming: np.ndarray) -> None:
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
            self._local_ratio(xs, ys)  # the calibration's samples start the local window
            if not done.size:
                return
            self._fit(float(d[idx[k]]), abs(float(x[k])))
            idx, x, y = idx[k:], x[k:], y[k:]
        out["caliper_ratio"][idx] = self._local_ratio(x, y)
        a, b, sig_t = self.fit  # type: ignore[misc]
        t_cal = self.sign * b * np.pi / 4.0
        out["caliper_eff"][idx] = t_cal
        out["caliper_nominal_dev"][idx], out["caliper_history_dev"][idx], out["caliper_flag"][idx] = self.devs
        warming[idx] = False
        if self.implausible:
            flags["implausible"][idx] = True
            return
        arg = a + b * x
        past = arg < (self.core**2 if self.sign < 0 else 0.0)  # an unwind paid out past its core
        flags["past_empty"][idx] = past
        with np.errstate(invalid="ignore"):
            pred = np.sqrt(np.where(past, np.nan, arg))
        sig_total = np.hypot(sig_t, self.drift * t_cal)
        with np.errstate(invalid="ignore", divide="ignore"):
            dd_dt = 2.0 * np.abs(x) / (np.pi * pred)
            dd_dl = 2.0 * t_cal / (np.pi * pred)
        sd = self.d_acc[0] + self.d_acc[1] * d[idx]
        sl_ = self.l_acc[0] + self.l_acc[1] * np.abs(x)
        bnd = np.sqrt((dd_dt * sig_total) ** 2 + sd**2 + (dd_dl * sl_) ** 2)
        r = d[idx] - pred
        out["residual"][idx], out["band"][idx] = r, bnd
        with np.errstate(invalid="ignore", divide="ignore"):
            out["value"][idx] = r / bnd

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
        self._judge(self.sign * float(b) * np.pi / 4.0)

    def _judge(self, t_cal: float) -> None:
        """Plausibility of the calibrated caliper, and how far it is from nominal and from the earlier rolls."""
        lo, hi = PLAUSIBLE_STACK
        self.implausible = not (lo * self.single_ply <= t_cal <= hi * self.single_ply)
        nominal = t_cal / self.t_prior - 1.0
        self.roll_grade = self.grade
        same = [c for g, c in self.history if g == self.grade or (math.isnan(g) and math.isnan(self.grade))]
        history = t_cal / float(np.median(same)) - 1.0 if same else np.nan  # earlier rolls of the same grade
        flag = abs(nominal) > self.tolerance or (np.isfinite(history) and abs(history) > self.tolerance)
        self.devs = (nominal, history, float(flag))


class SpeedDiameterCheck:
    """Diameter sensor against the diameter from web speed and roll rotation, ``D = V / (pi n)``."""

    kind: ClassVar[str] = "speed_diameter"
    rests_on: ClassVar[str] = ("no slip between web and roll surface; web speed reference equals the roll "
                               "surface speed in steady running")
    defaults: ClassVar[AlarmDefaults] = SPEED_DIAMETER_DEFAULTS

    def __init__(self, object_id: str, *, window_frames: int, min_rev_per_s: float,
                 blames: tuple[str, ...] = ()) -> None:
        self.object_id = object_id
        self.names = (f"diameter/{object_id}", f"rotation/{object_id}", "speed/web")
        self.inputs = self.names
        self.blames = blames or (object_id,)
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
                          min_rev_per_s=s.thread_speed / (np.pi * w.max_diameter),
                          blames=tuple(x for x in (w.id, w.diameter_tag, w.rpm_tag) if x))

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

    def __init__(self, object_id: str, *, window_frames: int, min_speed: float, blames: tuple[str, ...] = ()) -> None:
        self.object_id = object_id
        self.names = (f"length/{object_id}", "speed/web")
        self.inputs = self.names
        self.blames = blames or (object_id,)
        self.window_frames = window_frames
        self.min_speed = min_speed
        self.reset()

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[LengthRateCheck]:
        """One per winder with a length counter."""
        s = line.settings
        for w in line.winders_in_path:
            if line.has_signal(f"length/{w.id}"):
                yield cls(w.id, window_frames=s.frames(s.check_window), min_speed=s.thread_speed,
                          blames=tuple(x for x in (w.id, w.length_tag) if x))

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
