"""The one shape every check has: what it reads, what it emits, when it is valid.

A check is a small object with ``kind`` (what it computes), ``object_id`` (the
roller, span, winder or tag it is about), ``inputs`` (the signal names it reads),
``rests_on`` (the assumption a user must accept to trust it) and
``update(block) -> CheckResult``. The physics inside is a pure, vectorised
function in the same module; the check object only keeps the state that has to
survive from one block of frames to the next (windows, baselines, roll starts).

Validity is data, not an exception: every frame of a result carries a
:class:`Reason`; the value is NaN wherever the reason is not ``OK``. A block of a
million frames never stops at one NaN, a zero speed or a negative tension.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, fields
from enum import IntEnum
from typing import TYPE_CHECKING, ClassVar, Protocol, runtime_checkable

import numpy as np

if TYPE_CHECKING:
    from spanwatch.rules.linemodel import LineModel

FloatArray = np.ndarray
BoolArray = np.ndarray


class Reason(IntEnum):
    """Why a frame of a check result is (not) valid."""

    OK = 0
    LINE_STATE = 1  # gated by the line state (stopped, threading, accelerating ...)
    INPUT_BAD = 2  # an input is NaN/inf, out of range, bad or uncertain quality, or stale
    OUT_OF_DOMAIN = 3  # inputs fine, but the formula does not apply (tension too low, speed too low ...)
    WARMING_UP = 4  # not enough history yet (window filling, calibration running)
    ROLL_CHANGE = 5  # a roll change is settling


class LineState(IntEnum):
    """Line state derived from the line speed and its rate of change."""

    STOPPED = 0
    THREADING = 1
    ACCELERATING = 2
    RUNNING = 3
    DECELERATING = 4
    UNKNOWN = 5  # the line speed signal is not usable


def state_name(code: int) -> str:
    """The line state's name in lower case (``running``), or the code itself if it is not one."""
    try:
        return LineState(code).name.lower()
    except ValueError:
        return str(code)


MOVING_STATES = (LineState.THREADING, LineState.ACCELERATING, LineState.RUNNING, LineState.DECELERATING)
PRODUCTION_STATES = (LineState.ACCELERATING, LineState.RUNNING, LineState.DECELERATING)

# Plain ints for the per-block hot path (enum attribute access costs microseconds).
_OK = int(Reason.OK)
_OUT_OF_DOMAIN = int(Reason.OUT_OF_DOMAIN)
_STATE_LUT: dict[tuple[int, ...], np.ndarray] = {}


def state_mask(line_state: np.ndarray, states: Iterable[LineState]) -> np.ndarray:
    """True where the line state is one of ``states`` (a lookup table per set of states)."""
    key = tuple(int(s) for s in states)
    lut = _STATE_LUT.get(key)
    if lut is None:
        lut = np.zeros(len(LineState), dtype=bool)
        lut[list(key)] = True
        _STATE_LUT[key] = lut
    return lut[line_state]


@dataclass(frozen=True)
class Signal:
    """A named signal over the frames of a block, in SI, with a usable-or-not mask."""

    value: FloatArray
    ok: BoolArray

    @staticmethod
    def missing(n: int) -> Signal:
        return Signal(np.full(n, np.nan), np.zeros(n, dtype=bool))


@dataclass(frozen=True)
class TagFrames:
    """Raw per-tag frames for plausibility: held value (SI), quality code, age in seconds.

    ``quality``: 0 good, 1 uncertain, 2 bad, 3 no sample yet.
    """

    names: tuple[str, ...]
    value: FloatArray  # (n, k)
    quality: np.ndarray  # (n, k) int8
    age: FloatArray  # (n, k)

    def column(self, name: str) -> int:
        return self.names.index(name)


QUALITY_GOOD, QUALITY_UNCERTAIN, QUALITY_BAD, QUALITY_NONE = 0, 1, 2, 3


