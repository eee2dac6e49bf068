"""Control charts on standardised samples: the two-sided tabular CUSUM and the EWMA chart.

Both take standardised samples ``z`` (in control: mean 0, standard deviation 1, independent),
return a statistic per sample scaled so that 1.0 is the decision limit, and carry their state from
one call to the next. Both are vectorised over the samples of a call (no per-sample Python loop)
and over any leading axes: ``z`` of shape ``(runs, n)`` updates ``runs`` independent charts at once
(Monte Carlo run lengths, or many streams). The parameters may be given per chart (arrays of the leading
shape), a call may carry padding after each chart's real samples (``last``: how many are real), and single charts
of the leading axis can be restarted (:meth:`restart`) or take another chart's state (:meth:`put`): what a bank of
drift detectors on different residual streams needs.

Neither chart resets itself after a signal: the statistic stays at or above 1.0 while the shift
persists (an alarm condition, not an event); the caller decides when to learn again and calls
:meth:`reset`.
"""

from __future__ import annotations

import numpy as np

__all__ = ["Ewma", "TabularCusum"]


def _state(value: np.ndarray | float, shape: tuple[int, ...]) -> np.ndarray:
    """``value`` broadcast to ``shape`` as a writable float array."""
    return np.array(np.broadcast_to(np.asarray(value, dtype=float), shape))


def _param(value: float | np.ndarray) -> tuple[float | np.ndarray, float | np.ndarray]:
    """A chart parameter as given (a float, or an array with one per chart) and in the form that broadcasts against
    samples ``(..., n)`` (the array with a trailing axis)."""
    a = np.asarray(value, dtype=float)
    return (float(a), float(a)) if a.ndim == 0 else (a, a[..., None])


def _carried(per_sample: np.ndarray, old: np.ndarray, last: np.ndarray | None) -> np.ndarray:
    """The state to carry after a call: the value after the last sample, or, with ``last`` (real samples per chart,
    the rest padding), after each chart's last real sample (the old state where it had none)."""
    n = per_sample.shape[-1]
    if last is None or (last == n).all():
        return per_sample[..., -1].copy()
    at = np.take_along_axis(per_sample, np.maximum(last - 1, 0)[..., None], axis=-1)[..., 0]
    return np.where(last > 0, at, old)


