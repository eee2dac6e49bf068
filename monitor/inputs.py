"""Bad input, counted: every sample the pipeline could not use, by tag and reason.

Nothing is dropped silently. A reason is one of ``malformed``, ``non-finite value``,
``out of order``, ``duplicate timestamp``, ``late`` (arrived after its frame was
computed; used for later frames), ``unknown tag``, ``bad quality``, ``uncertain
quality``. Each keeps a count and the references (line numbers in a recording,
sequence numbers on a connection) of its first occurrences. Logging is rate-limited:
at most one line per reason every ``log_every`` seconds, with the count since the last.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from dataclasses import dataclass, field

from spanwatch.connectors.ratelog import RateLimitedLog

log = logging.getLogger("spanwatch.inputs")

# what a user can do about a reason, said once with its log line
HINTS = {
    "late": "a source that sends samples in batches (a gateway publishing every so often) needs [daemon] latency at "
            "least as long as a batch",
}


@dataclass
class InputStats:
    keep_refs: int = 20
    log_every: float = 10.0
    counts: dict[tuple[str, str], int] = field(default_factory=dict)
    refs: dict[tuple[str, str], list[int]] = field(default_factory=dict)
    _ratelog: RateLimitedLog = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        self._ratelog = RateLimitedLog(log, self.log_every)

    def add(self, tag: str, reason: str, refs: Iterable[int] = (), count: int | None = None) -> None:
        """Count ``count`` (default: len(refs)) samples of ``tag`` refused or flagged for ``reason``."""
        refs = [int(r) for r in refs]
        n = len(refs) if count is None else count
        if n <= 0:
            return
        key = (tag, reason)
        self.counts[key] = self.counts.get(key, 0) + n
        kept = self.refs.setdefault(key, [])
        kept.extend(r for r in refs[: max(0, self.keep_refs - len(kept))] if r >= 0)
        since = self._ratelog.tally(reason, n)
        if since:
            where = f" (the first at reference {kept[0]}: line or message number)" if kept else ""
            hint = f"; {HINTS[reason]}" if reason in HINTS else ""
            log.warning("input: %d sample(s) with %s, latest tag %s%s%s", since, reason, tag, where, hint)

    def total(self, reason: str | None = None) -> int:
        return sum(v for (_, r), v in self.counts.items() if reason is None or r == reason)

    def rows(self) -> list[dict[str, object]]:
        """One row per (tag, reason), sorted, for reports and the database."""
        return [{"tag": tag, "reason": reason, "count": n, "refs": self.refs.get((tag, reason), [])}
                for (tag, reason), n in sorted(self.counts.items())]
