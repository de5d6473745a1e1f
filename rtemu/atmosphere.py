"""Model-atmosphere and moisture helpers used by the state generator.

Pure numpy functions; every argument broadcasts. Pressures are in hPa, temperatures in K,
specific humidity in kg kg-1, relative humidity as a fraction [1] (0 = dry, 1 = saturated
over liquid water).

Contents
--------
- :func:`us_standard_atmosphere_1976`, :func:`us_standard_atmosphere_1976_height`,
  :func:`geometric_height`: the U.S. Standard Atmosphere 1976 below 86 km, as a function
  of pressure.
- :func:`saturation_vapour_pressure`, :func:`dewpoint_from_vapour_pressure`: Bolton (1980).
- :func:`vapour_pressure`, :func:`specific_humidity_from_vapour_pressure`,
  :func:`saturation_specific_humidity`, :func:`specific_humidity_from_relative_humidity`,
  :func:`relative_humidity`: conversions consistent with the physical model's
  ``e = q p / (eps + (1 - eps) q)``, ``eps = rtemu.constants.EPSILON``.
- :func:`total_column_water_vapour`: the physical model's trapezoidal column integral,
  optionally above a surface pressure.
- :func:`lifting_condensation_level` (Bolton 1980), :func:`pseudo_adiabatic_gradient`,
  :func:`pseudo_adiabat`, :func:`parcel_temperature`: saturated (pseudo-adiabatic) ascent.
- :func:`tropopause_search_layers`, :func:`lapse_rate_tropopause`: the lowest level where
  the lapse rate falls to 2 K/km (after the WMO 1957 criterion), used by the emulator's
  novelty check.
- :func:`default_pressure_grid`: the 64-level demo grid (1100 to 0.5 hPa).
"""

from __future__ import annotations

import numpy as np

from rtemu.constants import DRY_AIR_GAS_CONSTANT, EPSILON, STANDARD_GRAVITY

#: Lapse rate [K km-1] at or below which a level counts as the tropopause: the 2 K/km of
#: the WMO (1957) definition of the first tropopause (WMO Bulletin 6, 136; from memory).
TROPOPAUSE_LAPSE_RATE = 2.0

__all__ = [
    "us_standard_atmosphere_1976",
    "us_standard_atmosphere_1976_height",
    "geometric_height",
    "saturation_vapour_pressure",
    "dewpoint_from_vapour_pressure",
    "vapour_pressure",
    "specific_humidity_from_vapour_pressure",
    "saturation_specific_humidity",
    "specific_humidity_from_relative_humidity",
    "relative_humidity",
    "total_column_water_vapour",
    "value_at_pressure",
    "lifting_condensation_level",
    "pseudo_adiabatic_gradient",
    "pseudo_adiabat",
    "parcel_temperature",
    "DRY_AIR_HEAT_CAPACITY",
    "default_pressure_grid",
    "DEFAULT_SURFACE_PRESSURE_HPA",
    "DEFAULT_BOTTOM_PRESSURE_HPA",
    "tropopause_search_layers",
    "layer_lapse_factor",
    "lapse_rate_tropopause",
    "TROPOPAUSE_LAPSE_RATE",
    "DEFAULT_TOP_PRESSURE_HPA",
    "DEFAULT_LEVEL_COUNT",
]

# --- U.S. Standard Atmosphere 1976 (NOAA-S/T 76-1562, Part 1, sections 1.2-1.3) ---------
_US76_GAS_CONSTANT = 8.31432  # R* [N m kmol-1 K-1 / 1000] as fixed by the standard
_US76_MOLAR_MASS = 28.9644e-3  # M0 [kg mol-1], sea-level mean molar mass of air
_US76_G0 = 9.80665  # g0 [m s-2] (also the standard's geopotential metre definition)
_US76_EARTH_RADIUS = 6356766.0  # r0 [m], effective Earth radius of the standard
_US76_SEA_LEVEL_TEMPERATURE = 288.15  # T0 [K]
_US76_SEA_LEVEL_PRESSURE = 1013.25  # P0 [hPa]
#: Layer base geopotential heights Hb [m'] and molecular-scale temperature gradients Lb [K/m']
_US76_BASE_HEIGHT = np.array([0.0, 11000.0, 20000.0, 32000.0, 47000.0, 51000.0, 71000.0, 84852.0])
_US76_LAPSE = np.array([-6.5e-3, 0.0, 1.0e-3, 2.8e-3, 0.0, -2.8e-3, -2.0e-3])
#: g0 M0 / R* [K m'-1], the hydrostatic constant of the standard (34.1632 K/km)
_US76_GMR = _US76_G0 * _US76_MOLAR_MASS / _US76_GAS_CONSTANT