class TabularCusum:
    """Two-sided tabular CUSUM on standardised samples (Page 1954; Montgomery's tabular form).

    For standardised samples z_i (in control N(0, 1), independent), reference value ``k`` and
    decision interval ``h`` (both in sigma units)::

        C+_i = max(0,  z_i - k + C+_{i-1})
        C-_i = max(0, -z_i - k + C-_{i-1}),      C+_0 = C-_0 = 0

    and the chart signals when C+_i > h or C-_i > h. :meth:`update` returns
    ``max(C+_i, C-_i) / h`` per sample (above 1.0: signal).

    Vectorised with the Lindley form of the recursion: with y_j = z_j - k and the partial sums
    S_i = y_1 + ... + y_i (S_0 = 0), C_i = S_i - min(-C_0, S_1, ..., S_i), where C_0 is the
    value carried in from the previous call; likewise for the lower side with y_j = -z_j - k.

    After an update, for the last sample: :attr:`side` is +1 when C+ >= C- (an upward shift) and
    -1 otherwise; :attr:`run_length` is N+ or N- of that side, the number of consecutive samples
    its sum has been above zero (the change is estimated to have happened after sample i - N);
    :attr:`shift_estimate` is the new mean in sigma units, +(k + C+/N+) or -(k + C-/N-)
    (0 when N is 0). The per-sample arrays :attr:`runs` and :attr:`shifts` hold the same for every
    sample of the last call.

    Assumptions: independent, normal, standardised samples in control (the ARL tables rest on
    them); a step change of the mean.

    Source: D. C. Montgomery, *Introduction to Statistical Quality Control*, ch. 9 (section 9.1:
    the tabular CUSUM, 9.1.4: estimating the new mean and the change point); E. S. Page,
    "Continuous inspection schemes", *Biometrika* 41 (1954) 100-115.

    Examples
    --------
    >>> c = TabularCusum(k=0.5, h=4.0)
    >>> c.update(np.array([0.0, 1.5, 1.5, 1.5, 1.5])).round(3)
    array([0.  , 0.25, 0.5 , 0.75, 1.  ])
    >>> c.run_length, c.side, round(c.shift_estimate, 3)
    (4, 1, 1.5)
    >>> c.update(np.array([1.5])).round(3)  # the state carries over: now above the limit
    array([1.25])
    """

    def __init__(self, k: float | np.ndarray, h: float | np.ndarray, *, shape: tuple[int, ...] = ()) -> None:
        if not (np.all(np.asarray(k) >= 0) and np.all(np.asarray(h) > 0)):
            raise ValueError(f"TabularCusum needs k >= 0 and h > 0, got k={k}, h={h}")
        self.k, self._k = _param(k)
        self.h, self._h = _param(h)
        self.shape = tuple(np.broadcast_shapes(shape, np.shape(self.k), np.shape(self.h)))
        self.reset()

    def reset(self) -> None:
        """Forget the sums and runs: both sides start again from zero."""
        self._cp: np.ndarray = np.zeros(self.shape)
        self._cm: np.ndarray = np.zeros(self.shape)
        self._np: np.ndarray = np.zeros(self.shape, dtype=np.int64)
        self._nm: np.ndarray = np.zeros(self.shape, dtype=np.int64)
        self.runs = np.zeros(0, dtype=np.int64)
        self.shifts = np.zeros(0)

    def keep(self, rows: np.ndarray) -> None:
        """Keep only ``rows`` of a batch of independent charts (the leading axis), e.g. the Monte Carlo runs
        that have not signalled yet."""
        self._cp, self._cm, self._np, self._nm = (a[rows] for a in (self._cp, self._cm, self._np, self._nm))

    def restart(self, rows: np.ndarray | slice) -> None:
        """Start the charts ``rows`` of the leading axis (built with ``shape``) again from zero."""
        for a in (self._cp, self._cm, self._np, self._nm):
            a[rows] = 0

    def put(self, rows: np.ndarray | slice, other: TabularCusum, other_rows: np.ndarray | slice) -> None:
        """Give the charts ``rows`` the sums and runs of ``other``'s charts ``other_rows``."""
        for mine, theirs in ((self._cp, other._cp), (self._cm, other._cm), (self._np, other._np),
                             (self._nm, other._nm)):
            mine[rows] = theirs[other_rows] if theirs.ndim else theirs

    @staticmethod
    def _side(y: np.ndarray, c0: np.ndarray, n0: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """One side's sums and runs for increments ``y`` (..., n) from carried sum ``c0`` and run ``n0``."""
        s = np.cumsum(y, axis=-1)
        lead = np.broadcast_to(-c0, s.shape[:-1])[..., None]
        c = s - np.minimum.accumulate(np.concatenate([lead, s], axis=-1), axis=-1)[..., 1:]
        c = np.maximum(c, 0.0)  # rounding in the cumulative sum must not give a tiny negative sum
        idx = np.arange(y.shape[-1])
        last_zero = np.maximum.accumulate(np.where(c > 0, -1, idx), axis=-1)
        run = np.where(last_zero >= 0, idx - last_zero, idx + 1 + np.broadcast_to(n0, s.shape[:-1])[..., None])
        return c, run

    def update(self, z: np.ndarray, last: np.ndarray | None = None) -> np.ndarray:
        """Feed samples ``z`` (..., n); return max(C+, C-)/h per sample (above 1.0: signal).

        ``last`` (an int array of the leading shape): how many samples of each chart are real; the samples after
        them are padding (their statistics mean nothing) and the state carried is the one after the last real
        sample (unchanged for a chart with none)."""
        z = np.asarray(z, dtype=float)
        if z.shape[-1] == 0:
            return np.zeros(z.shape)
        lead = z.shape[:-1]
        both = (2, *lead)  # the upper and the lower side in one pass
        c0 = np.stack([np.broadcast_to(self._cp, lead), np.broadcast_to(self._cm, lead)])
        n0 = np.stack([np.broadcast_to(self._np, lead), np.broadcast_to(self._nm, lead)])
        c2, run2 = self._side(np.stack([z - self._k, -z - self._k]), c0, n0)
        cp, cm, run_p, run_m = c2[0], c2[1], run2[0], run2[1]
        up = cp >= cm
        c = np.where(up, cp, cm)
        self.runs = np.where(up, run_p, run_m)
        with np.errstate(invalid="ignore", divide="ignore"):
            size = np.where(self.runs > 0, self._k + c / self.runs, 0.0)
        self.shifts = np.where(up, size, -size)
        last2 = None if last is None else np.broadcast_to(last, both)
        self._cp, self._cm = _carried(c2, c0, last2)
        self._np, self._nm = _carried(run2, n0, last2)
        return c / self._h

    @property
    def upper(self) -> np.ndarray | float:
        """C+ after the last sample."""
        return self._cp[()] if self._cp.ndim == 0 else self._cp

    @property
    def lower(self) -> np.ndarray | float:
        """C- after the last sample."""
        return self._cm[()] if self._cm.ndim == 0 else self._cm

    def _last(self, a: np.ndarray) -> np.ndarray:
        return a[..., -1] if a.shape and a.shape[-1] else np.zeros(a.shape[:-1] if a.ndim else ())

    @property
    def side(self) -> int | np.ndarray:
        """+1 when the upper side is the larger after the last sample, -1 otherwise."""
        s = np.where(self._cp >= self._cm, 1, -1)
        return int(s) if s.ndim == 0 else s

    @property
    def run_length(self) -> int | np.ndarray:
        """N+ or N- of the larger side after the last sample (Montgomery 9.1.4)."""
        n = np.where(self._cp >= self._cm, self._np, self._nm)
        return int(n) if n.ndim == 0 else n

    @property
    def shift_estimate(self) -> float | np.ndarray:
        """The new mean in sigma units after the last sample: +(k + C+/N+) or -(k + C-/N-); 0 if N = 0."""
        s = self._last(self.shifts)
        return float(s) if np.ndim(s) == 0 else s


class Ewma:
    """EWMA control chart for standardised samples, with the exact time-varying limits.

    For standardised samples z_i (in control N(0, 1), independent) and weight 0 < lam <= 1::

        w_i = lam z_i + (1 - lam) w_{i-1},   w_0 = 0
        sigma_w,i = sqrt(lam / (2 - lam) * (1 - (1 - lam)^(2 i)))

    and the chart signals when |w_i| > L sigma_w,i. :meth:`update` returns |w_i| / (L sigma_w,i)
    per sample (above 1.0: signal). With ``exact_limits=False`` the asymptotic limit
    L sqrt(lam / (2 - lam)) is used throughout (as in Lucas & Saccucci's ARL tables).

    Vectorised with :func:`scipy.signal.lfilter` (imported when a chart is built; initial condition
    (1 - lam) w_{i-1} carried from the previous call); ``i`` counts the samples since the last
    :meth:`reset`. After an update :attr:`values` holds w for the samples of the call,
    :attr:`shift_estimate` the last w (the EWMA is the chart's estimate of the current mean in
    sigma units; it lags a step change) and :attr:`run_length` the number of consecutive samples
    w has kept its current sign (a change-point hint: common practice, no source); :attr:`runs`
    the same for every sample of the call.

    Assumptions: independent, normal, standardised samples in control.

    Source: J. M. Lucas and M. S. Saccucci, "Exponentially weighted moving average control
    schemes: properties and enhancements", *Technometrics* 32(1) (1990) 1-12; NIST/SEMATECH
    *e-Handbook of Statistical Methods*, section 6.3.2.4 "EWMA Control Charts".

    Examples
    --------
    >>> e = Ewma(lam=0.5, L=3.0)
    >>> e.update(np.array([2.0, 2.0])).round(4)  # w = 1, 1.5; sigma_w = 0.5, sqrt(5/16)
    array([0.6667, 0.8944])
    >>> e.values
    array([1. , 1.5])
    """

    def __init__(self, lam: float | np.ndarray, L: float | np.ndarray, *, exact_limits: bool = True,
                 shape: tuple[int, ...] = ()) -> None:
        if not (np.all((np.asarray(lam) > 0) & (np.asarray(lam) <= 1)) and np.all(np.asarray(L) > 0)):
            raise ValueError(f"Ewma needs 0 < lam <= 1 and L > 0, got lam={lam}, L={L}")
        self.lam, self._lam = _param(lam)
        self.L, self._L = _param(L)
        self.exact_limits = exact_limits
        self.shape = tuple(np.broadcast_shapes(shape, np.shape(self.lam), np.shape(self.L)))
        from scipy.signal import lfilter  # here, not at import: scipy.signal takes most of a second to import

        self._lfilter = lfilter
        self.reset()

    def reset(self) -> None:
        """Start again: w = 0, the limits from their first (narrowest) value."""
        self._w: np.ndarray = np.zeros(self.shape)
        self._i: np.ndarray = np.zeros(self.shape, dtype=np.int64)  # samples since the reset, per chart
        self._run: np.ndarray = np.zeros(self.shape, dtype=np.int64)
        self.values = np.zeros(0)
        self.runs = np.zeros(0, dtype=np.int64)

    def keep(self, rows: np.ndarray) -> None:
        """Keep only ``rows`` of a batch of independent charts (the leading axis)."""
        self._w, self._run = self._w[rows], self._run[rows]
        if self._i.ndim:
            self._i = self._i[rows]

    def restart(self, rows: np.ndarray | slice) -> None:
        """Start the charts ``rows`` of the leading axis (built with ``shape``) again: w = 0, the limits from
        their first value."""
        for a in (self._w, self._i, self._run):
            a[rows] = 0

    def put(self, rows: np.ndarray | slice, other: Ewma, other_rows: np.ndarray | slice) -> None:
        """Give the charts ``rows`` the state of ``other``'s charts ``other_rows``."""
        for mine, theirs in ((self._w, other._w), (self._i, other._i), (self._run, other._run)):
            mine[rows] = theirs[other_rows] if theirs.ndim else theirs

    def sigma_w(self, i: np.ndarray) -> np.ndarray:
        """Standard deviation of w_i in control (sample i counted from 1 after a reset; with a ``lam`` per chart,
        ``i`` is (..., n) for the charts of the leading axis)."""
        a = self._lam / (2.0 - self._lam)
        if not self.exact_limits:
            return np.broadcast_to(np.sqrt(a), np.broadcast_shapes(np.shape(i), np.shape(a))).copy()
        return np.sqrt(a * (1.0 - (1.0 - self._lam) ** (2.0 * np.asarray(i, dtype=float))))

    def _filter(self, z: np.ndarray, w0: np.ndarray) -> np.ndarray:
        """w over the samples ``z`` (..., n) from w0 (lead shape), with one lfilter per distinct ``lam``."""
        if np.ndim(self.lam) == 0:
            lam = float(self.lam)
            w, _ = self._lfilter([lam], [1.0, -(1.0 - lam)], z, axis=-1, zi=(1.0 - lam) * w0[..., None])
            return w
        lams = np.broadcast_to(self.lam, z.shape[:-1])
        w = np.empty(z.shape)
        for lam in np.unique(lams).tolist():
            sel = lams == lam
            w[sel], _ = self._lfilter([lam], [1.0, -(1.0 - lam)], z[sel], axis=-1, zi=(1.0 - lam) * w0[sel][..., None])
        return w

    def update(self, z: np.ndarray, last: np.ndarray | None = None) -> np.ndarray:
        """Feed samples ``z`` (..., n); return |w_i| / (L sigma_w,i) per sample (above 1.0: signal).

        ``last``: as for :meth:`TabularCusum.update` (real samples per chart, the rest padding)."""
        z = np.asarray(z, dtype=float)
        n = z.shape[-1]
        if n == 0:
            return np.zeros(z.shape)
        lead = z.shape[:-1]
        w = self._filter(z, np.broadcast_to(self._w, lead))
        i = np.broadcast_to(self._i, lead)[..., None] + np.arange(1, n + 1)
        stat = np.abs(w) / (self._L * self.sigma_w(i))
        sign = np.sign(w)
        prev = np.broadcast_to(np.sign(self._w), lead)[..., None]
        idx = np.arange(n)
        change = sign != np.concatenate([prev, sign[..., :-1]], axis=-1)
        since = np.maximum.accumulate(np.where(change, idx, -1), axis=-1)
        run = np.where(since >= 0, idx - since + 1, idx + 1 + np.broadcast_to(self._run, lead)[..., None])
        self.runs = run
        self._run = _carried(run, np.broadcast_to(self._run, lead), last)
        self._w = _carried(w, np.broadcast_to(self._w, lead), last)
        self._i = self._i + (n if last is None else last)
        self.values = w
        return stat

    @property
    def run_length(self) -> int | np.ndarray:
        """Consecutive samples the EWMA has kept its current sign (change-point hint; no source)."""
        return int(self._run) if self._run.ndim == 0 else self._run

    @property
    def side(self) -> int | np.ndarray:
        """+1 when w >= 0, -1 otherwise."""
        s = np.where(self._w >= 0, 1, -1)
        return int(s) if s.ndim == 0 else s

    @property
    def shift_estimate(self) -> float | np.ndarray:
        """The last EWMA value w: the chart's estimate of the current mean, in sigma units."""
        return float(self._w) if self._w.ndim == 0 else self._w
