"""river's ADWIN and Page-Hinkley drift detectors, used as they are, behind the charts' interface.

river is imported only when such a detector is built (``from river import drift`` takes about a
second), so a line that uses only the CUSUM or EWMA never pays for it.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["RIVER_DETECTORS", "RiverDetector"]

RIVER_DETECTORS = {"adwin": "ADWIN", "page_hinkley": "PageHinkley"}


class RiverDetector:
    """river's ``drift.ADWIN`` or ``drift.PageHinkley`` on a stream of samples, unchanged.

    ``name``: "adwin" or "page_hinkley"; ``params`` are passed to river's constructor as they are
    (river's defaults otherwise). :meth:`update` feeds the samples one by one (river's detectors
    are per-sample) and returns river's ``drift_detected`` per sample. river resets the detector
    itself after a detection: its window (ADWIN) or its running mean and sums (Page-Hinkley) start
    again from the samples that follow.

    What they test, in short: ADWIN keeps a variable-length window and drops its older part when
    the means of two sub-windows differ by more than a Hoeffding-type bound at confidence
    ``delta`` (A. Bifet and R. Gavalda, "Learning from time-changing data with adaptive
    windowing", SIAM International Conference on Data Mining, 2007). Page-Hinkley accumulates the
    deviations of each sample from the running (fading, ``alpha``) mean of all samples so far,
    less ``delta``, and signals when the sum rises ``threshold`` above its minimum (E. S. Page,
    "Continuous inspection schemes", *Biometrika* 41 (1954) 100-115; river's documentation). Since
    the reference is the running mean, a slow drift is partly absorbed into it, unlike the
    fixed-reference :class:`~spanwatch.rules.drift.charts.TabularCusum`.

    Assumptions: none on the distribution (ADWIN's bound is distribution-free for bounded
    samples); their false-alarm rates are not designed from an ARL here: set their parameters.
    """

    def __init__(self, name: str, **params: Any) -> None:
        if name not in RIVER_DETECTORS:
            raise ValueError(f"RiverDetector: name must be one of {sorted(RIVER_DETECTORS)}, got {name!r}")
        self.name = name
        self.params = dict(params)
        self._detector = self._build()

    def _build(self) -> Any:
        from river import drift  # lazy: costs about a second

        return getattr(drift, RIVER_DETECTORS[self.name])(**self.params)

    def reset(self) -> None:
        """A fresh detector with the same parameters."""
        self._detector = self._build()

    def update(self, z: np.ndarray) -> np.ndarray:
        """Feed the samples ``z`` (1-D) in order; True where river reports a drift."""
        z = np.asarray(z, dtype=float)
        out = np.zeros(z.shape[0], dtype=bool)
        det = self._detector
        for i, v in enumerate(z.tolist()):
            det.update(v)
            out[i] = det.drift_detected
        return out
