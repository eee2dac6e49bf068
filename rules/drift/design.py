"""Design of the drift charts: average run lengths, decision limits, and the engineer's terms.

The average run length (ARL) is the expected number of samples to a signal: in control (ARL0)
the mean time between false alarms, after a shift the mean detection delay. Everything here is in
samples and in sigma units of the standardised samples the charts see; :func:`arl0_for` turns an
acceptable false-alarm interval of the whole line into the ARL0 of one detector.

Pure functions; the Markov-chain results are cached (a detector is designed from the same few
parameters many times). scipy is imported on first use, not with the package.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

__all__ = [
    "arl0_for",
    "cusum_arl",
    "cusum_h",
    "design_cusum",
    "design_ewma",
    "ewma_L",
    "ewma_arl",
    "ewma_lambda",
]

CUSUM_STATES = 300  # Brook-Evans states of one CUSUM side (well under 0.1 % from the limit at k = 1/2, h = 4..5)
EWMA_STATES = 301  # Markov-chain states of the EWMA (odd: one state centred on zero)
SIEGMUND_B = 1.166  # Siegmund's correction of the decision interval (Montgomery ch. 9)


def _siegmund_one(delta: float, b: float) -> float:
    """Siegmund's one-sided ARL for drift ``delta`` = shift - k and corrected interval b = h + 1.166."""
    if abs(delta) < 1e-9:
        return b * b
    x = 2.0 * delta * b
    if x < -700:  # exp overflows: the ARL is astronomically long
        return math.inf
    return (math.exp(-x) + x - 1.0) / (2.0 * delta * delta)


def _phi(x: np.ndarray) -> np.ndarray:
    """The standard normal distribution function, Phi(x) = erfc(-x / sqrt 2) / 2, element by element with
    ``math.erfc`` (a few hundred values here: cheaper than importing scipy.special, about half a second)."""
    return np.array([0.5 * math.erfc(-v * _SQRT_HALF) for v in np.ravel(x).tolist()]).reshape(np.shape(x))


_SQRT_HALF = math.sqrt(0.5)


@lru_cache(maxsize=4096)
def _markov_one(k: float, h: float, shift: float, states: int) -> float:
    """Brook-Evans ARL of the upper CUSUM side from C = 0 (see :func:`cusum_arl`).

    The transition i -> j depends on j - i only, so Phi is evaluated at the 2 states - 1 distinct differences.
    """
    m = states
    w = 2.0 * h / (2 * m - 1)
    diff = np.arange(-(m - 1), m)
    up_d = _phi((diff + 0.5) * w + k - shift)
    lo_d = _phi((diff - 0.5) * w + k - shift)
    ij = np.arange(m)[None, :] - np.arange(m)[:, None] + (m - 1)  # j - i, as an index into diff
    r = (up_d - lo_d)[ij]
    r[:, 0] = up_d[ij[:, 0]]  # state 0 takes every value of C at or below w/2, including the reflection at zero
    arl = np.linalg.solve(np.eye(m) - r, np.ones(m))
    return float(arl[0])


def cusum_arl(k: float, h: float, shift: float = 0.0, *, two_sided: bool = True, method: str = "markov",
              states: int = CUSUM_STATES) -> float:
    """Zero-state ARL of the tabular CUSUM with reference value ``k`` and decision interval ``h``.

    ``shift`` is the mean of the standardised samples (0: in control). One-sided: the upper side
    C+_i = max(0, z_i - k + C+_{i-1}) signalling at C+ > h. Two-sided (the chart of
    :class:`~spanwatch.rules.drift.charts.TabularCusum`): 1/ARL = 1/ARL+ + 1/ARL-, where ARL- is
    the upper side's ARL at -shift (Montgomery ch. 9; exact only when the two sides cannot both be
    above zero, close for k = 1/2).

    ``method="siegmund"``: Siegmund's approximation, one side
    ARL = (exp(-2 D b) + 2 D b - 1) / (2 D^2) with D = shift - k and b = h + 1.166
    (D = 0: ARL = b^2). Within about 1 % of the exact values for k = 1/2, h = 4..5 and shifts up
    to 1 sigma; short for large shifts (1.44 against 1.71 at 4 sigma, h = 4). Source:
    D. Siegmund, *Sequential Analysis: Tests and Confidence Intervals*, Springer 1985; as given by
    D. C. Montgomery, *Introduction to Statistical Quality Control*, ch. 9.

    ``method="markov"``: the Markov chain of Brook & Evans: the interval [0, h] in ``states``
    states of width w = 2h / (2 states - 1), state i at C = i w (state 0 holds every C <= w/2),
    transition probabilities from the normal distribution, absorption above h; the ARL from zero is
    the first element of (I - R)^-1 1 (D. Brook and D. A. Evans, "An approach to the probability
    distribution of cusum run length", *Biometrika* 59(3) (1972) 539-549).

    Assumptions: independent normal samples with unit variance; a step shift present from the start.

    Examples
    --------
    >>> round(cusum_arl(0.5, 5.0), 0)  # Montgomery's table of two-sided ARLs, k = 1/2, h = 5: 465
    465.0
    >>> round(cusum_arl(0.5, 4.0, 1.0, method="siegmund"), 2)
    8.34
    """
    if method not in ("markov", "siegmund"):
        raise ValueError(f"cusum_arl: method must be 'markov' or 'siegmund', got {method!r}")
    k, h, shift = float(k), float(h), float(shift)

    def one(s: float) -> float:
        if method == "siegmund":
            return _siegmund_one(s - k, h + SIEGMUND_B)
        return _markov_one(k, h, s, int(states))

    up = one(shift)
    if not two_sided:
        return up
    down = one(-shift)
    return 1.0 / (1.0 / up + 1.0 / down)


