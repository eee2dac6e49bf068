"""Traction margin of a driven roller (capstan equation, derated for air at speed).

A driven roller changes web tension from T_up to T_down only by friction over its
wrap. It holds without slipping while

    T_high / T_low <= exp(mu_eff * theta)

so the share of its capacity that the measured tensions demand is the utilisation

    u = |ln(T_down / T_up)| / (mu_eff * theta)

The live check reports ``u`` itself: the share of the real capacity at the current
speed (mu_eff derated for the air film), so 1.0 means the roller is at the point of
slipping. Its defaults warn at 0.85 and alarm at 0.95 of that capacity: close enough
to slip that an operator has to act, far enough from a line running normally within
its capacity not to fire on it (common practice, no source). The safety factor SF is
a design criterion (a roller is *designed* to use at most 1/SF of its capacity); it
is reported by the design margins of :mod:`spanwatch.monitor.design` (``spanwatch
check-config``) and as the extra ``share_of_safe`` (u * SF), not alarmed on.

Sources: the Euler–Eytelwein belt-friction (capstan) equation; ASTM G143, "Standard
Test Method for Measurement of Web/Roller Friction Characteristics", measures the COF
with the same relation. The safety factor on the capacity is common practice, no source.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike
from spanwatch.rules.airfilm import combined_roughness, effective_cof
from spanwatch.rules.base import (
    PRODUCTION_STATES,
    AlarmDefaults,
    Block,
    CheckResult,
    LineState,
    Reason,
)
from spanwatch.rules.linemodel import LineModel
from spanwatch.rules.slip import SLIP_DEFAULTS, slip_ratio
from spanwatch.rules.stacked import (
    Stacked,
    StackedBatch,
    column,
    combine_rows,
    finalise_rows,
    forward_fill_rows,
    signal_rows,
)
from spanwatch.rules.windows import forward_fill_index

UTILISATION_CAP = 1e3
# a roller whose surface runs this far from the web slips (the slip check's default warning limit)
SLIPPING = SLIP_DEFAULTS.warning if SLIP_DEFAULTS.warning is not None else SLIP_DEFAULTS.alarm


def capstan_ratio_limit(mu: ArrayLike, wrap: ArrayLike) -> np.ndarray:
    """Largest tension ratio a roller holds without slip: ``exp(mu * theta)``.

    Assumptions: flexible web, Coulomb friction with constant mu, steady state, no air
    film, no inertia or centrifugal terms. Only the ratio matters, so tensions may be
    N or N/m.

    Source: Euler (1762) / Eytelwein belt-friction equation; ASTM G143, "Standard Test
    Method for Measurement of Web/Roller Friction Characteristics", measures web/roller
    COF with this relation.

    >>> round(float(capstan_ratio_limit(0.3, np.pi)), 3)
    2.566
    """
    with np.errstate(all="ignore"):
        return np.exp(np.asarray(mu, dtype=float) * np.asarray(wrap, dtype=float))


def traction_utilisation(t_up: ArrayLike, t_down: ArrayLike, mu_eff: ArrayLike, wrap: ArrayLike) -> np.ndarray:
    """Share of the capstan capacity the tension ratio demands: ``|ln(T_down/T_up)| / (mu_eff * theta)``.

    The roller holds while u <= 1. NaN where a tension is not positive or not finite;
    ``UTILISATION_CAP`` (1000) where the capacity is zero but a ratio is demanded (the air
    film has lifted the web completely); 0 where no ratio is demanded.

    Source: Euler–Eytelwein capstan equation (see :func:`capstan_ratio_limit`).

    >>> round(float(traction_utilisation(100.0, 256.6, 0.3, np.pi)), 3)
    1.0
    """
    a = np.asarray(t_up, dtype=float)
    b = np.asarray(t_down, dtype=float)
    with np.errstate(all="ignore"):
        cap = np.asarray(mu_eff, dtype=float) * np.asarray(wrap, dtype=float)
        demand = np.abs(np.log(b / a))
        u = demand / cap
    u = np.where((cap <= 0) & (demand > 0), UTILISATION_CAP, u)
    u = np.where((cap <= 0) & (demand == 0), 0.0, u)
    u = np.minimum(u, UTILISATION_CAP)
    ok = (a > 0) & (b > 0) & np.isfinite(a) & np.isfinite(b) & np.isfinite(cap) & (cap >= 0)
    return np.where(ok, u, np.nan)


def demonstrated_cof(t_a: ArrayLike, t_b: ArrayLike, wrap: ArrayLike) -> np.ndarray:
    """The COF a roller has proven by holding the ratio of ``t_a`` and ``t_b`` without slip: ``|ln(T_b/T_a)| / theta``.

    A roller that grips at the ratio T_high / T_low has mu_eff >= ln(T_high / T_low) / theta
    (capstan equation solved for mu), so the value is a lower bound on the effective COF while
    the roller does not slip, and an estimate of it at the moment it slips (the ratio is then
    held at the capstan limit). NaN where a tension is not positive or not finite, or the wrap is
    not positive. Source: Euler–Eytelwein capstan equation; ASTM G143 derives the COF this way.

    >>> round(float(demonstrated_cof(100.0, 256.6, np.pi)), 3)
    0.3
    """
    a, b = np.asarray(t_a, dtype=float), np.asarray(t_b, dtype=float)
    w = np.asarray(wrap, dtype=float)
    with np.errstate(all="ignore"):
        mu = np.abs(np.log(b / a)) / w
        ok = (a > 0) & (b > 0) & np.isfinite(a) & np.isfinite(b) & (w > 0) & np.isfinite(mu)
    return np.where(ok, mu, np.nan)


def settled_after_start(t: np.ndarray, stopped: np.ndarray, within: np.ndarray, settle: ArrayLike,
                        was_settled: np.ndarray, stop_t: np.ndarray) -> np.ndarray:
    """Per object and frame: has the line settled since it last stood still? ``within`` is objects x frames.

    A start ends at the first frame after the last STOPPED frame where ``within`` holds (the
    tensions have reached their setpoints) or ``settle`` seconds (a scalar or an objects column) have
    passed since that stop. ``was_settled`` and ``stop_t`` (one per object, updated in place to carry
    them to the next block) are: settled at the end of the previous block, time of its last stopped
    frame; a check that has never seen the line stop starts settled (it joined a running line).
    """
    last_stop = forward_fill_index(stopped)
    since = np.where(last_stop >= 0, t[np.maximum(last_stop, 0)], stop_t[:, None])
    with np.errstate(invalid="ignore"):
        cond = ~stopped & (within | (t - since >= settle))
    last_cond = forward_fill_rows(cond)
    settled = (last_cond > last_stop) | ((last_stop < 0) & was_settled[:, None])
    if t.size:
        was_settled[:] = settled[:, -1]
        stop_t[:] = since[:, -1]
    return settled


DEFAULTS = AlarmDefaults(
    direction="high",
    unit="share of capacity",
    warning=0.85,
    alarm=0.95,
    deadband=0.05,
    on_delay=1.0,
    off_delay=5.0,
    priority="high",
    warning_priority="medium",
    cause="Tension ratio across the driven roller approaches what friction over its wrap can hold at this "
    "speed: COF lower than assumed (contamination, slip additive, worn covering), air film at speed, "
    "a tension setpoint change that raised the ratio, or a load cell on either side reading wrong "
    "(a drifting tension tag makes the ratio look larger or smaller than it is).",
    consequence="Roller slips against the web: scratches, tension upsets downstream, wrinkles, web break.",
    action="Lower the tension ratio across the roller or the line speed; check the roller covering, "
    "nip or vacuum; clean the roller; verify the COF of this web lot; compare both load cells with a "
    "calibration weight if the ratio looks implausible.",
    response_time=60.0,
)

NO_DRIVE_DEFAULTS = AlarmDefaults(
    direction="high",
    unit="flag",
    warning=None,
    alarm=0.5,
    deadband=0.0,
    on_delay=2.0,
    off_delay=2.0,
    priority="high",
    warning_priority="high",
    cause="Both tensions at a driven roller are below the minimum drive tension while the line "
    "runs in production: web break, lost tension loop, or unthreaded web.",
    consequence="The roller cannot transmit drive; the web is slack or broken.",
    action="Check for a web break; check the tension loops and load cells.",
    response_time=30.0,
)


class _TractionBatch(StackedBatch):
    """Traction over all driven rollers at once: rollers x frames matrices of their tensions and roller speeds,
    each roller's parameters as a column; the start-up state is carried per roller (settled, last stop time)."""

    carries: ClassVar[dict[str, float | bool]] = {"settled": True, "stop_t": -np.inf}

    def __init__(self, checks: Sequence[TractionCheck], *, alone: bool = False) -> None:
        super().__init__(checks, alone=alone)
        self.up = [c.t_up for c in checks]
        self.down = [c.t_down for c in checks]
        self.vr = [c.roller_speed for c in checks]
        for name in ("mu", "wrap", "radius", "sigma", "film_factor", "sf", "min_t", "viscosity", "floor", "draw",
                     "min_speed", "settle"):
            setattr(self, name, column(getattr(c, name) for c in checks))
        self.encoder = np.array([c.has_encoder for c in checks]).reshape(-1, 1)
        # the start-up band around each zone's setpoint range (no range: any tension is within)
        self.bands = []
        for side in (0, 1):
            sps = [(c.setpoints[side], c.band) for c in checks]
            lo = column(sp[0] * (1.0 - band) if sp is not None else -np.inf for sp, band in sps)
            hi = column(sp[1] * (1.0 + band) if sp is not None else np.inf for sp, band in sps)
            free = np.array([sp is None for sp, _ in sps]).reshape(-1, 1)
            self.bands.append((lo, hi, free))
        groups: dict[tuple[str, str], list[int]] = {}
        for i, c in enumerate(checks):
            groups.setdefault((c.air_model, c.convention), []).append(i)
        self.air = [(model, conv, slice(None) if len(groups) == 1 else np.array(rows, dtype=np.intp))
                    for (model, conv), rows in groups.items()]

    def _within_setpoints(self, up: np.ndarray, down: np.ndarray) -> np.ndarray:
        """Both tensions within the start-up band of their zone's setpoint range (a zone without one: True)."""
        out = np.ones(up.shape, dtype=bool)
        for x, (lo, hi, free) in zip((up, down), self.bands, strict=True):
            with np.errstate(invalid="ignore"):
                out &= ((x >= lo) & (x <= hi)) | free
        return out

    def _effective_cof(self, lower: np.ndarray, vw: np.ndarray, vr: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """mu_eff and the air film per roller, each group of rollers with the same air-film model together."""
        if len(self.air) == 1:
            model, conv, _ = self.air[0]
            return effective_cof(self.mu, self.radius, lower, vw, vr, self.sigma, viscosity=self.viscosity,
                                 film_factor=self.film_factor, model=model, convention=conv, floor=self.floor)
        mu_eff, h = np.empty(lower.shape), np.empty(lower.shape)
        for model, conv, rows in self.air:
            mu_eff[rows], h[rows] = effective_cof(
                self.mu[rows], self.radius[rows], lower[rows], vw, vr[rows], self.sigma[rows],
                viscosity=self.viscosity[rows], film_factor=self.film_factor[rows], model=model, convention=conv,
                floor=self.floor[rows])
        return mu_eff, h

    def update(self, block: Block) -> list[CheckResult]:
        up, up_ok = signal_rows(block, self.up)
        down, down_ok = signal_rows(block, self.down)
        vr, vr_ok = signal_rows(block, self.vr)
        vw = block.signal("speed/web")
        lower = np.fmin(up, down)
        mu_eff, h = self._effective_cof(lower, vw.value, vr)
        u = traction_utilisation(up, down, mu_eff, self.wrap)
        mu_shown = demonstrated_cof(up, down, self.wrap)
        with np.errstate(invalid="ignore"):
            no_drive = np.fmax(up, down) < self.min_t
            lifted = (np.asarray(mu_eff) * self.wrap <= 0) & (mu_shown > 0)
        stopped = block.line_state == int(LineState.STOPPED)
        slots, rows = self.where()
        settled = settled_after_start(block.t, stopped, self._within_setpoints(up, down), self.settle,
                                      slots.a["settled"][rows], slots.a["stop_t"][rows])
        reason = combine_rows(
            (stopped | (block.line_state == int(LineState.THREADING)) | ~settled, Reason.LINE_STATE),
            (~(up_ok & down_ok & vw.ok & vr_ok), Reason.INPUT_BAD),
            (no_drive | (lower <= 0) | lifted, Reason.OUT_OF_DOMAIN),
            shape=up.shape,
        )
        valid = reason == int(Reason.OK)
        # a roller without an encoder of its own does not see slip: the bound is reported as if it grips
        s = np.where(self.encoder, slip_ratio(vr, vw.value, self.draw, self.min_speed), np.nan)
        with np.errstate(invalid="ignore"):
            slipping = self.encoder & (np.abs(s) >= SLIPPING)
        with np.errstate(divide="ignore"):
            margin = np.where(u > 0, 1.0 / u, np.inf)
        return finalise_rows(u, reason, mu_eff=mu_eff, air_film=h, utilisation=np.where(valid, u, np.nan),
                             share_of_safe=np.where(valid, u * self.sf, np.nan), margin=margin,
                             no_drive=no_drive.astype(float), lifted=lifted.astype(float),
                             mu_demonstrated=np.where(valid & ~slipping, mu_shown, np.nan),
                             mu_at_slip=np.where(valid & slipping, mu_shown, np.nan), slip=s)


class TractionCheck(Stacked):
    """Streaming traction utilisation of one driven roller: the share of its capacity at the current speed.

    Valid while the line moves in production (not stopped, not threading) and, after a start, once
    both tensions have come within ``startup_band`` of their setpoints or ``startup_settle`` seconds
    have passed (a driven roller transmits no meaningful ratio while tensions build). A web lifted
    off the roller by its air film (no traction left, a ratio demanded) is OUT_OF_DOMAIN with the
    extra ``lifted`` = 1: the capstan equation has no capacity left to compare with (the slip
    check sees the consequence).

    Extras per frame: ``utilisation`` (= the value), ``share_of_safe`` (u * SF, the design view),
    ``margin`` (1/u), ``mu_eff``, ``air_film`` (m), ``lifted`` and ``no_drive`` flags,
    ``mu_demonstrated`` (ln(T_high/T_low)/theta while the roller does not slip: the lowest COF the
    data prove; a drift detector can watch the highest ratio held), ``slip`` (relative, from the
    roller's own encoder where it has one) and ``mu_at_slip`` (the same ratio on frames where that
    slip is beyond the slip check's warning limit: an estimate of the actual mu_eff).
    """

    kind: ClassVar[str] = "traction"
    rests_on: ClassVar[str] = (
        "capstan equation with a constant, measured COF (ASTM G143); steady state; air film from "
        "Knox–Sweeney with the configured speed convention, derated against combined roughness; "
        "both load cells read true (a drifting load cell moves the ratio)")
    defaults: ClassVar[AlarmDefaults] = DEFAULTS
    _batch = _TractionBatch

    def __init__(self, object_id: str, *, zone_up: str, zone_down: str, mu: float, wrap: float,
                 radius: float, sigma: float, film_factor: float, safety_factor: float,
                 min_drive_tension: float, viscosity: float, air_model: str, convention: str,
                 floor: float, roller_speed: str | None, draw: float = 0.0, min_speed: float = 0.0,
                 setpoints: tuple[tuple[float, float] | None, tuple[float, float] | None] = (None, None),
                 startup_settle: float = 0.0, startup_band: float = 0.2,
                 blames: tuple[str, ...] = ()) -> None:
        self.object_id = object_id
        self.t_up = f"tension/{zone_up}"
        self.t_down = f"tension/{zone_down}"
        self.has_encoder = roller_speed is not None
        self.roller_speed = roller_speed or "speed/web"
        self.inputs = (self.t_up, self.t_down, "speed/web", self.roller_speed)
        self.drives = (object_id,)  # the drive it assumes healthy (a drive fault suppresses it)
        self.blames = blames or (object_id,)
        self.mu, self.wrap, self.radius, self.sigma = mu, wrap, radius, sigma
        self.film_factor, self.sf, self.min_t = film_factor, safety_factor, min_drive_tension
        self.viscosity, self.air_model, self.convention, self.floor = viscosity, air_model, convention, floor
        self.draw, self.min_speed = draw, min_speed
        self.setpoints = setpoints
        self.settle, self.band = startup_settle, startup_band
        self._init_slots()

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[TractionCheck]:
        """One per driven roller, between the zones on either side of it."""
        s, mat = line.settings, line.material
        for r in line.driven_rollers:
            zb, za = line.zone_before(r.id), line.zone_after(r.id)
            if zb is None or za is None:
                continue
            speed = f"speed/{r.id}" if line.has_signal(f"speed/{r.id}") else None
            blames = tuple(x for x in (r.id, zb.tension_tag, za.tension_tag) if x)
            yield cls(r.id, zone_up=zb.id, zone_down=za.id, mu=r.cof, wrap=r.wrap, radius=r.diameter / 2,
                      sigma=float(combined_roughness(mat.roughness, r.roughness)),
                      film_factor=r.air_film_factor * mat.air_film_factor, safety_factor=r.safety_factor,
                      min_drive_tension=s.min_drive_tension, viscosity=s.air_viscosity,
                      air_model=s.air_film_model, convention=s.air_speed_convention, floor=s.air_traction_floor,
                      roller_speed=speed, draw=r.draw, min_speed=s.thread_speed,
                      setpoints=(zb.setpoint_range, za.setpoint_range), startup_settle=s.startup_settle,
                      startup_band=s.startup_band, blames=blames)


class _NoDriveBatch(StackedBatch):
    """No-drive flags of all driven rollers at once (rollers x frames)."""

    def __init__(self, checks: Sequence[NoDriveCheck], *, alone: bool = False) -> None:
        super().__init__(checks, alone=alone)
        self.up, self.down = [c.t_up for c in checks], [c.t_down for c in checks]
        self.min_t = column(c.min_t for c in checks)

    def update(self, block: Block) -> list[CheckResult]:
        up, up_ok = signal_rows(block, self.up)
        down, down_ok = signal_rows(block, self.down)
        finite = np.isfinite(up) & np.isfinite(down)
        with np.errstate(invalid="ignore"):
            flag = (np.maximum(up, down) < self.min_t).astype(float)
        reason = combine_rows(
            (~block.in_states(PRODUCTION_STATES), Reason.LINE_STATE),
            (~(up_ok & down_ok & finite), Reason.INPUT_BAD),
            shape=up.shape,
        )
        return finalise_rows(flag, reason)


class NoDriveCheck(Stacked):
    """Flag a driven roller whose tensions are both below the minimum drive tension in production."""

    kind: ClassVar[str] = "no_drive"
    rests_on: ClassVar[str] = "load cells read true near zero; a driven roller needs tension to transmit drive"
    defaults: ClassVar[AlarmDefaults] = NO_DRIVE_DEFAULTS
    _batch = _NoDriveBatch

    def __init__(self, object_id: str, *, zone_up: str, zone_down: str, min_drive_tension: float,
                 blames: tuple[str, ...] = ()) -> None:
        self.object_id = object_id
        self.t_up = f"tension/{zone_up}"
        self.t_down = f"tension/{zone_down}"
        self.inputs = (self.t_up, self.t_down)
        self.drives = (object_id,)  # the drive it assumes healthy (a drive fault suppresses it)
        self.blames = blames or (object_id,)
        self.min_t = min_drive_tension

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[NoDriveCheck]:
        """One per driven roller."""
        for r in line.driven_rollers:
            zb, za = line.zone_before(r.id), line.zone_after(r.id)
            if zb is not None and za is not None:
                yield cls(r.id, zone_up=zb.id, zone_down=za.id, min_drive_tension=line.settings.min_drive_tension,
                          blames=tuple(x for x in (r.id, zb.tension_tag, za.tension_tag) if x))
