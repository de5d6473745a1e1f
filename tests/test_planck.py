"""Planck function, its derivative and inverse, against external references.

References used here:
* scipy.constants (CODATA 2018 values): h, c, k, sigma, physical_constants[...].
* CODATA 2018 published radiation constants (NIST, https://physics.nist.gov/cuu/Constants/):
  c1L = 1.191042972e-16 W m2 sr-1, c2 = 1.438776877e-2 m K.
* Stefan-Boltzmann law: integral of pi B over the spectrum equals sigma T^4.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import scipy.constants as sc
from scipy.integrate import quad

from rtemu import constants
from rtemu.planck import (
    brightness_temperature_frequency,
    brightness_temperature_wavenumber,
    inverse_planck,
    planck,
    planck_coefficients,
    planck_derivative,
    planck_frequency,
    planck_wavenumber,
)

TEMPERATURES = np.array([2.725, 100.0, 180.0, 250.0, 288.15, 330.0, 400.0])  # [K]
FREQUENCIES = np.array([1.4, 23.8, 50.3, 89.0, 183.31, 325.0, 664.0])  # [GHz]
WAVENUMBERS = np.array([15.0, 250.0, 667.0, 900.0, 1500.0, 2500.0, 3000.0])  # [cm-1]


def scipy_planck_frequency(nu_ghz, t):
    """B_nu [W m-2 sr-1 Hz-1] written out from scipy.constants (CODATA 2018)."""
    nu = nu_ghz * 1e9
    return 2.0 * sc.h * nu**3 / sc.c**2 / np.expm1(sc.h * nu / (sc.k * t))


def scipy_planck_wavenumber(k_cm1, t):
    """B per unit wavenumber [W m-2 sr-1 (cm-1)-1] from scipy.constants (CODATA 2018).

    B_k = 2 h c^2 k^3 / (exp(h c k / (kB T)) - 1) per m-1 with k in m-1; times 100 per cm-1.
    """
    k = k_cm1 * 100.0
    return 100.0 * 2.0 * sc.h * sc.c**2 * k**3 / np.expm1(sc.h * sc.c * k / (sc.k * t))


def test_defining_constants_equal_scipy_codata2018():
    # scipy.constants: h, c, k are exact in the 2019 SI (CODATA 2018)
    assert constants.PLANCK_CONSTANT == sc.h
    assert constants.SPEED_OF_LIGHT == sc.c
    assert constants.BOLTZMANN_CONSTANT == sc.k
    # scipy.constants.g: standard acceleration of gravity (CGPM 1901)
    assert constants.STANDARD_GRAVITY == sc.g


def test_radiation_constants_against_published_codata2018():
    # CODATA 2018 published values (NIST), given to 10 significant digits.
    assert constants.C1_RADIANCE == pytest.approx(1.191042972e-16, rel=5e-10)
    assert constants.C2 == pytest.approx(1.438776877e-2, rel=5e-10)
    # the same constants as tabulated in scipy.constants.physical_constants (CODATA 2018)
    c1l = sc.physical_constants["first radiation constant for spectral radiance"]
    c2 = sc.physical_constants["second radiation constant"]
    assert c1l[1] == "W m^2 sr^-1" and c2[1] == "m K"
    assert constants.C1_RADIANCE == pytest.approx(c1l[0], rel=1e-14)
    assert constants.C2 == pytest.approx(c2[0], rel=1e-14)


def test_cosmic_background_temperature():
    # Fixsen (2009), ApJ 707, 916: T_CMB = 2.72548 +- 0.00057 K (from memory); rtemu rounds to 2.725.
    assert constants.COSMIC_BACKGROUND_TEMPERATURE == pytest.approx(2.72548, abs=1e-3)


@pytest.mark.parametrize("t", TEMPERATURES)
def test_planck_frequency_against_scipy(t):
    expected = scipy_planck_frequency(FREQUENCIES, t)  # scipy.constants (CODATA 2018)
    np.testing.assert_allclose(planck_frequency(FREQUENCIES, t), expected, rtol=1e-12)


@pytest.mark.parametrize("t", TEMPERATURES)
def test_planck_wavenumber_against_scipy(t):
    with np.errstate(over="ignore"):  # the reference's expm1 overflows to inf at 2.725 K
        expected = scipy_planck_wavenumber(WAVENUMBERS, t)  # scipy.constants (CODATA 2018)
    got = planck_wavenumber(WAVENUMBERS, t)
    # Where exp(x) overflows in the reference, B is 0 in both to float precision.
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-300)


def test_planck_coefficients_by_hand():
    # a = 2 h nu^3 / c^2, b = h nu / k (frequency); a = 2 h c^2 k^3 (per cm-1), b = h c k / kB
    a, b = planck_coefficients(frequency_ghz=183.31)
    nu = 183.31e9
    assert a == pytest.approx(2 * sc.h * nu**3 / sc.c**2, rel=1e-14)
    assert b == pytest.approx(sc.h * nu / sc.k, rel=1e-14)
    a, b = planck_coefficients(wavenumber_cm1=900.0)
    assert a == pytest.approx(sc.physical_constants["first radiation constant for spectral radiance"][0]
                              * (900e2) ** 3 * 100.0, rel=1e-14)
    assert b == pytest.approx(sc.physical_constants["second radiation constant"][0] * 900e2, rel=1e-14)


def test_planck_coefficients_need_exactly_one_spectral_position():
    with pytest.raises(ValueError, match="exactly one of frequency_ghz or wavenumber_cm1"):
        planck_coefficients()
    with pytest.raises(ValueError, match="exactly one of frequency_ghz or wavenumber_cm1"):
        planck_coefficients(frequency_ghz=23.8, wavenumber_cm1=900.0)


@pytest.mark.parametrize(
    "forward, inverse, positions",
    [
        (planck_frequency, brightness_temperature_frequency, FREQUENCIES),
        (planck_wavenumber, brightness_temperature_wavenumber, WAVENUMBERS[1:]),
    ],
)
def test_inverse_round_trip(forward, inverse, positions):
    t = np.linspace(100.0, 400.0, 31)[:, None]  # rtemu's physical temperature range [K]
    radiance = forward(positions[None, :], t)
    np.testing.assert_allclose(inverse(positions[None, :], radiance), np.broadcast_to(t, radiance.shape),
                               rtol=1e-13)
    # and radiance -> T -> radiance
    np.testing.assert_allclose(forward(positions[None, :], inverse(positions[None, :], radiance)),
                               radiance, rtol=1e-12)


def test_inverse_round_trip_cosmic_microwave():
    # 2.725 K is representable in the microwave (Rayleigh-Jeans side), where rtemu uses it.
    r = planck_frequency(FREQUENCIES, 2.725)
    np.testing.assert_allclose(brightness_temperature_frequency(FREQUENCIES, r), 2.725, rtol=1e-12)


@pytest.mark.parametrize("position", [("frequency_ghz", 23.8), ("frequency_ghz", 183.31),
                                      ("wavenumber_cm1", 667.0), ("wavenumber_cm1", 2500.0)])
def test_planck_derivative_against_central_difference(position):
    a, b = planck_coefficients(**{position[0]: position[1]})
    t = np.array([150.0, 250.0, 300.0])
    h = 1e-3
    # central difference of the scipy-constants reference (independent of rtemu.planck)
    ref = scipy_planck_frequency if position[0] == "frequency_ghz" else scipy_planck_wavenumber
    fd = (ref(position[1], t + h) - ref(position[1], t - h)) / (2 * h)
    np.testing.assert_allclose(planck_derivative(a, b, t), fd, rtol=1e-7)


@pytest.mark.parametrize("t", [200.0, 300.0])
def test_stefan_boltzmann_from_wavenumber_integral(t):
    # Stefan-Boltzmann law: int_0^inf pi B_k dk = sigma T^4 (scipy.constants.sigma, CODATA 2018)
    peak = 1.961 * t  # Wien peak in wavenumber [cm-1], ~ 2.821 kB T / (h c) (from memory; only sets quad break points)
    def integrand(k):
        return np.pi * planck_wavenumber(k, t)
    pieces = [(1e-9, peak), (peak, 5 * peak), (5 * peak, 60 * peak)]
    total = sum(quad(integrand, lo, hi, epsabs=0.0, epsrel=1e-12, limit=200)[0] for lo, hi in pieces)
    assert total == pytest.approx(sc.sigma * t**4, rel=1e-9)


def test_stefan_boltzmann_from_frequency_integral():
    # Same law in the frequency convention: int_0^inf pi B_nu dnu = sigma T^4 (scipy.constants.sigma)
    t = 250.0
    peak_ghz = 58.79 * t  # Wien peak in frequency [GHz], 2.821 kB T / h (from memory; only sets quad break points)
    def integrand(nu_ghz):
        return np.pi * planck_frequency(nu_ghz, t) * 1e9  # per GHz
    pieces = [(1e-9, peak_ghz), (peak_ghz, 5 * peak_ghz), (5 * peak_ghz, 60 * peak_ghz)]
    total = sum(quad(integrand, lo, hi, epsabs=0.0, epsrel=1e-12, limit=200)[0] for lo, hi in pieces)
    assert total == pytest.approx(sc.sigma * t**4, rel=1e-9)


def test_cosmic_term_at_large_wavenumber_raises_no_warning():
    # exp(h c k / (kB T)) = exp(1320) at 2500 cm-1, 2.725 K: far beyond float range.
    a, b = planck_coefficients(wavenumber_cm1=np.array([2500.0, 3000.0]))
    with warnings.catch_warnings(), np.errstate(over="raise", divide="raise", invalid="raise"):
        warnings.simplefilter("error")
        value = planck(a, b, constants.COSMIC_BACKGROUND_TEMPERATURE)
        slope = planck_derivative(a, b, constants.COSMIC_BACKGROUND_TEMPERATURE)
    assert np.all(np.isfinite(value)) and np.all(value >= 0.0) and np.all(value < 1e-300)
    assert np.all(np.isfinite(slope)) and np.all(slope >= 0.0)


def test_planck_on_scalar_profile_and_batch():
    a, b = planck_coefficients(wavenumber_cm1=np.array([667.0, 900.0, 1500.0]))
    t_batch = np.array([[200.0, 250.0, 300.0], [210.0, 260.0, 310.0]])
    batch = planck(a, b, t_batch)
    assert batch.shape == (2, 3)
    np.testing.assert_array_equal(planck(a, b, t_batch[1]), batch[1])  # one profile
    assert planck(a[1], b[1], 260.0) == batch[1, 1]  # scalars
    assert np.ndim(planck(a[1], b[1], 260.0)) == 0
    bt = inverse_planck(a, b, batch)
    np.testing.assert_allclose(bt, t_batch, rtol=1e-13)
    assert inverse_planck(a[0], b[0], batch[0, 0]) == pytest.approx(200.0, rel=1e-13)