def _solve_increasing(f: object, target: float, lo: float, hi: float, what: str, *, xtol: float = 1e-6) -> float:
    """The x in [lo, ...) where the increasing function ``f`` reaches ``target``.

    Regula falsi with the Illinois modification on log ARL (Dowell & Jarratt 1971, BIT 11) inside a bracket that
    is widened until it holds the root: a few evaluations of ``f`` when ``lo``/``hi`` are close to the root, no
    scipy.optimize import (about half a second).
    """
    g = lambda x: math.log(f(x)) - math.log(target)  # noqa: E731
    glo = g(lo)
    if glo > 0:
        raise ValueError(f"{what}: an ARL of {target:g} is below what the smallest limit gives")
    ghi = g(hi)
    while ghi < 0:
        lo, glo, hi = hi, ghi, hi * 1.5
        if hi > 1e3:
            raise ValueError(f"{what}: no limit gives an ARL of {target:g}")
        ghi = g(hi)
    side = 0
    x = lo
    for _ in range(200):
        x = (lo * ghi - hi * glo) / (ghi - glo)
        gx = g(x)
        if abs(gx) < 1e-12 or hi - lo < xtol:
            break
        if gx < 0:
            lo, glo = x, gx
            if side == -1:
                ghi /= 2.0
            side = -1
        else:
            hi, ghi = x, gx
            if side == 1:
                glo /= 2.0
            side = 1
    return float(x)


@lru_cache(maxsize=1024)
def cusum_h(k: float, arl0: float, method: str = "markov") -> float:
    """The decision interval h giving the two-sided in-control ARL ``arl0`` for reference value ``k``.

    Solves :func:`cusum_arl`(k, h) = arl0 for h (Brent's method on log ARL, which rises
    monotonically with h). Same assumptions and sources as :func:`cusum_arl`.

    Examples
    --------
    >>> round(cusum_h(0.5, 465.0), 2)  # Montgomery's table: h = 5 gives 465
    5.0
    """
    if arl0 <= 1:
        raise ValueError(f"cusum_h: the in-control ARL must be above 1, got {arl0}")
    if method == "markov":  # start from Siegmund's h: the Markov chain is then evaluated a few times only
        h0 = _solve_increasing(lambda h: cusum_arl(k, h, method="siegmund"), float(arl0), 1e-3, 4.0, "cusum_h")
        lo = max(1e-3, 0.9 * h0 - 0.2)
        return _solve_increasing(lambda h: cusum_arl(k, h, method=method), float(arl0), lo, 1.1 * h0 + 0.2,
                                 "cusum_h")
    return _solve_increasing(lambda h: cusum_arl(k, h, method=method), float(arl0), 1e-3, 4.0, "cusum_h")


