"""Commissioning from a recording: the effective stack caliper of a roll, and the traction a roller has proven.

Pure functions on numpy arrays, SI in and out; no config, no clock.

Effective caliper (conservation of annulus area, the relation of :mod:`spanwatch.rules.woundroll`): a rewind
that has wound ``L`` metres since its diameter was ``D0`` has ``D^2 = D0^2 + (4 / pi) h L``; an unwind that has
paid out ``L`` has ``D^2 = D0^2 - (4 / pi) h L``. So D^2 is a straight line in L whose slope is ``+-4 h / pi``,
and the least-squares slope of D^2 on L gives h with the standard error of a straight-line regression.

Traction evidence (capstan / Euler-Eytelwein): a roller that holds ``T_high / T_low`` without slipping has
``ln(T_high / T_low) <= mu_eff * theta``, so the highest ratio held over a sustained window is a lower bound
of mu_eff x wrap (and of the dry mu x wrap, since air entrainment only lowers mu_eff).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats


@dataclass(frozen=True)
class CaliperFit:
    """A least-squares effective caliper of one roll.

    ``caliper`` (m) with its standard error ``stderr`` and the ``confidence`` interval ``ci`` (m); ``d0`` the
    fitted diameter at L = 0 (m); ``n`` samples, ``r1`` the lag-1 autocorrelation of the residuals and
    ``inflation`` the factor the standard error was widened by for it (1 when not adjusted); ``rms`` the rms
    diameter residual (m).
    """

    caliper: float
    stderr: float
    ci: tuple[float, float]
    confidence: float
    d0: float
    n: int
    r1: float
    inflation: float
    rms: float
    slope: float  # d(D^2)/dL, m
    slope_stderr: float  # of the plain regression, m


def line_fit(x: ArrayLike, y: ArrayLike) -> tuple[float, float, float, float]:
    """Ordinary least squares ``y = a + b x``: (a, b, stderr of b, residual standard deviation).

    ``b = Sxy / Sxx``, ``a = mean(y) - b mean(x)``, ``s^2 = sum(e^2) / (n - 2)``, ``se(b) = s / sqrt(Sxx)``.
    Source: the straight-line regression of any statistics text, e.g. N. R. Draper and H. Smith, *Applied
    Regression Analysis*, 3rd ed., Wiley 1998, ch. 1 (section from memory). Centred sums keep it accurate on
    lengths of tens of kilometres. Raises ValueError for fewer than three points or no spread in x.

    >>> [round(v, 6) for v in line_fit([0.0, 1.0, 2.0, 3.0], [1.0, 3.0, 5.0, 7.0])]
    [1.0, 2.0, 0.0, 0.0]
    """
    xa, ya = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    n = xa.size
    if n < 3:
        raise ValueError(f"expected at least 3 points for a straight line with its error, got {n}")
    xm, ym = float(xa.mean()), float(ya.mean())
    dx, dy = xa - xm, ya - ym
    sxx = float(dx @ dx)
    if not sxx > 0:
        raise ValueError("expected a spread of x (length) to fit a slope, got all points at one x")
    b = float(dx @ dy) / sxx
    a = ym - b * xm
    e = dy - b * dx
    s = math.sqrt(float(e @ e) / (n - 2))
    return a, b, s / math.sqrt(sxx), s


def lag1_autocorrelation(e: ArrayLike) -> float:
    """Lag-1 autocorrelation of a series: ``sum(e_k e_(k+1)) / sum(e_k^2)`` about its mean (0 for < 3 points)."""
    v = np.asarray(e, dtype=float)
    if v.size < 3:
        return 0.0
    v = v - v.mean()
    den = float(v @ v)
    return float(v[:-1] @ v[1:]) / den if den > 0 else 0.0


def fit_caliper(length: ArrayLike, diameter: ArrayLike, *, rewind: bool, confidence: float = 0.95,
                correlated: bool = True) -> CaliperFit:
    """Effective stack caliper of one roll from its diameter and wound (or unwound) length.

    Model: ``D^2 = D0^2 + s (4 / pi) h L``, s = +1 for a rewind (L wound on, D grows), -1 for an unwind (L
    paid out, D shrinks); h from the least-squares slope b of D^2 on L: ``h = s pi b / 4``, its standard error
    ``pi se(b) / 4``, the interval ``h +- t(1 - alpha/2, n - 2) se`` with Student's t (scipy.stats.t).

    Assumptions: one constant effective caliper through the roll (a caliper change within the roll bends the
    line); the length counter does not slip and counts from a fixed point of the roll; the diameter sensor is
    unbiased (its noise is what the residuals show, taken as having one variance on D^2 -- it grows with D,
    which leaves the slope unbiased but makes the interval approximate). Successive residuals of a sampled
    sensor are correlated (a held value, a slow wobble); with ``correlated`` the standard error is widened by
    ``sqrt((1 + r1) / (1 - r1))`` for the lag-1 autocorrelation r1 > 0 of the residuals, the variance
    inflation of the mean of an AR(1) series (D. S. Wilks, *Statistical Methods in the Atmospheric Sciences*,
    Academic Press, section on serial correlation; edition and equation number from memory), with ``n - 2``
    degrees of freedom kept.

    Sources: conservation of annulus area (Roisum, *The Mechanics of Winding*, TAPPI Press 1994); straight-line
    regression (:func:`line_fit`). Raises ValueError on fewer than three usable samples or no length spread.
    """
    lv, dv = np.asarray(length, dtype=float), np.asarray(diameter, dtype=float)
    keep = np.isfinite(lv) & np.isfinite(dv) & (dv > 0)
    lv, dv = lv[keep], dv[keep]
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"expected a confidence between 0 and 1, got {confidence}")
    a, b, se_b, _ = line_fit(lv, dv**2)
    sign = 1.0 if rewind else -1.0
    h = sign * math.pi * b / 4.0
    with np.errstate(invalid="ignore"):
        pred = np.sqrt(np.maximum(a + b * lv, 0.0))
    resid = dv - pred
    r1 = lag1_autocorrelation(dv**2 - (a + b * lv))
    infl = math.sqrt((1.0 + r1) / (1.0 - r1)) if correlated and 0.0 < r1 < 1.0 else 1.0
    if correlated and r1 >= 1.0:
        infl = math.inf
    se_h = math.pi * se_b / 4.0 * infl
    q = float(stats.t.ppf(0.5 + confidence / 2.0, lv.size - 2))
    return CaliperFit(caliper=h, stderr=se_h, ci=(h - q * se_h, h + q * se_h), confidence=confidence,
                      d0=math.sqrt(a) if a > 0 else math.nan, n=int(lv.size), r1=r1, inflation=infl,
                      rms=float(np.sqrt(np.mean(resid**2))), slope=b, slope_stderr=se_b)


def diameter_residuals(length: ArrayLike, diameter: ArrayLike, fit: CaliperFit, *, rewind: bool) -> np.ndarray:
    """Measured minus fitted diameter, m: ``D - sqrt(D0^2 + s (4 / pi) h L)`` (NaN where the root is not real)."""
    lv, dv = np.asarray(length, dtype=float), np.asarray(diameter, dtype=float)
    sign = 1.0 if rewind else -1.0
    arg = fit.d0**2 + sign * 4.0 * fit.caliper * lv / math.pi
    with np.errstate(invalid="ignore"):
        return np.where(arg >= 0, dv - np.sqrt(np.abs(arg)), np.nan)


def held_ratio(t: ArrayLike, ln_ratio: ArrayLike, ok: ArrayLike, window: float, *,
               max_step: float | None = None) -> tuple[float, int]:
    """The highest ``ln(T_high / T_low)`` held on every frame of a sustained window: (value, index of its last frame).

    For each run of consecutive frames where ``ok`` holds (no step in t longer than ``max_step``, default 1.5
    times the median frame step), and each window of frames spanning at least ``window`` seconds in it, the
    lowest ln ratio of the window is the ratio held throughout; the result is the highest of those. ``(nan, -1)``
    when no run is as long as the window. A lower bound of mu_eff x theta when ``ok`` means "no slip" (capstan
    equation, Euler-Eytelwein; ASTM G143); the minimum over the window keeps a single noisy frame from counting.

    >>> held_ratio(np.arange(10.0), np.array([1, 1, 2, 2, 2, 9, 2, 2, 1, 1.0]), np.ones(10, bool), 2.0)
    (2.0, 4)
    """
    tv, x = np.asarray(t, dtype=float), np.asarray(ln_ratio, dtype=float)
    good = np.asarray(ok, dtype=bool) & np.isfinite(x) & np.isfinite(tv)
    if tv.size < 2 or not good.any() or not window >= 0:
        return math.nan, -1
    steps = np.diff(tv)
    step = float(np.median(steps[steps > 0])) if (steps > 0).any() else 0.0
    if step <= 0:
        return math.nan, -1
    w = max(1, math.ceil(window / step - 1e-9)) + 1  # frames spanning ``window`` seconds
    gap = max_step if max_step is not None else 1.5 * step
    # a run ends at a bad frame or a step in time longer than ``gap``
    new_run = np.ones(tv.size, dtype=bool)
    new_run[1:] = ~good[:-1] | (steps > gap)
    idx = np.flatnonzero(good)
    runs = np.split(idx, np.flatnonzero(new_run[idx][1:]) + 1)
    best, where = -math.inf, -1
    for run in runs:
        if run.size < w:
            continue
        mins = np.lib.stride_tricks.sliding_window_view(x[run], w).min(axis=1)
        k = int(np.argmax(mins))
        if mins[k] > best:
            best, where = float(mins[k]), int(run[k + w - 1])
    return (best, where) if where >= 0 else (math.nan, -1)