def _us76_base_values() -> tuple[np.ndarray, np.ndarray]:
    """Base temperatures [K] and pressures [hPa] of the layers, from the defining equations."""
    temperature = [_US76_SEA_LEVEL_TEMPERATURE]
    pressure = [_US76_SEA_LEVEL_PRESSURE]
    for lapse, h0, h1 in zip(_US76_LAPSE, _US76_BASE_HEIGHT[:-1], _US76_BASE_HEIGHT[1:]):
        t0, p0 = temperature[-1], pressure[-1]
        t1 = t0 + lapse * (h1 - h0)
        if lapse == 0.0:
            p1 = p0 * np.exp(-_US76_GMR * (h1 - h0) / t0)  # NOAA-S/T 76-1562 eq. 33b
        else:
            p1 = p0 * (t0 / t1) ** (_US76_GMR / lapse)  # NOAA-S/T 76-1562 eq. 33a
        temperature.append(t1)
        pressure.append(p1)
    return np.array(temperature), np.array(pressure)


_US76_BASE_TEMPERATURE, _US76_BASE_PRESSURE = _us76_base_values()


def _check_positive_finite(name: str, values: np.ndarray) -> None:
    bad = ~np.isfinite(values) | (values <= 0.0)
    if np.any(bad):
        index = np.unravel_index(int(np.argmax(bad)), values.shape) if values.ndim else ()
        raise ValueError(
            f"{name} must be finite and > 0; got {float(values[index])!r} at index {tuple(map(int, index))}"
        )


def us_standard_atmosphere_1976_height(pressure_hpa) -> np.ndarray:
    """Geopotential height of a pressure level in the U.S. Standard Atmosphere 1976.

    Within layer b (base geopotential height Hb, base temperature Tb, base pressure Pb,
    gradient Lb) the hydrostatic equation of the standard gives

        H = Hb + (Tb / Lb) [(P / Pb) ** (-Lb R* / (g0 M0)) - 1]     (Lb != 0)
        H = Hb - (R* Tb / (g0 M0)) ln(P / Pb)                        (Lb == 0)

    the inverses of NOAA-S/T 76-1562 eqs. 33a and 33b. Above the top of the 7 layers
    (84.852 km' geopotential, 86 km geometric, 0.003734 hPa) the last layer's gradient
    is continued; below sea level (P > 1013.25 hPa) the first layer's.

    Parameters
    ----------
    pressure_hpa : array_like
        Pressure [hPa], > 0.

    Returns
    -------
    numpy.ndarray
        Geopotential height [m'] (geopotential metres).

    References
    ----------
    NOAA, NASA, USAF (1976): U.S. Standard Atmosphere, 1976. NOAA-S/T 76-1562,
    U.S. Government Printing Office, Washington D.C.
    """
    p = np.asarray(pressure_hpa, dtype=float)
    _check_positive_finite("pressure_hpa", p)
    layer = np.clip(
        np.searchsorted(-_US76_BASE_PRESSURE, -p, side="right") - 1, 0, _US76_LAPSE.size - 1
    )
    hb = _US76_BASE_HEIGHT[layer]
    tb = _US76_BASE_TEMPERATURE[layer]
    pb = _US76_BASE_PRESSURE[layer]
    lapse = _US76_LAPSE[layer]
    isothermal = lapse == 0.0
    safe_lapse = np.where(isothermal, 1.0, lapse)
    ratio = p / pb
    gradient_height = hb + tb / safe_lapse * (ratio ** (-safe_lapse / _US76_GMR) - 1.0)
    isothermal_height = hb - tb / _US76_GMR * np.log(ratio)
    return np.where(isothermal, isothermal_height, gradient_height)


def us_standard_atmosphere_1976(pressure_hpa) -> np.ndarray:
    """Temperature of the U.S. Standard Atmosphere 1976 at a given pressure.

    T = Tb + Lb (H - Hb), with H the geopotential height of the pressure level
    (:func:`us_standard_atmosphere_1976_height`). Below 80 km this is the kinetic
    temperature; between 80 and 86 km it is the molecular-scale temperature, which the
    standard's kinetic temperature undercuts by at most 0.08 K (186.87 K vs 186.946 K at
    86 km). Continued with the last layer's gradient above 86 km (P < 0.003734 hPa).

    Parameters
    ----------
    pressure_hpa : array_like
        Pressure [hPa], > 0.

    Returns
    -------
    numpy.ndarray
        Air temperature [K].

    References
    ----------
    NOAA, NASA, USAF (1976): U.S. Standard Atmosphere, 1976. NOAA-S/T 76-1562, eq. 23
    and Table 4 (layer definitions).
    """
    height = us_standard_atmosphere_1976_height(pressure_hpa)
    layer = np.clip(
        np.searchsorted(_US76_BASE_HEIGHT, height, side="right") - 1, 0, _US76_LAPSE.size - 1
    )
    return _US76_BASE_TEMPERATURE[layer] + _US76_LAPSE[layer] * (height - _US76_BASE_HEIGHT[layer])