@dataclass
class Block:
    """A block of time-aligned frames: what every check reads.

    ``t`` epoch seconds (float64), ``signals`` derived SI signals by name,
    ``line_state`` a :class:`LineState` code per frame, ``roll_start`` per winder a
    mask that is true at the first frame of a new roll, ``tags`` raw tag frames.
    """

    t: FloatArray
    signals: dict[str, Signal]
    line_state: np.ndarray
    tags: TagFrames
    roll_start: dict[str, BoolArray] = field(default_factory=dict)
    roll_settling: dict[str, BoolArray] = field(default_factory=dict)
    results: dict[tuple[str, str], CheckResult] = field(default_factory=dict)
    """The results of this block's checks so far, by (kind, object), filled in catalog order: a check that
    reads another check's residual (a drift detector) is registered after it and finds it here."""

    @property
    def n(self) -> int:
        return int(self.t.shape[0])

    def signal(self, name: str) -> Signal:
        sig = self.signals.get(name)
        return sig if sig is not None else Signal.missing(self.n)

    def in_states(self, states: Iterable[LineState]) -> BoolArray:
        return state_mask(self.line_state, states)


@dataclass(frozen=True)
class CheckResult:
    """Per-frame output of a check: value, reason code, and named extras (tolerances, estimates)."""

    value: FloatArray
    reason: np.ndarray
    extras: Mapping[str, FloatArray] = field(default_factory=dict)

    @property
    def valid(self) -> BoolArray:
        return self.reason == _OK


@dataclass(frozen=True, kw_only=True)
class AlarmSettings:
    """What a user may set per check kind and per object (``[checks.KIND]`` and its ``overrides``).

    ``warning`` None: the check has no warning level. Levels are in the check's own value (see
    :attr:`AlarmDefaults.unit`); delays and the response time in seconds. ``cause``,
    ``consequence``, ``action`` and ``response_time`` are the rationalization of the alarm
    (ANSI/ISA-18.2-2016, master alarm database; from memory). ``latched``: the alarm stays
    annunciated after its return to normal until an operator resets it (ISA-18.2 latched alarm).
    ``priority``: "advisory" (journal only, not annunciated), "low", "medium", "high" or "urgent".
    """

    enabled: bool = True
    warning: float | None
    alarm: float
    deadband: float
    on_delay: float
    off_delay: float
    priority: str
    warning_priority: str
    cause: str
    consequence: str
    action: str
    response_time: float = 60.0
    latched: bool = False

    def limit(self, level: str) -> float | None:
        """The limit of ``level`` ("warning" or "alarm")."""
        return self.warning if level == "warning" else self.alarm

    def level_priority(self, level: str) -> str:
        return self.warning_priority if level == "warning" else self.priority


@dataclass(frozen=True, kw_only=True)
class AlarmDefaults(AlarmSettings):
    """A check kind's default alarm settings and rationalization (config may override each), with what no config
    changes: ``direction`` ("high": alarm when value >= limit; "low": value <= limit; "abs": |value| >= limit) and
    ``unit`` (how the value reads to a person: "share of safe capacity", "%", "x band", "flag")."""

    direction: str
    unit: str

    def settings(self) -> AlarmSettings:
        """The defaults as settings a config may override."""
        return AlarmSettings(**{f.name: getattr(self, f.name) for f in fields(AlarmSettings)})


@runtime_checkable
class Check(Protocol):
    """What the pipeline and the alarm engine read from every check object.

    ``kind`` names the check kind, ``object_id`` the roller, zone, winder or tag it is about,
    ``inputs`` the signals it reads (a context window around each raise keeps them), ``rests_on``
    the assumption a user must accept to trust it, ``defaults`` its alarm settings and
    rationalization before the config overrides them. ``update`` computes one block of frames;
    ``reset`` forgets what it carries from one block to the next (windows, calibrations), as after
    a gap in the data.
    """

    kind: ClassVar[str]
    object_id: str
    inputs: tuple[str, ...]
    rests_on: ClassVar[str]
    defaults: ClassVar[AlarmDefaults]

    def update(self, block: Block) -> CheckResult: ...

    def reset(self) -> None: ...


