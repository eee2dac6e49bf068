"""The in-control baseline of a residual stream and its standardisation (AR(1) residuals).

Batch means of a 50 Hz residual are still autocorrelated when the process wanders slowly. A chart
fed with autocorrelated samples false-alarms far more often than its ARL table says, so the batch
means are whitened with an AR(1) model learnt with the baseline, and the charts watch the
one-step-ahead prediction errors (a residual chart).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["RHO_MAX", "Baseline", "learn_baseline", "standardise"]

RHO_MAX = 0.95  # the largest |rho| used: beyond it the residual's scale sqrt(1 - rho^2) becomes too uncertain


@dataclass(frozen=True)
class Baseline:
    """What a stream looked like in control: ``mean``, ``sigma`` (standard deviation, never below
    ``sigma_floor``), ``rho`` (lag-1 autocorrelation, as estimated), ``n`` (samples it was learnt
    from) and ``sigma_floor`` (the engineering floor of the scale, in the stream's unit)."""

    mean: float
    sigma: float
    rho: float
    n: int
    sigma_floor: float = 0.0

    @property
    def rho_used(self) -> float:
        """The autocorrelation the standardisation uses: 0 unless material, i.e. |rho| >= 2/sqrt(n) (outside the
        approximate 95 % band of a white-noise lag-1 autocorrelation, whose standard error is 1/sqrt(n); Box &
        Jenkins, *Time Series Analysis*), and at most ``RHO_MAX`` in size."""
        if self.n < 3 or abs(self.rho) < 2.0 / math.sqrt(self.n):
            return 0.0
        return float(np.clip(self.rho, -RHO_MAX, RHO_MAX))

    @property
    def scale(self) -> float:
        """The standard deviation of the AR(1) prediction error, sigma sqrt(1 - rho^2), never below the floor."""
        r = self.rho_used
        return max(self.sigma * math.sqrt(1.0 - r * r), self.sigma_floor)

    def to_units(self, shift_z: float | np.ndarray) -> float | np.ndarray:
        """A sustained shift of the standardised residual (sigma units of :meth:`scale`) in the stream's own unit.

        A step D in x moves the AR(1) prediction error by D (1 - rho) (after the first sample), so
        D = shift_z scale / (1 - rho)."""
        return shift_z * self.scale / (1.0 - self.rho_used)

    def step_size(self, shift_z: float | np.ndarray, n: int | np.ndarray) -> float | np.ndarray:
        """A step in the stream's own unit from a CUSUM's estimate over a run of ``n`` prediction errors.

        A step D in x before the first of n prediction errors moves their sum by
        (D / s) (1 + (n - 1)(1 - rho)) (the first error takes the whole step, the others D (1 - rho)),
        and the CUSUM's estimate of their mean is shift_z = k + C/n (Montgomery 9.1.4), so
        D = s n shift_z / (1 + (n - 1)(1 - rho)); with rho = 0 this is s shift_z. 0 where n is 0.

        >>> Baseline(mean=0.0, sigma=1.0, rho=0.0, n=100).step_size(1.5, 4)
        1.5
        """
        r = self.rho_used
        n = np.asarray(n, dtype=float)
        den = np.where(n > 0, 1.0 + (n - 1.0) * (1.0 - r), 1.0)
        out = np.where(n > 0, self.scale * n * np.asarray(shift_z, dtype=float) / den, 0.0)
        return float(out) if out.ndim == 0 else out


def learn_baseline(x: np.ndarray, *, sigma_floor: float = 0.0) -> Baseline:
    """The baseline of samples ``x`` (batch means in time order; NaN marks a missing sample).

    mean = the average of the finite samples; sigma = their sample standard deviation
    (ddof = 1), at least ``sigma_floor``; rho = the lag-1 sample autocorrelation
    r1 = sum (x_t - m)(x_{t-1} - m) / sum (x_t - m)^2 over the pairs of consecutive finite samples
    (G. E. P. Box, G. M. Jenkins, *Time Series Analysis: Forecasting and Control*, the sample
    autocorrelation function).

    Assumptions: the samples come from a stationary, in-control stretch. r1 is biased towards zero
    by about (1 + 4 rho)/n for short series; with the ~60 batches of a 10-minute baseline the bias
    is a few hundredths.

    Examples
    --------
    >>> b = learn_baseline(np.array([1.0, 3.0, 1.0, 3.0, 1.0, 3.0]))  # rho = -5/6, sigma = sqrt(6/5)
    >>> b.mean, round(b.sigma, 4), round(b.rho, 4), b.n
    (2.0, 1.0954, -0.8333, 6)
    >>> learn_baseline(np.array([5.0, 5.0, 5.0]), sigma_floor=0.1).sigma
    0.1
    """
    x = np.asarray(x, dtype=float)
    fin = np.isfinite(x)
    n = int(fin.sum())
    if n < 2:
        raise ValueError(f"learn_baseline needs at least 2 finite samples, got {n}")
    v = x[fin]
    mean = float(v.mean())
    sd = float(v.std(ddof=1))
    d = x - mean
    den = float(np.sum(d[fin] ** 2))
    pair = fin[1:] & fin[:-1]
    rho = float(np.sum(d[1:][pair] * d[:-1][pair]) / den) if den > 0 else 0.0
    return Baseline(mean=mean, sigma=max(sd, float(sigma_floor)), rho=rho, n=n, sigma_floor=float(sigma_floor))


def standardise(x: np.ndarray, baseline: Baseline, prev: float | np.ndarray | None = None) -> np.ndarray:
    """Standardised AR(1) prediction errors of ``x`` against ``baseline``.

    z_i = ((x_i - mu) - rho (x_{i-1} - mu)) / s, with s = sigma sqrt(1 - rho^2) (never below
    the baseline's sigma_floor) and rho the baseline's :attr:`Baseline.rho_used` (0 when the
    autocorrelation is not material: then z_i = (x_i - mu) / sigma). In control the z_i are
    independent N(0, 1) if x is AR(1) with those parameters.

    ``prev``: the sample before x_0 (a float), or an array of the same length as ``x`` giving each
    sample's predecessor; NaN or None where it is unknown (after a gap), where the marginal
    z_i = (x_i - mu) / max(sigma, floor) is used instead (also N(0, 1) in control).

    A residual chart sees a step of D in x as a first jump of D/s and then a sustained
    D (1 - rho)/s: positive rho hides part of a step (see :meth:`Baseline.to_units`).

    Source: L. C. Alwan and H. V. Roberts, "Time-series modeling for statistical process control",
    *Journal of Business & Economic Statistics* 6(1) (1988) 87-95; D. C. Montgomery,
    *Introduction to Statistical Quality Control*, ch. 10 (SPC for autocorrelated data).

    Examples
    --------
    >>> b = Baseline(mean=10.0, sigma=2.0, rho=0.6, n=100)
    >>> standardise(np.array([11.6, 10.0]), b, prev=11.0).round(4)  # s = 2 * 0.8 = 1.6
    array([ 0.625, -0.6  ])
    """
    x = np.asarray(x, dtype=float)
    mu = baseline.mean
    rho = baseline.rho_used
    marginal = (x - mu) / max(baseline.sigma, baseline.sigma_floor)
    if rho == 0.0:
        return marginal
    p = np.asarray(np.nan if prev is None else prev, dtype=float)
    if p.ndim == 0:
        p = np.concatenate([[float(p)], x[:-1]]) if x.size else np.zeros(0)
    z = ((x - mu) - rho * (p - mu)) / baseline.scale
    return np.where(np.isfinite(p), z, marginal)
