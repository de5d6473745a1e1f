"""Tests of rtemu.atmosphere against published standards, tables and reference libraries."""

from __future__ import annotations

import numpy as np
import pytest
from fluids.atmosphere import ATMOSPHERE_1976

from rtemu import atmosphere as atm
from rtemu import sampling
from rtemu.constants import EPSILON, STANDARD_GRAVITY

# --- U.S. Standard Atmosphere 1976 ----------------------------------------------------

# Geometric heights [m] spanning all seven layers up to 86 km.
FLUIDS_HEIGHTS_M = [0.0, 1500.0, 5000.0, 10000.0, 11019.0, 15000.0, 20063.0, 26000.0,
                    32162.0, 40000.0, 47350.0, 49000.0, 51412.0, 60000.0, 71802.0,
                    78000.0, 84000.0, 86000.0]


@pytest.mark.parametrize("z", FLUIDS_HEIGHTS_M)
def test_us1976_temperature_matches_fluids(z):
    # Reference library: fluids.atmosphere.ATMOSPHERE_1976 (an independent implementation
    # of NOAA-S/T 76-1562), queried at a geometric height; we go in by its pressure.
    ref = ATMOSPHERE_1976(z)
    p_hpa = ref.P / 100.0
    assert atm.us_standard_atmosphere_1976(p_hpa) == pytest.approx(ref.T, abs=2e-4)  # fluids rounds 186.946 K
    # fluids' .H is the geopotential height of the same level.
    assert atm.us_standard_atmosphere_1976_height(p_hpa) == pytest.approx(ref.H, abs=1e-3)
    assert atm.geometric_height(ref.H) == pytest.approx(z, abs=1e-3)


# U.S. Standard Atmosphere, 1976 (NOAA-S/T 76-1562), Table 4 layer bases (geopotential
# height [m'], temperature [K], pressure [hPa]) (from memory).
US76_LAYER_BASES = [
    (0.0, 288.15, 1013.25),
    (11000.0, 216.65, 226.32),
    (20000.0, 216.65, 54.749),
    (32000.0, 228.65, 8.6802),
    (47000.0, 270.65, 1.1091),
    (51000.0, 270.65, 0.66939),
    (71000.0, 214.65, 0.039564),
]


@pytest.mark.parametrize("height, temperature, pressure", US76_LAYER_BASES)
def test_us1976_layer_bases_match_published_table(height, temperature, pressure):
    # The table gives 5 significant figures of pressure: relative 5e-5.
    assert atm.us_standard_atmosphere_1976_height(pressure) == pytest.approx(height, abs=1.0)
    assert atm.us_standard_atmosphere_1976(pressure) == pytest.approx(temperature, abs=0.01)


def test_us1976_published_geometric_heights():
    # NOAA-S/T 76-1562 Table I (geometric altitude) (from memory): 5 km: 255.676 K,
    # 540.48 hPa; 10 km: 223.252 K, 265.00 hPa; 86 km: 186.87 K, 3.7338e-3 hPa.
    for z, t, p in [(5000.0, 255.676, 540.48), (10000.0, 223.252, 265.00)]:
        assert atm.geometric_height(atm.us_standard_atmosphere_1976_height(p)) == pytest.approx(z, abs=2.0)
        assert atm.us_standard_atmosphere_1976(p) == pytest.approx(t, abs=0.02)
    # At 86 km the table's kinetic temperature is 0.08 K below the molecular-scale
    # temperature 186.946 K that the module returns (documented).
    assert atm.geometric_height(atm.us_standard_atmosphere_1976_height(3.7338e-3)) == pytest.approx(86000.0, abs=5.0)
    assert atm.us_standard_atmosphere_1976(3.7338e-3) == pytest.approx(186.87, abs=0.1)


