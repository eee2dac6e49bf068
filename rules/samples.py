"""The one type every source produces: a batch of tag samples."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

QUALITY_CODES = {"good": 0, "uncertain": 1, "bad": 2}


@dataclass(frozen=True)
class SampleBatch:
    """Samples from one source, in no particular order.

    ``tags`` names the tags the indices in ``tag`` refer to; ``t`` is the source
    timestamp in epoch seconds (UTC); ``value`` is raw, in the tag's configured unit;
    ``quality`` 0 good, 1 uncertain, 2 bad; ``ref`` where the sample came from (a line
    number in a recording, a sequence number on a live connection), -1 if unknown.
    """

    tags: tuple[str, ...]
    tag: np.ndarray  # int32 index into tags
    t: np.ndarray  # float64
    value: np.ndarray  # float64
    quality: np.ndarray  # int8
    ref: np.ndarray  # int64

    def __len__(self) -> int:
        return int(self.t.shape[0])

    @staticmethod
    def empty(tags: tuple[str, ...] = ()) -> SampleBatch:
        return SampleBatch(tags, np.zeros(0, np.int32), np.zeros(0), np.zeros(0), np.zeros(0, np.int8),
                           np.zeros(0, np.int64))

    @staticmethod
    def concat(batches: list[SampleBatch]) -> SampleBatch:
        """Join batches that share one tag list."""
        if not batches:
            return SampleBatch.empty()
        tags = batches[0].tags
        assert all(b.tags == tags for b in batches), "batches must share their tag list"
        return SampleBatch(tags, *(np.concatenate([getattr(b, f) for b in batches])
                                   for f in ("tag", "t", "value", "quality", "ref")))

    def sorted_by_time(self) -> SampleBatch:
        order = np.argsort(self.t, kind="stable")
        return SampleBatch(self.tags, self.tag[order], self.t[order], self.value[order], self.quality[order],
                           self.ref[order])