def geometric_height(geopotential_height_m) -> np.ndarray:
    """Geometric height from geopotential height, Z = r0 H / (r0 - H), r0 = 6356766 m.

    Parameters
    ----------
    geopotential_height_m : array_like
        Geopotential height [m'].

    Returns
    -------
    numpy.ndarray
        Geometric height above mean sea level [m].

    References
    ----------
    NOAA-S/T 76-1562 (U.S. Standard Atmosphere, 1976), eq. 18.
    """
    h = np.asarray(geopotential_height_m, dtype=float)
    return _US76_EARTH_RADIUS * h / (_US76_EARTH_RADIUS - h)


# --- moisture -------------------------------------------------------------------------
_BOLTON_E0 = 6.112  # [hPa]
_BOLTON_A = 17.67  # [1]
_BOLTON_B = 243.5  # [degC]
_CELSIUS_OFFSET = 273.15  # [K]
#: Temperature range [K] accepted by the moisture functions (the physical model's validity)
TEMPERATURE_VALIDITY_K = (100.0, 400.0)


def _check_temperature(temperature_k: np.ndarray) -> None:
    lo, hi = TEMPERATURE_VALIDITY_K
    bad = ~np.isfinite(temperature_k) | (temperature_k < lo) | (temperature_k > hi)
    if np.any(bad):
        index = np.unravel_index(int(np.argmax(bad)), temperature_k.shape) if temperature_k.ndim else ()
        raise ValueError(
            f"temperature must lie in [{lo}, {hi}] K; got {float(temperature_k[index])!r} "
            f"at index {tuple(map(int, index))}"
        )


def saturation_vapour_pressure(temperature_k) -> np.ndarray:
    """Saturation vapour pressure over plane liquid water (Bolton 1980, eq. 10).

        es = 6.112 exp(17.67 t / (t + 243.5))      [hPa], t in degC

    Bolton gives it as accurate to 0.1 % between -30 and +35 degC; rtemu uses it over
    liquid water at every temperature (relative humidity is with respect to water
    everywhere, also below 0 degC).

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K], within 100-400 K.

    Returns
    -------
    numpy.ndarray
        Saturation vapour pressure [hPa].

    References
    ----------
    Bolton, D. (1980): The computation of equivalent potential temperature. Mon. Wea.
    Rev., 108, 1046-1053, doi:10.1175/1520-0493(1980)108<1046:TCOEPT>2.0.CO;2
    """
    t = np.asarray(temperature_k, dtype=float)
    _check_temperature(t)
    celsius = t - _CELSIUS_OFFSET
    return _BOLTON_E0 * np.exp(_BOLTON_A * celsius / (celsius + _BOLTON_B))  # Bolton eq. 10


def dewpoint_from_vapour_pressure(vapour_pressure_hpa) -> np.ndarray:
    """Temperature at which ``vapour_pressure_hpa`` is saturated: the inverse of eq. 10.

        Td = 243.5 ln(e / 6.112) / (17.67 - ln(e / 6.112))     [degC]   (Bolton eq. 11)

    Parameters
    ----------
    vapour_pressure_hpa : array_like
        Water vapour partial pressure [hPa], > 0.

    Returns
    -------
    numpy.ndarray
        Dew point temperature [K].

    References
    ----------
    Bolton, D. (1980), Mon. Wea. Rev., 108, 1046-1053, eq. 11.
    """
    e = np.asarray(vapour_pressure_hpa, dtype=float)
    _check_positive_finite("vapour_pressure_hpa", e)
    log_ratio = np.log(e / _BOLTON_E0)
    return _BOLTON_B * log_ratio / (_BOLTON_A - log_ratio) + _CELSIUS_OFFSET  # Bolton eq. 11


