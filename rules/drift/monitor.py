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

The state of a monitor lives in a row of a :class:`MonitorBank`: the monitors of one bank (streams batched on
the same grid of ``period`` seconds, each with its own detector, baseline and design) are updated by one call
over a streams x frames matrix, so the cost per block hardly grows with the number of streams. A monitor made on
its own has a bank of one; :class:`MonitorBank` ``(monitors)`` moves monitors, state and all, into one bank.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from spanwatch.rules.drift.baseline import Baseline, learn_baseline
from spanwatch.rules.drift.charts import Ewma, TabularCusum
from spanwatch.rules.drift.design import design_cusum, design_ewma
from spanwatch.rules.drift.rivers import RIVER_DETECTORS, RiverDetector

__all__ = ["DETECTORS", "GATED", "LEARNING", "MIN_LEARN_BATCHES", "OK", "DriftMonitor", "DriftOutput",
           "MonitorBank"]

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
        self.design: dict[str, float] = self._design()
        self._bank: MonitorBank | None = None
        self._row = 0
        MonitorBank([self])  # a bank of its own, until it is moved into a bank with others

    def _design(self) -> dict[str, float]:
        """The chart's parameters: given in ``params``, else designed from ``shift`` and ``arl0``; {} for river's."""
        p = self.params
        if self.detector == "cusum":
            k, h = (float(p["k"]), float(p["h"])) if "k" in p and "h" in p else design_cusum(self.shift, self.arl0)
            return {"k": k, "h": h}
        if self.detector == "ewma":
            lam, L = (float(p["lam"]), float(p["L"])) if "lam" in p and "L" in p else design_ewma(self.shift, self.arl0)
            return {"lam": lam, "L": L}
        return {}

    @property
    def bank(self) -> MonitorBank:
        """The bank that holds this monitor's state (its row: :attr:`row`)."""
        assert self._bank is not None
        return self._bank

    @property
    def row(self) -> int:
        return self._row

    @property
    def baseline(self) -> Baseline | None:
        """The baseline in use (None while learning)."""
        return self.bank.baselines[self._row]

    @property
    def learning(self) -> bool:
        """True while there is no baseline."""
        return self.baseline is None

    def relearn(self) -> None:
        """Forget the baseline, the detector and the open batch: learn again from the next usable frames."""
        self.bank.relearn([self._row])

    def renew(self) -> None:
        """Start again as a new monitor with the same settings (the grid step seen is forgotten too)."""
        self.bank.renew([self._row])

    def use_baseline(self, baseline: Baseline) -> None:
        """Take ``baseline`` (learnt before, at the same operating point) instead of learning; the detector starts
        again from zero."""
        self.bank.use_baseline(self._row, baseline)

    def reset(self) -> None:
        """After a gap in the data: forget the open batch and the AR(1) predecessor; keep the baseline and detector."""
        self.bank.reset([self._row])

    def update(self, t: np.ndarray, x: np.ndarray, ok: np.ndarray) -> DriftOutput:
        """Feed one block of frames: epoch times ``t`` (s, increasing), values ``x``, usable mask ``ok``."""
        t = np.asarray(t, dtype=float)
        x = np.broadcast_to(np.asarray(x, dtype=float), t.shape)[None]
        ok = np.broadcast_to(np.asarray(ok, dtype=bool), t.shape)[None]
        return DriftOutput(*(a[0] for a in self.bank.update(t, x, ok, rows=[self._row])))


