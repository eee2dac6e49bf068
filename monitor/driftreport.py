"""What the drift detectors of a line were designed to do, for ``check-config`` and the commissioning tools.

Per residual: the objects it is watched on, the detector, the shift it is designed for (sigmas of the batch
means in good running), the in-control average run length each detector gets from the line's false-alarm
interval (:func:`spanwatch.rules.drift.design.arl0_for`), the chart parameters the published design rules give
(CUSUM k and h: Montgomery, *Introduction to Statistical Quality Control*, ch. 9, with the Brook & Evans (1972)
Markov chain; EWMA lambda and L: Lucas & Saccucci (1990)) and the expected delay to detect the design shift.
"""

from __future__ import annotations

from dataclasses import dataclass

from spanwatch.rules.base import Check
from spanwatch.rules.drift.design import cusum_arl, ewma_arl
from spanwatch.rules.driftcheck import DriftCheck


@dataclass(frozen=True)
class DriftDesign:
    """One residual's drift detectors as designed (times in s)."""

    residual: str
    unit: str
    objects: tuple[str, ...]
    detector: str
    shift: float  # sigmas
    period: float  # s per batch mean
    learn: float  # s
    arl0: float  # batches
    params: str  # "k 0.5, h 15.0" or "lambda 0.1, L 3.1" or river's
    delay: float | None  # s: expected delay at the design shift (None: not designed by ARL)

    @property
    def false_alarm_years(self) -> float:
        """The in-control ARL of one detector as running time, years."""
        return self.arl0 * self.period / (365.25 * 86400.0)


def drift_designs(checks: list[Check]) -> list[DriftDesign]:
    """The design of every residual watched on the line (one row per residual, its objects together)."""
    rows: dict[str, list[DriftCheck]] = {}
    for c in checks:
        if isinstance(c, DriftCheck):
            rows.setdefault(c.residual.name, []).append(c)
    out = []
    for name, cs in rows.items():
        c = cs[0]
        d = c.design
        if c.detector == "cusum":
            params = f"k {d['k']:.2f}, h {d['h']:.1f}"
            delay = cusum_arl(d["k"], d["h"], c.shift) * c.period
        elif c.detector == "ewma":
            params = f"lambda {d['lam']:.2f}, L {d['L']:.2f}"
            delay = ewma_arl(d["lam"], d["L"], c.shift) * c.period
        else:
            params = ", ".join(f"{k} {v}" for k, v in c.params.items()) or "river's defaults"
            delay = None
        out.append(DriftDesign(name, c.residual.unit, tuple(x.object_id.removeprefix(name + ".") for x in cs),
                               c.detector, c.shift, c.period, c.learn, c.arl0, params, delay))
    return out