def test_us1976_shapes_and_bad_input():
    p = atm.default_pressure_grid()
    assert np.ndim(atm.us_standard_atmosphere_1976(500.0)) == 0
    assert atm.us_standard_atmosphere_1976(p).shape == p.shape
    batch = np.stack([p, p])
    assert atm.us_standard_atmosphere_1976(batch).shape == batch.shape
    # monotone height in pressure (hydrostatic)
    assert np.all(np.diff(atm.us_standard_atmosphere_1976_height(p)) > 0)
    with pytest.raises(ValueError, match="pressure_hpa"):
        atm.us_standard_atmosphere_1976([500.0, -1.0])
    with pytest.raises(ValueError, match="pressure_hpa"):
        atm.us_standard_atmosphere_1976(np.nan)


# --- saturation vapour pressure -------------------------------------------------------

def _murphy_koop_liquid_hpa(t):
    """Murphy & Koop (2005, Q. J. R. Meteorol. Soc. 131, 1539-1565) eq. 10, over liquid
    water, 123 K < T < 332 K, an independent formulation (coefficients from memory,
    confirmed by reproducing the triple-point pressure 611.657 Pa below)."""
    t = np.asarray(t, dtype=float)
    ln_e = (54.842763 - 6763.22 / t - 4.210 * np.log(t) + 0.000367 * t
            + np.tanh(0.0415 * (t - 218.8))
            * (53.878 - 1331.22 / t - 9.44523 * np.log(t) + 0.014025 * t))
    return np.exp(ln_e) / 100.0


def test_reference_formula_reproduces_triple_point():
    # Triple point of water 611.657 Pa at 273.16 K (IAPWS; Murphy & Koop 2005 Table 1).
    assert _murphy_koop_liquid_hpa(273.16) == pytest.approx(6.11657, rel=1e-5)


def test_bolton_within_stated_accuracy():
    # Bolton (1980) states eq. 10 is accurate to 0.3 % for -35 degC <= T <= 35 degC
    # (from memory); checked against Murphy & Koop (2005) eq. 10.
    t = np.linspace(273.15 - 35.0, 273.15 + 35.0, 141)
    rel = atm.saturation_vapour_pressure(t) / _murphy_koop_liquid_hpa(t) - 1.0
    assert np.max(np.abs(rel)) < 3e-3


@pytest.mark.parametrize("celsius, table_hpa", [(0.0, 6.1078), (20.0, 23.373), (30.0, 42.430),
                                                (-20.0, 1.2540), (10.0, 12.272)])
def test_bolton_against_smithsonian_table(celsius, table_hpa):
    # Smithsonian Meteorological Tables (List 1951, Goff-Gratch over water) (from memory).
    assert atm.saturation_vapour_pressure(273.15 + celsius) == pytest.approx(table_hpa, rel=3e-3)


def test_bolton_definition_point_and_dewpoint_inverse():
    # eq. 10 gives exactly 6.112 hPa at 0 degC by construction (Bolton 1980).
    assert atm.saturation_vapour_pressure(273.15) == pytest.approx(6.112, rel=1e-12)
    t = np.array([150.0, 200.0, 250.0, 300.0, 330.0])
    assert atm.dewpoint_from_vapour_pressure(atm.saturation_vapour_pressure(t)) == pytest.approx(t, rel=1e-12)


def test_saturation_vapour_pressure_rejects_out_of_validity():
    with pytest.raises(ValueError, match="temperature"):
        atm.saturation_vapour_pressure([250.0, 50.0])
    with pytest.raises(ValueError, match=r"index \(1,\)"):
        atm.saturation_vapour_pressure([250.0, np.nan])


# --- humidity conversions --------------------------------------------------------------

def test_vapour_pressure_textbook_relation():
    # Wallace & Hobbs (2006) eq. 3.59 with q = w / (1 + w): w = eps e / (p - e).
    e, p = 20.0, 1000.0
    w = EPSILON * e / (p - e)
    q = w / (1.0 + w)
    assert atm.vapour_pressure(q, p) == pytest.approx(e, rel=1e-12)
    assert atm.specific_humidity_from_vapour_pressure(e, p) == pytest.approx(q, rel=1e-12)


