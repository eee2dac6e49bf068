"""Waiting for a live system in tests: poll a condition with a bound (a behaviour bound, not a timing test)."""

from __future__ import annotations

import asyncio
import sqlite3
import time
from collections.abc import Callable
from pathlib import Path


async def until(pred: Callable[[], object], timeout: float, what: str) -> float:
    """Poll ``pred`` every 0.1 s; return how long it took, or fail with ``what`` after ``timeout`` seconds."""
    start = time.monotonic()
    while time.monotonic() - start < timeout:
        if pred():
            return time.monotonic() - start
        await asyncio.sleep(0.1)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")


def assert_outage_committed(db: Path, source: str) -> None:
    """The outage raised one alarm, the source's own, and no alarm per tag; every alarm raised was also cleared."""
    con = sqlite3.connect(db)
    try:
        rows = con.execute("select alarm_key, event from alarm_events order by id").fetchall()
        open_eps = con.execute("select count(*) from alarm_episodes where cleared_t is null").fetchone()[0]
    finally:
        con.close()
    raised = {k for k, e in rows if e == "raise"}
    cleared = {k for k, e in rows if e == "clear"}
    assert raised == {f"source_lost:{source}:alarm"}, sorted(raised)
    assert raised == cleared and open_eps == 0
