"""Scoring alarms against a simulator's ground truth: detected, on the right object, how late, false alarms.

Pure functions over plain records (no pipeline, no simulator), so the rules of the score can be
tested on hand-made alarms and faults:

* A fault is **detected** when any alarm is raised in its window ``[start, end + grace]``.
* It is detected **on the right object** when such an alarm names one of the fault's ``blame``
  (what the simulator says an alarm may point at, see :mod:`spanwatch.monitor.simline.scenario`):
  the alarm's check names it (:func:`spanwatch.rules.base.blames_of`) or it is the alarm's object.
* Its **delay** is the first right-object raise minus the fault's start.
* A **false alarm** is a raise outside the window of every fault of its run (every raise of a
  clean run), counted per 8-hour shift of the time it could happen in.
* The **interval floor** is a detector that raises every ``X`` seconds at a random phase and
  names one of the line's ``n`` alarm objects at random (:func:`interval_floor`).

Warning and alarm levels are separate alarm points (ANSI/ISA-18.2-2016 counts annunciations per
point; from memory), so each of their raises counts.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

SHIFT_S = 8 * 3600.0  # one 8-hour shift, s


@dataclass(frozen=True)
class Raise:
    """One alarm raise: when (epoch s), which point, and what its check names."""

    t: float
    kind: str
    object_id: str
    level: str = "alarm"
    priority: str = "high"
    blames: tuple[str, ...] = ()

    @property
    def annunciated(self) -> bool:
        """Shown to the operator (every priority but ``advisory``, which goes to the journal only)."""
        return self.priority != "advisory"

    def names(self) -> set[str]:
        """What the alarm points at: its check's blames and its own object."""
        return {*self.blames, self.object_id}


@dataclass(frozen=True)
class FaultWindow:
    """One injected fault as the score sees it (epoch seconds)."""

    label: str
    kind: str
    start: float
    end: float
    blame: tuple[str, ...]
    severity: str | None = None
    target: str = ""

    @staticmethod
    def from_truth(d: Mapping[str, object]) -> FaultWindow:
        """From one entry of :meth:`SimulatedLine.truth` ``["faults"]``."""
        return FaultWindow(label=str(d.get("label") or d["kind"]), kind=str(d["kind"]),
                           start=float(d["start_epoch"]), end=float(d["end_epoch"]),  # type: ignore[arg-type]
                           blame=tuple(d.get("blame") or ()), severity=d.get("severity"),  # type: ignore[arg-type]
                           target=str(d.get("target") or ""))

    def window(self, grace: float) -> tuple[float, float]:
        return self.start, self.end + grace


def on_object(r: Raise, blame: Iterable[str]) -> bool:
    """True when the raise names one of ``blame``."""
    return not r.names().isdisjoint(blame)


@dataclass(frozen=True)
class FaultScore:
    """How one fault of one run was seen."""

    fault: FaultWindow
    detected: bool
    right: bool
    delay: float | None  # first right-object raise - start, s
    first_delay: float | None  # first raise of any alarm in the window - start, s
    by_kind: dict[str, float] = field(default_factory=dict)  # kind -> delay of its first right-object raise
    kinds_seen: tuple[str, ...] = ()  # kinds raised in the window, right object or not

    @property
    def first_kinds(self) -> tuple[str, ...]:
        """The kinds whose right-object raise came first."""
        if self.delay is None:
            return ()
        return tuple(sorted(k for k, d in self.by_kind.items() if d == self.delay))


def score_fault(fault: FaultWindow, raises: Iterable[Raise], grace: float) -> FaultScore:
    """Score one fault against the raises of its run (see the module docstring)."""
    lo, hi = fault.window(grace)
    inside = sorted((r for r in raises if lo <= r.t <= hi), key=lambda r: r.t)
    by_kind: dict[str, float] = {}
    for r in inside:
        if on_object(r, fault.blame) and r.kind not in by_kind:
            by_kind[r.kind] = r.t - fault.start
    delay = min(by_kind.values()) if by_kind else None
    return FaultScore(fault=fault, detected=bool(inside), right=delay is not None, delay=delay,
                      first_delay=inside[0].t - fault.start if inside else None, by_kind=by_kind,
                      kinds_seen=tuple(dict.fromkeys(r.kind for r in inside)))


def outside_windows(raises: Iterable[Raise], faults: Sequence[FaultWindow], grace: float) -> list[Raise]:
    """The raises outside every fault's window: the false alarms of a run (all of them in a clean run)."""
    wins = [f.window(grace) for f in faults]
    return [r for r in raises if not any(lo <= r.t <= hi for lo, hi in wins)]


def covered_seconds(faults: Sequence[FaultWindow], grace: float, t0: float, t1: float) -> float:
    """Seconds of ``[t0, t1]`` inside at least one fault window (the union, so overlaps count once)."""
    spans = sorted((max(lo, t0), min(hi, t1)) for lo, hi in (f.window(grace) for f in faults))
    total, cur_lo, cur_hi = 0.0, None, None
    for lo, hi in spans:
        if hi <= lo:
            continue
        if cur_hi is None or lo > cur_hi:
            if cur_hi is not None:
                total += cur_hi - cur_lo  # type: ignore[operator]
            cur_lo, cur_hi = lo, hi
        else:
            cur_hi = max(cur_hi, hi)
    if cur_hi is not None:
        total += cur_hi - cur_lo  # type: ignore[operator]
    return total


def per_shift(count: float, seconds: float) -> float:
    """A count over ``seconds`` as a rate per 8-hour shift (NaN when there was no time)."""
    return count * SHIFT_S / seconds if seconds > 0 else math.nan


def interval_floor(window: float, interval: float, n_objects: int) -> tuple[float, float, float]:
    """What a detector firing every ``interval`` seconds at a uniformly random phase scores on a window.

    Returns ``(p_detect, p_right, mean_delay)``: it raises inside a window of ``window`` seconds with
    probability ``min(1, window / interval)``; it names the right object by luck with probability
    ``1 / n_objects`` of that; given a raise inside, its first one is uniform over ``[0, min(window,
    interval)]``, so the mean delay is half of that. Its false-alarm rate is ``SHIFT_S / interval``
    per shift: ``interval = SHIFT_S`` holds it at the target of one per shift.
    """
    if interval <= 0 or window < 0:
        raise ValueError(f"expected interval > 0 and window >= 0, got {interval}, {window}")
    p = min(1.0, window / interval)
    return p, p / max(n_objects, 1), 0.5 * min(window, interval)


def median(values: Sequence[float]) -> float:
    """The median of a non-empty sequence (NaN for an empty one)."""
    v = sorted(values)
    n = len(v)
    if not n:
        return math.nan
    return v[n // 2] if n % 2 else 0.5 * (v[n // 2 - 1] + v[n // 2])
