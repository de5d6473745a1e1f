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
- :func:`total_column_water_vapour`: the physical model's trapezoidal column integral.
- :func:`tropopause_search_layers`, :func:`lapse_rate_tropopause`: the lowest level where
  the lapse rate falls to 2 K/km (after the WMO 1957 criterion), used by the emulator's
  novelty check.
- :func:`default_pressure_grid`: the 60-level demo grid.
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
    "default_pressure_grid",
    "DEFAULT_SURFACE_PRESSURE_HPA",
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


def total_column_water_vapour(pressure_hpa, specific_humidity) -> np.ndarray:
    """Total column water vapour by the trapezoidal rule, as the physical model does.

        TCWV = sum_j (q_j + q_{j+1}) / 2 * |p_j - p_{j+1}| * 100 / g

    (100 converts hPa to Pa; g = 9.80665 m s-2.) Levels may be in either order.

    Parameters
    ----------
    pressure_hpa : array_like
        Level pressures [hPa], shape (L,) or (..., L), monotonic along the last axis.
    specific_humidity : array_like
        Specific humidity [kg kg-1], shape (..., L).

    Returns
    -------
    numpy.ndarray
        Total column water vapour [kg m-2], shape (...).
    """
    p = np.asarray(pressure_hpa, dtype=float)
    q = np.asarray(specific_humidity, dtype=float)
    layer_mass = np.abs(np.diff(p, axis=-1)) * 100.0 / STANDARD_GRAVITY  # [kg m-2]
    layer_q = 0.5 * (q[..., 1:] + q[..., :-1])
    return np.sum(layer_q * layer_mass, axis=-1)


# --- the demo level grid --------------------------------------------------------------
DEFAULT_SURFACE_PRESSURE_HPA = 1013.25
DEFAULT_TOP_PRESSURE_HPA = 0.5
DEFAULT_LEVEL_COUNT = 60
#: Weight of the pressure-linear term of the grid coordinate (see default_pressure_grid)
_GRID_LINEAR_WEIGHT = 15.0


def _grid_coordinate(p: np.ndarray, p_surface: float) -> np.ndarray:
    return _GRID_LINEAR_WEIGHT * (1.0 - p / p_surface) + np.log(p_surface / p)


def default_pressure_grid() -> np.ndarray:
    """The 60-level demo pressure grid, surface first.

    Levels are equally spaced in the hybrid coordinate

        eta(p) = 15 (1 - p / ps) + ln(ps / p),    ps = 1013.25 hPa,

    from eta(1013.25 hPa) = 0 to eta(0.5 hPa), solved for p by Newton's method. The
    linear term dominates near the surface (spacing 24.3 hPa at the bottom, about
    0.2 km), the logarithmic term aloft (spacing ~0.38 in ln p at the top, about 2.7 km
    with a 7 km scale height); 42 of the 60 levels lie below 100 hPa.

    Returns
    -------
    numpy.ndarray
        Pressure [hPa], shape (60,), strictly decreasing from 1013.25 to 0.5.
    """
    ps, top = DEFAULT_SURFACE_PRESSURE_HPA, DEFAULT_TOP_PRESSURE_HPA
    eta = np.linspace(0.0, _grid_coordinate(np.array(top), ps), DEFAULT_LEVEL_COUNT)
    # Start from the log-only solution, which lies above (lower p than) the answer.
    p = ps * np.exp(-eta)
    for _ in range(50):
        residual = _grid_coordinate(p, ps) - eta
        slope = -_GRID_LINEAR_WEIGHT / ps - 1.0 / p
        step = residual / slope
        p = p - step
        if np.max(np.abs(step / p)) < 1e-14:
            break
    p[0], p[-1] = ps, top
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