def vapour_pressure(specific_humidity, pressure_hpa) -> np.ndarray:
    """Water vapour partial pressure, e = q p / (eps + (1 - eps) q), eps = 0.622.

    Parameters
    ----------
    specific_humidity : array_like
        Specific humidity q [kg kg-1], in [0, 1).
    pressure_hpa : array_like
        Air pressure p [hPa].

    Returns
    -------
    numpy.ndarray
        Vapour pressure e [hPa].

    References
    ----------
    Wallace, J. M. and Hobbs, P. V. (2006): Atmospheric Science, 2nd ed., Academic Press,
    eq. 3.57-3.59 (w = eps e / (p - e), q = w / (1 + w)).
    """
    q = np.asarray(specific_humidity, dtype=float)
    p = np.asarray(pressure_hpa, dtype=float)
    return q * p / (EPSILON + (1.0 - EPSILON) * q)


def specific_humidity_from_vapour_pressure(vapour_pressure_hpa, pressure_hpa) -> np.ndarray:
    """Specific humidity from vapour pressure, q = eps e / (p - (1 - eps) e).

    Parameters
    ----------
    vapour_pressure_hpa : array_like
        Vapour pressure e [hPa], 0 <= e < p.
    pressure_hpa : array_like
        Air pressure p [hPa].

    Returns
    -------
    numpy.ndarray
        Specific humidity [kg kg-1].
    """
    e = np.asarray(vapour_pressure_hpa, dtype=float)
    p = np.asarray(pressure_hpa, dtype=float)
    bad = ~(e < p) | ~(e >= 0.0)
    if np.any(bad):
        shape = np.broadcast(e, p).shape
        index = np.unravel_index(int(np.argmax(np.broadcast_to(bad, shape))), shape) if shape else ()
        raise ValueError(
            "vapour pressure must satisfy 0 <= e < p (the air pressure); violated at index "
            f"{tuple(map(int, index))}"
        )
    return EPSILON * e / (p - (1.0 - EPSILON) * e)


def saturation_specific_humidity(temperature_k, pressure_hpa) -> np.ndarray:
    """Specific humidity at saturation over water, q_s = eps es / (p - (1 - eps) es).

    Where es(T) >= p (warm air at very low pressure, where saturation is not a
    meaningful limit) the result is +inf: any specific humidity is then subsaturated.

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K].
    pressure_hpa : array_like
        Air pressure [hPa].

    Returns
    -------
    numpy.ndarray
        Saturation specific humidity [kg kg-1] (may be +inf, see above).
    """
    es = saturation_vapour_pressure(temperature_k)
    p = np.asarray(pressure_hpa, dtype=float)
    es, p = np.broadcast_arrays(es, p)
    reachable = es < p
    denominator = np.where(reachable, p - (1.0 - EPSILON) * es, 1.0)
    return np.where(reachable, EPSILON * es / denominator, np.inf)


def specific_humidity_from_relative_humidity(relative_humidity_1, temperature_k, pressure_hpa) -> np.ndarray:
    """Specific humidity from relative humidity over water, with e = RH es(T).

        q = eps e / (p - (1 - eps) e),    e = RH * es(T)  (es: Bolton 1980 eq. 10)

    Parameters
    ----------
    relative_humidity_1 : array_like
        Relative humidity [1] (a fraction, 0-1).
    temperature_k : array_like
        Temperature [K].
    pressure_hpa : array_like
        Air pressure [hPa]; RH es(T) must stay below it.

    Returns
    -------
    numpy.ndarray
        Specific humidity [kg kg-1].
    """
    rh = np.asarray(relative_humidity_1, dtype=float)
    if np.any(~np.isfinite(rh) | (rh < 0.0)):
        raise ValueError("relative humidity must be finite and >= 0")
    e = rh * saturation_vapour_pressure(temperature_k)
    return specific_humidity_from_vapour_pressure(e, pressure_hpa)


def relative_humidity(specific_humidity, temperature_k, pressure_hpa) -> np.ndarray:
    """Relative humidity over water, RH = e(q, p) / es(T).

    Parameters
    ----------
    specific_humidity : array_like
        Specific humidity [kg kg-1].
    temperature_k : array_like
        Temperature [K].
    pressure_hpa : array_like
        Air pressure [hPa].

    Returns
    -------
    numpy.ndarray
        Relative humidity [1] (a fraction; 1 = saturated over liquid water).
    """
    return vapour_pressure(specific_humidity, pressure_hpa) / saturation_vapour_pressure(temperature_k)


