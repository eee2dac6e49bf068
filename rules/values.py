"""Plain values for records: finite numbers or nothing, epoch seconds as ISO 8601."""

from __future__ import annotations

import math
from datetime import UTC, datetime


def finite_or_none(x: float | None) -> float | None:
    """``x`` as a float if it is a finite number, else None (JSON and SQL have no NaN).

    >>> finite_or_none(1.5), finite_or_none(float("nan")), finite_or_none(None)
    (1.5, None, None)
    """
    return float(x) if x is not None and math.isfinite(x) else None


def iso(t: float | None) -> str:
    """Epoch seconds -> ISO 8601 in UTC with milliseconds ('' for None).

    >>> iso(0.0)
    '1970-01-01T00:00:00.000+00:00'
    """
    if t is None:
        return ""
    return datetime.fromtimestamp(t, UTC).isoformat(timespec="milliseconds")


def parse_iso(text: str) -> float:
    """An ISO 8601 time with a UTC offset -> epoch s; ValueError says what was expected.

    >>> parse_iso("2026-03-02T06:00:00+01:00")
    1772427600.0
    """
    try:
        dt = datetime.fromisoformat(text)
    except ValueError:
        raise ValueError(f"expected an ISO 8601 time such as 2026-03-02T06:00:00+01:00, got {text!r}") from None
    if dt.tzinfo is None:
        raise ValueError(f"expected a time with a UTC offset (e.g. +01:00 or Z), got {text!r}")
    return dt.timestamp()
