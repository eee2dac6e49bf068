"""One residual stream's drift detector: decimation, baseline, standardisation, chart, per-frame output.

A :class:`DriftMonitor` takes the frames of a residual stream block by block (epoch time, value,
usable-or-not) and

1. decimates the usable frames into batch means of ``period`` seconds, the batches aligned on
   epoch time (batch b covers [b period, (b + 1) period)), the open batch carried from one block to
   the next; a batch with fewer than half of its frames usable (gated, missing) is dropped;
2. learns a :class:`~spanwatch.rules.drift.baseline.Baseline` from the first ``learn`` seconds of
   batch means (at least ``MIN_LEARN_BATCHES``);
3. standardises each later batch mean (AR(1) prediction error,
   :func:`~spanwatch.rules.drift.baseline.standardise`) and feeds it to the detector: a tabular
   CUSUM (default) or an EWMA chart designed from ``shift`` (sigmas) and ``arl0`` (batches), or
   river's ADWIN / Page-Hinkley with ``params``;
4. gives every frame the detector's statistic of the last closed batch (held), a state code, and
   the estimated change time and size.

A batch closes at the first frame of a later batch; its result belongs to that frame onwards. The
output does not depend on how the frames are split into blocks. The frames are assumed to lie on a
regular grid (the aligner's); the grid step is taken as the smallest positive time step seen.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from spanwatch.rules.drift.baseline import Baseline, learn_baseline, standardise
from spanwatch.rules.drift.charts import Ewma, TabularCusum
from spanwatch.rules.drift.design import design_cusum, design_ewma
from spanwatch.rules.drift.rivers import RIVER_DETECTORS, RiverDetector

__all__ = ["DETECTORS", "GATED", "LEARNING", "MIN_LEARN_BATCHES", "OK", "DriftMonitor", "DriftOutput"]

# State codes per frame; the same numbers as spanwatch.rules.base.Reason (OK, LINE_STATE, WARMING_UP), kept as
# plain ints here so that this package imports nothing of the rest of the core.
OK, GATED, LEARNING = 0, 1, 4
MIN_LEARN_BATCHES = 20  # fewer batch means make sigma and rho too uncertain (rho's standard error 1/sqrt(n))
HISTORY = 4096  # batch end times kept for the change-time estimate
DETECTORS = ("cusum", "ewma", *RIVER_DETECTORS)
_FIELDS = ("value", "change_time", "shift", "mean", "sigma")


@dataclass(frozen=True)
class DriftOutput:
    """Per frame: ``value`` (the detector's statistic of the last closed batch, 1.0 = drift; river's detectors
    give 1.0 at the batch they report a drift and 0.0 otherwise; NaN while learning or gated), ``state``
    (``OK`` 0, ``GATED`` 1: the frame was not usable, ``LEARNING`` 4: no statistic yet), ``change_time``
    (epoch s: the estimated change point, the end of the last batch before the signalling side's run began),
    ``shift`` (the estimated size of the change in the stream's own unit, signed: for the CUSUM
    :meth:`~spanwatch.rules.drift.baseline.Baseline.step_size` of its run, for the EWMA its current value, which lags a
    step; NaN for river's detectors),
    ``mean`` and ``sigma`` (the baseline's)."""

    value: np.ndarray
    state: np.ndarray
    change_time: np.ndarray
    shift: np.ndarray
    mean: np.ndarray
    sigma: np.ndarray


class DriftMonitor:
    """Drift detection on one residual stream (see the module docstring).

    ``detector``: "cusum" (two-sided tabular CUSUM, k and h from
    :func:`~spanwatch.rules.drift.design.design_cusum`), "ewma" (lam and L from
    :func:`~spanwatch.rules.drift.design.design_ewma`), "adwin" or "page_hinkley" (river's, with
    ``params``). ``period``: batch length in s; ``learn``: baseline length in s; ``shift``: the
    shift to detect in baseline sigmas (of the AR(1) prediction error); ``arl0``: the in-control
    ARL in batches (:func:`~spanwatch.rules.drift.design.arl0_for`); ``sigma_floor``: the smallest
    sigma believed, in the stream's unit; ``params``: for the CUSUM ``k`` and ``h``, for the EWMA
    ``lam`` and ``L`` (each overrides the design), for river's detectors their constructor's
    parameters.

    Assumptions: in control, the batch means are close to an AR(1) process (the whitened batch
    means then nearly independent and normal, as the ARL design assumes); the baseline stretch was
    in control.

    Examples
    --------
    >>> m = DriftMonitor(period=1.0, learn=20.0, shift=1.0, arl0=500.0, sigma_floor=0.1)
    >>> t = 1000.0 + np.arange(0, 60, 0.02)  # 60 s at 50 Hz
    >>> x = np.where(t >= 1040.0, 0.5, 0.0)  # steady, then a step of 5 floors after 40 s
    >>> out = m.update(t, x, np.ones(t.size, dtype=bool))
    >>> int(out.state[0]), int(out.state[-1]), round(m.design["h"], 2)
    (4, 0, 5.07)
    >>> # 19 closed batches at z = 5: C+ = 19 (5 - 0.5), over h; the run began after the batch ending at 1040 s
    >>> round(float(out.value[-1]), 1), float(out.change_time[-1]), round(float(out.shift[-1]), 3)
    (16.9, 1040.0, 0.5)
    """

    def __init__(self, detector: str = "cusum", *, period: float = 10.0, learn: float = 600.0, shift: float = 1.0,
                 arl0: float = 1e6, sigma_floor: float = 0.0, params: dict[str, Any] | None = None) -> None:
        if detector not in DETECTORS:
            raise ValueError(f"DriftMonitor: detector must be one of {list(DETECTORS)}, got {detector!r}")
        if not (period > 0 and learn >= 0 and shift > 0 and arl0 > 1 and sigma_floor >= 0):
            raise ValueError("DriftMonitor: period and shift must be positive, learn and sigma_floor not negative, "
                             f"arl0 above 1; got period={period}, learn={learn}, shift={shift}, arl0={arl0}, "
                             f"sigma_floor={sigma_floor}")
        self.detector = detector
        self.period = float(period)
        self.learn = float(learn)
        self.shift = float(shift)
        self.arl0 = float(arl0)
        self.sigma_floor = float(sigma_floor)
        self.params = dict(params or {})
        self.learn_batches = max(MIN_LEARN_BATCHES, math.ceil(self.learn / self.period - 1e-9))
        self.design: dict[str, float] = {}
        self._chart: TabularCusum | Ewma | RiverDetector = self._build()
        self._dt: float | None = None
        self._last_t: float | None = None
        self.baseline: Baseline | None = None
        self.relearn()

    def _build(self) -> TabularCusum | Ewma | RiverDetector:
        p = self.params
        if self.detector == "cusum":
            k, h = (float(p["k"]), float(p["h"])) if "k" in p and "h" in p else design_cusum(self.shift, self.arl0)
            self.design = {"k": k, "h": h}
            return TabularCusum(k, h)
        if self.detector == "ewma":
            lam, L = (float(p["lam"]), float(p["L"])) if "lam" in p and "L" in p else design_ewma(self.shift, self.arl0)
            self.design = {"lam": lam, "L": L}
            return Ewma(lam, L)
        return RiverDetector(self.detector, **p)

    @property
    def learning(self) -> bool:
        """True while there is no baseline."""
        return self.baseline is None

    def _forget_detector(self) -> None:
        self._chart.reset()
        self._held = dict.fromkeys(_FIELDS, math.nan)
        self._ends = np.full(1, math.nan)  # end times of the detector's batches; [0]: the batch before the first
        self._ends_offset = 0  # detector batch number of _ends[1]
        self._n_det = 0

    def relearn(self) -> None:
        """Forget the baseline, the detector and the open batch: learn again from the next usable frames."""
        self.baseline = None
        self._learn_buf: list[float] = []
        self._learn_n = 0
        self._prev: tuple[int, float] | None = None  # (batch number, mean) of the last accepted batch
        self._open: tuple[int, float, int] | None = None  # (batch number, sum, usable frames) of the open batch
        self._forget_detector()

    def use_baseline(self, baseline: Baseline) -> None:
        """Take ``baseline`` (learnt before, at the same operating point) instead of learning; the detector starts
        again from zero."""
        self.baseline = baseline
        self._learn_buf = []
        self._learn_n = 0
        self._prev = None
        self._forget_detector()

    def reset(self) -> None:
        """After a gap in the data: forget the open batch and the AR(1) predecessor; keep the baseline and detector."""
        self._open = None
        self._prev = None

    # -- decimation ---------------------------------------------------------------------------------------------

    def _batches(self, t: np.ndarray, x: np.ndarray, valid: np.ndarray) -> tuple[np.ndarray, ...]:
        """Closed batches of this block: (batch number, sum, usable frames, frame at which it closes)."""
        n = t.shape[0]
        if n >= 1:
            steps = np.diff(t if self._last_t is None else np.concatenate([[self._last_t], t]))
            steps = steps[steps > 0]
            if steps.size:
                smallest = float(steps.min())
                self._dt = smallest if self._dt is None else min(self._dt, smallest)
            self._last_t = float(t[-1])
        b = np.floor(t / self.period).astype(np.int64)
        carried = self._open
        run = np.maximum.accumulate(b if carried is None else np.concatenate([[carried[0]], b]))
        run = run if carried is None else run[1:]
        valid = valid & (b == run)  # a frame earlier than the open batch (time ran back) counts for nothing
        starts = np.flatnonzero(np.concatenate([[True], run[1:] != run[:-1]]))
        sums = np.add.reduceat(np.where(valid, x, 0.0), starts)
        cnts = np.add.reduceat(valid.astype(np.int64), starts)
        seg = run[starts]
        close = np.concatenate([starts[1:], [n]])
        if carried is not None:
            if seg[0] == carried[0]:
                sums[0] += carried[1]
                cnts[0] += carried[2]
            else:
                seg, sums, cnts = np.r_[carried[0], seg], np.r_[carried[1], sums], np.r_[carried[2], cnts]
                close = np.r_[0, close]
        self._open = (int(seg[-1]), float(sums[-1]), int(cnts[-1]))
        return seg[:-1], sums[:-1], cnts[:-1], close[:-1]

    # -- the stream ---------------------------------------------------------------------------------------------

    def _learn(self, bs: np.ndarray, means: np.ndarray) -> int:
        """Feed accepted batches to the baseline; how many of them it took."""
        for i in range(bs.shape[0]):
            b, m = int(bs[i]), float(means[i])
            if self._prev is not None and b != self._prev[0] + 1:
                self._learn_buf.append(math.nan)  # a gap: no lag-1 pair across it
            self._learn_buf.append(m)
            self._learn_n += 1
            self._prev = (b, m)
            if self._learn_n >= self.learn_batches:
                self.baseline = learn_baseline(np.array(self._learn_buf), sigma_floor=self.sigma_floor)
                self._learn_buf = []
                self._ends = np.array([(b + 1) * self.period])
                return i + 1
        return bs.shape[0]

    def _detect(self, bs: np.ndarray, means: np.ndarray) -> dict[str, np.ndarray]:
        """Run the detector on accepted batches after the baseline; per batch: statistic, change time and size."""
        base = self.baseline
        assert base is not None
        before = np.r_[self._prev[0] if self._prev is not None else -2, bs[:-1]]
        prev_mean = np.r_[self._prev[1] if self._prev is not None else math.nan, means[:-1]]
        prev = np.where(bs == before + 1, prev_mean, math.nan)
        self._prev = (int(bs[-1]), float(means[-1]))
        z = standardise(means, base, prev)
        ends = (bs + 1) * self.period
        if math.isnan(self._ends[0]):  # the batch before the detector's first: its first batch's start
            self._ends[0] = bs[0] * self.period
        j = self._n_det + np.arange(bs.shape[0])  # detector batch numbers
        self._ends = np.concatenate([self._ends, ends])
        if self._ends.shape[0] > HISTORY + 1:
            drop = self._ends.shape[0] - (HISTORY + 1)
            self._ends = self._ends[drop:]
            self._ends_offset += drop
        self._n_det += bs.shape[0]
        n = bs.shape[0]
        if isinstance(self._chart, RiverDetector):
            value = self._chart.update(z).astype(float)
            change, size = np.full(n, math.nan), np.full(n, math.nan)
        else:
            value = self._chart.update(z)
            runs = self._chart.runs
            if isinstance(self._chart, TabularCusum):
                size = np.asarray(base.step_size(self._chart.shifts, runs), dtype=float)
            else:  # the EWMA's own estimate of the current mean (it lags a step)
                size = np.asarray(base.to_units(self._chart.values), dtype=float)
            # the change is placed after the last batch before the run: detector batch j - run (index + 1 in _ends)
            k = j - runs - self._ends_offset + 1
            kept = self._ends[np.clip(k, 0, self._ends.shape[0] - 1)]
            change = np.where(k >= 0, kept, ends - runs * self.period)  # beyond the kept history: on the grid
            change = np.where(runs > 0, change, math.nan)
        return {"value": value, "change_time": change, "shift": size,
                "mean": np.full(n, base.mean), "sigma": np.full(n, base.sigma)}

    def update(self, t: np.ndarray, x: np.ndarray, ok: np.ndarray) -> DriftOutput:
        """Feed one block of frames: epoch times ``t`` (s, increasing), values ``x``, usable mask ``ok``."""
        t = np.asarray(t, dtype=float)
        x = np.asarray(x, dtype=float)
        n = t.shape[0]
        fin_t = np.isfinite(t)
        valid = np.asarray(ok, dtype=bool) & np.isfinite(x) & fin_t
        if n and fin_t.any():
            # time that runs back (or is not a number) makes a frame unusable; batching follows the running maximum
            tt = np.maximum.accumulate(np.where(fin_t, t, -np.inf))
            tt = np.where(np.isfinite(tt), tt, t[fin_t][0])
            valid &= t >= tt
            batches = self._batches(tt, x, valid)
        else:
            batches = (np.zeros(0, dtype=np.int64), np.zeros(0), np.zeros(0, dtype=np.int64), np.zeros(0, np.int64))
        bs, sums, cnts, close = batches
        # frames a batch should have: period / grid step, rounded (epoch times carry rounding of ~1e-7 s)
        expected = max(1, round(self.period / self._dt)) if self._dt else 1
        keep = cnts >= max(1.0, 0.5 * expected)
        bs, means, close = bs[keep], sums[keep] / np.maximum(cnts[keep], 1), close[keep]
        if bs.size and self.baseline is None:
            used = self._learn(bs, means)
            bs, means, close = bs[used:], means[used:], close[used:]
        out = {f: np.full(n, self._held[f]) for f in _FIELDS}
        if bs.size and self.baseline is not None:
            ev = self._detect(bs, means)
            idx = np.searchsorted(close, np.arange(n), side="right") - 1
            has = idx >= 0
            for f in _FIELDS:
                out[f] = np.where(has, ev[f][np.maximum(idx, 0)], out[f])
                self._held[f] = float(ev[f][-1])
        state = np.where(~valid, GATED, np.where(np.isnan(out["value"]), LEARNING, OK)).astype(np.int8)
        value = np.where(state == OK, out["value"], math.nan)
        return DriftOutput(value, state, out["change_time"], out["shift"], out["mean"], out["sigma"])
