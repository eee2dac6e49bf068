"""Waiting for a live system in tests: poll a condition with a bound (a behaviour bound, not a timing test)."""

from __future__ import annotations

import asyncio
import time
from collections.abc import Callable


async def until(pred: Callable[[], object], timeout: float, what: str) -> float:
    """Poll ``pred`` every 0.1 s; return how long it took, or fail with ``what`` after ``timeout`` seconds."""
    start = time.monotonic()
    while time.monotonic() - start < timeout:
        if pred():
            return time.monotonic() - start
        await asyncio.sleep(0.1)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")
