"""Alarm-system performance metrics (KPIs) over a window of alarm episodes, as the alarm-management
standards define them.

Sources: ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries*, clause 16
(monitoring and assessment) and its table of alarm performance metrics; IEC 62682:2014 (the same
table); EEMUA 191, 3rd ed. (2013), *Alarm systems: a guide to design, management and procurement*,
its alarm-rate performance levels and the definition of a flood. All figures below are **from memory**
(the clauses were not checked against the text).

Benchmarks (the named constants of this module):

* annunciated alarms per operator position: ~1 per 10 min acceptable, ~2 maximum manageable; ~6 / ~12
  per hour; ~150 / ~300 per day (ISA-18.2 table; EEMUA 191 calls one alarm in 10 min "very likely to be
  acceptable" and one in 5 min "manageable"),
* % of time in flood: below ~1 %; a flood begins at more than 10 alarms in 10 min and ends when the rate
  falls below 5 per 10 min (EEMUA 191; ISA-18.2 gives "more than 10 per 10 minutes" as its example),
* the top 10 most frequent alarms: ~1 % to 5 % of all alarms at most (ISA-18.2 table),
* chattering and fleeting alarms: none; stale (standing) alarms: fewer than 5 on any day,
* annunciated priority distribution with 3 priorities: ~80 % low, ~15 % medium, ~5 % high; with a 4th
  ("urgent" here): under ~1 % of that one.

What counts:

* **Raises** are the episodes raised in ``[start, end)``; an episode raised before ``start`` and still active
  during the window counts only for staleness.
* **Advisory** alarms are not annunciated to an operator: they are left out of every operator metric (rates,
  floods, top contributors, chattering, fleeting, stale, priority distribution), and reported separately
  (:attr:`AlarmKpis.advisory_raises`, and in :attr:`AlarmKpis.per_key`, the full inventory). So are raises of
  alarms that were shelved, suppressed by design or out of service at the time (:attr:`AlarmKpis.hidden_raises`):
  the operator did not see them (ANSI/ISA-18.2-2016 counts annunciated alarms; from memory).
* **Per operator**: the line's counts are divided by ``operators`` (the number of operator positions), as if
  the load were shared evenly; the flood thresholds apply to that per-operator rate.
* **Slots**: 10-min (and 1-h) slots start at ``start``: slot ``i`` is ``[start + 600 i, start + 600 (i + 1))``;
  a last slot cut short by ``end`` is a slot too. Averages are raises over the window's length in 10 min,
  hours or days (not over slots), so a partial slot does not distort them.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

# --- benchmarks (ISA-18.2-2016 clause 16 table / IEC 62682:2014 / EEMUA 191 3rd ed.; from memory) -----------------
PER_10MIN_ACCEPTABLE = 1.0
PER_10MIN_MANAGEABLE = 2.0
PER_HOUR_ACCEPTABLE = 6.0
PER_HOUR_MANAGEABLE = 12.0
PER_DAY_ACCEPTABLE = 150.0
PER_DAY_MANAGEABLE = 300.0
FLOOD_TIME_SHARE_MAX = 0.01
TOP10_SHARE_MAX = 0.05
STALE_MAX_PER_DAY = 5
PRIORITY_SHARE_3 = {"low": 0.80, "medium": 0.15, "high": 0.05}
PRIORITY_SHARE_HIGHEST_MAX = 0.01  # a 4th, highest priority ("urgent")

PRIORITIES = ("advisory", "low", "medium", "high", "urgent")
ANNUNCIATED = PRIORITIES[1:]
SLOT_S = 600.0
HOUR_S = 3600.0
DAY_S = 86400.0


@dataclass(frozen=True)
class KpiThresholds:
    """The definitions' parameters, with their defaults and sources.

    ``flood_start`` / ``flood_end`` / ``flood_window``: a flood begins when the trailing-window count per
    operator exceeds ``flood_start`` and ends when it falls below ``flood_end`` (EEMUA 191 3rd ed.: more than
    10 in 10 min, below 5 in 10 min; from memory). ``chatter_count`` / ``chatter_window``: an alarm raised
    ``chatter_count`` times or more within ``chatter_window`` seconds chatters (3 in 60 s: ISA-TR18.2.5 and
    EEMUA 191 guidance; from memory). ``fleeting_s``: an episode shorter than this is fleeting (1 s:
    common practice, no source; ISA-18.2 defines fleeting without a number). ``stale_s``: an alarm active this
    long is stale (24 h: ISA-18.2-2016 "e.g. 24 hours"; from memory). ``top_n``: how many top contributors.
    """

    flood_start: float = 10.0
    flood_end: float = 5.0
    flood_window: float = SLOT_S
    chatter_count: int = 3
    chatter_window: float = 60.0
    fleeting_s: float = 1.0
    stale_s: float = DAY_S
    top_n: int = 10


@dataclass(frozen=True)
class Episodes:
    """Alarm episodes as parallel arrays: key, check kind, object, priority (:data:`PRIORITIES`), raise time and
    clear time (epoch s; NaN while active)."""

    key: np.ndarray
    kind: np.ndarray
    object_id: np.ndarray
    priority: np.ndarray
    raised_t: np.ndarray
    cleared_t: np.ndarray
    hidden: np.ndarray | None = None  # raised while shelved, suppressed or out of service (not annunciated)

    @classmethod
    def of(cls, key: Sequence[str], kind: Sequence[str], object_id: Sequence[str], priority: Sequence[str],
           raised_t: Sequence[float], cleared_t: Sequence[float | None],
           hidden: Sequence[bool] | None = None) -> Episodes:
        """Arrays from sequences (None in ``cleared_t`` = still active; ``hidden``: raised while shelved, suppressed
        or out of service); refuses unequal lengths and unknown priorities."""
        cols = [np.asarray(list(c), dtype=object) for c in (key, kind, object_id, priority)]
        r = np.asarray(list(raised_t), dtype=float)
        c = np.asarray([np.nan if x is None else x for x in cleared_t], dtype=float)
        if len({len(a) for a in (*cols, r, c)}) > 1:
            raise ValueError("episodes: every column needs the same length")
        bad = sorted({str(p) for p in cols[3]} - set(PRIORITIES))
        if bad:
            raise ValueError(f"episodes: priority expected one of {', '.join(PRIORITIES)}, got {bad[0]!r}")
        h = np.zeros(len(r), dtype=bool) if hidden is None else np.asarray(list(hidden), dtype=bool)
        if len(h) != len(r):
            raise ValueError("episodes: every column needs the same length")
        return cls(*(a.astype(str) if len(a) else np.array([], dtype=str) for a in cols), r, c, h)

    def __len__(self) -> int:
        return len(self.raised_t)


@dataclass(frozen=True)
class FloodPeriod:
    """A flood: ``[start, end)`` (epoch s), the annunciated raises it holds, and whether the window ended in it."""

    start: float
    end: float
    alarms: int
    ongoing: bool


@dataclass(frozen=True)
class KeyCount:
    """An alarm key, its number of raises and their share of the raises counted."""

    key: str
    count: int
    share: float


@dataclass(frozen=True)
class StaleAlarm:
    """An episode active ``age_s`` seconds or more (at its clear, or at the window's end when later)."""

    key: str
    raised_t: float
    cleared_t: float | None
    age_s: float


@dataclass(frozen=True)
class PriorityShare:
    """Raises of one priority, their share of the annunciated raises and the recommended share (None: none given)."""

    priority: str
    count: int
    share: float
    recommended: float | None


@dataclass(frozen=True)
class AlarmKpis:
    """The metrics of one window ``[start, end)`` (see the module docstring for what counts)."""

    start: float
    end: float
    operators: int
    thresholds: KpiThresholds
    raises: int  # annunciated raises in the window
    advisory_raises: int
    slot_counts: tuple[int, ...]  # annunciated raises per 10-min slot, all operators together
    avg_per_10min: float  # per operator, from here on
    max_per_10min: float
    share_slots_over_1: float
    share_slots_over_2: float
    avg_per_hour: float
    max_per_hour: float
    avg_per_day: float
    floods: tuple[FloodPeriod, ...]
    flood_time_share: float
    largest_flood: FloodPeriod | None
    top: tuple[KeyCount, ...]
    top_share: float
    chattering_keys: tuple[str, ...]
    chattering_raises: int
    fleeting: int
    fleeting_keys: tuple[str, ...]
    stale: tuple[StaleAlarm, ...]
    priorities: tuple[PriorityShare, ...]
    per_key: tuple[KeyCount, ...] = field(default=())  # every raise in the window, advisory included
    hidden_raises: int = 0  # raised while shelved, suppressed by design or out of service: not annunciated


def chattering_mask(keys: np.ndarray, raised_t: np.ndarray, count: int = 3, window: float = 60.0) -> np.ndarray:
    """Per raise: True if it is one of ``count`` or more raises of its key within ``window`` seconds
    (first to last of the group, inclusive: ``t[j + count - 1] - t[j] <= window``)."""
    if count < 1:
        raise ValueError(f"chattering count: expected 1 or more, got {count}")
    n = len(raised_t)
    out = np.zeros(n, dtype=bool)
    if n < count:
        return out
    keys = np.asarray(keys).astype(str)
    order = np.lexsort((raised_t, keys))
    k, t = keys[order], np.asarray(raised_t, dtype=float)[order]
    span = count - 1
    starts = np.zeros(n, dtype=bool)
    starts[: n - span] = (k[span:] == k[: n - span]) & (t[span:] - t[: n - span] <= window)
    # raise q is in a group if a group starts at one of q - span .. q
    in_group = np.convolve(starts.astype(int), np.ones(count, dtype=int))[:n] > 0
    out[order] = in_group
    return out


def chattering_keys(keys: Sequence[str] | np.ndarray, raised_t: Sequence[float] | np.ndarray, count: int = 3,
                    window: float = 60.0) -> frozenset[str]:
    """The keys raised ``count`` times or more within ``window`` seconds (inclusive) — online, e.g. over the
    raises of the last minutes.

    3 raises in 60 s: ISA-TR18.2.5 / EEMUA 191 guidance on chattering alarms; from memory.

    >>> sorted(chattering_keys(["a", "a", "b", "a"], [0.0, 20.0, 30.0, 50.0]))
    ['a']
    >>> sorted(chattering_keys(["a", "a", "a"], [0.0, 35.0, 70.0]))
    []
    """
    k = np.asarray(list(keys) if not isinstance(keys, np.ndarray) else keys, dtype=object).astype(str)
    m = chattering_mask(k, np.asarray(raised_t, dtype=float), count, window)
    return frozenset(k[m].tolist())


def slot_counts(raised_t: np.ndarray, start: float, end: float, slot: float) -> np.ndarray:
    """Raises per slot ``[start + i slot, start + (i + 1) slot)`` up to ``end`` (the last slot may be short)."""
    n = max(1, int(np.ceil((end - start) / slot)))
    r = np.asarray(raised_t, dtype=float)
    r = r[(r >= start) & (r < end)]
    idx = np.minimum(((r - start) // slot).astype(int), n - 1)
    return np.bincount(idx, minlength=n)


def flood_periods(raised_t: np.ndarray, end: float, *, above: float = 10.0, below: float = 5.0,
                  window: float = SLOT_S) -> list[FloodPeriod]:
    """Flood periods of a sequence of raise times, by a trailing window.

    ``N(t)`` = raises in ``(t - window, t]``. A flood **starts** at a raise where ``N > above``, and **ends** at
    the first moment after it where ``N < below`` — a moment when a raise leaves the window, ``r_i + window``
    (raises at that same instant counted) — or at ``end`` if the window ends first (``ongoing``). Its
    ``alarms`` are the raises from the first one in the window that started it (but none before the previous
    flood's end) to its end, exclusive. Thresholds are counts (multiply per-operator rates by the number of
    operators). EEMUA 191 3rd ed. (2013): more than 10 in 10 min starts, below 5 in 10 min ends; from memory.
    """
    r = np.sort(np.asarray(raised_t, dtype=float))
    if not len(r):
        return []
    n_up = np.searchsorted(r, r, "right") - np.searchsorted(r, r - window, "right")
    down_t = r + window
    n_down = np.searchsorted(r, down_t, "right") - np.searchsorted(r, r, "right")
    ups = np.flatnonzero(n_up > above)
    downs = np.flatnonzero(n_down < below)
    out: list[FloodPeriod] = []
    prev_end = -np.inf
    while True:
        i = np.searchsorted(r[ups], prev_end, "right")
        if i >= len(ups):
            return out
        k = ups[i]
        s = r[k]
        if s >= end:
            return out
        j = np.searchsorted(down_t[downs], s, "right")
        e = down_t[downs[j]] if j < len(downs) else np.inf
        ongoing = e >= end
        e = min(e, end)
        first = max(np.searchsorted(r, s - window, "right"), np.searchsorted(r, prev_end, "left"))
        alarms = int(np.searchsorted(r, e, "left") - first)
        out.append(FloodPeriod(float(s), float(e), alarms, bool(ongoing)))
        prev_end = e


def _key_counts(keys: np.ndarray, total: int) -> list[KeyCount]:
    """Keys by count, most first (ties by key)."""
    if not len(keys):
        return []
    names, counts = np.unique(keys, return_counts=True)
    order = sorted(range(len(names)), key=lambda i: (-counts[i], names[i]))
    return [KeyCount(str(names[i]), int(counts[i]), float(counts[i] / total)) for i in order]


def alarm_kpis(ep: Episodes, start: float, end: float, *, operators: int = 1,
               thresholds: KpiThresholds | None = None) -> AlarmKpis:
    """The alarm-system KPIs of ``ep`` over ``[start, end)`` (epoch s) for ``operators`` operator positions.

    See the module docstring for the benchmarks, their sources and what counts.
    """
    th = thresholds or KpiThresholds()
    if not end > start:
        raise ValueError(f"window: expected start < end, got {start} .. {end}")
    if operators < 1:
        raise ValueError(f"operators: expected 1 or more, got {operators}")
    dur = end - start
    in_win = (ep.raised_t >= start) & (ep.raised_t < end)
    hidden = ep.hidden if ep.hidden is not None else np.zeros(len(ep), dtype=bool)
    advisory = ep.priority == "advisory"
    annunciated = ~advisory & ~hidden
    sel = in_win & annunciated
    r, keys = ep.raised_t[sel], ep.key[sel]
    n = int(sel.sum())

    slots = slot_counts(r, start, end, SLOT_S)
    hours = slot_counts(r, start, end, HOUR_S)
    per_op = slots / operators

    floods = flood_periods(r, end, above=th.flood_start * operators, below=th.flood_end * operators,
                           window=th.flood_window)
    largest = max(floods, key=lambda f: (f.alarms, f.end - f.start), default=None)

    ranked = _key_counts(keys, n)
    top = tuple(ranked[: th.top_n])

    chat = chattering_mask(keys, r, th.chatter_count, th.chatter_window)
    dur_ep = ep.cleared_t[sel] - r
    fleet = dur_ep < th.fleeting_s  # NaN (active) compares False

    active = annunciated & (ep.raised_t < end) & (np.isnan(ep.cleared_t) | (ep.cleared_t > start))
    reach = np.where(np.isnan(ep.cleared_t), end, np.minimum(ep.cleared_t, end)) - ep.raised_t
    stale_idx = np.flatnonzero(active & (reach >= th.stale_s))
    stale = tuple(sorted((StaleAlarm(str(ep.key[i]), float(ep.raised_t[i]),
                                     None if np.isnan(ep.cleared_t[i]) else float(ep.cleared_t[i]),
                                     float(reach[i])) for i in stale_idx), key=lambda s: (s.raised_t, s.key)))

    pr = ep.priority[sel]
    priorities = tuple(
        PriorityShare(p, int((pr == p).sum()), float((pr == p).sum() / n) if n else 0.0,
                      PRIORITY_SHARE_3.get(p, PRIORITY_SHARE_HIGHEST_MAX if p == "urgent" else None))
        for p in ANNUNCIATED)

    return AlarmKpis(
        start=float(start), end=float(end), operators=operators, thresholds=th, raises=n,
        advisory_raises=int((in_win & advisory).sum()),
        hidden_raises=int((in_win & hidden & ~advisory).sum()),
        slot_counts=tuple(int(x) for x in slots),
        avg_per_10min=n / operators / (dur / SLOT_S), max_per_10min=float(per_op.max()),
        share_slots_over_1=float(np.mean(per_op > PER_10MIN_ACCEPTABLE)),
        share_slots_over_2=float(np.mean(per_op > PER_10MIN_MANAGEABLE)),
        avg_per_hour=n / operators / (dur / HOUR_S), max_per_hour=float(hours.max() / operators),
        avg_per_day=n / operators / (dur / DAY_S),
        floods=tuple(floods), flood_time_share=sum(f.end - f.start for f in floods) / dur, largest_flood=largest,
        top=top, top_share=sum(k.count for k in top) / n if n else 0.0,
        chattering_keys=tuple(sorted(set(keys[chat].tolist()))), chattering_raises=int(chat.sum()),
        fleeting=int(fleet.sum()), fleeting_keys=tuple(sorted(set(keys[fleet].tolist()))),
        stale=stale, priorities=priorities,
        per_key=tuple(_key_counts(ep.key[in_win], int(in_win.sum()))),
    )