def test_relative_humidity_round_trip_scalar_profile_batch():
    p = atm.default_pressure_grid()[:40]
    t = atm.us_standard_atmosphere_1976(p)
    rh = np.linspace(0.0, 1.0, p.size)
    q = atm.specific_humidity_from_relative_humidity(rh, t, p)
    assert atm.relative_humidity(q, t, p) == pytest.approx(rh, abs=1e-12)
    batch_rh = np.stack([rh, rh[::-1]])
    qb = atm.specific_humidity_from_relative_humidity(batch_rh, t, p)
    assert qb.shape == (2, p.size)
    assert atm.relative_humidity(qb, t, p) == pytest.approx(batch_rh, abs=1e-12)
    q0 = atm.specific_humidity_from_relative_humidity(0.5, 290.0, 1000.0)
    assert np.ndim(q0) == 0
    # 50 % at 290 K, 1000 hPa against the independent Murphy & Koop (2005) es and the
    # textbook relation q = eps e / (p - (1 - eps) e) (Wallace & Hobbs 2006).
    e = 0.5 * _murphy_koop_liquid_hpa(290.0)
    assert q0 == pytest.approx(EPSILON * e / (1000.0 - (1.0 - EPSILON) * e), rel=3e-3)


def test_saturation_specific_humidity_and_unreachable_saturation():
    assert atm.saturation_specific_humidity(300.0, 1000.0) == pytest.approx(
        atm.specific_humidity_from_relative_humidity(1.0, 300.0, 1000.0), rel=1e-12)
    # es(300 K) = 35 hPa exceeds 10 hPa: saturation cannot be reached.
    assert np.isinf(atm.saturation_specific_humidity(300.0, 10.0))
    with pytest.raises(ValueError, match="vapour pressure"):
        atm.specific_humidity_from_relative_humidity(1.0, 300.0, 10.0)
    with pytest.raises(ValueError, match="relative humidity"):
        atm.specific_humidity_from_relative_humidity(-0.1, 300.0, 1000.0)


# --- column water ----------------------------------------------------------------------

def test_total_column_water_vapour_analytic():
    # Uniform q over a column from 1000 to 0 hPa: W = q * 1e5 Pa / g (hydrostatics).
    p = np.linspace(1000.0, 0.0, 11)
    assert atm.total_column_water_vapour(p, np.full(11, 0.01)) == pytest.approx(0.01 * 1e5 / STANDARD_GRAVITY)
    # Linear q in p: the trapezoid rule is exact, W = mean(q) * dp / g.
    q = 0.02 * p / 1000.0
    expected = 0.5 * (0.02 + 0.0) * 1e5 / STANDARD_GRAVITY
    assert atm.total_column_water_vapour(p, q) == pytest.approx(expected, rel=1e-12)
    # Level order does not matter; batches keep their leading shape.
    assert atm.total_column_water_vapour(p[::-1], q[::-1]) == pytest.approx(expected, rel=1e-12)
    batch = atm.total_column_water_vapour(p, np.stack([q, 2 * q, 3 * q]))
    assert batch == pytest.approx([expected, 2 * expected, 3 * expected], rel=1e-12)


# --- the demo grid --------------------------------------------------------------------

def test_default_pressure_grid_properties():
    p = atm.default_pressure_grid()
    assert p.shape == (64,)
    assert p[0] == 1100.0 and p[-1] == 0.5
    assert np.all(np.diff(p) < 0)
    # the bottom lies below the highest surface pressure the generator draws
    assert p[0] >= sampling.envelope_description()["ranges"]["surface_air_pressure"]["max"]
    # boundary layer spacing <= 25 hPa below 850 hPa
    near_surface = p[p > 850.0]
    assert np.all(-np.diff(near_surface) <= 25.0)
    # log-like aloft: the ln-p step grows monotonically and stays below 0.4 (~2.8 km)
    step = np.log(p[:-1] / p[1:])
    assert np.all(np.diff(step) > 0)
    assert step.max() < 0.4
    # the documented coordinate is equally spaced
    eta = 15.0 * (1.0 - p / 1013.25) + np.log(1013.25 / p)
    assert np.diff(eta) == pytest.approx(np.full(63, (eta[-1] - eta[0]) / 63), rel=1e-9)


