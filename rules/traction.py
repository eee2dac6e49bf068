"""Traction margin of a driven roller (capstan equation, derated for air at speed).

A driven roller changes web tension from T_up to T_down only by friction over its
wrap. It holds without slipping while

    T_high / T_low <= exp(mu_eff * theta)

so the share of its capacity that the measured tensions demand is the utilisation

    u = |ln(T_down / T_up)| / (mu_eff * theta)

and the check reports ``u * SF``: the share of the *safe* capacity used (1.0 means
the margin has shrunk to exactly the configured safety factor SF).

Sources: the Euler–Eytelwein belt-friction (capstan) equation; ASTM G143, "Standard
Test Method for Measurement of Web/Roller Friction Characteristics", measures the COF
with the same relation. The safety factor on the capacity is common practice, no source.
"""

from __future__ import annotations

from collections.abc import Iterator
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
    combine_reasons,
    finalise,
)
from spanwatch.rules.linemodel import LineModel

UTILISATION_CAP = 1e3


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


DEFAULTS = AlarmDefaults(
    direction="high",
    unit="share of safe capacity",
    warning=0.8,
    alarm=1.0,
    deadband=0.05,
    on_delay=1.0,
    off_delay=5.0,
    priority="high",
    warning_priority="medium",
    cause="Tension ratio across the driven roller approaches what friction over its wrap can hold: "
    "COF lower than assumed (contamination, slip additive, worn covering), air film at speed, "
    "or a tension setpoint change that raised the ratio.",
    consequence="Roller slips against the web: scratches, tension upsets downstream, wrinkles, web break.",
    action="Lower the tension ratio across the roller or the line speed; check the roller covering, "
    "nip or vacuum; clean the roller; verify the COF of this web lot.",
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


class TractionCheck:
    """Streaming traction margin of one driven roller (stateless between blocks)."""

    kind: ClassVar[str] = "traction"
    rests_on: ClassVar[str] = (
        "capstan equation with a constant, measured COF (ASTM G143); steady state; air film from "
        "Knox–Sweeney with the configured speed convention, derated against combined roughness")
    defaults: ClassVar[AlarmDefaults] = DEFAULTS

    def __init__(self, object_id: str, *, zone_up: str, zone_down: str, mu: float, wrap: float,
                 radius: float, sigma: float, film_factor: float, safety_factor: float,
                 min_drive_tension: float, viscosity: float, air_model: str, convention: str,
                 floor: float, roller_speed: str | None) -> None:
        self.object_id = object_id
        self.t_up = f"tension/{zone_up}"
        self.t_down = f"tension/{zone_down}"
        self.roller_speed = roller_speed or "speed/web"
        self.inputs = (self.t_up, self.t_down, "speed/web", self.roller_speed)
        self.drives = (object_id,)  # the drive it assumes healthy (a drive fault suppresses it)
        self.mu, self.wrap, self.radius, self.sigma = mu, wrap, radius, sigma
        self.film_factor, self.sf, self.min_t = film_factor, safety_factor, min_drive_tension
        self.viscosity, self.air_model, self.convention, self.floor = viscosity, air_model, convention, floor

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[TractionCheck]:
        """One per driven roller, between the zones on either side of it."""
        s, mat = line.settings, line.material
        for r in line.driven_rollers:
            zb, za = line.zone_before(r.id), line.zone_after(r.id)
            if zb is None or za is None:
                continue
            speed = f"speed/{r.id}" if line.has_signal(f"speed/{r.id}") else None
            yield cls(r.id, zone_up=zb.id, zone_down=za.id, mu=r.cof, wrap=r.wrap, radius=r.diameter / 2,
                      sigma=float(combined_roughness(mat.roughness, r.roughness)),
                      film_factor=r.air_film_factor * mat.air_film_factor, safety_factor=r.safety_factor,
                      min_drive_tension=s.min_drive_tension, viscosity=s.air_viscosity,
                      air_model=s.air_film_model, convention=s.air_speed_convention, floor=s.air_traction_floor,
                      roller_speed=speed)

    def reset(self) -> None:
        """Nothing is carried from one block to the next."""

    def update(self, block: Block) -> CheckResult:
        up, down = block.signal(self.t_up), block.signal(self.t_down)
        vw, vr = block.signal("speed/web"), block.signal(self.roller_speed)
        lower = np.fmin(up.value, down.value)
        mu_eff, h = effective_cof(self.mu, self.radius, lower, vw.value, vr.value, self.sigma,
                                  viscosity=self.viscosity, film_factor=self.film_factor,
                                  model=self.air_model, convention=self.convention, floor=self.floor)
        u = traction_utilisation(up.value, down.value, mu_eff, self.wrap)
        no_drive = np.fmax(up.value, down.value) < self.min_t
        reason = combine_reasons(
            (block.line_state == int(LineState.STOPPED), Reason.LINE_STATE),
            (~(up.ok & down.ok & vw.ok & vr.ok), Reason.INPUT_BAD),
            (no_drive | (lower <= 0), Reason.OUT_OF_DOMAIN),
            n=block.n,
        )
        with np.errstate(divide="ignore"):
            margin = np.where(u > 0, 1.0 / u, np.inf)
        return finalise(u * self.sf, reason, mu_eff=mu_eff, air_film=h, utilisation=u,
                        margin=margin, no_drive=no_drive.astype(float))


class NoDriveCheck:
    """Flag a driven roller whose tensions are both below the minimum drive tension in production."""

    kind: ClassVar[str] = "no_drive"
    rests_on: ClassVar[str] = "load cells read true near zero; a driven roller needs tension to transmit drive"
    defaults: ClassVar[AlarmDefaults] = NO_DRIVE_DEFAULTS

    def __init__(self, object_id: str, *, zone_up: str, zone_down: str, min_drive_tension: float) -> None:
        self.object_id = object_id
        self.t_up = f"tension/{zone_up}"
        self.t_down = f"tension/{zone_down}"
        self.inputs = (self.t_up, self.t_down)
        self.drives = (object_id,)  # the drive it assumes healthy (a drive fault suppresses it)
        self.min_t = min_drive_tension

    @classmethod
    def for_line(cls, line: LineModel) -> Iterator[NoDriveCheck]:
        """One per driven roller."""
        for r in line.driven_rollers:
            zb, za = line.zone_before(r.id), line.zone_after(r.id)
            if zb is not None and za is not None:
                yield cls(r.id, zone_up=zb.id, zone_down=za.id, min_drive_tension=line.settings.min_drive_tension)

    def reset(self) -> None:
        """Nothing is carried from one block to the next."""

    def update(self, block: Block) -> CheckResult:
        up, down = block.signal(self.t_up), block.signal(self.t_down)
        finite = np.isfinite(up.value) & np.isfinite(down.value)
        with np.errstate(invalid="ignore"):
            flag = (np.maximum(up.value, down.value) < self.min_t).astype(float)
        reason = combine_reasons(
            (~block.in_states(PRODUCTION_STATES), Reason.LINE_STATE),
            (~(up.ok & down.ok & finite), Reason.INPUT_BAD),
            n=block.n,
        )
        return finalise(flag, reason)
