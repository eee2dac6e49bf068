"""Sample periods: what a tag's configured ``sample_period`` says against what arrives.

A tag's ``sample_period`` sets its stale limit (``stale_after`` periods) and, on an OPC UA source,
the sampling interval asked of the server. Left at the 20 ms default on a tag that arrives at 5 Hz,
the tag is stale between any two samples (200 ms > 5 x 20 ms) and every check that reads it is
switched off, while the config itself is valid. Three places look for it:

* ``check-tags`` (live): :func:`median_periods` on what arrived in its window;
* ``check-config`` (the config alone): :func:`config_findings`, an OPC UA source whose sampling or
  publishing interval makes a tag's samples arrive further apart than its stale limit allows;
* replay: :class:`PeriodEstimator` on the first samples of each tag of the recording.

The estimate is the median of the intervals between successive sample times of a tag (times
sorted, repeated times left out): robust to a few lost or late samples and to jitter. A tag
"disagrees" when the median is more than :data:`FACTOR` times off its configured period either
way (common practice, no source: jitter and decimation by 2 stay inside, a 5 Hz tag set at 50 Hz
is ten times off).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from spanwatch.rules.samples import SampleBatch

if TYPE_CHECKING:
    from spanwatch.monitor.line import Line

FACTOR = 2.0  # a median interval more than twice or less than half the configured period disagrees
MIN_INTERVALS = 5  # fewer intervals of a tag: no estimate (common practice, no source)
KEEP = 2000  # sample times kept per tag by the replay estimator (the first ones)


def median_periods(tag: np.ndarray, t: np.ndarray, n_tags: int, *, min_intervals: int = MIN_INTERVALS
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Each tag's median sample interval (s) and the number of intervals it rests on.

    ``tag`` indexes ``0 .. n_tags - 1``; ``t`` in seconds. Per tag, the times are sorted and the
    differences between distinct successive times taken; the median of those is the estimate
    (NaN when fewer than ``min_intervals``).

    >>> tag = np.array([0, 0, 0, 1, 1, 0, 0, 0, 0])
    >>> t = np.array([0.0, 0.2, 0.4, 0.0, 1.0, 0.6, 0.8, 1.0, 1.2])
    >>> p, n = median_periods(tag, t, 2)
    >>> round(float(p[0]), 3), int(n[0]), bool(np.isnan(p[1])), int(n[1])
    (0.2, 6, True, 1)
    """
    out = np.full(n_tags, np.nan)
    counts = np.zeros(n_tags, dtype=np.int64)
    if not len(t):
        return out, counts
    order = np.lexsort((t, tag))
    tg, ts = tag[order], t[order]
    same = tg[1:] == tg[:-1]
    dt = np.diff(ts)
    ok = same & (dt > 0) & np.isfinite(dt)
    for k in np.unique(tg):
        d = dt[ok & (tg[1:] == k)]
        counts[k] = len(d)
        if len(d) >= min_intervals:
            out[k] = float(np.median(d))
    return out, counts


def disagrees(configured: float, observed: float, factor: float = FACTOR) -> bool:
    """Whether an observed median interval is more than ``factor`` times off the configured period.

    >>> disagrees(0.02, 0.2), disagrees(0.02, 0.021), disagrees(0.2, 0.02), disagrees(0.02, float("nan"))
    (True, False, True, False)
    """
    if not (np.isfinite(observed) and observed > 0 and configured > 0):
        return False
    return bool(observed > configured * factor or observed < configured / factor)


@dataclass(frozen=True)
class PeriodMismatch:
    """A tag whose samples arrive at another period than configured."""

    tag: str
    configured: float  # s
    observed: float  # s, median interval
    intervals: int
    stale_limit: float  # s: stale_after x sample_period

    @property
    def goes_stale(self) -> bool:
        """Samples further apart than the stale limit: the tag is stale between samples."""
        return self.observed > self.stale_limit

    def text(self) -> str:
        """One sentence, naming the tag, the configured and the observed period."""
        more = (f"; its stale limit {fmt_period(self.stale_limit)} is shorter, so it goes stale between samples "
                f"and every check reading it is off" if self.goes_stale else "")
        return (f"{self.tag}: sample_period {fmt_period(self.configured)} configured, samples arrive every "
                f"{fmt_period(self.observed)} (median of {self.intervals} intervals){more}; set sample_period "
                f"= \"{fmt_period(self.observed)}\"")


