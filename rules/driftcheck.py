"""Drift detection on the residuals of the physics checks: the ``drift`` check kind.

A fixed limit catches a roller that is already slipping; a drift detector hears, long before a
limit, that a residual is creeping away from what it was in good running: a load cell losing its
gain, an idler bearing dragging, a roller glazing, the wound roll's effective caliper changing.

Each :class:`DriftCheck` watches one residual stream of one check object (the residual is computed
by the check that owns the physics and read from :attr:`Block.results`; see :data:`RESIDUALS`):

* it runs only in the line states where the residual means something (steady running for most),
  and only on frames the source check marks valid;
* it decimates the residual into batch means (the residuals are strongly autocorrelated at
  20-50 Hz) and learns a baseline (mean, sigma, lag-1 autocorrelation) from a configurable stretch
  of good running, never while an alarm of the same object stands;
* baselines are kept per operating point (a band of line speed): the air film, idler lag and
  draw all move with speed, so a speed change is a new operating point, not a drift; returning to a
  known speed reuses its baseline;
* it re-learns after a grade change (the line's ``grade_tag``), after a roll change of a winder it
  depends on, and when a drift alarm of its own is acknowledged (the operator has seen the change;
  the new level is the new normal);
* its detector (fixed-reference tabular CUSUM by default; EWMA or river's ADWIN / Page-Hinkley
  where configured) is designed from the engineer's terms: the shift to detect in sigmas and the
  line's acceptable false-alarm interval (see :mod:`spanwatch.rules.drift.design`).

Its value is the detector's statistic (1.0 = drift detected); its extras give the estimated change
time, the size of the change in the residual's own unit, and the baseline. The alarm is of its own
kind, advisory by default, and blames what the source check blames.

The pipeline evaluates all drift checks of a line together (:meth:`DriftCheck.batch`, :class:`DriftBatch`): their
detectors' state is stacked in one :class:`~spanwatch.rules.drift.monitor.MonitorBank` and one pass over a
detectors x frames matrix serves them all; a check's own ``update`` is the same evaluation for a batch of one.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from spanwatch.rules.base import AlarmDefaults, Block, Check, CheckResult, LineState, Reason, blames_of, state_mask
from spanwatch.rules.drift import Baseline, DriftMonitor
from spanwatch.rules.drift.design import arl0_for
from spanwatch.rules.drift.monitor import MonitorBank
from spanwatch.rules.linemodel import DriftSettings, LineModel

RUNNING = (LineState.RUNNING,)


@dataclass(frozen=True)
class Residual:
    """A residual stream a drift detector may watch: ``source`` check kind, ``field`` (``value`` or an extra),
    its ``unit`` as a person reads it, the line ``states`` where it means something, the smallest sigma worth
    believing (``sigma_floor``, in the field's SI unit: a near-constant baseline must not make every tiny change
    a drift), and the winders whose roll change re-learns it (``"*"``: the winder the source check is on)."""

    source: str
    field: str
    unit: str
    sigma_floor: float
    states: tuple[LineState, ...] = RUNNING
    roll_change: tuple[str, ...] = ()
    label: str = ""
    enabled: bool = True  # watched unless the config says otherwise

    @property
    def name(self) -> str:
        return self.label or (self.source if self.field == "value" else f"{self.source}.{self.field}")


# The residuals watched by default. Floors: common practice, no source (about a tenth of a typical alarm band).
RESIDUALS: tuple[Residual, ...] = (
    Residual("traction", "utilisation", "share of capacity", 0.01, label="traction"),
    Residual("traction", "mu_demonstrated", "COF", 0.005, label="traction.mu"),
    Residual("slip", "value", "%", 2e-4),
    Residual("idler_lag", "value", "%", 2e-4),
    Residual("draw", "residual", "N/m", 1.0, label="draw"),
    Residual("draw", "ratio", "x predicted", 0.002, label="draw.gain"),
    # not watched by default: its expected error grows along the roll with the calibration's slope error (the
    # check's band grows with it), so it is not stationary; the local caliper ratio below is
    Residual("roll_diameter", "residual", "m", 2e-4, roll_change=("*",), label="roll_diameter", enabled=False),
    Residual("roll_diameter", "caliper_ratio", "x calibrated", 0.005, roll_change=("*",), label="caliper"),
    Residual("length_rate", "value", "%", 5e-4, roll_change=("*",)),
    Residual("runout", "value", "% of mean tension", 0.002),
)

DEFAULTS = AlarmDefaults(
    direction="high",
    unit="x threshold",
    warning=None,
    alarm=1.0,
    deadband=0.2,
    on_delay=0.0,
    off_delay=60.0,
    priority="advisory",
    warning_priority="advisory",
    cause="A residual of a physics check has moved away from its level in good running: a sensor losing its "
          "zero or gain, a bearing dragging, a roller glazing, the wound roll's caliper changing.",
    consequence="Left alone, the fixed-limit alarm of the same check follows later: slip, a wrinkle, a soft or "
                "telescoped roll, or a tension the load cell no longer reports truly.",
    action="Look at the named object and the residual's trend; check the load cell (zero at standstill with the "
           "web slack, gain against a known weight), the bearing, the roller surface, the roll. Acknowledge to "
           "accept the new level as normal.",
    response_time=3600.0,
)


def residual_of(object_id: str) -> Residual | None:
    """The residual a drift object id (``<residual name>.<object>``) watches, or None."""
    best = None
    for r in RESIDUALS:
        if object_id.startswith(r.name + ".") and (best is None or len(r.name) > len(best.name)):
            best = r
    return best


def residuals_for(settings: DriftSettings) -> list[tuple[Residual, dict[str, object]]]:
    """The residuals enabled by ``settings``, each with its overrides."""
    out = []
    for r in RESIDUALS:
        over = settings.residuals.get(r.name, {})
        if over.get("enabled", r.enabled):
            out.append((r, over))
    return out


class DriftCheck:
    """A drift detector on one residual stream of one check object (see the module docstring)."""

    kind: ClassVar[str] = "drift"
    rests_on: ClassVar[str] = ("the residual was stationary in the good running its baseline was learnt from, at the "
                               "same operating point (line speed band); batch means nearly independent after the "
                               "AR(1) correction")
    defaults: ClassVar[AlarmDefaults] = DEFAULTS
    detail: ClassVar[tuple[str, ...]] = ("change_time", "shift", "mean", "sigma")  # carried by a raise

    def __init__(self, source: Check, residual: Residual, *, detector: str, period: float, learn: float,
                 shift: float, arl0: float, sigma_floor: float, speed_band: float,
                 params: dict[str, object] | None = None) -> None:
        self.source_key = (source.kind, source.object_id)
        self.residual = residual
        self.object_id = f"{residual.name}.{source.object_id}"
        self.inputs = tuple(source.inputs)
        self.blames = blames_of(source)
        self.detector, self.period, self.learn, self.shift = detector, period, learn, shift
        self.arl0, self.sigma_floor, self.speed_band = arl0, sigma_floor, speed_band
        self.params = dict(params or {})
        self.hold = False  # set by the application while an alarm of the same object stands: learn nothing
        self._baselines: list[tuple[float, Baseline]] = []  # (line speed m/s, baseline learnt there)
        self._speed: float | None = None  # line speed of the current operating point
        self._grade: float | None = None  # the grade in production (``grade/line``), when the line publishes it
        # the winders whose roll change re-learns it
        self._winders = frozenset(source.object_id if w == "*" else w for w in residual.roll_change)
        self._monitor = DriftMonitor(self.detector, period=self.period, learn=self.learn, shift=self.shift,
                                     arl0=self.arl0, sigma_floor=self.sigma_floor, params=self.params or None)

    @classmethod
    def for_line(cls, line: LineModel, sources: list[Check] | None = None) -> Iterator[DriftCheck]:
        """One per enabled residual and object of its source check kind; ``sources``: the line's other checks."""
        s = line.drift
        if sources is None:
            from spanwatch.rules.catalog import source_checks

            sources = source_checks(line)
        chosen = [(r, over, c) for r, over in residuals_for(s) for c in sources if c.kind == r.source]
        n = max(1, len(chosen))
        for r, over, c in chosen:
            detector = str(over.get("detector", s.detector))
            arl0 = arl0_for(s.false_alarm_interval, s.period, n)
            yield cls(c, r, detector=detector, period=s.period, learn=s.learn,
                      shift=float(over.get("shift", s.shift)),  # type: ignore[arg-type]
                      arl0=arl0, sigma_floor=float(over.get("sigma_floor", r.sigma_floor)),  # type: ignore[arg-type]
                      speed_band=s.speed_band)

    @classmethod
    def batch(cls, checks: Sequence[DriftCheck]) -> DriftBatch:
        """All ``checks`` evaluated together (see :class:`DriftBatch`)."""
        return DriftBatch(checks)

    @property
    def baseline(self) -> Baseline | None:
        """The baseline in use at the current operating point (None while learning)."""
        return self._monitor.baseline

    @property
    def design(self) -> dict[str, float]:
        """The detector's parameters (CUSUM ``k``, ``h``; EWMA ``lam``, ``L``; {} for river's)."""
        return self._monitor.design

    def reset(self) -> None:
        """After a gap: forget the partial batch, keep the baselines."""
        self._monitor.reset()

    def relearn(self) -> None:
        """Forget every baseline (roll change of a winder it depends on, an acknowledged drift): learn again."""
        self._baselines.clear()
        self._monitor.relearn()

    def _operating_point(self, speed: float) -> None:
        """Follow the line speed: a speed outside the current band (relative ``speed_band``) is a new operating
        point; the current baseline is kept for it and a known one is taken back (else it is learnt)."""
        if not math.isfinite(speed) or speed <= 0:
            return
        if self._speed is not None and abs(speed / self._speed - 1.0) <= self.speed_band:
            return
        if self._speed is not None and self._monitor.baseline is not None:
            self._baselines = [(v, b) for v, b in self._baselines if abs(v / self._speed - 1.0) > self.speed_band / 2]
            self._baselines.append((self._speed, self._monitor.baseline))
        self._speed = speed
        self._monitor.renew()
        known = min(self._baselines, key=lambda vb: abs(vb[0] / speed - 1.0), default=None)
        if known is not None and abs(known[0] / speed - 1.0) <= self.speed_band / 2:
            self._monitor.use_baseline(known[1])

    def update(self, block: Block) -> CheckResult:
        return evaluate([self], block)[0]

    def _pieces(self, block: Block, ok: np.ndarray) -> list[tuple[int, int, float | None]]:
        """The block cut where the operating point changes: (start, end, line speed there or None to keep it).

        A speed change passes through frames the residual does not use (accelerating, settling), so each run of
        usable frames has one operating point (the line speed at its middle frame); runs in the same band as the
        one before are not cut, so the result does not depend on how the frames were cut into blocks."""
        n = block.n
        if not ok.any():
            return [(0, n, None)]
        edges = np.flatnonzero(np.diff(np.concatenate(([False], ok, [False])).astype(np.int8)))
        starts, ends = edges[0::2], edges[1::2]
        speed = block.signal("speed/web").value
        cuts: list[tuple[int, float]] = []
        current = self._speed
        for a, b in zip(starts, ends, strict=True):
            v = float(speed[(a + b - 1) // 2])
            if not math.isfinite(v) or v <= 0:
                continue
            if current is None or abs(v / current - 1.0) > self.speed_band:
                cuts.append((int(a), v))
                current = v
        if not cuts:
            return [(0, n, None)]
        out: list[tuple[int, int, float | None]] = [(0, cuts[0][0], None)] if cuts[0][0] > 0 else []
        for i, (a, v) in enumerate(cuts):
            out.append((a, cuts[i + 1][0] if i + 1 < len(cuts) else n, v))
        return out


class DriftBatch:
    """The drift checks of a line evaluated together (:class:`~spanwatch.rules.base.CheckBatch`).

    Building it moves the checks' detectors, state and all, into one
    :class:`~spanwatch.rules.drift.monitor.MonitorBank` per batch period (one on a line); :meth:`update` is
    :func:`evaluate` over all of them. Each check keeps working on its own (``update``, ``reset``, ``relearn``,
    ``hold``): its state is its row of the bank."""

    def __init__(self, checks: Sequence[DriftCheck]) -> None:
        self.checks = tuple(checks)
        periods: dict[float, list[DriftMonitor]] = {}
        for c in self.checks:
            periods.setdefault(c._monitor.period, []).append(c._monitor)
        for monitors in periods.values():
            MonitorBank(monitors)

    def update(self, block: Block) -> list[CheckResult]:
        return evaluate(self.checks, block)

    def reset(self) -> None:
        for c in self.checks:
            c.reset()


_FIELDS = ("value", "state", "change_time", "shift", "mean", "sigma")
_LINE_STATE, _OK, _INPUT_BAD = int(Reason.LINE_STATE), int(Reason.OK), int(Reason.INPUT_BAD)


class _Extras(Mapping[str, np.ndarray]):
    """A drift result's extras (``change_time``, ``shift``, ``mean``, ``sigma``, ``residual``: the residual on the
    frames the check used, NaN elsewhere), each spread over the frames when first read: the alarm engine reads them
    only for a raise."""

    __slots__ = ("_cols", "_frames", "_ok", "_row", "_seen", "_x0")

    def __init__(self, cols: np.ndarray, row: int, frames: np.ndarray, x0: np.ndarray, ok: np.ndarray) -> None:
        self._cols, self._row, self._frames, self._x0, self._ok = cols, row, frames, x0, ok
        self._seen: dict[str, np.ndarray] = {}

    def __getitem__(self, key: str) -> np.ndarray:
        got = self._seen.get(key)
        if got is None:
            if key == "residual":
                got = np.where(self._ok, self._x0, np.nan)
            else:
                got = np.repeat(self._cols[_EXTRAS.index(key) + 1, self._row], self._frames)
            self._seen[key] = got
        return got

    def __iter__(self) -> Iterator[str]:
        return iter((*_EXTRAS, "residual"))

    def __len__(self) -> int:
        return len(_EXTRAS) + 1


_EXTRAS = ("change_time", "shift", "mean", "sigma")


def _missing(n: int) -> CheckResult:
    """The result of a check whose source result or field is missing: invalid, not a guess."""
    return CheckResult(np.full(n, np.nan), np.full(n, _INPUT_BAD, dtype=np.int8),
                       {k: np.full(n, np.nan) for k in ("change_time", "shift", "mean", "sigma", "residual")})


def _relearn_on_events(live: list[DriftCheck], block: Block) -> None:
    """Re-learn what a new grade (every check) or a roll change of a winder a check depends on calls for."""
    grade = block.signals.get("grade/line")
    if grade is not None and grade.ok.any():
        g = grade.value[grade.ok]
        changed = bool((g[1:] != g[:-1]).any())
        first, last = g[0], float(g[-1])
        for c in live:
            if changed or (c._grade is not None and first != c._grade):
                c.relearn()  # a new grade: its residuals have levels of their own
            c._grade = last
    started = {w for w, s in block.roll_start.items() if s.any()}
    if started:
        for c in live:
            if c._winders & started:
                c.relearn()


def _cut(live: list[DriftCheck], block: Block, usable: np.ndarray,
         ok: np.ndarray) -> dict[int, list[tuple[int, int, float | None]]]:
    """The checks (by position) whose block is cut by an operating point change, with their pieces.

    A check's frames are not cut when the line speed of every ``usable`` frame (a mask holding at least the
    frames any check uses) lies in its current band: the speeds the cut looks at (the middle frames of its runs
    of usable frames) lie between the smallest and the largest of them, and |v / v0 - 1| is largest at one of
    those two.
    That is tried for all checks at once; the others are cut as :meth:`DriftCheck._pieces` says."""
    speed = block.signal("speed/web").value
    with np.errstate(invalid="ignore"):
        good = usable & np.isfinite(speed) & (speed > 0)
    if not good.any():
        return {}
    lo, hi = float(speed[good].min()), float(speed[good].max())
    out = {}
    for i, c in enumerate(live):
        v0 = c._speed
        if v0 is not None and abs(lo / v0 - 1.0) <= c.speed_band and abs(hi / v0 - 1.0) <= c.speed_band:
            continue
        pieces = c._pieces(block, ok[i])
        if pieces[0][2] is not None or len(pieces) > 1:
            out[i] = pieces
    return out


def _reason(reasons: np.ndarray, src_ok: np.ndarray, ok: np.ndarray, state: np.ndarray) -> np.ndarray:
    """Per check and frame: the monitor's state where the check could use the frame, else why not (its source's
    reason, or the line state). The monitor's value is already NaN wherever its state is not OK."""
    reason = (reasons + src_ok).astype(np.int8, copy=False)  # LINE_STATE (1) where the source is valid (0)
    np.copyto(reason, state, where=ok)
    return reason


def evaluate(checks: Sequence[DriftCheck], block: Block) -> list[CheckResult]:
    """The results of ``checks`` for ``block``, in order: what each check's own evaluation gives, computed together.

    Per check: its source's residual (from :attr:`Block.results`), re-learnt on a new grade or a roll change of a
    winder it depends on, gated to the frames its source marks valid in the line states where the residual means
    something (none while it holds and has no baseline), cut where the operating point changes, decimated,
    standardised and charted by its monitor. All of this runs over a checks x frames matrix and each bank's
    monitors in one call; only checks whose block an operating point change cuts run piece by piece."""
    n = block.n
    out: list[CheckResult | None] = [None] * len(checks)
    live: list[DriftCheck] = []
    where: list[int] = []
    xs, results = [], []
    for i, c in enumerate(checks):
        res = block.results.get(c.source_key)
        x = None if res is None else res.value if c.residual.field == "value" else res.extras.get(c.residual.field)
        if res is None or x is None:
            out[i] = _missing(n)
            continue
        live.append(c)
        where.append(i)
        xs.append(x)
        results.append(res)
    if not live:
        return out  # type: ignore[return-value]
    _relearn_on_events(live, block)
    d = len(live)
    x = np.stack(xs).astype(float, copy=False)  # a new array (it is written below)
    reasons = np.stack([r.reason for r in results])
    src_ok = reasons == _OK
    masks = {c.residual.states for c in live}
    if len(masks) == 1:
        states = state_mask(block.line_state, live[0].residual.states)
        usable = states
    else:
        states = np.stack([state_mask(block.line_state, c.residual.states) for c in live])
        usable = states.any(axis=0)
    ok = src_ok & states & np.isfinite(x)
    holding = [i for i, c in enumerate(live) if c.hold and c._monitor.learning]
    if holding:
        ok[holding] = False
    x0 = x  # np.stack made it a copy of the sources' arrays: 0.0 where not usable, as the monitors sum it
    np.copyto(x0, 0.0, where=~ok)
    cut = _cut(live, block, usable, ok)
    t = block.t
    groups: dict[MonitorBank, tuple[list[int], list[int]]] = {}  # per bank: positions in live, rows in the bank
    for i, c in enumerate(live):
        if i not in cut:
            m = c._monitor
            pos, rows = groups.setdefault(m.bank, ([], []))
            pos.append(i)
            rows.append(m.row)
    if len(groups) == 1 and not cut:
        # the usual: one bank, no operating point change; the extras spread over the frames when read
        bank, (_, rows) = next(iter(groups.items()))
        value, state, per_col, frames = bank.columns(t, x0, ok, rows=rows, zeroed=True)
        reason = _reason(reasons, src_ok, ok, state)
        for k, i in enumerate(where):
            out[i] = CheckResult(value[k], reason[k], _Extras(per_col, k, frames, x0[k], ok[k]))
        return out  # type: ignore[return-value]
    # some checks cut by an operating point change, or in other banks: each group by itself
    fields = tuple(np.empty((d, n), dtype=np.int8 if f == "state" else float) for f in _FIELDS)
    for bank, (pos, rows) in groups.items():
        got = bank.update(t, x0[pos], ok[pos], rows=rows, zeroed=True)
        for whole, part in zip(fields, got, strict=True):
            whole[pos] = part
    # checks cut alike (the same pieces, one bank) run together, piece by piece
    alike: dict[tuple[object, ...], list[int]] = {}
    for i, pieces in cut.items():
        alike.setdefault((live[i]._monitor.bank, *pieces), []).append(i)
    for pos in alike.values():
        bank = live[pos[0]]._monitor.bank
        rows = [live[i]._monitor.row for i in pos]
        for a, b, point in cut[pos[0]]:
            if point is not None:
                for i in pos:
                    live[i]._operating_point(point)
            got = bank.update(t[a:b], x0[pos, a:b], ok[pos, a:b], rows=rows, zeroed=True)
            for whole, part in zip(fields, got, strict=True):
                whole[pos, a:b] = part
    value, state = fields[0], fields[1]
    reason = _reason(reasons, src_ok, ok, state)
    residual = np.where(ok, x0, np.nan)
    for k, i in enumerate(where):
        out[i] = CheckResult(value[k], reason[k], {"change_time": fields[2][k], "shift": fields[3][k],
                                                   "mean": fields[4][k], "sigma": fields[5][k],
                                                   "residual": residual[k]})
    return out  # type: ignore[return-value]
