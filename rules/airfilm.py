"""Air entrainment: the air film a moving web drags over a roller, and the traction it costs.

Pure functions, SI in and out, vectorised over numpy arrays. Used by the traction
check and by the derived-line report (capacity at top speed).

Sources: Knox & Sweeney (1971), Ind. Eng. Chem. Process Des. Dev. 10(2):201-205, for the
film height; Ducotey & Good (1999), "Predicting traction in web handling", ASME J.
Tribology 121:618-624, for the loss of traction against roughness; Sutherland's law for
the air viscosity, checked against Lemmon & Jacobsen (2004).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

# Sutherland's law for air (White, Viscous Fluid Flow, 3rd ed., Table 1-2):
# mu_ref = 1.716e-5 Pa s at T_ref = 273.15 K, S = 110.4 K.
_SUTHERLAND_MU0 = 1.716e-5
_SUTHERLAND_T0 = 273.15
_SUTHERLAND_S = 110.4

#: Knox & Sweeney (1971) foil-bearing constant of the constant-gap region.
KNOX_SWEENEY_CONSTANT = 0.643


def air_viscosity(temperature: ArrayLike) -> np.ndarray:
    """Dynamic viscosity of dry air at about 1 atm, Pa s, by Sutherland's law.

    ``eta = eta0 * (T / T0)**1.5 * (T0 + S) / (T + S)`` with eta0 = 1.716e-5 Pa s,
    T0 = 273.15 K, S = 110.4 K. Good to about 1 % from 250 K to 400 K, which covers
    any converting hall; pressure dependence is negligible near 1 atm.

    Source: W. Sutherland, Phil. Mag. 36:507-531, 1893 (from memory); constants from
    F. M. White, *Viscous Fluid Flow*, 3rd ed., McGraw-Hill 2006, Table 1-2 (table number
    from memory). Checked in the tests against CoolProp's implementation of E. W. Lemmon and
    R. T. Jacobsen, "Viscosity and thermal conductivity equations for nitrogen, oxygen,
    argon, and air", Int. J. Thermophys. 25(1):21-69, 2004.

    >>> round(float(air_viscosity(293.15)) * 1e5, 3)
    1.813
    """
    t = np.asarray(temperature, dtype=float)
    with np.errstate(all="ignore"):
        eta = _SUTHERLAND_MU0 * (t / _SUTHERLAND_T0) ** 1.5 * (_SUTHERLAND_T0 + _SUTHERLAND_S) / (t + _SUTHERLAND_S)
    return np.where(t > 0, eta, np.nan)


def entrainment_speed(web_speed: ArrayLike, roller_speed: ArrayLike, convention: str = "mean") -> np.ndarray:
    """The speed U that drives the air film.

    ``"mean"``: U = (V_web + V_roller) / 2, for use with 12 * eta * U (Knox & Sweeney).
    ``"sum"``: U = V_web + V_roller, for authors who write 12 * eta * (V1 + V2); it gives
    a film 2**(2/3) = 1.59 times thicker. Speeds are magnitudes (m/s).

    Source: the mean is the Couette term of Reynolds' lubrication equation for two surfaces
    moving at V1 and V2 (flow per width q = (V1 + V2) / 2 * h - h^3 p' / (12 eta)), the form
    Knox & Sweeney's 12 * eta * U belongs to; that the "sum" form circulates is from memory.
    """
    vw = np.abs(np.asarray(web_speed, dtype=float))
    vr = np.abs(np.asarray(roller_speed, dtype=float))
    if convention == "mean":
        with np.errstate(over="ignore"):
            return 0.5 * vw + 0.5 * vr
    if convention == "sum":
        with np.errstate(over="ignore"):
            return vw + vr
    raise ValueError(f"expected convention 'mean' or 'sum', got {convention!r}")


def knox_sweeney_h0(radius: ArrayLike, tension_per_width: ArrayLike, speed: ArrayLike,
                    viscosity: ArrayLike = 1.8206e-5) -> np.ndarray:
    """Air-film height between a web and a roller, m (foil-bearing theory).

    ``h0 = 0.643 * R * (12 * eta * U / T_w) ** (2/3)``

    R roller radius (m), T_w web tension per unit width (N/m), U entrainment speed
    (m/s, see :func:`entrainment_speed`), eta air viscosity (Pa s).

    Assumptions: perfectly flexible, impermeable web; smooth rigid roller; wide web
    (no side leakage); isothermal incompressible air; steady state; wrap long enough
    for the constant-gap region to form.

    Source: J. R. Knox and T. L. Sweeney, "Fluid effects associated with web handling",
    Ind. Eng. Chem. Process Des. Dev. 10(2):201-205, 1971; the same constant appears in
    Eshel & Elrod's foil-bearing solution written as 0.643 R (6 eta (V1 + V2) / T)^(2/3)
    (A. Eshel and H. G. Elrod, ASME J. Basic Eng. 87(4):831-836, 1965; from memory).

    Returns NaN where tension is not positive or an input is not finite; 0 at zero speed.

    >>> round(float(knox_sweeney_h0(0.05, 200.0, 5.0, 1.8e-5)) * 1e6, 2)
    9.9
    """
    r = np.asarray(radius, dtype=float)
    tw = np.asarray(tension_per_width, dtype=float)
    u = np.abs(np.asarray(speed, dtype=float))
    eta = np.asarray(viscosity, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        h = KNOX_SWEENEY_CONSTANT * r * np.cbrt(12.0 * eta * u / tw) ** 2
    ok = np.isfinite(h) & (tw > 0) & (r > 0)
    return np.where(ok, h, np.nan)


def combined_roughness(rq_web: ArrayLike, rq_roller: ArrayLike) -> np.ndarray:
    """Combined rms roughness of the two surfaces, sigma = sqrt(Rq_web**2 + Rq_roller**2), m.

    Source: K. S. Ducotey and J. K. Good, "Predicting traction in web handling", ASME J.
    Tribology 121:618-624, 1999, who compare h0 with this.
    """
    with np.errstate(over="ignore"):
        return np.hypot(np.asarray(rq_web, dtype=float), np.asarray(rq_roller, dtype=float))


def traction_derating(h: ArrayLike, sigma: ArrayLike, model: str = "linear", floor: float = 0.0) -> np.ndarray:
    """Share of the dry COF left when an air film of height h separates surfaces of roughness sigma.

    ``"linear"`` (default): 1 while h <= sigma, falling linearly to ``floor`` at h = 3 sigma
    and staying there; the 3-sigma end point is from Ducotey & Good (1999), who found
    minimal traction once h0 exceeds about three times the combined roughness; the
    linear interpolation between the two end points is one of the circulating forms
    (from memory), so it is a named, configurable model.
    ``"none"``: no derating (webs that vent, or a user who trusts the dry COF at speed).

    Returns NaN where h or sigma is NaN; with sigma = 0 any film gives ``floor``.

    >>> [float(x) for x in traction_derating([0.5, 1.0, 2.0, 3.0, 4.0], 1.0)]
    [1.0, 1.0, 0.5, 0.0, 0.0]
    """
    h = np.asarray(h, dtype=float)
    s = np.asarray(sigma, dtype=float)
    if model == "none":
        return np.where(np.isnan(h) | np.isnan(s), np.nan, 1.0)
    if model != "linear":
        raise ValueError(f"expected air-film model 'linear' or 'none', got {model!r}")
    with np.errstate(all="ignore"):
        x = np.clip((h - s) / (2.0 * s), 0.0, 1.0)
        x = np.where((s <= 0) & (h > 0), 1.0, np.where((s <= 0) & (h <= 0), 0.0, x))
        out = 1.0 - (1.0 - floor) * x
    return np.where(np.isnan(h) | np.isnan(s), np.nan, out)


def effective_cof(mu: ArrayLike, radius: ArrayLike, tension_per_width: ArrayLike, web_speed: ArrayLike,
                  roller_speed: ArrayLike, sigma: ArrayLike, *, viscosity: ArrayLike = 1.8206e-5,
                  film_factor: ArrayLike = 1.0, model: str = "linear", convention: str = "mean",
                  floor: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Dry COF derated for air entrainment: returns ``(mu_eff, h)`` with h the vented film height.

    h = film_factor * h0 (film_factor < 1 for grooved or perforated rollers and permeable
    webs, which vent air; 1 for a smooth roller and an impermeable web).
    mu_eff = mu * traction_derating(h, sigma).

    Source: :func:`knox_sweeney_h0` and :func:`traction_derating`; the film factor as a
    single venting multiplier is common practice, no source.
    """
    u = entrainment_speed(web_speed, roller_speed, convention)
    with np.errstate(all="ignore"):
        h = np.asarray(film_factor, dtype=float) * knox_sweeney_h0(radius, tension_per_width, u, viscosity)
        return np.asarray(mu, dtype=float) * traction_derating(h, sigma, model, floor), h
