"""Commissioning from a recording: each roll's effective stack caliper and each driven roller's proven traction.

One pass of the pipeline over the recording (as ``spanwatch replay`` does, without a history database) gives
the SI signals, the line state, the roll changes the detectors found and the check results; the physics is in
:mod:`spanwatch.rules.calibration`.

- :func:`calibrate_rolls`: per winder and roll (a roll change splits them; the frames while a change settles
  and while the line is stopped are left out), the least-squares effective caliper with its interval
  (:func:`~spanwatch.rules.calibration.fit_caliper`).
- :func:`traction_evidence`: per driven roller, the highest T_high / T_low held over a sustained window on
  frames where the traction check is valid, the roller's encoder shows no slip beyond the slip check's warning
  limit and its drive reports no fault (:func:`~spanwatch.rules.calibration.held_ratio`), against the
  configured COF x wrap and the air-film-derated one at that moment.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from spanwatch.connectors.recording import read_recording
from spanwatch.monitor.line import Line
from spanwatch.monitor.pipeline import Pipeline
from spanwatch.rules.base import MOVING_STATES, Block, Reason
from spanwatch.rules.calibration import CaliperFit, diameter_residuals, fit_caliper, held_ratio
from spanwatch.rules.traction import TractionCheck

MIN_ROLL_SAMPLES = 50  # fewer moving samples than this on a roll: no calibration (too short to say anything)


@dataclass
class _Series:
    """Columns gathered block by block."""

    cols: dict[str, list[np.ndarray]] = field(default_factory=dict)

    def add(self, **arrays: np.ndarray) -> None:
        for k, v in arrays.items():
            self.cols.setdefault(k, []).append(np.array(v, copy=True))

    def get(self, name: str) -> np.ndarray:
        parts = self.cols.get(name)
        return np.concatenate(parts) if parts else np.zeros(0)


@dataclass
class Gathered:
    """What one pass kept: per winder (t, diameter, length, usable, roll number) and per driven roller (t,
    tensions, traction valid, slip ok, mu_eff, web speed)."""

    winders: dict[str, _Series]
    rollers: dict[str, _Series]
    checks: dict[str, TractionCheck]
    slip_limit: dict[str, float]
    frames: int = 0


def gather(line: Line, recording: str | Path, *, winders: list[str] | None = None, rollers: list[str] | None = None,
           chunk_rows: int = 200_000) -> Gathered:
    """Run ``recording`` through a fresh pipeline (no history) and keep what calibration and traction need:
    of the ``winders`` (default all) the usable frames only, of the driven ``rollers`` (default all) every frame.
    Raises ValueError when the recording holds no sample of the configured tags (RecordingError when it is
    damaged beyond reading)."""
    pipe = Pipeline(line, None, context=False, block_seconds=60.0)
    wids = [w.id for w in line.model.winders_in_path if winders is None or w.id in winders]
    traction = {c.object_id: c for c in pipe.checks
                if isinstance(c, TractionCheck) and (rollers is None or c.object_id in rollers)}
    slip_limit: dict[str, float] = {}
    for p in pipe.points:
        if p.kind == "slip":
            slip_limit[p.object_id] = min(slip_limit.get(p.object_id, math.inf), abs(p.limit))
    out = Gathered({w: _Series() for w in wids}, {r: _Series() for r in traction}, traction, slip_limit)
    rolls = dict.fromkeys(wids, 0)

    def keep(block: Block) -> None:
        moving = block.in_states(MOVING_STATES)
        for w in wids:
            d, ln = block.signal(f"diameter/{w}"), block.signal(f"length/{w}")
            start = block.roll_start.get(w)
            start = np.zeros(block.n, bool) if start is None else np.asarray(start, bool)
            settling = block.roll_settling.get(w)
            settling = np.zeros(block.n, bool) if settling is None else np.asarray(settling, bool)
            roll = rolls[w] + np.cumsum(start)
            rolls[w] = int(roll[-1]) if roll.size else rolls[w]
            ok = d.ok & ln.ok & moving & ~settling
            if ok.any():
                out.winders[w].add(t=block.t[ok], d=d.value[ok], length=ln.value[ok], roll=roll[ok])
        vw = block.signal("speed/web")
        for rid, c in traction.items():
            r = block.results.get(("traction", rid))
            up, down = block.signal(c.t_up), block.signal(c.t_down)
            valid = r.reason == int(Reason.OK) if r is not None else np.zeros(block.n, bool)
            mu_eff = r.extras.get("mu_eff", np.full(block.n, np.nan)) if r is not None else np.full(block.n, np.nan)
            s = block.results.get(("slip", rid))
            lim = slip_limit.get(rid)
            if s is not None and lim is not None:
                with np.errstate(invalid="ignore"):
                    grip = (s.reason == int(Reason.OK)) & (np.abs(s.value) < lim)
            else:
                grip = np.ones(block.n, bool)  # no encoder: nothing shows slip (reported as such)
            fault = block.signals.get(f"drive_fault/{rid}")
            if fault is not None:
                with np.errstate(invalid="ignore"):
                    grip &= ~(fault.ok & (fault.value > 0.5))
            out.rollers[rid].add(t=block.t, up=np.where(up.ok, up.value, np.nan),
                                 down=np.where(down.ok, down.value, np.nan), valid=valid, grip=grip,
                                 mu_eff=np.broadcast_to(mu_eff, (block.n,)), v=np.where(vw.ok, vw.value, np.nan))
        out.frames += block.n

    # the pipeline's own loop (Pipeline.advance), keeping each block once its checks have run
    def advance(until: float) -> None:
        while (block := pipe.next_block(until)) is not None:
            pipe._evaluate(block)
            keep(block)

    for batch in read_recording(Path(recording), pipe.names, chunk_rows=chunk_rows):
        pipe.ingest(batch)
        if pipe.last_t is not None:
            advance(pipe.last_t - pipe.lag)
    if pipe.last_t is None:
        raise ValueError(f"{recording}: no samples of the configured tags")
    advance(pipe.last_t)
    return out


# --- caliper ------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RollCalibration:
    """One roll of one winder: its time span, the length it covered, the fit (None: too few samples, with why)."""

    winder: str
    rewind: bool
    roll: int  # 1, 2, ... in the recording
    t0: float
    t1: float
    length: float  # m covered by the fit
    fit: CaliperFit | None
    why: str = ""
    lengths: np.ndarray | None = None  # for the residual plot
    residuals: np.ndarray | None = None  # measured minus fitted diameter, m


def calibrate_rolls(gathered: Gathered, line: Line, *, confidence: float = 0.95) -> list[RollCalibration]:
    """The effective caliper of every roll of every gathered winder (see :func:`fit_caliper`)."""
    out: list[RollCalibration] = []
    for w, ser in gathered.winders.items():
        rewind = line.model.winders[w].rewind
        t, d, ln, roll = (ser.get(k) for k in ("t", "d", "length", "roll"))
        if t.size == 0:
            continue
        ok = np.isfinite(d) & np.isfinite(ln)
        k = 0
        for r in np.unique(roll.astype(int)):
            sel = (roll == r) & ok
            tr = t[roll == r]
            if not sel.any():  # a roll change settling, or the line stopped throughout: no roll to speak of
                continue
            k += 1
            if sel.sum() < MIN_ROLL_SAMPLES:
                out.append(RollCalibration(w, rewind, k, float(tr[0]), float(tr[-1]), 0.0, None,
                                           f"{int(sel.sum())} moving samples (at least {MIN_ROLL_SAMPLES})"))
                continue
            lv, dv = ln[sel], d[sel]
            try:
                fit = fit_caliper(lv, dv, rewind=rewind, confidence=confidence)
            except ValueError as exc:
                out.append(RollCalibration(w, rewind, k, float(tr[0]), float(tr[-1]), 0.0, None, str(exc)))
                continue
            out.append(RollCalibration(w, rewind, k, float(tr[0]), float(tr[-1]), float(lv.max() - lv.min()), fit,
                                       lengths=lv, residuals=diameter_residuals(lv, dv, fit, rewind=rewind)))
    return out


def suggested_stack_factor(rolls: list[RollCalibration], caliper: float) -> tuple[float, float] | None:
    """(effective caliper, stack factor) to configure: the inverse-variance weighted mean of the rolls'
    calipers over the nominal single-ply ``caliper``; None when no roll was calibrated."""
    fits = [r.fit for r in rolls if r.fit is not None and r.fit.stderr > 0 and math.isfinite(r.fit.stderr)]
    if not fits:
        return None
    w = np.array([1.0 / f.stderr**2 for f in fits])
    h = float(np.sum(w * np.array([f.caliper for f in fits])) / np.sum(w))
    return h, h / caliper


def plot_residuals(rolls: list[RollCalibration], path: str | Path, *, accuracy: dict[str, float] | None = None
                   ) -> None:
    """Residual plot: measured minus fitted diameter (mm) against length (m), one panel per roll (Agg)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    shown = [r for r in rolls if r.fit is not None and r.lengths is not None][:12]
    n = max(1, len(shown))
    fig, axes = plt.subplots(n, 1, figsize=(8, 2.2 * n + 0.6), squeeze=False)
    for ax, r in zip(axes[:, 0], shown, strict=False):
        assert r.fit is not None and r.lengths is not None and r.residuals is not None
        step = max(1, r.lengths.size // 20_000)
        ax.plot(r.lengths[::step], r.residuals[::step] * 1e3, ".", ms=1.5, color="tab:blue")
        ax.axhline(0.0, color="black", lw=0.8)
        acc = (accuracy or {}).get(r.winder)
        if acc:
            for s in (-1, 1):
                ax.axhline(s * acc * 1e3, color="tab:red", lw=0.8, ls="--",
                           label="diameter sensor accuracy" if s > 0 else None)
            ax.legend(fontsize=7, loc="upper right")
        ax.set_title(f"{r.winder} roll {r.roll}: effective caliper {r.fit.caliper * 1e6:.2f} um "
                     f"({r.fit.ci[0] * 1e6:.2f}-{r.fit.ci[1] * 1e6:.2f}), rms {r.fit.rms * 1e3:.2f} mm", fontsize=9)
        ax.set_ylabel("D - fit, mm")
    axes[-1, 0].set_xlabel("length on the roll, m" + ("" if shown else " (no roll calibrated)"))
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


# --- traction -----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class TractionEvidence:
    """One driven roller: the highest ln(T_high/T_low) held for ``window`` s without slip, when, and what the
    configuration allows (dry mu x wrap, and mu_eff x wrap at that moment's speed and tension)."""

    roller: str
    wrap: float  # rad
    cof: float  # configured dry COF
    held: float  # ln(T_high / T_low), nan: no sustained window without slip
    at: float | None  # time of the window's last frame
    speed: float  # m/s at that frame
    mu_eff: float  # configured mu derated for the air film at that frame
    encoder: bool  # the roller has an encoder of its own (else no slip could be seen)
    frames: int  # frames that counted (valid and gripping)

    @property
    def configured(self) -> float:
        """mu x theta the configuration assumes (dry)."""
        return self.cof * self.wrap

    @property
    def configured_eff(self) -> float:
        """mu_eff x theta at the moment of the evidence (air film derated)."""
        return self.mu_eff * self.wrap

    @property
    def mu_lower(self) -> float:
        """The lowest dry COF the evidence proves: ln(T_high/T_low) / theta."""
        return self.held / self.wrap if self.wrap > 0 else math.nan


def traction_evidence(gathered: Gathered, *, window: float = 2.0,
                      roller: Callable[[str], bool] | None = None) -> list[TractionEvidence]:
    """Per driven roller, the highest tension ratio held over ``window`` seconds without slip (see module doc)."""
    out: list[TractionEvidence] = []
    for rid, ser in gathered.rollers.items():
        if roller is not None and not roller(rid):
            continue
        c = gathered.checks[rid]
        t, up, down, valid, grip, mu_eff, v = (ser.get(k) for k in ("t", "up", "down", "valid", "grip", "mu_eff", "v"))
        with np.errstate(all="ignore"):
            lnr = np.abs(np.log(down / up))
        ok = valid.astype(bool) & grip.astype(bool) & np.isfinite(lnr)
        held, k = held_ratio(t, lnr, ok, window) if t.size else (math.nan, -1)
        out.append(TractionEvidence(rid, c.wrap, c.mu, held, float(t[k]) if k >= 0 else None,
                                    float(v[k]) if k >= 0 else math.nan, float(mu_eff[k]) if k >= 0 else math.nan,
                                    c.has_encoder, int(ok.sum())))
    return out
