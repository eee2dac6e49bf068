"""Rate-limited logging of bad input: at most one line per reason every few seconds, with a count.

A flood of malformed messages, unknown topics or refused samples must be visible in the
log without filling it: for each reason the first occurrence is logged at once, later
ones are counted, and the next line (no sooner than ``every`` seconds after the last one
of that reason) carries the number of occurrences since the last line. Used by the MQTT
and OPC UA connectors and by the application's input accounting.
"""

from __future__ import annotations

import logging
import math
import threading
import time

LOG_EVERY = 10.0  # seconds between two log lines of one reason


class RateLimitedLog:
    """At most one log line per reason every ``every`` seconds, with the number of occurrences since the last.

    :meth:`tally` only counts and says when a line is due, so a caller on a hot path formats
    its message only then; calling the object counts one occurrence and logs ``message``
    when due. Safe to call from several threads (a network thread and the event loop).

    >>> rl = RateLimitedLog(logging.getLogger("doctest"), every=3600.0)
    >>> rl.tally("not a number"), rl.tally("not a number"), rl.tally("not JSON", 5)
    (1, 0, 5)
    """

    def __init__(self, logger: logging.Logger, every: float = LOG_EVERY, level: int = logging.WARNING) -> None:
        self.logger = logger
        self.every = every
        self.level = level
        self._last: dict[str, float] = {}
        self._since: dict[str, int] = {}
        self._lock = threading.Lock()

    def tally(self, reason: str, n: int = 1) -> int:
        """Count ``n`` occurrences of ``reason``; the count since the last line (these included) if a line is due
        now, else 0."""
        now = time.monotonic()
        with self._lock:
            count = self._since.get(reason, 0) + n
            if now - self._last.get(reason, -math.inf) < self.every:
                self._since[reason] = count
                return 0
            self._last[reason], self._since[reason] = now, 0
        return count

    def __call__(self, reason: str, message: str) -> None:
        """Count one occurrence of ``reason``; log ``message`` (with the count when more than one) if due."""
        n = self.tally(reason)
        if n:
            self.logger.log(self.level, "%s%s", message, f" ({n} time(s) since the last report)" if n > 1 else "")
