"""Online drift detection on residual streams: charts, their design, baselines, river's detectors, the monitor.

* :mod:`~spanwatch.rules.drift.charts`: the two-sided tabular CUSUM and the EWMA chart (vectorised, state
  carried between calls);
* :mod:`~spanwatch.rules.drift.design`: average run lengths (Siegmund, Brook-Evans, Lucas-Saccucci Markov
  chains), decision limits for an in-control ARL, and the line's false-alarm interval as an ARL;
* :mod:`~spanwatch.rules.drift.baseline`: the in-control baseline and the AR(1) residual standardisation;
* :mod:`~spanwatch.rules.drift.rivers`: river's ADWIN and Page-Hinkley as they are (river imported lazily);
* :mod:`~spanwatch.rules.drift.monitor`: :class:`DriftMonitor`, one residual stream from frames to a per-frame
  statistic.

numpy and scipy only (river when one of its detectors is built); nothing else of spanwatch.
"""

from spanwatch.rules.drift.baseline import Baseline, learn_baseline, standardise
from spanwatch.rules.drift.charts import Ewma, TabularCusum
from spanwatch.rules.drift.design import (
    arl0_for,
    cusum_arl,
    cusum_h,
    design_cusum,
    design_ewma,
    ewma_arl,
    ewma_L,
    ewma_lambda,
)
from spanwatch.rules.drift.monitor import DETECTORS, GATED, LEARNING, OK, DriftMonitor, DriftOutput
from spanwatch.rules.drift.rivers import RiverDetector

__all__ = [
    "DETECTORS",
    "GATED",
    "LEARNING",
    "OK",
    "Baseline",
    "DriftMonitor",
    "DriftOutput",
    "Ewma",
    "RiverDetector",
    "TabularCusum",
    "arl0_for",
    "cusum_arl",
    "cusum_h",
    "design_cusum",
    "design_ewma",
    "ewma_L",
    "ewma_arl",
    "ewma_lambda",
    "learn_baseline",
    "standardise",
]
