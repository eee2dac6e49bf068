"""Span tension from draw: the first-order span equation and the draw-versus-tension check.

Tensions here are per unit width (N/m) and the web stiffness is ``Et = E * caliper``
(N/m), the per-width form of E*A.

Sources: Whitworth & Harrison (1983); Shin, *Tension Control* (TAPPI Press, 2000);
Pagilla, Siraskar & Dwivedula, IEEE Trans. Control Syst. Technol. 15(1), 2007.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike
from spanwatch.rules.base import (
    AlarmDefaults,
    Block,
    CheckBatch,
    CheckResult,
    LineState,
    OneByOne,
    Reason,
)
from spanwatch.rules.linemodel import LineModel
from spanwatch.rules.stacked import (
    Stacked,
    StackedBatch,
    column,
    combine_rows,
    finalise_rows,
    rolling_mean_rows,
    signal_rows,
)


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
              ratio_tol: float, t1_acc: ArrayLike, t2_acc: ArrayLike, ratio_random: ArrayLike = 0.0) -> np.ndarray:
    """Tolerance band of the steady-state prediction, N/m (root sum of squares of the bounds).

    Terms: modulus uncertainty ``modulus_tol * Et (V2 - V1) / V2``; the speed ratio's
    systematic uncertainty ``Et * ratio_tol`` (encoder or drive calibration: averaging does
    not shrink it) and its random part ``Et * ratio_random`` (the noise left in an averaged
    ratio, see :func:`mean_ratio_uncertainty`; 0 for a commanded ratio); the two load-cell
    accuracies (T1 scaled by V1 / V2).

    Source: the law of propagation of uncertainty for uncorrelated inputs (JCGM 100:2008,
    the GUM, eq. 10) applied to :func:`steady_span_tension`, with the ratio term's
    sensitivity (Et - T1) V1^2 / V2^2 taken as Et (T1 << Et, small draw). Which error
    sources are counted is common practice, no source.
    """
    v1, v2, et = np.asarray(v1, dtype=float), np.asarray(v2, dtype=float), np.asarray(et, dtype=float)
    with np.errstate(all="ignore"):
        e_mod = modulus_tol * et * (v2 - v1) / v2
        e_t1 = np.asarray(t1_acc, dtype=float) * v1 / v2
        e_ratio = et * np.hypot(ratio_tol, np.asarray(ratio_random, dtype=float))
        return np.sqrt(e_mod**2 + e_ratio**2 + e_t1**2 + np.asarray(t2_acc, dtype=float) ** 2)


def mean_ratio_uncertainty(variance: ArrayLike, lag1: ArrayLike, n: ArrayLike, coverage: float = 2.0) -> np.ndarray:
    """Random uncertainty of the mean of ``n`` autocorrelated samples: ``k s / sqrt(n_eff)``.

    ``variance`` s^2 of the samples, ``lag1`` their lag-one autocorrelation r1; the effective
    number of independent samples of a first-order autoregressive series is
    ``n_eff = n (1 - r1) / (1 + r1)`` (at most n, at least 1). ``coverage`` k = 2 (about 95 %)
    puts the random part on the footing of the tolerance bounds it is combined with.

    Sources: the experimental standard deviation of the mean, s / sqrt(n) (JCGM 100:2008, the
    GUM, 4.2.3), which the GUM warns does not hold for correlated observations (4.2.7); the
    effective sample size of an AR(1) series, Bayley & Hammersley, "The effective number of
    independent observations in an autocorrelated time series", J. R. Stat. Soc. Suppl. 8(2),
    1946 (from memory; the same form is in Wilks, *Statistical Methods in the Atmospheric
    Sciences*). Treating the ratio as AR(1) is common practice, no source.

    >>> round(float(mean_ratio_uncertainty(4.0, 0.0, 100)), 3)
    0.4
    >>> round(float(mean_ratio_uncertainty(4.0, 0.5, 100)), 3)
    0.693
    """
    var, r1, n = (np.asarray(x, dtype=float) for x in (variance, lag1, n))
    with np.errstate(all="ignore"):
        r1 = np.clip(r1, -0.999, 0.999)
        n_eff = np.clip(n * (1.0 - r1) / (1.0 + r1), 1.0, np.maximum(n, 1.0))
        out = coverage * np.sqrt(var / n_eff)
    return np.where((var >= 0) & (n >= 1) & np.isfinite(out), out, np.nan)


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
    cause="Measured span tension departs from what the draw predicts: the zone's load cell (or the one "
    "upstream) out of calibration or drifting, a roller slipping, a modulus different from the configured "
    "one (new web lot), or an encoder fault.",
    consequence="Tension control is not doing what the draw settings say; slip or a wrong tension "
    "leads to wrinkles, neck-in or a web break.",
    action="Compare with the traction and slip checks; verify the zone's load cell with a calibration weight "
    "(the extra ratio, measured over predicted tension, shows a gain drift); confirm the web lot's modulus.",
)


# the windows a draw check keeps, in the order of its stacked window rows
_WINDOWS = ("t1", "t2", "v1", "v2", "steady", "x", "xprev", "xx", "xlag")


class _DrawBatch(StackedBatch):
    """Draw checks of all zones at once: zones x frames matrices, and the nine rolling windows of every zone
    (its four averaged inputs, the steady-running window and the five sums of the speed ratio's noise) as the
    rows of one window computation; every zone's windows, commanded ratio and tolerances as columns.

    Draw checks are stacked only with the same window (a line's ``draw_window``); see :meth:`DrawCheck.batch`.
    """

    def __init__(self, checks: Sequence[DrawCheck], *, alone: bool = False) -> None:
        super().__init__(checks, alone=alone)
        self.names = [[c.names[j] for c in checks] for j in range(4)]
        self.w = checks[0].window_frames
        self.et = column(c.et for c in checks)
        self.modulus_tol, self.ratio_tol = column(c.modulus_tol for c in checks), column(c.ratio_tol for c in checks)
        self.acc = [column(getattr(c, f)[j] for c in checks) for f in ("t1_acc", "t2_acc") for j in (0, 1)]
        self.min_speed = column(c.min_speed for c in checks)
        self.has_cmd = np.array([c.commanded_ratio is not None for c in checks]).reshape(-1, 1)
        self.r_cmd = column(np.nan if c.commanded_ratio is None else c.commanded_ratio for c in checks)

    @classmethod
    def carried(cls, check: DrawCheck) -> dict[str, tuple[float | bool | int, tuple[int, ...]]]:
        """Its windows' tails (nine rows of ``window - 1`` frames), how full they are, and the last ratio frame."""
        tail = (len(_WINDOWS), max(check.window_frames - 1, 0))
        return {"tail_x": (0.0, tail), "tail_ok": (False, tail), "filled": (0, ()),
                "prev_x": (np.nan, ()), "prev_ok": (False, ())}

    def update(self, block: Block) -> list[CheckResult]:
        (t1s, ok1s), (t2s, ok2s), (v1s, okv1s), (v2s, okv2s) = (signal_rows(block, names) for names in self.names)
        k, n = t1s.shape
        slots, rows = self.where()
        a = slots.a
        running = block.line_state == int(LineState.RUNNING)
        # the speed ratio's random uncertainty over the window, from its variance and lag-one autocorrelation:
        # its samples x (speed ratio - 1) and x_k-1 (the two means differ by the window's end samples)
        with np.errstate(all="ignore"):
            x = v2s / v1s - 1.0
        okx = okv1s & okv2s & np.isfinite(x)
        x = np.where(okx, x, 0.0)
        prev = np.concatenate([a["prev_x"][rows, None], x], axis=1)[:, :n]
        ok_prev = np.concatenate([a["prev_ok"][rows, None], okx], axis=1)[:, :n]
        if n:
            a["prev_x"][rows], a["prev_ok"][rows] = x[:, -1], okx[:, -1]
        prev = np.where(ok_prev, prev, 0.0)
        run = np.broadcast_to(running, (k, n))
        xs = np.stack([t1s, t2s, v1s, v2s, run.astype(float), x, prev, x * x, x * prev], axis=1)
        oks = np.stack([ok1s, ok2s, okv1s, okv2s, run, okx, ok_prev, okx, okx & ok_prev], axis=1)
        tail_x, tail_ok = a["tail_x"][rows], a["tail_ok"][rows]
        width = tail_x.shape[-1]
        mean, all_ok = rolling_mean_rows(xs.reshape(-1, n), oks.reshape(-1, n), tail_x.reshape(-1, width),
                                         tail_ok.reshape(-1, width), a["filled"][rows], self.w)
        mean, all_ok = mean.reshape(k, len(_WINDOWS), n), all_ok.reshape(k, len(_WINDOWS), n)
        (t1, t2, v1, v2, _, m, m_prev, mm, ml) = (mean[:, j] for j in range(len(_WINDOWS)))
        ok1, ok2, okv1, okv2, steady = (all_ok[:, j] for j in range(5))
        w = self.w
        with np.errstate(all="ignore"):
            var = np.maximum(mm - m * m, 0.0) * w / max(w - 1, 1)
            cov = ml - m * m_prev
            r1 = np.where(var > 0, cov / var, 0.0)
        noise = mean_ratio_uncertainty(var, r1, w)
        with np.errstate(invalid="ignore", divide="ignore"):
            measured = v2 / v1
        with np.errstate(invalid="ignore"):
            agree = self.has_cmd & (np.abs(measured - self.r_cmd)
                                    <= self.ratio_tol * self.r_cmd + np.nan_to_num(noise, nan=0.0))
        ratio = np.where(agree, self.r_cmd, measured)
        random = np.where(agree, 0.0, noise)
        pred = steady_span_tension(t1, 1.0, ratio, self.et)
        acc1 = self.acc[0] + self.acc[1] * np.abs(t1)
        acc2 = self.acc[2] + self.acc[3] * np.abs(t2)
        band = draw_band(t1, 1.0, ratio, self.et, modulus_tol=self.modulus_tol, ratio_tol=self.ratio_tol,
                         t1_acc=acc1, t2_acc=acc2, ratio_random=random)
        resid = t2 - pred
        with np.errstate(invalid="ignore", divide="ignore"):
            et_eff = (t2 * ratio - t1) / (ratio - 1.0)
            gain = t2 / pred
        et_eff = np.where(np.abs(ratio - 1.0) > 1e-4 * np.abs(ratio), et_eff, np.nan)
        with np.errstate(invalid="ignore"):
            slack = ~(pred > 0)
            # the window's means and the rollers now: a long window must not judge a line that has just stopped
            slow = (np.fmin(v1, v2) <= self.min_speed) | ~(np.fmin(v1s, v2s) > self.min_speed)
        reason = combine_rows(
            (~steady, Reason.LINE_STATE),
            (~(ok1 & ok2 & okv1 & okv2), Reason.INPUT_BAD),
            (slow | slack, Reason.OUT_OF_DOMAIN),
            shape=(k, n),
        )
        with np.errstate(invalid="ignore", divide="ignore"):
            value = resid / band
        valid = reason == int(Reason.OK)
        return finalise_rows(value, reason, residual=resid, band=band, predicted=pred,
                             ratio=np.where(valid, gain, np.nan), speed_ratio=ratio, ratio_random=random,
                             commanded=agree.astype(float), stiffness_eff=et_eff)


class DrawCheck(Stacked):
    """Draw-versus-tension residual of a tension zone bounded by two driven rollers.

    Inputs are averaged over ``window`` seconds (the line's ``draw_window``); valid only after
    the line has run steadily (RUNNING, which includes the settle time after a speed change)
    for a whole window.

    The speed ratio V2/V1: where the line file commands a draw on either roller (its ``draw``
    key), the drives are commanded to hold V2/V1 = (1 + draw2) / (1 + draw1); while the
    averaged encoder ratio agrees with that within the encoder tolerance (plus the random
    uncertainty of its mean) the commanded ratio replaces it (no encoder noise; extra
    ``commanded`` = 1). Otherwise, and on lines without a commanded draw, the averaged encoder
    ratio is used and its random uncertainty (:func:`mean_ratio_uncertainty`, from the
    variance and lag-one autocorrelation of the ratio over the window) widens the band. The
    systematic encoder tolerance stays in the band either way (averaging does not shrink it).

    A predicted tension at or below zero (V2 so far below V1 that the span would go slack) is
    outside the span equation: OUT_OF_DOMAIN. Extras: ``residual`` (N/m, measured - predicted),
    ``band`` (N/m), ``predicted`` (N/m), ``ratio`` (measured / predicted tension: a load cell's
    gain drift reads as a ratio away from 1), ``speed_ratio`` (the V2/V1 used),
    ``ratio_random`` (its random uncertainty), ``commanded`` (1: the commanded ratio was used),
    ``stiffness_eff`` (N/m, the Et that would explain the measurement).
    """

    kind: ClassVar[str] = "draw"
    rests_on: ClassVar[str] = ("steady state, no slip at either bounding roller, linear elastic web with "
                               "the configured modulus and nominal caliper, idlers without drag, load cells "
                               "of this zone and the zone upstream reading true")
    defaults: ClassVar[AlarmDefaults] = DEFAULTS
    _batch = _DrawBatch

    def __init__(self, object_id: str, *, zone_up: str, roller_up: str, roller_down: str, et: float,
                 modulus_tol: float, ratio_tol: float, t1_acc: tuple[float, float],
                 t2_acc: tuple[float, float], window_frames: int, min_speed: float,
                 commanded_ratio: float | None = None, blames: tuple[str, ...] = ()) -> None:
        self.object_id = object_id
        self.names = (f"tension/{zone_up}", f"tension/{object_id}", f"speed/{roller_up}", f"speed/{roller_down}")
        self.inputs = self.names
        self.drives = (roller_up, roller_down)  # the drives that set its draw (a fault of either suppresses it)
        self.blames = blames or (object_id, roller_up, roller_down)
        self.et, self.modulus_tol, self.ratio_tol = et, modulus_tol, ratio_tol
        self.t1_acc, self.t2_acc = t1_acc, t2_acc
        self.min_speed = min_speed
        self.window_frames = window_frames
        self.commanded_ratio = commanded_ratio
        self._init_slots()

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
            r1, r2 = line.rollers[z.upstream], line.rollers[z.downstream]
            commanded = (1.0 + r2.draw) / (1.0 + r1.draw) if (r1.draw_configured or r2.draw_configured) else None
            yield cls(z.id, zone_up=zb.id, roller_up=z.upstream, roller_down=z.downstream,
                      et=mat.modulus * mat.caliper, modulus_tol=mat.modulus_tolerance,
                      ratio_tol=s.encoder_ratio_tolerance, t1_acc=zb.tension_accuracy, t2_acc=z.tension_accuracy,
                      window_frames=s.frames(s.draw_window), min_speed=s.thread_speed, commanded_ratio=commanded,
                      blames=(*line.zone_blames(z), z.upstream, z.downstream))

    @classmethod
    def batch(cls, checks: Sequence[DrawCheck]) -> CheckBatch:
        """All zones' draw checks at once when they share one window (a line's ``draw_window``), else one by one."""
        if len({c.window_frames for c in checks}) > 1:
            return OneByOne(checks)
        return _DrawBatch(checks)
