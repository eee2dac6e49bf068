"""Once-per-revolution tension oscillation: out-of-round rolls and eccentric rollers.

A roll that is not round, or a roller mounted off-centre, pulls the web a little
more and a little less once per turn, so span tension oscillates at the rotation
frequency ``f1 = V / (pi D)`` (C. Branca, P. R. Pagilla and K. N. Reid, "Governing
equations for web tension and web velocity in the presence of nonideal rollers", ASME
J. Dyn. Sys. Meas. Control 135(1), 2013; title and volume from memory). On an unwind
f1 rises as the roll gets smaller, so a fixed-frequency filter misses it; this module
measures the amplitude on the roll's own angle.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike
from spanwatch.rules.base import AlarmDefaults, Block, CheckResult, LineState, Reason, combine_reasons, finalise
from spanwatch.rules.linemodel import LineModel


def rotation_frequency(speed: ArrayLike, diameter: ArrayLike) -> np.ndarray:
    """Revolutions per second of a roll or roller: ``f1 = V / (pi D)``; NaN where D <= 0.

    Source: kinematics of rolling without slip (one circumference of web per turn).
    """
    v, d = np.asarray(speed, dtype=float), np.asarray(diameter, dtype=float)
    with np.errstate(all="ignore"):
        f = np.abs(v) / (np.pi * d)
    return np.where(d > 0, f, np.nan)


def goertzel(x: ArrayLike, freq: float, fs: float) -> np.ndarray:
    """Single-bin DFT of the last axis of ``x`` at ``freq`` Hz (Goertzel recurrence).

    ``s[n] = x[n] + 2 cos(w) s[n-1] - s[n-2]``, ``X = e^{jw} s[N-1] - s[N-2]``,
    w = 2 pi freq / fs; X equals ``sum_n x[n] e^{-j w n}`` up to a phase factor, so
    |X| matches the FFT bin when freq is a bin frequency (whole cycles in the window).

    Source: G. Goertzel, "An algorithm for the evaluation of finite trigonometric
    series", Amer. Math. Monthly 65(1):34-35, 1958.

    NaN (no exception) where w is not finite (fs = 0, freq infinite, or either NaN).
    """
    x = np.asarray(x, dtype=float)
    with np.errstate(all="ignore"):
        w = 2.0 * np.pi * np.float64(freq) / np.float64(fs)
        coeff = 2.0 * np.cos(w)
        s1 = np.zeros(x.shape[:-1])
        s2 = np.zeros(x.shape[:-1])
        for k in range(x.shape[-1]):
            s0 = x[..., k] + coeff * s1 - s2
            s2, s1 = s1, s0
        return np.exp(1j * w) * s1 - s2


def sinusoid_amplitude(x: ArrayLike, freq: float, fs: float) -> np.ndarray:
    """Amplitude of the component of ``x`` at ``freq``: ``2 |X| / N`` (mean removed first).

    Exact for a sinusoid with whole cycles in the window: the DFT of A cos(w n + phi) has
    magnitude A N / 2 at its bin (e.g. Oppenheim & Schafer, *Discrete-Time Signal
    Processing*, on the DFT of sinusoids).

    >>> n = np.arange(200); round(float(sinusoid_amplitude(3 + 0.5 * np.sin(2 * np.pi * 5 * n / 100), 5, 100)), 6)
    0.5
    """
    x = np.asarray(x, dtype=float)
    with np.errstate(all="ignore"):
        x = x - x.mean(axis=-1, keepdims=True)
        return 2.0 * np.abs(goertzel(x, freq, fs)) / x.shape[-1]


def order_amplitude(x: ArrayLike, phase: ArrayLike) -> float:
    """Amplitude of the once-per-revolution component of ``x`` sampled at roll angles ``phase`` (rad).

    Computed order tracking without resampling: ``A = 2 |sum (x - mean) e^{-j phase}| / N``
    over a window of whole revolutions. Exact for a uniform angle grid; for slowly varying
    speed the angle grid is nearly uniform and the error is second order.

    Source: computed order tracking (K. R. Fyfe and E. D. S. Munck, "Analysis of computed
    order tracking", Mech. Syst. Signal Process. 11(2):187-205, 1997; from memory), here
    evaluated on the sampled angles instead of resampling onto a uniform angle grid.
    """
    x = np.asarray(x, dtype=float)
    p = np.asarray(phase, dtype=float)
    with np.errstate(all="ignore"):
        xm = x - x.mean()
        return float(2.0 * np.abs(np.sum(xm * np.exp(-1j * p))) / x.size)


DEFAULTS = AlarmDefaults(
    direction="high",
    unit="% of mean tension",
    warning=0.05,
    alarm=0.10,
    deadband=0.01,
    on_delay=5.0,
    off_delay=10.0,
    priority="medium",
    warning_priority="low",
    cause="Span tension oscillates once per revolution of this roll or roller: out-of-round roll "
    "(flat spot, damaged core, poor storage), eccentric core chucking, or a bent or eccentric roller.",
    consequence="Tension spikes each turn: web breaks at speed, baggy lanes, register errors, a bad "
    "roll structure downstream.",
    action="Reduce speed through the resonance; check the chucking and the roll for flats; "
    "check roller runout at the next stop.",
)


class RunoutCheck:
    """Once-per-revolution tension amplitude relative to mean tension, over whole revolutions.

    Keeps the roll angle (integral of the rotation frequency) and a tail of frames as long
    as the window; per frame the amplitude over the last ``revolutions`` whole turns is
    computed from cumulative sums, so a block costs O(frames).
    """

    kind: ClassVar[str] = "runout"
    rests_on: ClassVar[str] = ("tension sampled at least 4 times per revolution; speed varies slowly over "
                               "the window; the rotation frequency comes from rpm (or V / pi D)")
    defaults: ClassVar[AlarmDefaults] = DEFAULTS

    def __init__(self, object_id: str, *, zone: str, rotation: str | None, diameter: str | None,
                 frame_rate: float, revolutions: int = 4, min_tension: float = 1.0,
                 max_frames: int = 4096) -> None:
        self.object_id = object_id
        self.tension = f"tension/{zone}"
        self.rotation = rotation
        self.diameter = diameter
        self.inputs = (self.tension, rotation) if rotation else (self.tension, diameter or "", "speed/web")
        self.fs = frame_rate
        self.revs = revolutions
        self.min_tension = min_tension
        self.max_frames = max_frames
        self.reset()

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[RunoutCheck]:
        """One per winder flagged for it with its rotation (rpm, or speed and diameter) and the zone it feeds."""
        s = line.settings
        for w in line.winders_in_path:
            if not w.runout_check or not (w.has_rpm or line.has_signal(f"diameter/{w.id}")):
                continue
            zone = line.zone_before(w.id) if w.rewind else line.zone_after(w.id)
            if zone is not None and zone.tension_tag is not None:
                yield cls(w.id, zone=zone.id, rotation=f"rotation/{w.id}" if w.has_rpm else None,
                          diameter=f"diameter/{w.id}", frame_rate=s.frame_rate, min_tension=s.min_drive_tension)

    def reset(self) -> None:
        """Forget the roll angle and the window of past frames."""
        self._phase0 = 0.0
        self._tail_x = np.zeros(0)
        self._tail_p = np.zeros(0)
        self._tail_ok = np.zeros(0, dtype=bool)

    def _rev_per_s(self, block: Block) -> tuple[np.ndarray, np.ndarray]:
        if self.rotation is not None:
            s = block.signal(self.rotation)
            return np.abs(s.value), s.ok
        d, v = block.signal(self.diameter or ""), block.signal("speed/web")
        return rotation_frequency(v.value, d.value), d.ok & v.ok

    def update(self, block: Block) -> CheckResult:
        n = block.n
        ten = block.signal(self.tension)
        f1, okf = self._rev_per_s(block)
        dt = 1.0 / self.fs
        # The roll must turn: a window of whole revolutions must fit in the frames kept.
        f_min = self.revs * self.fs / (self.max_frames - 1)
        with np.errstate(invalid="ignore"):
            turning = okf & np.isfinite(f1) & (f1 >= f_min)
        with np.errstate(all="ignore"):
            step = np.where(turning, 2.0 * np.pi * f1 * dt, 0.0)
        phase = self._phase0 + np.cumsum(step)
        self._phase0 = float(phase[-1]) if n else self._phase0
        ok = ten.ok & turning & np.isfinite(ten.value)
        xs = np.concatenate([self._tail_x, np.where(ok, ten.value, 0.0)])
        ps = np.concatenate([self._tail_p, phase])
        oks = np.concatenate([self._tail_ok, ok])
        m = self._tail_x.shape[0]
        # Window start per frame: the first frame whose phase is within revs * 2 pi of this one.
        end = np.arange(m + 1, m + n + 1)  # exclusive end index into the cumulative sums
        start = np.searchsorted(ps, ps[m:] - self.revs * 2.0 * np.pi, side="right")
        count = end - start
        e = np.exp(-1j * (ps - ps[0]))
        cx = np.concatenate([[0.0], np.cumsum(xs)])
        ce = np.concatenate([[0.0], np.cumsum(e)])
        cxe = np.concatenate([[0.0], np.cumsum(xs * e)])
        cbad = np.concatenate([[0], np.cumsum(~oks)])
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = (cx[end] - cx[start]) / count
            spec = (cxe[end] - cxe[start]) - mean * (ce[end] - ce[start])
            amp = 2.0 * np.abs(spec) / count
            rel = amp / mean
        full = (start > 0) | (ps[0] <= ps[m:] - self.revs * 2.0 * np.pi)
        window_ok = (cbad[end] - cbad[start]) == 0
        with np.errstate(invalid="ignore"):
            undersampled = f1 > self.fs / 4.0
        keep = min(self.max_frames, xs.shape[0])
        self._tail_x, self._tail_p, self._tail_ok = xs[-keep:], ps[-keep:], oks[-keep:]
        # Keep the stored phase small so exp() stays accurate after days of running.
        if self._tail_p.size:
            shift = 2.0 * np.pi * np.floor(self._tail_p[0] / (2.0 * np.pi))
            self._tail_p = self._tail_p - shift
            self._phase0 -= shift
        reason = combine_reasons(
            (~block.in_states((LineState.RUNNING, LineState.ACCELERATING, LineState.DECELERATING)),
             Reason.LINE_STATE),
            (~(ten.ok & okf & np.isfinite(ten.value) & ~np.isnan(f1)), Reason.INPUT_BAD),
            (~turning | undersampled | ~(mean >= self.min_tension), Reason.OUT_OF_DOMAIN),
            (~(full & window_ok) | (count > self.max_frames - 1), Reason.WARMING_UP),
            n=n,
        )
        return finalise(rel, reason, amplitude=amp, frequency=f1)


class RollerRunoutCheck(RunoutCheck):
    """Runout of a driven roller: its rotation from its surface speed and fixed diameter."""

    def __init__(self, object_id: str, *, zone: str, diameter: float, frame_rate: float, min_tension: float) -> None:
        super().__init__(object_id, zone=zone, rotation=None, diameter=None, frame_rate=frame_rate,
                         min_tension=min_tension)
        self.roller_diameter = diameter
        self.inputs = (f"tension/{zone}", f"speed/{object_id}")

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[RollerRunoutCheck]:  # type: ignore[override]
        """One per driven roller flagged for it, on the zone downstream of it."""
        s = line.settings
        for r in line.driven_rollers:
            zone = line.zone_after(r.id)
            if r.runout_check and zone is not None and zone.tension_tag is not None:
                yield cls(r.id, zone=zone.id, diameter=r.diameter, frame_rate=s.frame_rate,
                          min_tension=s.min_drive_tension)

    def _rev_per_s(self, block: Block) -> tuple[np.ndarray, np.ndarray]:
        sig = block.signal(f"speed/{self.object_id}")
        return np.abs(sig.value) / (np.pi * self.roller_diameter), sig.ok