def total_column_water_vapour(pressure_hpa, specific_humidity, surface_pressure_hpa=None) -> np.ndarray:
    """Total column water vapour by the trapezoidal rule, as the physical model does.

        TCWV = sum_j (q_j + q_{j+1}) / 2 * |p_j - p_{j+1}| * 100 / g

    (100 converts hPa to Pa; g = 9.80665 m s-2.) Levels may be in either order. With a
    surface pressure ps, the column above the ground: levels with p >= ps are dropped and
    a new bottom level is placed at ps, q there interpolated linearly in ln p between the
    two levels that bracket ps (the ``surface_air_pressure`` rule of the physical model).

    Parameters
    ----------
    pressure_hpa : array_like
        Level pressures [hPa], shape (L,) or (..., L), monotonic along the last axis.
    specific_humidity : array_like
        Specific humidity [kg kg-1], shape (..., L).
    surface_pressure_hpa : array_like, optional
        Surface pressure ps [hPa], shape (...), between the lowest and the highest level
        pressure (ps > top, ps <= bottom).

    Returns
    -------
    numpy.ndarray
        Total column water vapour [kg m-2], shape (...).
    """
    p = np.asarray(pressure_hpa, dtype=float)
    q = np.asarray(specific_humidity, dtype=float)
    if surface_pressure_hpa is not None:
        p, q = np.broadcast_arrays(p, q)
        ps = np.asarray(surface_pressure_hpa, dtype=float)[..., None]
        if np.any(~(ps > p.min(axis=-1, keepdims=True)) | ~(ps <= p.max(axis=-1, keepdims=True))):
            raise ValueError("surface_pressure_hpa must lie in (top, bottom] of the level pressures")
        q_surface = value_at_pressure(p, q, ps[..., 0])[..., None]
        # Levels below the ground count with zero mass: clip them to ps, where q is q_surface.
        below = p >= ps
        p = np.where(below, ps, p)
        q = np.where(below, q_surface, q)
    layer_mass = np.abs(np.diff(p, axis=-1)) * 100.0 / STANDARD_GRAVITY  # [kg m-2]
    layer_q = 0.5 * (q[..., 1:] + q[..., :-1])
    return np.sum(layer_q * layer_mass, axis=-1)


def value_at_pressure(pressure_hpa, values, target_hpa) -> np.ndarray:
    """A profile's value at one pressure, linear in ln p between the two levels around it.

    Parameters
    ----------
    pressure_hpa : array_like
        Level pressures [hPa], shape (L,) or (..., L), strictly monotonic.
    values : array_like
        Profile values [any unit], shape (..., L).
    target_hpa : array_like
        Pressure [hPa], shape (...), within the level range.

    Returns
    -------
    numpy.ndarray
        Interpolated values [unit of ``values``], shape (...).
    """
    p, v = np.broadcast_arrays(np.asarray(pressure_hpa, dtype=float), np.asarray(values, dtype=float))
    x = np.log(p)
    target = np.log(np.asarray(target_hpa, dtype=float))[..., None]
    if p.shape[-1] > 1 and np.all(p[..., 0] < p[..., -1]):
        x, v = x[..., ::-1], v[..., ::-1]  # surface first from here on
    # index of the first level at or above the target (p <= target), at least 1
    upper = np.clip(np.sum(x > target, axis=-1, keepdims=True), 1, x.shape[-1] - 1)
    x0, x1 = np.take_along_axis(x, upper - 1, -1), np.take_along_axis(x, upper, -1)
    v0, v1 = np.take_along_axis(v, upper - 1, -1), np.take_along_axis(v, upper, -1)
    weight = (target - x0) / (x1 - x0)
    return (v0 + weight * (v1 - v0))[..., 0]


# --- saturated ascent ----------------------------------------------------------------------
#: Specific heat of dry air at constant pressure [J kg-1 K-1], the value Bolton (1980) uses
#: (from memory).
DRY_AIR_HEAT_CAPACITY = 1005.7


def _latent_heat(temperature_k):
    """Latent heat of vaporisation [J kg-1], Bolton (1980) eq. 2: (2.501 - 0.00237 t) 1e6, t [degC]."""
    return (2.501 - 0.00237 * (temperature_k - _CELSIUS_OFFSET)) * 1e6  # Bolton eq. 2


def lifting_condensation_level(temperature_k, specific_humidity, pressure_hpa):
    """Temperature and pressure where dry-adiabatic ascent of a parcel saturates.

        T_L = 2840 / (3.5 ln T - ln e - 4.805) + 55          (Bolton 1980 eq. 21; e [hPa])
        p_L = p (T_L / T) ** (c_pd / R_d)                     (Poisson's equation)

    Parameters
    ----------
    temperature_k : array_like
        Parcel temperature T [K].
    specific_humidity : array_like
        Parcel specific humidity q [kg kg-1], > 0.
    pressure_hpa : array_like
        Parcel pressure p [hPa].

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        T_L [K] and p_L [hPa]. A saturated (or, by round-off, supersaturated) parcel gets
        T_L = T and p_L = p.

    References
    ----------
    Bolton, D. (1980), Mon. Wea. Rev., 108, 1046-1053, eq. 21 (accurate to about 0.1 K,
    as Bolton states; from memory).
    """
    t = np.asarray(temperature_k, dtype=float)
    p = np.asarray(pressure_hpa, dtype=float)
    e = vapour_pressure(specific_humidity, p)
    _check_positive_finite("vapour pressure of specific_humidity", np.asarray(e))
    t_lcl = 2840.0 / (3.5 * np.log(t) - np.log(e) - 4.805) + 55.0  # Bolton eq. 21
    t_lcl = np.minimum(t_lcl, t)
    return t_lcl, p * (t_lcl / t) ** (DRY_AIR_HEAT_CAPACITY / DRY_AIR_GAS_CONSTANT)