def _take(a: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """``a`` (rows, cols) at per-row column ``idx`` (rows, k)."""
    return np.take_along_axis(a, idx, axis=1)


class MonitorBank:
    """The state of many :class:`DriftMonitor` (one row each, all on one grid of ``period`` s), stacked so that
    one :meth:`update` computes any set of them together: the batch sums of every stream by one reduction, the
    standardisation and the CUSUM / EWMA charts with a leading axis of streams. Only what happens to a single
    stream loops over streams: learning a baseline, river's detectors (per sample by nature), a restart.

    Building a bank moves the monitors into it: each keeps its state (copied from the bank it was in) and reads and
    writes it here from then on. Every row's result is the one its monitor alone would give."""

    _ROW_STATE = ("dt", "last_t", "has_open", "open_b", "open_sum", "open_cnt", "has_prev", "prev_b", "prev_mean",
                  "learn_n", "has_base", "b_mean", "b_sigma", "b_rho", "b_scale", "b_div", "n_det")

    def __init__(self, monitors: Sequence[DriftMonitor]) -> None:
        periods = {m.period for m in monitors}
        if len(periods) != 1:
            raise ValueError(f"MonitorBank: the monitors of a bank share one period, got {sorted(periods)}")
        self.period = periods.pop()
        self.monitors = tuple(monitors)
        d = self.size = len(monitors)
        self._all, self._idx = list(range(d)), np.arange(d)  # every row
        kinds = [m.detector for m in monitors]
        self.learn_batches = np.array([m.learn_batches for m in monitors], dtype=np.int64)
        self.sigma_floor = np.array([m.sigma_floor for m in monitors])
        self.is_cusum = np.array([k == "cusum" for k in kinds])
        self.is_ewma = np.array([k == "ewma" for k in kinds])
        self.is_river = ~(self.is_cusum | self.is_ewma)
        self._cusum = TabularCusum(np.array([m.design.get("k", 0.0) for m in monitors]),
                                   np.array([m.design.get("h", 1.0) for m in monitors]),
                                   shape=(d,)) if self.is_cusum.any() else None
        self._ewma = Ewma(np.array([m.design.get("lam", 1.0) for m in monitors]),
                          np.array([m.design.get("L", 1.0) for m in monitors]),
                          shape=(d,)) if self.is_ewma.any() else None
        self._river: list[RiverDetector | None] = [None] * d
        nan = np.full(d, math.nan)
        self.dt, self.last_t = nan.copy(), nan.copy()  # grid step seen, last frame time (NaN: none yet)
        self.has_open = np.zeros(d, dtype=bool)  # the open batch: number, sum, usable frames
        self.open_b, self.open_sum, self.open_cnt = np.zeros(d, np.int64), np.zeros(d), np.zeros(d, np.int64)
        self.has_prev = np.zeros(d, dtype=bool)  # the last accepted batch: number, mean
        self.prev_b, self.prev_mean = np.zeros(d, np.int64), nan.copy()
        self.learn_n = np.zeros(d, dtype=np.int64)
        self.learn_buf: list[list[float]] = [[] for _ in range(d)]
        self.baselines: list[Baseline | None] = [None] * d
        # the baseline as the standardisation reads it: mean, sigma, rho used, scale, max(sigma, floor)
        self.has_base = np.zeros(d, dtype=bool)
        self.b_mean, self.b_sigma, self.b_rho, self.b_scale, self.b_div = (nan.copy() for _ in range(5))
        self.held = np.full((len(_FIELDS), d), math.nan)  # per field, the last closed batch's output
        # end times of the detector's batches, batch q at (q + 1) % (HISTORY + 1) (q = -1: the batch before the first)
        self.ends = np.full((d, HISTORY + 1), math.nan)
        self.n_det = np.zeros(d, dtype=np.int64)  # detector batches since the detector started
        for i, m in enumerate(monitors):
            old = m._bank
            if old is None:
                if self.is_river[i]:
                    self._river[i] = RiverDetector(m.detector, **m.params)
            else:
                self._adopt(i, old, m._row)
            m._bank, m._row = self, i

    def _adopt(self, i: int, old: MonitorBank, j: int) -> None:
        """Row ``i`` takes the state of ``old``'s row ``j``."""
        for name in self._ROW_STATE:
            getattr(self, name)[i] = getattr(old, name)[j]
        self.learn_buf[i] = list(old.learn_buf[j])
        self.baselines[i] = old.baselines[j]
        self.held[:, i] = old.held[:, j]
        self.ends[i] = old.ends[j]
        self._river[i] = old._river[j]
        if self.is_cusum[i] and self._cusum is not None and old._cusum is not None:
            self._cusum.put([i], old._cusum, [j])
        if self.is_ewma[i] and self._ewma is not None and old._ewma is not None:
            self._ewma.put([i], old._ewma, [j])

    # -- what happens to single streams ---------------------------------------------------------------------------

    def _set_baseline(self, i: int, b: Baseline | None) -> None:
        self.baselines[i] = b
        self.has_base[i] = b is not None
        if b is not None:
            self.b_mean[i], self.b_sigma[i], self.b_rho[i] = b.mean, b.sigma, b.rho_used
            self.b_scale[i], self.b_div[i] = b.scale, max(b.sigma, b.sigma_floor)

    def _forget_detector(self, rows: list[int]) -> None:
        if self._cusum is not None:
            self._cusum.restart(rows)
        if self._ewma is not None:
            self._ewma.restart(rows)
        for i in rows:
            river = self._river[i]
            if river is not None:
                river.reset()
        self.held[:, rows] = math.nan
        self.ends[rows, 0] = math.nan  # the other end times are written again before they are read
        self.n_det[rows] = 0

    def reset(self, rows: list[int]) -> None:
        """After a gap in the data: forget the open batch and the AR(1) predecessor of ``rows``."""
        self.has_open[rows] = False
        self.has_prev[rows] = False

    def relearn(self, rows: list[int]) -> None:
        """Forget the baseline, the detector and the open batch of ``rows``."""
        for i in rows:
            self._set_baseline(i, None)
            self.learn_buf[i] = []
        self.learn_n[rows] = 0
        self.has_prev[rows] = False
        self.has_open[rows] = False
        self._forget_detector(rows)

    def renew(self, rows: list[int]) -> None:
        """``rows`` start again as new monitors: as :meth:`relearn`, and the grid step seen is forgotten."""
        self.relearn(rows)
        self.dt[rows] = math.nan
        self.last_t[rows] = math.nan

    def use_baseline(self, i: int, baseline: Baseline) -> None:
        """Row ``i`` takes ``baseline`` instead of learning; its detector starts again from zero."""
        self._set_baseline(i, baseline)
        self.learn_buf[i] = []
        self.learn_n[i] = 0
        self.has_prev[i] = False
        self._forget_detector([i])

    def _learn(self, i: int, bs: np.ndarray, means: np.ndarray) -> int:
        """Feed accepted batches (numbers ``bs``, ``means``) to row ``i``'s baseline; how many of them it took.

        A NaN goes into the learning buffer before a batch that does not follow the one before it (a gap: no lag-1
        pair across it)."""
        take = min(int(self.learn_batches[i] - self.learn_n[i]), bs.shape[0])
        b, m = bs[:take], means[:take]
        before = np.concatenate([[self.prev_b[i] if self.has_prev[i] else b[0] - 1], b[:-1]])
        gaps = np.flatnonzero(b != before + 1)
        buf = self.learn_buf[i]
        buf.extend((np.insert(m, gaps, math.nan) if gaps.size else m).tolist())
        self.learn_n[i] += take
        last = int(b[-1])
        self.has_prev[i], self.prev_b[i], self.prev_mean[i] = True, last, float(m[-1])
        if self.learn_n[i] >= self.learn_batches[i]:
            self._set_baseline(i, learn_baseline(np.array(buf), sigma_floor=float(self.sigma_floor[i])))
            self.learn_buf[i] = []
            self.ends[i, 0] = (last + 1) * self.period  # the batch before the detector's first
        return take

    # -- the streams together ---------------------------------------------------------------------------------------

    def _closed(self, sel: np.ndarray | slice, tt: np.ndarray, b: np.ndarray, usable: np.ndarray,
                valid: np.ndarray) -> tuple[np.ndarray, ...]:
        """The batches the frames close, per stream ``(rows, S)``: batch number, sum, usable frames, whether it is
        one, and the frame at which each column closes ``(S,)``. Column 0 is the batch carried in from the block
        before when the block does not continue it; the open batch is carried to the next block.

        ``tt``: the frame times (their running maximum), ``b`` their batch numbers, the same for every stream (the
        streams' open batches are not ahead of them); ``usable``: the values, 0.0 where not ``valid``."""
        n = tt.shape[0]
        steps = np.diff(tt)
        steps = steps[steps > 0]
        inner = float(steps.min()) if steps.size else math.nan
        with np.errstate(invalid="ignore"):
            first = tt[0] - self.last_t[sel]
            step = np.where(first > 0, np.fmin(first, inner), inner)
        self.dt[sel] = np.fmin(self.dt[sel], step)
        self.last_t[sel] = tt[-1]
        starts = np.concatenate([[0], np.flatnonzero(b[1:] != b[:-1]) + 1])
        sums = np.add.reduceat(usable, starts, axis=1)
        cnts = np.add.reduceat(valid, starts, axis=1, dtype=np.int32).astype(np.int64)
        seg = b[starts]
        close = np.concatenate([[0], starts[1:]])
        has_open, open_b = self.has_open[sel], self.open_b[sel]
        open_sum, open_cnt = self.open_sum[sel], self.open_cnt[sel]
        merge = has_open & (open_b == seg[0])
        sums[:, 0] = np.where(merge, sums[:, 0] + open_sum, sums[:, 0])
        cnts[:, 0] += np.where(merge, open_cnt, 0)
        rows = sums.shape[0]
        bnum = np.concatenate([open_b[:, None], np.broadcast_to(seg[:-1], (rows, seg.size - 1))], axis=1)
        bsum = np.concatenate([open_sum[:, None], sums[:, :-1]], axis=1)
        bcnt = np.concatenate([open_cnt[:, None], cnts[:, :-1]], axis=1)
        exists = np.ones(bnum.shape, dtype=bool)
        exists[:, 0] = has_open & ~merge
        self.has_open[sel] = True
        self.open_b[sel], self.open_sum[sel], self.open_cnt[sel] = seg[-1], sums[:, -1], cnts[:, -1]
        assert close.shape[0] == bnum.shape[1] and n >= 1
        return bnum, bsum, bcnt, exists, close

    def update(self, t: np.ndarray, x: np.ndarray, ok: np.ndarray,
               rows: Sequence[int] | np.ndarray | None = None, *, zeroed: bool = False) -> tuple[np.ndarray, ...]:
        """Feed one block of frames to the monitors ``rows`` (all by default): epoch times ``t`` (n,) (s,
        increasing), values ``x`` and usable masks ``ok`` (rows, n). Returns the fields of :class:`DriftOutput`,
        each (rows, n). ``zeroed``: the caller has made ``x`` finite wherever ``ok`` is true and 0.0 elsewhere."""
        value, state, per_col, frames = self.columns(t, x, ok, rows, zeroed=zeroed)
        rest = np.repeat(per_col[1:], frames, axis=2)
        return value, state, rest[0], rest[1], rest[2], rest[3]

    def columns(self, t: np.ndarray, x: np.ndarray, ok: np.ndarray,
                rows: Sequence[int] | np.ndarray | None = None, *,
                zeroed: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """As :meth:`update`, with the fields other than the value and state not yet spread over the frames: returns
        ``value`` and ``state`` (rows, n), every field per column (field, rows, c) in the order of
        :class:`DriftOutput` without ``state``, and the frames of each column (c,) (``np.repeat`` spreads them)."""
        t = np.asarray(t, dtype=float)
        n = t.shape[0]
        if rows is None or (len(rows) == self.size and list(rows) == self._all):
            idx, sel = self._idx, slice(None)
        else:
            idx = sel = np.asarray(rows, dtype=np.intp)
        r = idx.shape[0]
        valid = ok if zeroed else ok & np.isfinite(x)
        fin_t = np.isfinite(t)
        closed = None
        if n and fin_t.any():
            # time that runs back (or is not a number) makes a frame unusable; batching follows the running maximum
            if fin_t.all():
                tt = np.maximum.accumulate(t)
            else:
                tt = np.maximum.accumulate(np.where(fin_t, t, -np.inf))
                tt = np.where(np.isfinite(tt), tt, t[fin_t][0])
            forward = t >= tt
            if not forward.all():
                valid = valid & forward
            b = np.floor(tt / self.period).astype(np.int64)
            ahead = self.has_open[sel] & (self.open_b[sel] > b[0])  # an open batch later than the frames
            if ahead.any():
                if r > 1:  # one by one, each spread over the frames (a column per frame)
                    parts = [self.update(t, x[k:k + 1], ok[k:k + 1], rows=[int(idx[k])], zeroed=zeroed)
                             for k in range(r)]
                    value, state, *rest = (np.concatenate([p[f] for p in parts]) for f in range(len(parts[0])))
                    return value, state, np.stack([value, *rest]), np.ones(n, dtype=np.int64)
                run = np.maximum(b, self.open_b[sel][0])
                valid = valid & (b == run)  # a frame earlier than the open batch counts for nothing
                b = run
            closed = self._closed(sel, tt, b, x if zeroed and valid is ok else np.where(valid, x, 0.0), valid)
        elif n:
            valid = valid & fin_t
        held = self.held[:, sel].copy()
        if closed is None:
            per_col, frames = held[:, :, None], np.array([n])
        else:
            per_col, frames = self._detect(sel, idx, closed, held, n)
        # every frame takes its column's output; a frame the stream could not use is gated
        value = np.repeat(per_col[0], frames, axis=1)
        state = np.repeat(np.where(np.isnan(per_col[0]), LEARNING, OK).astype(np.int8), frames, axis=1)
        gated = ~valid
        np.copyto(state, np.int8(GATED), where=gated)
        np.copyto(value, math.nan, where=gated)
        return value, state, per_col, frames

    def _detect(self, sel: np.ndarray | slice, idx: np.ndarray, closed: tuple[np.ndarray, ...], held: np.ndarray,
                n: int) -> tuple[np.ndarray, np.ndarray]:
        """Learn from and detect on the closed batches. Returns the fields per stream and column (field, rows, c)
        and the frames of each column (c,): the frames from one closing to the next take the output of the
        stream's last detector batch closed so far (the held one before the first)."""
        bnum, bsum, bcnt, exists, close = closed
        period = self.period
        rows = bnum.shape[0]
        whole = np.array([n])
        if bnum.shape[1] == 0:
            return held[:, :, None], whole
        # frames a batch should have: period / grid step, rounded (epoch times carry rounding of ~1e-7 s)
        dt = self.dt[sel]
        with np.errstate(invalid="ignore", divide="ignore"):
            expected = np.where(np.isnan(dt), 1.0, np.maximum(1.0, np.round(period / dt)))
        accepted = exists & (bcnt >= np.maximum(1.0, 0.5 * expected)[:, None])
        means = bsum / np.maximum(bcnt, 1)
        based = self.has_base[sel]
        if not based.all():
            for k in np.flatnonzero(~based & accepted.any(axis=1)).tolist():
                cols = np.flatnonzero(accepted[k])
                used = self._learn(int(idx[k]), bnum[k, cols], means[k, cols])
                accepted[k, cols[:used]] = False
        count = accepted.sum(axis=1)
        m = int(count.max())
        if m == 0:
            return held[:, :, None], whole
        # each stream's detector batches, in order, to the left (columns from count on: padding)
        rix = np.arange(rows)[:, None]
        if (accepted == accepted[0]).all():  # the usual: every stream has the same batches
            cols = np.flatnonzero(accepted[0])
            bs, xs = bnum[:, cols], means[:, cols]
            real = None
        else:
            order = np.argsort(~accepted, axis=1, kind="stable")[:, :m]
            bs, xs = bnum[rix, order], means[rix, order]
            real = np.arange(m) < count[:, None]
        got = count > 0
        has_prev = self.has_prev[sel]
        before = np.concatenate([np.where(has_prev, self.prev_b[sel], -2)[:, None], bs[:, :-1]], axis=1)
        prev_mean = np.concatenate([np.where(has_prev, self.prev_mean[sel], math.nan)[:, None], xs[:, :-1]], axis=1)
        prev = np.where(bs == before + 1, prev_mean, math.nan)
        if real is None:  # every stream got the same m batches
            self.has_prev[sel] = True
            self.prev_b[sel], self.prev_mean[sel] = bs[:, -1], xs[:, -1]
        else:
            lastcol = np.maximum(count - 1, 0)
            self.has_prev[sel] = has_prev | got
            self.prev_b[sel] = np.where(got, bs[rix[:, 0], lastcol], self.prev_b[sel])
            self.prev_mean[sel] = np.where(got, xs[rix[:, 0], lastcol], self.prev_mean[sel])
        # standardise (AR(1) prediction errors; the marginal where the predecessor is unknown), as standardise()
        mu, rho = self.b_mean[sel][:, None], self.b_rho[sel][:, None]
        scale = self.b_scale[sel][:, None]
        marginal = (xs - mu) / self.b_div[sel][:, None]
        with np.errstate(invalid="ignore"):
            z = np.where((rho != 0.0) & np.isfinite(prev), ((xs - mu) - rho * (prev - mu)) / scale, marginal)
        if real is not None:
            z = np.where(real, z, 0.0)
        ends = (bs + 1) * period
        # the end times of the detector's batches, for the change-time estimate
        n_det = self.n_det[sel]
        start = got & (n_det == 0)
        if start.any():
            start &= np.isnan(self.ends[idx, 0])
            self.ends[idx[start], 0] = bs[start, 0] * period  # the batch before the detector's first: its start
        j = n_det[:, None] + np.arange(m)  # detector batch numbers
        total = n_det + count
        if real is None and m <= HISTORY + 1:  # every batch of the block is among the last HISTORY + 1
            self.ends[idx[:, None], (j + 1) % (HISTORY + 1)] = ends
        else:
            write = j + 1 >= (total - HISTORY)[:, None]
            if real is not None:
                write &= real
            wr, wc = np.nonzero(write)
            self.ends[idx[wr], (j[wr, wc] + 1) % (HISTORY + 1)] = ends[wr, wc]
        self.n_det[sel] = total
        # the detectors
        value = np.full(z.shape, math.nan)
        size = np.full(z.shape, math.nan)
        runs = np.zeros(z.shape, dtype=np.int64)
        charted = np.zeros(rows, dtype=bool)
        for chart, mine in ((self._cusum, self.is_cusum), (self._ewma, self.is_ewma)):
            if chart is None:
                continue
            use = mine[sel] & got
            if not use.any():
                continue
            last = np.where(use, count, 0)
            if isinstance(sel, slice):
                zz, ll = z, last
            else:
                zz, ll = np.zeros((self.size, m)), np.zeros(self.size, dtype=np.int64)
                zz[idx], ll[idx] = z, last
            stat = chart.update(zz, ll)[sel]
            crun = chart.runs[sel]
            if isinstance(chart, TabularCusum):
                r = crun.astype(float)
                den = np.where(r > 0, 1.0 + (r - 1.0) * (1.0 - rho), 1.0)
                csize = np.where(r > 0, scale * r * chart.shifts[sel] / den, 0.0)  # Baseline.step_size
            else:
                csize = chart.values[sel] * scale / (1.0 - rho)  # Baseline.to_units: the EWMA's own estimate
            if use.all():
                value, size, runs = stat, csize, crun
            else:
                u = use[:, None]
                value, size, runs = np.where(u, stat, value), np.where(u, csize, size), np.where(u, crun, runs)
            charted |= use
        for k in np.flatnonzero(self.is_river[sel] & got).tolist():
            river = self._river[int(idx[k])]
            assert river is not None
            value[k, :count[k]] = river.update(z[k, :count[k]]).astype(float)
        # the change is placed after the last batch before the run: detector batch j - run
        q1 = j - runs + 1
        kept = self.ends[idx[:, None], q1 % (HISTORY + 1)]
        change = np.where(q1 >= np.maximum(0, total - HISTORY)[:, None], kept, ends - runs * period)
        change = np.where(charted[:, None] & (runs > 0), change, math.nan)
        table = np.empty((len(_FIELDS), rows, m + 1))
        table[:, :, 0] = held
        table[0, :, 1:], table[1, :, 1:], table[2, :, 1:] = value, change, size
        table[3, :, 1:], table[4, :, 1:] = self.b_mean[sel][:, None], self.b_sigma[sel][:, None]
        # per column: 1 + the stream's last detector batch closed by it or before it (0: none, the held output)
        last_det = np.cumsum(accepted, axis=1)
        per_col = table[:, rix, last_det]
        self.held[:, sel] = per_col[:, :, -1]
        frames = np.diff(np.concatenate([close, [n]]))
        return per_col, frames