def fmt_period(seconds: float) -> str:
    """A period as a person writes it in the config.

    >>> fmt_period(0.02), fmt_period(0.2), fmt_period(1.5), fmt_period(0.0004)
    ('20 ms', '200 ms', '1.5 s', '0.4 ms')
    """
    if seconds < 1.0:
        return f"{seconds * 1e3:.3g} ms"
    return f"{seconds:.3g} s"


def mismatches(line: Line, periods: Mapping[str, tuple[float, int]]) -> list[PeriodMismatch]:
    """The tags of ``line`` whose observed median interval (``periods``: tag -> (median s, intervals))
    disagrees with the configured sample period."""
    out = []
    for name, (observed, n) in periods.items():
        info = line.tags.get(name)
        if info is not None and disagrees(info.sample_period, observed):
            out.append(PeriodMismatch(name, info.sample_period, observed, n, info.stale_after))
    return out


class PeriodEstimator:
    """Keeps the first :data:`KEEP` sample times of each tag from a stream of batches (a replay), and estimates
    each tag's median interval from them. Memory: ``KEEP`` floats per tag."""

    def __init__(self, tags: tuple[str, ...], keep: int = KEEP) -> None:
        self.tags = tags
        self.keep = keep
        self._t: list[list[np.ndarray]] = [[] for _ in tags]
        self._n = np.zeros(len(tags), dtype=np.int64)

    def feed(self, batch: SampleBatch) -> None:
        if not len(batch) or bool((self._n >= self.keep).all()):
            return
        for k in np.unique(batch.tag):
            if self._n[k] >= self.keep:
                continue
            ts = batch.t[batch.tag == k][: self.keep - int(self._n[k])]
            self._t[k].append(ts)
            self._n[k] += len(ts)

    def periods(self) -> dict[str, tuple[float, int]]:
        """tag -> (median interval s, intervals) for the tags with an estimate."""
        out = {}
        for k, name in enumerate(self.tags):
            if not self._t[k]:
                continue
            t = np.concatenate(self._t[k])
            p, n = median_periods(np.zeros(len(t), dtype=np.int64), t, 1)
            if np.isfinite(p[0]):
                out[name] = (float(p[0]), int(n[0]))
        return out


def config_findings(line: Line) -> list[str]:
    """What the config alone tells of sample periods that cannot hold, one sentence each.

    On an OPC UA source (``connectors/opcua.py``): a server samples each item at the sampling
    interval (the source's ``sampling_interval``, else the tag's ``sample_period``) and sends what it
    sampled once per publishing interval (OPC UA Part 4, CreateSubscription and
    CreateMonitoredItems; from memory). So
    * a ``sampling_interval`` longer than a tag's ``sample_period``: its samples come that far apart;
    * a tag's stale limit (``stale_after`` x ``sample_period``) shorter than the sampling interval or
      the publishing interval: the tag is stale between samples or between two deliveries.
    """
    out = []
    for name, spec in line.config.sources.items():
        if spec.kind != "opcua":
            continue
        for tag, t in line.tags_of_source(name).items():
            info = line.tags[tag]
            sampling = spec.sampling_interval if spec.sampling_interval is not None else t.sample_period
            if spec.sampling_interval is not None and spec.sampling_interval > t.sample_period * FACTOR:
                out.append(f"{tag}: sample_period {fmt_period(t.sample_period)}, but source {name} samples every "
                           f"{fmt_period(spec.sampling_interval)} (sampling_interval): set the tag's sample_period "
                           f"to it or shorten the source's sampling_interval")
            if info.stale_after < sampling:
                out.append(f"{tag}: stale limit {fmt_period(info.stale_after)} (stale_after {t.stale_after:g} x "
                           f"sample_period) is shorter than the sampling interval {fmt_period(sampling)} of source "
                           f"{name}: the tag goes stale between samples")
            elif info.stale_after < spec.publishing_interval:
                out.append(f"{tag}: stale limit {fmt_period(info.stale_after)} (stale_after {t.stale_after:g} x "
                           f"sample_period) is shorter than the publishing interval "
                           f"{fmt_period(spec.publishing_interval)} of source {name}: the tag goes stale between "
                           f"two deliveries; raise stale_after or shorten publishing_interval")
    return out