@lru_cache(maxsize=4096)
def _ewma_markov(lam: float, L: float, shift: float, states: int) -> float:
    from scipy.special import ndtr  # here: keeps the package's import light (the EWMA's transitions have m^2 values)

    m = states
    ucl = L * math.sqrt(lam / (2.0 - lam))
    d = 2.0 * ucl / m
    c = -ucl + (np.arange(m) + 0.5) * d
    base = (1.0 - lam) * c[:, None]
    r = ndtr((c[None, :] + d / 2 - base) / lam - shift) - ndtr((c[None, :] - d / 2 - base) / lam - shift)
    arl = np.linalg.solve(np.eye(m) - r, np.ones(m))
    return float(arl[m // 2])


def ewma_arl(lam: float, L: float, shift: float = 0.0, *, states: int = EWMA_STATES) -> float:
    """Zero-state ARL of the two-sided EWMA chart with weight ``lam`` and asymptotic limits +-L sigma_w.

    w_i = lam z_i + (1 - lam) w_{i-1}, w_0 = 0; the chart signals when |w_i| > L sqrt(lam/(2 - lam))
    (the asymptotic limits, as in Lucas & Saccucci's tables). Markov chain in the manner of
    Brook & Evans, as Lucas & Saccucci compute it: the in-control region split into ``states``
    equal intervals (odd: w_0 = 0 is a state's centre), each represented by its centre c_i, the
    transition i -> j being Phi((c_j + d/2 - (1 - lam) c_i)/lam - shift) - Phi((c_j - d/2 -
    (1 - lam) c_i)/lam - shift); the ARL is the centre element of (I - R)^-1 1.

    With the exact time-varying limits of :class:`~spanwatch.rules.drift.charts.Ewma` the ARL is
    slightly shorter (the first few limits are narrower).

    Assumptions: independent normal samples with unit variance; a step shift from the start.

    Source: J. M. Lucas and M. S. Saccucci, "Exponentially weighted moving average control schemes:
    properties and enhancements", *Technometrics* 32(1) (1990) 1-12; D. Brook and D. A. Evans,
    *Biometrika* 59(3) (1972) 539-549.

    Examples
    --------
    >>> round(ewma_arl(0.2, 2.962), -1)  # Lucas & Saccucci: 500 in control
    500.0
    """
    return _ewma_markov(float(lam), float(L), float(shift), int(states))


@lru_cache(maxsize=1024)
def ewma_L(lam: float, arl0: float) -> float:
    """The limit multiple L giving the in-control ARL ``arl0`` for weight ``lam`` (asymptotic limits).

    Solves :func:`ewma_arl`(lam, L) = arl0 for L (Brent's method on log ARL). Same assumptions and
    sources as :func:`ewma_arl`.

    Examples
    --------
    >>> round(ewma_L(0.1, 500.0), 2)  # Lucas & Saccucci: L = 2.814 for 500 at lambda = 0.1
    2.81
    """
    if arl0 <= 1:
        raise ValueError(f"ewma_L: the in-control ARL must be above 1, got {arl0}")
    return _solve_increasing(lambda x: ewma_arl(lam, x), float(arl0), 0.05, 3.0, "ewma_L")


def design_cusum(shift_sigma: float, arl0: float) -> tuple[float, float]:
    """(k, h) of a two-sided tabular CUSUM to detect a shift of ``shift_sigma`` with in-control ARL ``arl0``.

    k = shift / 2 (the reference value half-way between the in-control mean and the shifted mean,
    which makes the CUSUM the sequential probability ratio test for that shift; Montgomery ch. 9),
    h from :func:`cusum_h` (Brook-Evans Markov chain).

    Examples
    --------
    >>> k, h = design_cusum(1.0, 465.0)
    >>> k, round(h, 2)
    (0.5, 5.0)
    """
    if not shift_sigma > 0:
        raise ValueError(f"design_cusum: the shift to detect must be positive, got {shift_sigma}")
    k = shift_sigma / 2.0
    return k, cusum_h(k, float(arl0))


def ewma_lambda(shift_sigma: float) -> float:
    """The EWMA weight for a shift of ``shift_sigma``: lam = shift / 10, kept within [0.05, 0.25].

    Montgomery (ch. 9) recommends 0.05 <= lam <= 0.25 and smaller lam for smaller shifts, which is
    the trend of Lucas & Saccucci's (1990) optimal designs; the linear rule itself is common
    practice, no source.
    """
    return float(min(0.25, max(0.05, shift_sigma / 10.0)))


def design_ewma(shift_sigma: float, arl0: float) -> tuple[float, float]:
    """(lam, L) of an EWMA chart to detect a shift of ``shift_sigma`` with in-control ARL ``arl0``.

    lam from :func:`ewma_lambda` (smaller for smaller shifts), L from :func:`ewma_L`.

    Examples
    --------
    >>> lam, L = design_ewma(1.0, 500.0)
    >>> lam, round(L, 2)
    (0.1, 2.81)
    """
    if not shift_sigma > 0:
        raise ValueError(f"design_ewma: the shift to detect must be positive, got {shift_sigma}")
    lam = ewma_lambda(shift_sigma)
    return lam, ewma_L(lam, float(arl0))


def arl0_for(interval_s: float, sample_period_s: float, detectors: int = 1) -> float:
    """The in-control ARL, in samples, each of ``detectors`` detectors needs for a line-wide false-alarm interval.

    ``interval_s``: the mean time between false alarms the engineer accepts for the whole line;
    ``sample_period_s``: the time between the samples a detector sees (the batch period);
    ``detectors``: how many detectors share that budget.

    Rule: false alarms of a detector in control are close to a Poisson process of rate
    1 / (ARL0 dt) (run lengths nearly geometric for ARL0 >> 1), so D independent detectors give
    P(at least one false alarm in time T) = 1 - exp(-T D / (ARL0 dt)) and a mean interval of
    ARL0 dt / D. Setting that to ``interval_s``: ARL0 = D interval_s / dt.

    Examples
    --------
    >>> arl0_for(30 * 86400, 10.0, detectors=20)  # one false alarm a month over 20 detectors, 10 s batches
    5184000.0
    """
    if not (interval_s > 0 and sample_period_s > 0 and detectors >= 1):
        raise ValueError("arl0_for: interval and sample period must be positive and detectors at least 1, got "
                         f"{interval_s}, {sample_period_s}, {detectors}")
    return max(1.0, float(detectors) * float(interval_s) / float(sample_period_s))