# --- column water above a surface, interpolation in ln p ------------------------------------

def test_value_at_pressure_is_linear_in_ln_p():
    p = np.array([1100.0, 1000.0, 800.0, 500.0])
    v = 3.0 + 2.0 * np.log(p)  # linear in ln p: exact anywhere
    for target in (1100.0, 1013.25, 900.0, 500.0, 640.0):
        assert atm.value_at_pressure(p, v, target) == pytest.approx(3.0 + 2.0 * np.log(target), rel=1e-12)
    # either level order, a batch
    assert atm.value_at_pressure(p[::-1], v[::-1], 900.0) == pytest.approx(3.0 + 2.0 * np.log(900.0))
    batch = atm.value_at_pressure(p, np.stack([v, 2 * v]), np.array([900.0, 700.0]))
    np.testing.assert_allclose(batch, [3 + 2 * np.log(900.0), 2 * (3 + 2 * np.log(700.0))], rtol=1e-12)


def test_column_water_above_a_surface():
    # A constant q: the column is q (ps - p_top) 100 / g exactly (hydrostatic mass).
    p = np.linspace(1100.0, 100.0, 41)
    q = np.full(41, 0.004)
    for ps in (1100.0, 1013.25, 612.5):
        expected = 0.004 * (ps - 100.0) * 100.0 / STANDARD_GRAVITY
        assert atm.total_column_water_vapour(p, q, ps) == pytest.approx(expected, rel=1e-12)
    # the levels below the surface do not count, whatever they hold
    q2 = q.copy()
    q2[p > 950.0] = 0.05
    assert atm.total_column_water_vapour(p, q2, 900.0) == pytest.approx(
        atm.total_column_water_vapour(p, q, 900.0), rel=1e-12)
    # ps at the bottom: the whole column
    assert atm.total_column_water_vapour(p, q2, 1100.0) == pytest.approx(atm.total_column_water_vapour(p, q2))
    with pytest.raises(ValueError, match="surface_pressure_hpa"):
        atm.total_column_water_vapour(p, q, 1200.0)


# --- saturated ascent ------------------------------------------------------------------------

def test_pseudo_adiabatic_gradient_limits_and_textbook_values():
    # Dry limit: with no vapour the gradient is R_d T / c_pd (Poisson); at 150 K and
    # 1000 hPa e_s is 6e-6 hPa, so the moist terms vanish to 1e-6.
    t = 150.0
    assert atm.pseudo_adiabatic_gradient(t, 1000.0) == pytest.approx(287.05 * t / 1005.7, rel=1e-6)
    # Saturated lapse rates at 1000 hPa (textbook tables, e.g. Wallace & Hobbs 2006 fig. 3.x /
    # Smithsonian Meteorological Tables; values from memory): about 6.4 K/km at 0 degC,
    # 5.3 at 10 degC, 4.3 at 20 degC, 3.6 at 30 degC. Converted with dz = R_d T / g d ln p.
    for celsius, expected in ((0.0, 6.4), (10.0, 5.3), (20.0, 4.3), (30.0, 3.6)):
        tk = 273.15 + celsius
        per_km = atm.pseudo_adiabatic_gradient(tk, 1000.0) * STANDARD_GRAVITY / (287.05 * tk) * 1e3
        assert per_km == pytest.approx(expected, abs=0.15), celsius
    # scalar, profile and batch shapes
    assert np.ndim(atm.pseudo_adiabatic_gradient(280.0, 900.0)) == 0
    assert atm.pseudo_adiabatic_gradient(np.full((3, 4), 280.0), np.full(4, 900.0)).shape == (3, 4)