def pseudo_adiabatic_gradient(temperature_k, pressure_hpa) -> np.ndarray:
    """dT/d(ln p) of saturated air rising pseudo-adiabatically (condensate falls out).

        dT/d ln p = (R_d T + L r_s) / (c_pd + L^2 r_s eps / (R_d T^2))

    with r_s = eps e_s / (p - e_s) the saturation mixing ratio (e_s: Bolton 1980 eq. 10),
    L from Bolton eq. 2, c_pd = 1005.7 J kg-1 K-1, R_d = 287.05 J kg-1 K-1. This is the
    pseudo-adiabatic lapse rate G_m = g (1 + L r_s / (R_d T)) / (c_pd + L^2 r_s eps /
    (R_d T^2)) of the AMS Glossary of Meteorology ("pseudoadiabatic lapse rate") written
    per ln p through the hydrostatic dz = -(R_d T / g) d ln p; like the glossary's form it
    neglects the heat capacity of the vapour and the virtual-temperature correction. With
    r_s -> 0 it is the dry adiabat R_d T / c_pd.

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K] (100-400 K).
    pressure_hpa : array_like
        Pressure [hPa]; e_s(T) < p.

    Returns
    -------
    numpy.ndarray
        dT / d ln p [K] (positive: the parcel cools as p falls).

    References
    ----------
    American Meteorological Society (2012): Glossary of Meteorology, "Pseudoadiabatic
    lapse rate" (formula from memory). Wallace, J. M. and Hobbs, P. V. (2006): Atmospheric
    Science, 2nd ed., section 3.7 (saturated adiabatic lapse rate).
    """
    t = np.asarray(temperature_k, dtype=float)
    p = np.asarray(pressure_hpa, dtype=float)
    es = saturation_vapour_pressure(t)
    if np.any(es >= p):
        raise ValueError("pseudo_adiabatic_gradient: saturation vapour pressure reaches the air pressure "
                         "(rule: e_s(T) < p)")
    r_s = EPSILON * es / (p - es)
    latent = _latent_heat(t)
    numerator = DRY_AIR_GAS_CONSTANT * t + latent * r_s
    denominator = DRY_AIR_HEAT_CAPACITY + latent**2 * r_s * EPSILON / (DRY_AIR_GAS_CONSTANT * t**2)
    return numerator / denominator


def pseudo_adiabat(temperature_k, pressure_hpa, target_pressure_hpa, *, steps: int = 24) -> np.ndarray:
    """Temperature along the pseudo-adiabat through a saturated parcel.

    Integrates dT/d ln p = :func:`pseudo_adiabatic_gradient` from (T, p) to each target
    pressure with ``steps`` classical Runge-Kutta steps of equal size in ln p (up or down).

    Parameters
    ----------
    temperature_k : array_like
        Starting temperature [K], shape (...).
    pressure_hpa : array_like
        Starting pressure [hPa], shape (...).
    target_pressure_hpa : array_like
        Pressures [hPa], shape (..., L) or (L,).
    steps : int
        Runge-Kutta steps per target [1] (24 keep the error below 1e-4 K over 1000-100 hPa).

    Returns
    -------
    numpy.ndarray
        Temperature [K] at the targets, shape (..., L).
    """
    t0 = np.asarray(temperature_k, dtype=float)[..., None]
    x0 = np.log(np.asarray(pressure_hpa, dtype=float))[..., None]
    x1 = np.log(np.asarray(target_pressure_hpa, dtype=float))
    h = (x1 - x0) / steps
    t = t0 + np.zeros_like(h)
    x = x0 + np.zeros_like(h)

    def slope(tt, xx):
        return pseudo_adiabatic_gradient(tt, np.exp(xx))

    for _ in range(steps):
        k1 = slope(t, x)
        k2 = slope(t + 0.5 * h * k1, x + 0.5 * h)
        k3 = slope(t + 0.5 * h * k2, x + 0.5 * h)
        k4 = slope(t + h * k3, x + h)
        t = t + h * (k1 + 2.0 * k2 + 2.0 * k3 + k4) / 6.0
        x = x + h
    return t


