"""A physical model of a line described by a spanwatch config, with injected faults.

What it models (per unit width, SI):

* Span tension of every tension zone by the first-order span equation
  ``L dT_i/dt = Et (w_{i+1} - w_i) + w_i T_{i-1} - w_{i+1} T_i``
  (Whitworth & Harrison 1983; see :mod:`rules.span`), w the web speed at each driven
  element, Et = E * caliper; idlers inside a zone are drag-free.
* Driven rollers in speed control at ``V_ref * (1 + draw)``. Each holds the web while
  the tension ratio across it is within its capstan capacity ``exp(mu_eff theta)``
  (mu_eff derated for air entrainment by :func:`spanwatch.rules.airfilm.effective_cof`). Beyond
  that it slips: the ratio is held at the limit (an algebraic constraint on the two
  span tensions) and the web speed on the roller is freed and solved from the
  constraint.
* Unwind and rewind in tension control: a PI loop trims the winder's surface speed to
  hold its zone at setpoint (the rewind's setpoint follows the configured taper).
* Roll geometry by area conservation (d(D^2) = +-4 t dL / pi) with a true effective
  caliper; roll angle and rotation from V / (pi D); an out-of-round unwind modulates
  the payout speed by ``2 e / D * sin(phase)``.
* Sensors sampled at each tag's sample period with Gaussian noise; faults from the
  scenario act on the plant (COF drop, glazing, speed ramp, out-of-round, caliper change,
  idler drag) or on the sensors (load-cell zero drift and gain error, stuck sensor, length
  undercount, tag dropout). A grade change (a new lot) changes the true stack factor,
  modulus and COF from its time on.
* Slow faults (load-cell gain, idler drag, glazing) ramp linearly from nothing at their
  start to their size at their end and hold that value until the scenario ends.

Invented, demo-only behaviour (not published physics): idlers lag the web by 0.05 %
plus a share that grows with speed above 500 m/min (a dragging idler lags by its fault's
share more; the zone's tension is one state, so the drag force itself is not modelled);
the unwind roll holds a share of its zone's setpoint as wound-in tension. The model uses
the air-film equations of the checks (a scalar copy, tested against them), so it tests
the monitoring pipeline, not those equations.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from spanwatch.monitor import units as U
from spanwatch.monitor.config import RollerSection, WinderSection
from spanwatch.monitor.line import Line
from spanwatch.monitor.simline.scenario import Fault, Scenario
from spanwatch.rules.airfilm import KNOX_SWEENEY_CONSTANT, combined_roughness
from spanwatch.rules.samples import SampleBatch

KP, KI = 2.0, 2.0  # winder tension loops, on the strain error (T_sp - T) / Et


def scalar_effective_cof(mu: float, radius: float, tension_per_width: float, web_speed: float,
                         roller_speed: float, sigma: float, *, viscosity: float, film_factor: float,
                         model: str = "linear", convention: str = "mean", floor: float = 0.0) -> float:
    """:func:`spanwatch.rules.airfilm.effective_cof` for one roller and one instant, in plain floats.

    The same equations (Knox & Sweeney film height ``h = f 0.643 R (12 eta U / T)^(2/3)``, derated
    linearly from h = sigma to h = 3 sigma after Ducotey & Good), written for scalars: the plant steps
    a few roller states at a time, where numpy's per-call cost would dominate. The tests compare it
    with the vectorised function over a grid of inputs.
    """
    vw, vr = abs(web_speed), abs(roller_speed)
    u = 0.5 * vw + 0.5 * vr if convention == "mean" else vw + vr
    if not (tension_per_width > 0 and radius > 0):
        return math.nan
    h = film_factor * KNOX_SWEENEY_CONSTANT * radius * (12.0 * viscosity * u / tension_per_width) ** (2.0 / 3.0)
    if model == "none" or math.isnan(h):
        return mu if not math.isnan(h) else math.nan
    x = (1.0 if h > 0 else 0.0) if sigma <= 0 else min(max((h - sigma) / (2.0 * sigma), 0.0), 1.0)
    return mu * (1.0 - (1.0 - floor) * x)


def ramp_share(f: Fault, t: float) -> float:
    """How far a slow fault has come at plant time ``t``: 0 before its start, rising linearly to 1 at its end
    and held at 1 after it (a drift does not heal itself)."""
    if t < f.start:
        return 0.0
    if t >= f.end or f.end <= f.start:
        return 1.0
    return (t - f.start) / (f.end - f.start)


@dataclass
class _Driven:
    id: str
    wrap: float
    mu: float  # true dry COF of the roller (the config's times the truth's cof_factor)
    radius: float
    sigma: float
    film: float
    draw: float
    speed: float = 0.0
    web: float = 0.0  # web speed on the roller
    slipping: bool = False


class SimulatedLine:
    """Step the plant forward; ``advance(seconds)`` returns the tag samples produced meanwhile."""

    def __init__(self, line: Line, scenario: Scenario) -> None:
        self.line, self.sc = line, scenario
        self.name = line.name
        cfg, sc = line.config, scenario.scenario
        self.t0 = sc.start
        self.frame_dt = 1.0 / cfg.line.frame_rate
        self.dt = self.frame_dt / sc.substeps
        self.rng = np.random.default_rng(sc.seed)
        mat, truth = cfg.material, scenario.truth
        self.et = mat.modulus * mat.caliper * truth.modulus_factor
        self.width = mat.width
        self.viscosity = line.viscosity
        lw = cfg.line
        self.air = dict(model=lw.air_film_model, convention=lw.air_speed_convention, floor=lw.air_traction_floor)
        self._cof_cfg: dict[str, float] = {}
        self.driven: list[_Driven] = []
        for el in line.driven_rollers:
            s = el.section
            assert isinstance(s, RollerSection)
            self._cof_cfg[el.id] = s.cof
            self.driven.append(_Driven(el.id, s.wrap, s.cof * truth.cof_factor, s.diameter / 2,
                                       float(combined_roughness(mat.roughness, s.roughness)),
                                       s.air_film_factor * mat.air_film_factor, s.draw))
        self.zones = line.zones
        self.zone_len = [z.length for z in self.zones]
        self.setpoints = [z.setpoint if z.setpoint is not None else 0.0 for z in self.zones]
        self.unwind = next(w for w in line.winders if w.section.kind == "unwind")  # type: ignore[union-attr]
        self.rewind = next(w for w in line.winders if w.section.kind == "rewind")  # type: ignore[union-attr]
        us, rs = self.unwind.section, self.rewind.section
        assert isinstance(us, WinderSection) and isinstance(rs, WinderSection)
        self.us, self.rs = us, rs
        stack = truth.stack_factor if truth.stack_factor is not None else mat.stack_factor
        self.caliper = mat.caliper * stack
        ini = scenario.initial
        # plant state (time counted in whole steps so it never drifts)
        self.steps = 0
        self.t = 0.0
        self.v_ref = scenario.speed[0].to if scenario.speed and scenario.speed[0].at == 0 else 0.0
        self.v_target = self.v_ref
        self.d_u2 = (ini.unwind_diameter or 0.97 * us.max_diameter) ** 2
        self.d_r2 = (ini.rewind_diameter or rs.core_diameter) ** 2
        self.len_u = self.len_r = 0.0
        self.count_u = self.count_r = 0.0
        self.phase_u = self.phase_r = 0.0
        self.x_u = self.x_r = 0.0  # winder loop integrators
        self.core_flag_until = -1.0
        self.tension = [self._setpoint(i) for i in range(len(self.zones))]
        self._steady_start()
        self._w = [self.v_ref] * (len(self.driven) + 2)  # web speed at unwind, driven rollers, rewind
        # winder loop integrators at their steady values, so a scenario starts settled
        t_in = scenario.truth.unwind_wound_in_tension * self.setpoints[0]
        self.x_u = (self.tension[0] - t_in) / (self.et - t_in)
        self.x_r = (self.tension[-1] - self.tension[-2]) / (self.et - self.tension[-1])
        self._v_u_surface = self.v_ref
        # tags and what feeds them
        self.tag_names = tuple(line.tags)
        self._sources = self._map_tags()
        self._next_sample = {name: 0.0 for name in self.tag_names}
        self._stuck: dict[str, float] = {}
        self.faults = scenario.fault
        self._by_kind: dict[str, list[Fault]] = {}
        for f in self.faults:
            self._by_kind.setdefault(f.kind, []).append(f)
        self._ecc0 = scenario.initial.unwind_eccentricity
        self._t_in = scenario.truth.unwind_wound_in_tension * self.setpoints[0]
        self._grades = sorted(scenario.grade_change, key=lambda g: g.at)
        self._grades_done = 0
        # idler -> (tension zone it sits in); driven id -> index
        self._idler_zone: dict[str, int] = {}
        self._driven_idx = {d.id: j for j, d in enumerate(self.driven)}
        self._layout()

    # --- set-up ------------------------------------------------------------------------

    def _setpoint(self, i: int) -> float:
        """Zone i's setpoint; the rewind's follows its taper (the formulas of
        :func:`spanwatch.rules.woundroll.taper_tension`, in plain floats)."""
        sp = self.setpoints[i]
        taper = self.rs.taper
        if i == len(self.zones) - 1 and taper is not None:
            d = math.sqrt(self.d_r2)
            dc = self.rs.core_diameter
            if taper.model == "hyperbolic":
                return sp * (1.0 - taper.k * (1.0 - dc / d))
            return sp * (1.0 - taper.k * (d - dc) / (self.rs.max_diameter - dc))
        return sp

    def _steady_start(self) -> None:
        """Start with tensions at their steady values for the initial speed (no start-up transient)."""
        for i in range(1, len(self.zones) - 1):
            t_up = self.tension[i - 1]
            d = self.driven
            v1, v2 = 1 + d[i - 1].draw, 1 + d[i].draw
            self.tension[i] = (self.et * (v2 - v1) + v1 * t_up) / v2

    def _map_tags(self) -> dict[str, tuple[str, str, float]]:
        """tag -> (quantity, object, factor); quantity in speed_ref, speed, tension, diameter, rpm, length, core,
        drive_fault, grade."""
        out: dict[str, tuple[str, str, float]] = {}
        cfg = self.line.config
        out[cfg.line.speed_tag] = ("speed_ref", "", 1.0)
        if cfg.line.grade_tag:
            out[cfg.line.grade_tag] = ("grade", "", 1.0)
        for el in self.line.elements.values():
            s = el.section
            if isinstance(s, RollerSection) and s.speed_tag:
                rot = self.line.tags[s.speed_tag].kind is not U.SPEED
                out[s.speed_tag] = ("speed", el.id, 1.0 / (math.pi * s.diameter) if rot else 1.0)
            if isinstance(s, RollerSection) and s.fault_tag:
                out[s.fault_tag] = ("drive_fault", el.id, 1.0)
            if isinstance(s, WinderSection):
                for tag, q in ((s.diameter_tag, "diameter"), (s.rpm_tag, "rpm"), (s.length_tag, "length"),
                               (s.core_change_tag, "core")):
                    if tag:
                        out[tag] = (q, el.id, 1.0)
        for i, z in enumerate(self.zones):
            if z.tension_tag:
                force = self.line.tags[z.tension_tag].kind is U.FORCE
                out[z.tension_tag] = ("tension", str(i), self.width if force else 1.0)
        return out

    # --- faults --------------------------------------------------------------------------

    def _active(self, kind: str, target: str | None = None) -> Fault | None:
        for f in self._by_kind.get(kind, ()):
            if f.start <= self.t < f.end and (target is None or f.target == target):
                return f
        return None

    def _slow(self, kind: str, target: str) -> float:
        """The size reached by the slow faults of ``kind`` on ``target`` at the current time (see
        :func:`ramp_share`; sizes of several such faults add)."""
        total = 0.0
        for f in self._by_kind.get(kind, ()):
            if f.target == target and self.t >= f.start:
                total += f.size_si(U.DIMENSIONLESS) * ramp_share(f, self.t)
        return total

    def _grade_changes(self) -> None:
        """A new lot from its time on: the true stack factor, modulus and COF change (within the config's
        tolerances: the monitor is told nothing)."""
        grades = self._grades
        while self._grades_done < len(grades) and grades[self._grades_done].at <= self.t:
            g = grades[self._grades_done]
            self._grades_done += 1
            mat = self.line.config.material
            if g.stack_factor is not None:
                self.caliper = mat.caliper * g.stack_factor
            if g.modulus_factor is not None:
                self.et = mat.modulus * mat.caliper * g.modulus_factor
            if g.cof_factor is not None:
                for d in self.driven:
                    d.mu = self._cof_cfg[d.id] * g.cof_factor

    # --- physics step ----------------------------------------------------------------------

    def _profile_target(self) -> tuple[float, float]:
        target, rate = self.v_target, self.sc.scenario.accel
        for step in self.sc.speed:
            if step.at <= self.t:
                target, rate = step.to, step.rate or self.sc.scenario.accel
        ramp = self._active("speed_ramp")
        if ramp is not None:
            target = ramp.size_si(U.SPEED)
        return target, rate

    def _roll_changes(self) -> None:
        for rc in self.sc.roll_change:
            if rc.at <= self.t < rc.at + self.dt:
                if rc.winder == self.rewind.id:
                    self.d_r2 = (rc.diameter or self.rs.core_diameter) ** 2
                    self.len_r = self.count_r = 0.0
                    self.core_flag_until = self.t + 2.0
                elif rc.winder == self.unwind.id:
                    self.d_u2 = (rc.diameter or 0.97 * self.us.max_diameter) ** 2
                    self.len_u = self.count_u = 0.0

    def step(self) -> None:
        """Advance the plant by one time step ``dt`` (explicit Euler with slip constraints)."""
        dt = self.dt
        self._roll_changes()
        if self._grades_done < len(self._grades):
            self._grade_changes()
        target, rate = self._profile_target()
        dv = target - self.v_ref
        self.v_ref += max(-rate * dt, min(rate * dt, dv))
        v = self.v_ref
        n = len(self.zones)
        tens = self.tension
        # setpoints and winder loops
        sp_u, sp_r = self._setpoint(0), self._setpoint(n - 1)
        e_u = (sp_u - tens[0]) / self.et
        e_r = (sp_r - tens[-1]) / self.et
        gain = 1.0 if v > 0.05 else 0.0  # loops hold while the line stands
        self.x_u += KI * e_u * dt * gain
        self.x_r += KI * e_r * dt * gain
        x_u = KP * e_u + self.x_u
        x_r = KP * e_r + self.x_r
        for d in self.driven:
            d.speed = v * (1.0 + d.draw)
            if not d.slipping:
                d.web = d.speed
        d_u = math.sqrt(max(self.d_u2, 1e-6))
        d_r = math.sqrt(max(self.d_r2, 1e-6))
        ecc = self._active("out_of_round", self.unwind.id) if "out_of_round" in self._by_kind else None
        e = (ecc.size_si(U.LENGTH) if ecc else 0.0) + self._ecc0
        v_u_surface = self.driven[0].web * (1.0 - x_u) if self.driven else v * (1 - x_u)
        w_u = v_u_surface * (1.0 + 2.0 * e / d_u * math.sin(self.phase_u))
        v_r = (self.driven[-1].web if self.driven else v) * (1.0 + x_r)
        t_in = self._t_in
        # web speeds at the elements: unwind, driven..., rewind
        self._update_slip(v)
        w = [w_u, *[d.web for d in self.driven], v_r]
        new = list(tens)
        for i in range(n):
            t_up = t_in if i == 0 else tens[i - 1]
            rate_i = (self.et * (w[i + 1] - w[i]) + w[i] * t_up - w[i + 1] * tens[i]) / self.zone_len[i]
            new[i] = tens[i] + rate_i * dt
        for j, d in enumerate(self.driven):
            if d.slipping:
                new[j], new[j + 1] = self._project(new[j], new[j + 1], j, d)
        self.tension = new
        # roll geometry
        cal_r = self.caliper
        cc = self._active("caliper_change", self.rewind.id) if "caliper_change" in self._by_kind else None
        if cc is not None:
            cal_r *= 1.0 + cc.size_si(U.DIMENSIONLESS)
        self.len_u += w_u * dt
        self.len_r += v_r * dt
        self.d_u2 = max(self.d_u2 - 4.0 * self.caliper * w_u * dt / math.pi, self.us.core_diameter ** 2)
        self.d_r2 = self.d_r2 + 4.0 * cal_r * v_r * dt / math.pi
        under_u = self._undercount(self.us.length_tag)
        under_r = self._undercount(self.rs.length_tag)
        self.count_u += w_u * dt * (1.0 - under_u)
        self.count_r += v_r * dt * (1.0 - under_r)
        self.phase_u = (self.phase_u + 2.0 * v_u_surface / d_u * dt) % (2.0 * math.pi)
        self.phase_r = (self.phase_r + 2.0 * v_r / d_r * dt) % (2.0 * math.pi)
        self._w = w
        self._v_u_surface = v_u_surface
        self.steps += 1
        self.t = self.steps * dt

    def _undercount(self, tag: str | None) -> float:
        if tag is None or "length_undercount" not in self._by_kind:
            return 0.0
        f = self._active("length_undercount", tag)
        return f.size_si(U.DIMENSIONLESS) if f else 0.0

    def _capacity(self, j: int, d: _Driven) -> float:
        mu = d.mu
        if "glazing" in self._by_kind:
            mu *= max(0.0, 1.0 - self._slow("glazing", d.id))
        if "cof_drop" in self._by_kind:
            f = self._active("cof_drop", d.id)
            if f is not None:
                mu = float(f.size_si(U.DIMENSIONLESS))
        t_low = min(self.tension[j], self.tension[j + 1])
        mu_eff = scalar_effective_cof(mu, d.radius, max(t_low, 1e-3), d.web, d.speed, d.sigma,
                                      viscosity=self.viscosity, film_factor=d.film, **self.air)
        return math.exp(mu_eff * d.wrap)

    def _update_slip(self, v: float) -> None:
        """Decide stick or slip for each driven roller; solve the free web speed while slipping.

        A sticking roller starts to slip when the tension ratio across it leaves its capstan
        capacity: the two tensions are projected onto the limit at once. A slipping roller
        sticks again when the web speed the constraint needs crosses the roller's surface speed.
        """
        tens = self.tension
        for j, d in enumerate(self.driven):
            ta, tb = tens[j], tens[j + 1]
            if ta <= 0 or tb <= 0 or v <= 0.01:
                d.slipping, d.web = False, d.speed
                continue
            r = self._capacity(j, d)
            ratio = tb / ta
            if not d.slipping and (ratio > r or ratio < 1.0 / r):
                d.slipping = True
                tens[j], tens[j + 1] = self._project(ta, tb, j, d)
            if d.slipping:
                w = self._free_web_speed(j, d, r if tens[j + 1] >= tens[j] else 1.0 / r)
                holds_back = tens[j + 1] >= tens[j]  # friction holds the web back: a slipping web overruns
                if (holds_back and w <= d.speed) or (not holds_back and w >= d.speed):
                    d.slipping, d.web = False, d.speed
                else:
                    d.web = w

    def _free_web_speed(self, j: int, d: _Driven, r: float) -> float:
        """Web speed on slipping roller j that keeps T_{j+1} = r T_j (derivative of the constraint)."""
        tens, et, ln = self.tension, self.et, self.zone_len
        t_up = self._t_in if j == 0 else tens[j - 1]
        # web speed upstream of roller j (element j) and downstream (element j + 2 in w numbering)
        w_prev, w_next = self._w[j], self._w[j + 2]
        big_b = w_next * (et - tens[j + 1])
        big_c = w_prev * (et - t_up)
        x = (big_b / ln[j + 1] + r * big_c / ln[j]) / (1.0 / ln[j + 1] + r / ln[j])
        return x / (et - tens[j])

    def _project(self, ta: float, tb: float, j: int, d: _Driven) -> tuple[float, float]:
        """Put the two tensions back on the capstan limit, keeping L_a T_a + L_b T_b."""
        r = self._capacity(j, d)
        r = r if tb >= ta else 1.0 / r
        la, lb = self.zone_len[j], self.zone_len[j + 1]
        ta2 = (la * ta + lb * tb) / (la + r * lb)
        return ta2, r * ta2

    # --- sensors -------------------------------------------------------------------------

    def _zone_of_idler(self, idler: str) -> int:
        """The tension zone an idler sits in (whose upstream element's web speed it sees)."""
        zone = self._idler_zone.get(idler)
        if zone is None:
            path = self.line.path
            pos = path.index(idler)
            zone = next(i for i, z in enumerate(self.zones)
                        if path.index(z.upstream) < pos < path.index(z.downstream))
            self._idler_zone[idler] = zone
        return zone

    def advance(self, seconds: float) -> SampleBatch:
        """Run the plant for ``seconds`` and return the tag samples (raw, in each tag's unit).

        Each tag is sampled at the first step at or after its next sample time; that time then moves on by
        the tag's period (in whole steps). The plant's state is kept at the steps where some tag samples,
        and the tags' true values are computed from those states at once.
        """
        steps = max(1, round(seconds / self.dt)) if seconds > 0 else 0
        tags = self.tag_names
        infos = [self.line.tags[n] for n in tags]
        s0, s1 = self.steps, self.steps + steps
        per_tag: list[list[int]] = []
        due = bytearray(steps + 1)
        for k, src in enumerate(self._sources_list):
            got: list[int] = []
            if src is not None:
                n, p, last = self._next_step[k], self._period_steps[k], s0
                while True:
                    at = n if n > last else last + 1
                    if at > s1:
                        break
                    got.append(at)
                    due[at - s0] = 1
                    last, n = at, (n + p) if isinstance(p, int) else round(n + p)
                self._next_step[k] = n
            per_tag.append(got)
        snaps: list[tuple[float, ...]] = []
        snap_steps: list[int] = []
        for i in range(1, steps + 1):
            self.step()
            if due[i]:
                snaps.append(self._snapshot())
                snap_steps.append(s0 + i)
        for k, n in enumerate(tags):
            self._next_sample[n] = self._next_step[k] * self.dt
        state = np.array(snaps, dtype=float).reshape(len(snaps), self._snap_width)
        at_step = np.asarray(snap_steps, dtype=np.int64)
        ks, ss, vs = [], [], []
        for k, got in enumerate(per_tag):
            if not got:
                continue
            rows = np.searchsorted(at_step, np.asarray(got, dtype=np.int64))
            ks.append(np.full(rows.size, k, dtype=np.int32))
            ss.append(np.asarray(got, dtype=np.int64))
            vs.append(self._true_values(k, state[rows]))
        if not ks:
            empty = np.zeros(0)
            return self._sensors(np.zeros(0, np.int32), empty, empty, infos)
        idx, stp, val = np.concatenate(ks), np.concatenate(ss), np.concatenate(vs)
        order = np.lexsort((idx, stp))  # step by step, and within a step in tag order
        idx, stp, val = idx[order], stp[order], val[order]
        return self._sensors(idx, state[np.searchsorted(at_step, stp), 0], val, infos)

    def _snapshot(self) -> tuple[float, ...]:
        """The state the tags read, at this step (see :meth:`_layout`)."""
        drives = tuple(1.0 if self._active("drive_fault", d.id) is not None else 0.0 for d in self.driven) \
            if "drive_fault" in self._by_kind else self._no_drive_fault
        return (self.t, self.v_ref, *self.tension, *(d.speed for d in self.driven), *self._w, self.d_u2, self.d_r2,
                self._v_u_surface, self.count_u, self.count_r, 1.0 if self.t < self.core_flag_until else 0.0, *drives)

    def _layout(self) -> None:
        """Columns of a state snapshot: t, v_ref, tensions, driven speeds, web speeds (unwind, driven..., rewind),
        D_u^2, D_r^2, unwind surface speed, counted lengths (unwind, rewind), core flag, drive faults."""
        nz, nd = len(self.zones), len(self.driven)
        c = {"t": 0, "v_ref": 1, "tension": 2}
        c["speed"] = c["tension"] + nz
        c["w"] = c["speed"] + nd
        c["d_u2"] = c["w"] + nd + 2
        c["d_r2"], c["v_u"], c["count_u"], c["count_r"], c["core"] = (c["d_u2"] + i for i in range(1, 6))
        c["drive"] = c["core"] + 1
        self._col = c
        self._snap_width = c["drive"] + nd
        self._no_drive_fault = (0.0,) * nd
        tags = self.tag_names
        self._sources_list = [self._sources.get(n) for n in tags]
        # a period of whole steps as an int (the common case), else the float that each sample time rounds from
        self._period_steps: list[int | float] = []
        for n in tags:
            p = self.line.tags[n].sample_period / self.dt
            self._period_steps.append(round(p) if abs(p - round(p)) < 1e-9 else p)
        self._next_step = [round(self._next_sample[n] / self.dt) for n in tags]

    def _true_values(self, k: int, m: np.ndarray) -> np.ndarray:
        """True values of tag ``k`` (SI of the tag's kind) at the snapshot rows ``m``."""
        quantity, obj, factor = self._sources_list[k]  # type: ignore[misc]
        c = self._col
        unwind = obj == self.unwind.id
        if quantity == "speed_ref":
            return m[:, c["v_ref"]]
        if quantity == "tension":
            return m[:, c["tension"] + int(obj)] * factor
        if quantity == "speed":
            j = self._driven_idx.get(obj)
            if j is not None:
                return m[:, c["speed"] + j] * factor
            return self._idler_speeds(obj, m) * factor
        if quantity == "diameter":
            return np.sqrt(m[:, c["d_u2"] if unwind else c["d_r2"]])
        if quantity == "rpm":
            if unwind:
                return m[:, c["v_u"]] / (math.pi * np.sqrt(m[:, c["d_u2"]]))
            return m[:, c["w"] + len(self.driven) + 1] / (math.pi * np.sqrt(m[:, c["d_r2"]]))
        if quantity == "length":
            return m[:, c["count_u"] if unwind else c["count_r"]]
        if quantity == "core":
            return m[:, c["core"]]
        if quantity == "drive_fault":
            return m[:, c["drive"] + self._driven_idx[obj]]
        if quantity == "grade":  # the grade number the controls publish: how many grade changes have passed
            at = np.array([g.at for g in self._grades], dtype=float)
            return np.searchsorted(at, m[:, c["t"]] + 1e-9, side="right").astype(float)
        raise KeyError(quantity)

    def _idler_speeds(self, idler: str, m: np.ndarray) -> np.ndarray:
        """Idler surface speed at the snapshot rows ``m``: the web speed of its zone (leaving the unwind or the
        driven roller upstream) minus an invented speed-dependent lag, plus the lag of a dragging bearing
        (:func:`ramp_share` of each ``idler_drag`` fault on it)."""
        web = m[:, self._col["w"] + self._zone_of_idler(idler)]
        lag = 0.0005 + 0.02 * np.minimum(np.maximum((np.abs(web) - 500 / 60) / (200 / 60), 0.0), 1.0)
        if "idler_drag" in self._by_kind:
            t = m[:, self._col["t"]]
            total = np.zeros_like(t)
            for f in self._by_kind["idler_drag"]:
                if f.target == idler:
                    share = np.where(t < f.start, 0.0, np.where((t >= f.end) | (f.end <= f.start), 1.0,
                                                                (t - f.start) / max(f.end - f.start, 1e-300)))
                    total = total + np.where(t >= f.start, f.size_si(U.DIMENSIONLESS) * share, 0.0)
            lag = lag + total
        return web * (1.0 - lag)

    def _sensors(self, idx: np.ndarray, t: np.ndarray, v: np.ndarray, infos: list) -> SampleBatch:
        noise = self.sc.noise
        keep = np.ones(idx.shape[0], dtype=bool)
        for k, info in enumerate(infos):
            sel = idx == k
            if not sel.any():
                continue
            src = self._sources.get(info.name)
            q = src[0] if src else ""
            x = v[sel]
            if q == "tension":
                x = x * (1.0 + noise.tension * self.rng.standard_normal(x.size))
            elif q in ("speed", "speed_ref"):
                x = x * (1.0 + noise.speed * self.rng.standard_normal(x.size))
            elif q == "rpm":
                x = x * (1.0 + noise.rpm * self.rng.standard_normal(x.size))
            elif q == "diameter":
                x = x + noise.diameter * self.rng.standard_normal(x.size)
            elif q == "length":
                x = np.floor(x / noise.length_step) * noise.length_step
            raw = (x - info.offset) / info.scale
            ts = t[sel]
            for f in self.faults:
                if f.target != info.name:
                    continue
                inside = (ts >= f.start) & (ts < f.end)
                if f.kind == "loadcell_drift":
                    raw = raw + np.where(inside, f.size_si(U.DIMENSIONLESS) * (ts - f.start), 0.0)
                elif f.kind == "loadcell_gain":
                    span = max(f.end - f.start, 1e-9)
                    share = np.clip((ts - f.start) / span, 0.0, 1.0)
                    raw = raw * (1.0 + f.size_si(U.DIMENSIONLESS) * share)
                elif f.kind == "stuck_sensor" and inside.any():
                    first = self._stuck.setdefault(info.name, float(raw[np.argmax(inside)]))
                    raw = np.where(inside, first, raw)
                elif f.kind == "tag_dropout":
                    sub = keep[sel]
                    sub[inside] = False
                    keep[sel] = sub
            v[sel] = raw
        n = int(keep.sum())
        return SampleBatch(self.tag_names, idx[keep], self.t0 + t[keep], v[keep], np.zeros(n, np.int8),
                           np.full(n, -1, np.int64))

    def truth(self) -> dict[str, object]:
        """Ground truth of the scenario: fault windows, roll changes and speed steps, in epoch and ISO time."""
        from datetime import UTC, datetime

        def iso(rel: float) -> str:
            return datetime.fromtimestamp(self.t0 + rel, UTC).isoformat()

        return {
            "scenario": self.sc.scenario.name,
            "config": self.line.file,
            "config_hash": self.line.config_hash,
            "start": iso(0.0),
            "duration_s": self.sc.scenario.duration,
            "faults": [{"kind": f.kind, "label": f.label or f.kind, "severity": f.severity, "target": f.target,
                        "size": f.size, "start": iso(f.start), "end": iso(f.end),
                        "start_epoch": self.t0 + f.start, "end_epoch": self.t0 + f.end, "blame": self.blame(f)}
                       for f in self.faults],
            "roll_changes": [{"winder": r.winder, "at": iso(r.at), "at_epoch": self.t0 + r.at}
                             for r in self.sc.roll_change],
            "speed_steps": [{"at": iso(s.at), "to_m_per_min": s.to * 60.0} for s in self.sc.speed],
            "grade_changes": [{"at": iso(g.at), "at_epoch": self.t0 + g.at, "stack_factor": g.stack_factor,
                               "modulus_factor": g.modulus_factor, "cof_factor": g.cof_factor}
                              for g in self._grades],
        }

    def tag_owner(self, tag: str) -> str | None:
        """What a tag measures: its roller or winder, or its tension zone (None for the line speed reference)."""
        src = self._sources.get(tag)
        if src is None:
            return None
        quantity, obj, _ = src
        if quantity == "tension":
            return self.zones[int(obj)].id
        return obj or None

    def blame(self, f: Fault) -> list[str]:
        """What an alarm may name to be on the right object for fault ``f`` (the table in
        :mod:`spanwatch.monitor.simline.scenario`)."""
        if f.kind == "speed_ramp":
            return [d.id for d in self.driven]
        zones = [z.id for z in self.zones if f.target in (z.upstream, z.downstream)]
        if f.kind in ("cof_drop", "glazing"):  # a slipping roller upsets the tension of both zones it bounds
            return [f.target, *zones]
        if f.kind == "drive_fault":
            sec = self.line.elements[f.target].section if f.target in self.line.elements else None
            tag = getattr(sec, "fault_tag", None)
            return [f.target, *([tag] if tag else []), *zones]
        if f.kind == "idler_drag":
            sec = self.line.elements[f.target].section if f.target in self.line.elements else None
            tag = getattr(sec, "speed_tag", None)
            return [f.target, *([tag] if tag else [])]
        if f.target in self._sources:  # a tag: the tag and what it measures
            owner = self.tag_owner(f.target)
            return [f.target, *([owner] if owner else [])]
        return [f.target] if f.target else []