def blames_of(check: Check) -> tuple[str, ...]:
    """The measured things a user can go and look at when ``check`` alarms: its ``blames`` attribute where
    it has one (a draw check names its zone, the zone's tension tag and the two rollers), else its object."""
    return tuple(getattr(check, "blames", None) or (check.object_id,))


class CheckKind(Protocol):
    """What one registration in :mod:`spanwatch.rules.catalog` offers: a check class.

    ``for_line(line)`` yields a check object for every object of the line this kind applies to
    (its parameters read from the :class:`~spanwatch.rules.linemodel.LineModel`). A kind may also
    offer ``batch(checks) -> CheckBatch``: one evaluation of all its objects at once (see
    :func:`batches_of`); without it, its objects are evaluated one by one.
    """

    kind: ClassVar[str]
    rests_on: ClassVar[str]
    defaults: ClassVar[AlarmDefaults]

    def for_line(self, line: LineModel) -> Iterable[Check]: ...


class CheckBatch(Protocol):
    """All the objects of one check kind, evaluated together: ``update(block)`` returns one result per check of
    ``checks``, in that order, equal to what each check's own ``update`` would return; ``reset()`` resets them all.

    The seam that lets a kind compute over a frames x objects matrix (tag checks over every tag, traction over
    every driven roller, drift detectors as stacked charts) instead of paying Python's per-object overhead.
    State stays with the check objects (or with the batch where it is stacked); a check's own ``update`` and
    ``reset`` keep working, so a single object can still be tested on its own.
    """

    checks: Sequence[Check]

    def update(self, block: Block) -> list[CheckResult]: ...

    def reset(self) -> None: ...


class OneByOne:
    """The batch of a kind that offers none: each check's own ``update``, in order."""

    def __init__(self, checks: Sequence[Check]) -> None:
        self.checks = tuple(checks)

    def update(self, block: Block) -> list[CheckResult]:
        return [c.update(block) for c in self.checks]

    def reset(self) -> None:
        for c in self.checks:
            c.reset()


def batches_of(checks: Sequence[Check]) -> list[CheckBatch]:
    """The checks cut into runs of the same class (catalog order is kept), each run as its kind's batch.

    A class with a ``batch`` class method builds its own (:class:`CheckBatch`); any other runs :class:`OneByOne`.
    Results come out in the order of ``checks``, so a derived kind still finds its sources' results first.
    """
    out: list[CheckBatch] = []
    i = 0
    while i < len(checks):
        cls = type(checks[i])
        j = i
        while j < len(checks) and type(checks[j]) is cls:
            j += 1
        run = checks[i:j]
        make = getattr(cls, "batch", None)
        out.append(make(run) if make is not None else OneByOne(run))
        i = j
    return out


def combine_reasons(*pairs: tuple[BoolArray, Reason], n: int | tuple[int, ...]) -> np.ndarray:
    """First failing condition wins: ``pairs`` are (mask of frames that fail, reason) in priority order. ``n`` is
    the number of frames, or a shape (objects x frames: a mask may then be one row shared by every object)."""
    reason = np.zeros(n, dtype=np.int8)
    unset = np.ones(n, dtype=bool)
    for failing, why in pairs:
        hit = failing & unset
        reason[hit] = int(why)
        unset &= ~hit
    return reason


def blank_invalid(value: FloatArray, reason: np.ndarray) -> tuple[FloatArray, np.ndarray]:
    """(value, reason) with non-finite values on valid frames marked OUT_OF_DOMAIN and invalid frames NaN; any
    shape (frames, or objects x frames)."""
    value = np.asarray(value, dtype=float)
    ok = reason == _OK
    bad = ok & ~np.isfinite(value)
    if bad.any():
        reason = reason.copy()
        reason[bad] = _OUT_OF_DOMAIN
        ok &= ~bad
    return np.where(ok, value, np.nan), reason


def finalise(value: FloatArray, reason: np.ndarray, **extras: FloatArray) -> CheckResult:
    """Mark non-finite values as OUT_OF_DOMAIN, blank invalid frames, wrap as a result."""
    value, reason = blank_invalid(value, reason)
    return CheckResult(value=value, reason=reason, extras=extras)