def parcel_temperature(temperature_k, specific_humidity, pressure_hpa, target_pressure_hpa) -> np.ndarray:
    """Temperature of a parcel lifted from (T, q, p): dry adiabat to its lifting
    condensation level (:func:`lifting_condensation_level`), pseudo-adiabat above it
    (:func:`pseudo_adiabat`).

    Parameters
    ----------
    temperature_k : array_like
        Parcel temperature [K], shape (...).
    specific_humidity : array_like
        Parcel specific humidity [kg kg-1], shape (...).
    pressure_hpa : array_like
        Parcel pressure [hPa], shape (...).
    target_pressure_hpa : array_like
        Pressures at or above the parcel's [hPa], shape (..., L) or (L,).

    Returns
    -------
    numpy.ndarray
        Parcel temperature [K] at the targets, shape (..., L).
    """
    t = np.asarray(temperature_k, dtype=float)[..., None]
    p = np.asarray(pressure_hpa, dtype=float)[..., None]
    target = np.asarray(target_pressure_hpa, dtype=float)
    t_lcl, p_lcl = lifting_condensation_level(t, np.asarray(specific_humidity, dtype=float)[..., None], p)
    dry = t * (target / p) ** (DRY_AIR_GAS_CONSTANT / DRY_AIR_HEAT_CAPACITY)
    moist = pseudo_adiabat(t_lcl[..., 0], p_lcl[..., 0], np.minimum(target, p_lcl))
    return np.where(target >= p_lcl, dry, moist)


# --- the demo level grid --------------------------------------------------------------
#: Reference surface pressure of the grid coordinate [hPa] (the US 1976 sea-level pressure)
DEFAULT_SURFACE_PRESSURE_HPA = 1013.25
#: Bottom level of the default grid [hPa]: at or below the highest surface pressure the
#: state generator draws (1060 hPa), so every drawn surface lies inside the grid.
DEFAULT_BOTTOM_PRESSURE_HPA = 1100.0
DEFAULT_TOP_PRESSURE_HPA = 0.5
DEFAULT_LEVEL_COUNT = 64
#: Weight of the pressure-linear term of the grid coordinate (see default_pressure_grid)
_GRID_LINEAR_WEIGHT = 15.0


def _grid_coordinate(p: np.ndarray, p_surface: float) -> np.ndarray:
    return _GRID_LINEAR_WEIGHT * (1.0 - p / p_surface) + np.log(p_surface / p)


def default_pressure_grid() -> np.ndarray:
    """The 64-level demo pressure grid, bottom first.

    Levels are equally spaced in the hybrid coordinate

        eta(p) = 15 (1 - p / ps) + ln(ps / p),    ps = 1013.25 hPa,

    from eta(1100 hPa) to eta(0.5 hPa), solved for p by Newton's method. The linear term
    dominates near the surface (spacing about 25 hPa at the bottom, about 0.2 km), the
    logarithmic term aloft (spacing ~0.38 in ln p at the top, about 2.7 km with a 7 km
    scale height); 46 of the 64 levels lie below 100 hPa. The bottom lies below every
    surface pressure the state generator draws: levels below a profile's surface carry
    extrapolated values that a ``surface_air_pressure`` drops.

    Returns
    -------
    numpy.ndarray
        Pressure [hPa], shape (64,), strictly decreasing from 1100 to 0.5.
    """
    ps, bottom, top = DEFAULT_SURFACE_PRESSURE_HPA, DEFAULT_BOTTOM_PRESSURE_HPA, DEFAULT_TOP_PRESSURE_HPA
    eta = np.linspace(_grid_coordinate(np.array(bottom), ps), _grid_coordinate(np.array(top), ps),
                      DEFAULT_LEVEL_COUNT)
    # Start from the log-only solution, which lies above (lower p than) the answer.
    p = ps * np.exp(-eta)
    for _ in range(50):
        residual = _grid_coordinate(p, ps) - eta
        slope = -_GRID_LINEAR_WEIGHT / ps - 1.0 / p
        step = residual / slope
        p = p - step
        if np.max(np.abs(step / p)) < 1e-14:
            break
    p[0], p[-1] = bottom, top
    return p


