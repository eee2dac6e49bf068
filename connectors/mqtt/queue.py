"""The bounded queue between a connection's network thread and the event loop.

The network thread decodes each message and appends a ``(tag index, t, value, quality,
ref)`` tuple; a task on the event loop takes whole batches. paho acknowledges a QoS 1
message (PUBACK) when ``on_message`` returns, so with ``overflow = "block"`` a full queue
holds the network thread: the broker's in-flight window fills and it keeps the rest queued
for the session: backpressure instead of loss (up to the broker's own queue limit,
mosquitto's ``max_queued_messages``). With ``"drop_oldest"`` the oldest queued sample makes
room and is counted.
"""

from __future__ import annotations

import threading
from collections import deque
from collections.abc import Callable

from spanwatch.connectors.live import ConnectorStats

Item = tuple[int, float, float, int, int]  # (tag index, t, value, quality, ref)


class SampleQueue:
    """Bounded FIFO of decoded samples, written by one network thread and read on the event loop.

    ``put`` counts overflow in ``stats.overflow``: with ``"drop_oldest"`` every sample
    dropped to make room, with ``"block"`` every time it has to wait for room (it waits
    until the reader makes room or :meth:`close` is called; after close it never waits
    and keeps everything, so a stopping connector loses nothing). One writer and
    one reader: appends and pops are atomic deque operations; the lock only orders a drop
    or a wait against the reader.
    """

    def __init__(self, maxsize: int, policy: str, stats: ConnectorStats | None = None) -> None:
        if policy not in ("block", "drop_oldest"):
            raise ValueError(f"expected overflow 'block' or 'drop_oldest', got {policy!r}")
        self.maxsize = maxsize
        self.block = policy == "block"
        self._items: deque[Item] = deque()
        self._lock = threading.Lock()
        self._room = threading.Condition(self._lock)
        self._waiting = False
        self.closed = False
        self.on_first: Callable[[], None] | None = None  # called when the queue stops being empty
        self.stats = stats if stats is not None else ConnectorStats()  # overflow is counted as it happens

    def __len__(self) -> int:
        return len(self._items)

    def put(self, item: Item) -> None:
        items = self._items
        if len(items) >= self.maxsize and not self.closed:
            if self.block:
                with self._room:
                    if len(items) >= self.maxsize and not self.closed:
                        self.stats.overflow += 1  # counted before waiting, so the wait is visible while it lasts
                        self._waiting = True
                        while len(items) >= self.maxsize and not self.closed:
                            self._room.wait(0.25)
                        self._waiting = False
            else:
                with self._lock:
                    if len(items) >= self.maxsize:
                        items.popleft()
                        self.stats.overflow += 1
        items.append(item)
        if len(items) == 1 and self.on_first is not None:
            self.on_first()

    def take(self, limit: int) -> list[Item]:
        with self._lock:
            items = self._items
            n = min(limit, len(items))
            if n == 0:
                return []
            pop = items.popleft
            out = [pop() for _ in range(n)]
            if self._waiting:
                self._room.notify_all()
        return out

    def close(self) -> None:
        with self._lock:
            self.closed = True
            self._room.notify_all()