def test_pseudo_adiabat_against_scipy_solve_ivp():
    # An independent integration of the same equation (scipy.integrate.solve_ivp, RK45 at
    # rtol 1e-10) from 1000 hPa up to 100 hPa: the fixed-step RK4 agrees to 1e-3 K.
    from scipy.integrate import solve_ivp

    targets = np.array([1000.0, 850.0, 700.0, 500.0, 300.0, 200.0, 100.0])
    for t0 in (275.0, 290.0, 300.0, 305.0):
        ivp = solve_ivp(lambda x, y: atm.pseudo_adiabatic_gradient(y, np.exp(x)), (np.log(1000.0), np.log(100.0)),
                        [t0], t_eval=np.log(targets), rtol=1e-10, atol=1e-8)
        ours = atm.pseudo_adiabat(t0, 1000.0, targets)
        np.testing.assert_allclose(ours, ivp.y[0], atol=1e-3)
    # batch of parcels, each with its own start
    batch = atm.pseudo_adiabat(np.array([290.0, 300.0]), np.array([1000.0, 950.0]), targets)
    assert batch.shape == (2, targets.size)
    assert batch[1, 0] > 300.0  # going down from 950 to 1000 hPa warms


def _bolton_theta_e(t, p, r):
    """Pseudo-equivalent potential temperature, Bolton (1980) eq. 43, for saturated air
    (T_L = T); r mixing ratio [g kg-1], p [hPa], T [K]."""
    return (t * (1000.0 / p) ** (0.2854 * (1 - 0.28e-3 * r))
            * np.exp((3.376 / t - 0.00254) * r * (1 + 0.81e-3 * r)))


def test_pseudo_adiabat_conserves_bolton_theta_e():
    # Bolton's eq. 43 is an independent empirical fit to pseudo-adiabats (stated accuracy
    # about 0.3 K in theta_e, from memory). Along our pseudo-adiabat from 1000 to 200 hPa it
    # changes by less than 0.6 K (measured: 0.07, 0.09, 0.34 K at 280, 295, 303 K); our
    # equation neglects the vapour's heat capacity, which Bolton's pseudo-adiabats include.
    targets = np.array([1000.0, 900.0, 800.0, 700.0, 600.0, 500.0, 400.0, 300.0, 200.0])
    for t0 in (280.0, 295.0, 303.0):
        t = atm.pseudo_adiabat(t0, 1000.0, targets)
        es = atm.saturation_vapour_pressure(t)
        r = 1000.0 * EPSILON * es / (targets - es)
        theta_e = _bolton_theta_e(t, targets, r)
        assert np.ptp(theta_e) < 0.6, (t0, theta_e)


def test_lifting_condensation_level_saturates_the_parcel():
    # Lifted dry-adiabatically with its mixing ratio kept, the parcel's vapour pressure
    # falls with p; at the LCL it must equal e_s(T_L). Bolton's eq. 21 is a fit (0.1 K,
    # from memory): e_s(T_L) matches the carried vapour pressure to 0.5 %.
    p0 = 1000.0
    for t0, rh in ((300.0, 0.8), (290.0, 0.5), (275.0, 0.3), (310.0, 0.2)):
        q = atm.specific_humidity_from_relative_humidity(rh, t0, p0)
        t_l, p_l = atm.lifting_condensation_level(t0, q, p0)
        e_carried = atm.vapour_pressure(q, p_l)
        assert atm.saturation_vapour_pressure(t_l) == pytest.approx(e_carried, rel=5e-3)
        # Poisson: the parcel kept its potential temperature
        assert t_l * (1000.0 / p_l) ** (287.05 / 1005.7) == pytest.approx(t0, rel=1e-12)
    # a saturated parcel is at its LCL
    q = atm.saturation_specific_humidity(295.0, 950.0)
    t_l, p_l = atm.lifting_condensation_level(295.0, q, 950.0)
    assert t_l == pytest.approx(295.0, abs=0.2) and p_l == pytest.approx(950.0, rel=3e-3)


