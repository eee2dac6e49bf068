"""Design margins of the driven rollers: how much of its traction capacity each one uses where a roll runs.

The live traction check (:mod:`spanwatch.rules.traction`) alarms when a roller comes close to
slipping. Whether a line is *designed* with enough margin is a different question, asked here for
commissioning: at the configured tension setpoints, how much of its capstan capacity does each
driven roller use

- at standstill (no air film: the dry COF),
- at the normal running speed (``line.normal_speed``; default :data:`NORMAL_SPEED_SHARE` of the
  top speed),
- at the top speed (``line.max_speed``),
- at the end of a roll at normal speed (unwind nearly empty, rewind full: the zone tensions at
  the taper's end), and at the end of a roll at top speed (the worst of the points),

and is that within the safe share 1/SF of its safety factor SF?

Capacity: the capstan (Euler–Eytelwein) equation, a roller holds ``T_high / T_low <=
exp(mu_eff theta)`` (ASTM G143 measures the COF with the same relation), with mu_eff derated for
the Knox–Sweeney air film against the combined roughness (:mod:`spanwatch.rules.airfilm`). The
utilisation is ``u = ln(T_high / T_low) / (mu_eff theta)``, the design margin ``1 / u``. The safety
factor is common practice, no source.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from spanwatch.monitor.config import NORMAL_SPEED_SHARE, LineConfig, RollerSection, WinderSection
from spanwatch.monitor.line import Line
from spanwatch.rules.airfilm import combined_roughness, effective_cof
from spanwatch.rules.linemodel import Zone
from spanwatch.rules.traction import capstan_ratio_limit
from spanwatch.rules.woundroll import taper_tension

POINTS = ("standstill", "normal speed", "top speed", "end of roll", "end of roll at top speed")


@dataclass(frozen=True)
class RollerMargin:
    """One driven roller at one operating point. Tensions in N/m, speed in m/s, the air film in m."""

    roller: str
    point: str  # one of POINTS
    speed: float
    t_up: float
    t_down: float
    mu: float
    mu_eff: float
    air_film: float
    wrap: float
    safety_factor: float

    @property
    def capacity_ratio(self) -> float:
        """Largest tension ratio the roller holds here: ``exp(mu_eff theta)``."""
        return float(capstan_ratio_limit(self.mu_eff, self.wrap))

    @property
    def demanded_ratio(self) -> float:
        """The tension ratio the setpoints ask of it (high over low)."""
        return max(self.t_up, self.t_down) / min(self.t_up, self.t_down)

    @property
    def utilisation(self) -> float:
        """Share of the capacity used, ``ln(ratio) / (mu_eff theta)``; inf where the air film leaves no traction."""
        demand = math.log(self.demanded_ratio)
        cap = self.mu_eff * self.wrap
        if cap <= 0:
            return math.inf if demand > 0 else 0.0
        return demand / cap

    @property
    def margin(self) -> float:
        """Design margin ``1 / u``: how many times the demanded ratio's logarithm the capacity holds."""
        u = self.utilisation
        return math.inf if u == 0 else 1.0 / u

    @property
    def safe_share(self) -> float:
        """The share of the capacity the design allows: ``1 / SF``."""
        return 1.0 / self.safety_factor

    @property
    def within_design(self) -> bool:
        return self.utilisation <= self.safe_share

    @property
    def slips(self) -> bool:
        return self.utilisation > 1.0


def normal_speed(cfg: LineConfig) -> float:
    """The line's normal running speed, m/s: ``line.normal_speed``, else NORMAL_SPEED_SHARE of ``max_speed``."""
    lw = cfg.line
    return lw.normal_speed if lw.normal_speed is not None else NORMAL_SPEED_SHARE * lw.max_speed


def zone_tension(line: Line, zone: Zone, end_of_roll: bool) -> float | None:
    """A zone's tension setpoint at the start or the end of a roll, N/m (None: the zone has no setpoint).

    A winder with a taper moves its zone's setpoint with the roll diameter
    (:func:`spanwatch.rules.woundroll.taper_tension`): a rewind starts on its core and ends full, an
    unwind starts full and ends nearly empty (at its core).
    """
    if zone.setpoint is None:
        return None
    for eid, rewind in ((zone.downstream, True), (zone.upstream, False)):
        sec = line.elements[eid].section
        if isinstance(sec, WinderSection) and (sec.kind == "rewind") == rewind and sec.taper is not None:
            full = end_of_roll if rewind else not end_of_roll
            d = sec.max_diameter if full else sec.core_diameter
            return float(taper_tension(d, zone.setpoint, sec.taper.k, sec.core_diameter, sec.max_diameter,
                                       sec.taper.model))
    return zone.setpoint


def roller_margin(line: Line, roller_id: str, point: str) -> RollerMargin | None:
    """The margin of one driven roller at one of :data:`POINTS` (None: a zone beside it has no setpoint)."""
    if point not in POINTS:
        raise ValueError(f"expected one of {', '.join(POINTS)}, got {point!r}")
    sec = line.elements[roller_id].section
    assert isinstance(sec, RollerSection)
    cfg = line.config
    lw, mat = cfg.line, cfg.material
    speed = {"standstill": 0.0, "normal speed": normal_speed(cfg), "top speed": lw.max_speed,
             "end of roll": normal_speed(cfg), "end of roll at top speed": lw.max_speed}[point]
    end = point.startswith("end of roll")
    zb, za = line.zone_before(roller_id), line.zone_after(roller_id)
    if zb is None or za is None:
        return None
    t_up, t_down = zone_tension(line, zb, end), zone_tension(line, za, end)
    if t_up is None or t_down is None or t_up <= 0 or t_down <= 0:
        return None
    sigma = float(combined_roughness(mat.roughness, sec.roughness))
    mu_eff, h = effective_cof(sec.cof, sec.diameter / 2, min(t_up, t_down), speed, speed * (1 + sec.draw), sigma,
                              viscosity=line.viscosity, film_factor=sec.air_film_factor * mat.air_film_factor,
                              model=lw.air_film_model, convention=lw.air_speed_convention,
                              floor=lw.air_traction_floor)
    return RollerMargin(roller=roller_id, point=point, speed=speed, t_up=t_up, t_down=t_down, mu=sec.cof,
                        mu_eff=float(mu_eff), air_film=float(h), wrap=sec.wrap, safety_factor=sec.safety_factor)


def design_margins(line: Line) -> list[RollerMargin]:
    """Every driven roller at every point of :data:`POINTS`, in web-path order."""
    out = []
    for el in line.driven_rollers:
        for point in POINTS:
            m = roller_margin(line, el.id, point)
            if m is not None:
                out.append(m)
    return out


def design_findings(margins: list[RollerMargin]) -> list[str]:
    """Plain sentences for every point beyond the design: ordinary running (normal speed, end of roll) above the
    safe share 1/SF, and any point beyond the capacity itself (the roller would slip at its setpoints)."""
    out = []
    for m in margins:
        u = m.utilisation
        used = "all of its traction (the air film leaves none)" if math.isinf(u) else f"{u:.0%} of its capacity"
        where = f"{m.roller} at {m.point} ({m.speed * 60:.0f} m/min)"
        if m.slips:
            out.append(f"{where} needs {used}: it would slip at its setpoints (ratio {m.demanded_ratio:.2f} "
                       f"against a capacity of {m.capacity_ratio:.2f}).")
        elif not m.within_design and m.point in ("normal speed", "end of roll"):
            out.append(f"{where} already uses {used} in ordinary running, more than the safe share 1/SF = "
                       f"{m.safe_share:.0%} (safety factor {m.safety_factor:g}).")
    return out