def tropopause_search_layers(pressure_hpa, *, bottom_hpa: float = 500.0, top_hpa: float = 40.0,
                             depth_ln_p: float = 0.3):
    """Layers searched for a lapse-rate tropopause on a level grid.

    Each base level with ``top_hpa <= p <= bottom_hpa`` gets two layers: up to the next
    level, and up to the nearest level at least ``depth_ln_p`` higher in ln p (0.3 is about
    1.9 km at 215 K, by the hypsometric equation; the WMO criterion looks 2 km up). Bases
    without such a level are left out.

    Parameters
    ----------
    pressure_hpa : array_like
        Level pressures [hPa], strictly monotonic in either order.
    bottom_hpa, top_hpa : float
        Pressure range of the base levels [hPa].
    depth_ln_p : float
        Least thickness of the deep layer [1, in ln p].

    Returns
    -------
    dict of numpy.ndarray, each [M], bases ordered from the surface upward
        ``base``, ``next``, ``deep``: level indices into ``pressure_hpa`` (int);
        ``next_thickness``, ``deep_thickness``: ln(p_base / p_top) of the two layers [1].
    """
    p = np.asarray(pressure_hpa, dtype=float)
    ln_p = np.log(p)
    order = np.argsort(-p)  # surface upward
    base, nxt, deep = [], [], []
    for i, k in enumerate(order):
        if not top_hpa <= p[k] <= bottom_hpa:
            continue
        above = order[i + 1:][ln_p[k] - ln_p[order[i + 1:]] >= depth_ln_p]
        if above.size:
            base.append(k)
            nxt.append(order[i + 1])
            deep.append(above[0])
    base, nxt, deep = (np.array(v, dtype=int) for v in (base, nxt, deep))
    return {"base": base, "next": nxt, "deep": deep,
            "next_thickness": ln_p[base] - ln_p[nxt], "deep_thickness": ln_p[base] - ln_p[deep]}


def layer_lapse_factor(thickness_ln_p, lapse_rate: float = TROPOPAUSE_LAPSE_RATE):
    """a [1] such that a layer's mean lapse rate is at most ``lapse_rate`` [K km-1] exactly when
    (T_b - T_t) - a (T_b + T_t) <= 0, for a layer of ``thickness_ln_p`` = ln(p_b / p_t).

    From dz = (R_d / g) (T_b + T_t) / 2 ln(p_b / p_t) (hypsometric equation, R_d =
    287.05 J kg-1 K-1, g = 9.80665 m s-2): a = lapse_rate [K m-1] R_d ln(p_b / p_t) / (2 g).
    """
    thickness = np.asarray(thickness_ln_p, dtype=float)
    return lapse_rate * 1e-3 * DRY_AIR_GAS_CONSTANT * thickness / (2.0 * STANDARD_GRAVITY)


def lapse_rate_tropopause(air_temperature, pressure_hpa, *, lapse_rate: float = TROPOPAUSE_LAPSE_RATE,
                          **layers):
    """The lowest searched base level where the lapse rate has fallen to ``lapse_rate``.

    A base qualifies when the mean lapse rate (T_b - T_t) / dz is at most ``lapse_rate``
    both up to the next level and over the deep layer (about 2 km) above it
    (:func:`tropopause_search_layers`, :func:`layer_lapse_factor`): a simplified form of
    the WMO (1957) first-tropopause rule, which checks every layer up to 2 km.

    Parameters
    ----------
    air_temperature : array_like
        Temperature [K], shape (..., L) on ``pressure_hpa``.
    pressure_hpa : array_like
        Level pressures [hPa], [L].
    lapse_rate : float
        Threshold [K km-1].
    **layers
        ``bottom_hpa``, ``top_hpa``, ``depth_ln_p`` of :func:`tropopause_search_layers`.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        ``position`` (int, shape (...)): index of the base in the search layers, or M when
        none qualifies; ``temperature`` [K]: T at that base (NaN when none qualifies).
    """
    lay = tropopause_search_layers(pressure_hpa, **layers)
    t = np.asarray(air_temperature, dtype=float)
    m = lay["base"].size
    if not m:
        return np.zeros(t.shape[:-1], dtype=int), np.full(t.shape[:-1], np.nan)
    tb = t[..., lay["base"]]
    low = np.ones(tb.shape, dtype=bool)
    for top, thickness in ((lay["next"], lay["next_thickness"]), (lay["deep"], lay["deep_thickness"])):
        tt = t[..., top]
        low &= (tb - tt) - layer_lapse_factor(thickness, lapse_rate) * (tb + tt) <= 0.0
    found = low.any(axis=-1)
    position = np.where(found, np.argmax(low, axis=-1), m)
    at = np.take_along_axis(tb, np.minimum(position, m - 1)[..., None], axis=-1)[..., 0]
    return position, np.where(found, at, np.nan)