def test_parcel_temperature_dry_then_moist():
    q = atm.specific_humidity_from_relative_humidity(0.6, 300.0, 1000.0)
    t_l, p_l = atm.lifting_condensation_level(300.0, q, 1000.0)
    targets = np.array([1000.0, 0.5 * (1000.0 + p_l), 700.0, 500.0])
    t = atm.parcel_temperature(300.0, q, 1000.0, targets)
    assert t[0] == pytest.approx(300.0)
    assert t[1] == pytest.approx(300.0 * (targets[1] / 1000.0) ** (287.05 / 1005.7), rel=1e-12)  # dry adiabat
    np.testing.assert_allclose(t[2:], atm.pseudo_adiabat(t_l, p_l, targets[2:]), rtol=1e-12)


# --- lapse-rate tropopause ---------------------------------------------------------------------

def _fluids_us1976(heights_m):
    """(pressure [hPa], temperature [K]) of the US 1976 atmosphere from the fluids package."""
    states = [ATMOSPHERE_1976(float(z)) for z in heights_m]
    return np.array([s.P / 100.0 for s in states]), np.array([s.T for s in states])


def test_lapse_rate_tropopause_of_us1976_from_fluids():
    # The US 1976 atmosphere cools 6.5 K/km up to 11 km geopotential (226.32 hPa) and is
    # isothermal above (NOAA-S/T 76-1562; here from the fluids package, an independent
    # implementation, on geometric heights 250 m apart): the tropopause found is the grid
    # level nearest 226.32 hPa (the layer from the level just below is then nearly isothermal).
    p, t = _fluids_us1976(np.arange(0.0, 30001.0, 250.0))
    lay = atm.tropopause_search_layers(p)
    position, temperature = atm.lapse_rate_tropopause(t, p)
    base = lay["base"][position]
    assert base == np.argmin(np.abs(np.log(p / 226.32)))
    assert temperature == pytest.approx(216.65, abs=0.2)
    # the same on the grid in the other order, and for a batch
    position2, temperature2 = atm.lapse_rate_tropopause(np.stack([t[::-1]] * 3), p[::-1])
    lay2 = atm.tropopause_search_layers(p[::-1])
    assert np.all(p[::-1][lay2["base"][position2]] == p[base]) and np.allclose(temperature2, temperature)


def test_lapse_rate_criterion_at_two_kelvin_per_km():
    # A layer 2 km deep by the hypsometric equation dz = (R_d / g) T_mean ln(p_b / p_t)
    # (Wallace & Hobbs 2006 eq. 3.29; R_d = 287.05 J kg-1 K-1, common value) cooling by
    # (2 +- 0.05) K/km: the criterion (WMO 1957: 2 K/km, from memory) holds just below the
    # threshold and fails just above it.
    thickness = 0.3
    a = atm.layer_lapse_factor(thickness)
    for rate, holds in ((1.95, True), (2.05, False), (0.0, True), (-3.0, True), (6.5, False)):
        # solve T_b - T_t = rate * dz with dz = (287.05 / g) (T_b + T_t) / 2 * thickness, T_b = 220 K
        k = rate * 1e-3 * 287.05 / STANDARD_GRAVITY * thickness / 2.0
        t_top = 220.0 * (1.0 - k) / (1.0 + k)
        assert ((220.0 - t_top) - a * (220.0 + t_top) <= 0.0) == holds, rate


def test_no_tropopause_in_the_search_range():
    p = atm.default_pressure_grid()
    z = np.log(p[0] / p) * 7.0  # [km], rough heights: a steady 6.5 K/km cooling everywhere
    t = 300.0 - 6.5 * z
    lay = atm.tropopause_search_layers(p)
    position, temperature = atm.lapse_rate_tropopause(t, p)
    assert position == lay["base"].size and np.isnan(temperature)
    # a grid that ends below the search range has no layer at all
    assert atm.tropopause_search_layers(np.linspace(1000.0, 600.0, 10))["base"].size == 0
