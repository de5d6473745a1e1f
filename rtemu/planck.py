"""Planck function, its temperature derivative and its exact inverse.

Two spectral conventions, chosen per channel:

* frequency channels: B_nu(T) = 2 h nu^3 / c^2 / (exp(h nu / (k T)) - 1)
  [W m-2 sr-1 Hz-1], frequency given in GHz;
* wavenumber channels: B_k(T) = 2 h c^2 k^3 / (exp(h c k / (k_B T)) - 1)
  [W m-2 sr-1 (cm-1)-1], wavenumber given in cm-1.

Both reduce to B(T) = a / (exp(b / T) - 1) with channel constants a (radiance units) and
b [K]; everything below works on that pair, so a channel is described once.

References
----------
Planck, M. (1901), Ann. Phys. 309, 553-563. Constants: CODATA 2018 (rtemu.constants).
"""

from __future__ import annotations

import numpy as np

from rtemu.constants import BOLTZMANN_CONSTANT, C1_RADIANCE, C2, PLANCK_CONSTANT, SPEED_OF_LIGHT


def planck_coefficients(frequency_ghz=None, wavenumber_cm1=None):
    """Channel constants (a, b) with B(T) = a / (exp(b / T) - 1).

    Parameters
    ----------
    frequency_ghz : array_like, optional
        Channel frequency [GHz]; radiance then per Hz.
    wavenumber_cm1 : array_like, optional
        Channel wavenumber [cm-1]; radiance then per cm-1. Exactly one of the two.

    Returns
    -------
    a : ndarray
        [W m-2 sr-1 Hz-1] or [W m-2 sr-1 (cm-1)-1]
    b : ndarray
        [K]
    """
    if (frequency_ghz is None) == (wavenumber_cm1 is None):
        raise ValueError("give exactly one of frequency_ghz or wavenumber_cm1")
    if frequency_ghz is not None:
        nu = np.asarray(frequency_ghz, dtype=float) * 1e9  # [Hz]
        a = 2.0 * PLANCK_CONSTANT * nu**3 / SPEED_OF_LIGHT**2
        b = PLANCK_CONSTANT * nu / BOLTZMANN_CONSTANT
        return a, b
    k = np.asarray(wavenumber_cm1, dtype=float) * 100.0  # [m-1]
    a = C1_RADIANCE * k**3 * 100.0  # per m-1 -> per cm-1
    b = C2 * k
    return a, b


def planck(a, b, temperature):
    """Planck radiance B(T) = a / (exp(b/T) - 1), written to stay finite at any b/T.

    Parameters
    ----------
    a, b : array_like
        Channel constants from :func:`planck_coefficients` [radiance units], [K].
    temperature : array_like
        [K], > 0.

    Returns
    -------
    ndarray
        Radiance [a's units].
    """
    x = b / temperature
    # exp(-x) / (1 - exp(-x)) underflows gracefully where exp(x) would overflow.
    return a * np.exp(-x) / -np.expm1(-x)


def planck_derivative(a, b, temperature):
    """dB/dT [radiance units K-1] of :func:`planck`."""
    x = b / temperature
    em = np.exp(-x)
    return a * (x / temperature) * em / np.expm1(-x) ** 2


def inverse_planck(a, b, radiance):
    """Brightness temperature T = b / ln(1 + a / R) [K], the exact inverse of :func:`planck`.

    Parameters
    ----------
    radiance : array_like
        [a's units], > 0.
    """
    return b / np.log1p(a / radiance)


def planck_frequency(frequency_ghz, temperature):
    """B_nu(T) [W m-2 sr-1 Hz-1] at ``frequency_ghz`` [GHz], ``temperature`` [K]."""
    a, b = planck_coefficients(frequency_ghz=frequency_ghz)
    return planck(a, b, temperature)


def planck_wavenumber(wavenumber_cm1, temperature):
    """B(T) [W m-2 sr-1 (cm-1)-1] at ``wavenumber_cm1`` [cm-1], ``temperature`` [K]."""
    a, b = planck_coefficients(wavenumber_cm1=wavenumber_cm1)
    return planck(a, b, temperature)


def brightness_temperature_frequency(frequency_ghz, radiance):
    """Inverse Planck [K] of ``radiance`` [W m-2 sr-1 Hz-1] at ``frequency_ghz`` [GHz]."""
    a, b = planck_coefficients(frequency_ghz=frequency_ghz)
    return inverse_planck(a, b, radiance)


def brightness_temperature_wavenumber(wavenumber_cm1, radiance):
    """Inverse Planck [K] of ``radiance`` [W m-2 sr-1 (cm-1)-1] at ``wavenumber_cm1`` [cm-1]."""
    a, b = planck_coefficients(wavenumber_cm1=wavenumber_cm1)
    return inverse_planck(a, b, radiance)
