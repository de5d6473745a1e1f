"""Training-set generation: atmospheric states that fill the envelope, and their radiances.

Two parts:

* :func:`draw_states` builds clear-sky atmospheric states from a mixture of climate
  regimes (docs/generator.md), a space-filling design (scrambled Sobol' points for the
  scalars) plus vertically correlated Gaussian perturbations; the construction is
  described in :func:`draw_states` and the nominal ranges in :func:`envelope_description`.
* :func:`sample_to_netcdf` draws states chunk by chunk, runs the physical model
  (:func:`rtemu.physics.simulate`) on each chunk, optionally in parallel on
  dask.distributed, keeps finished chunks so that an interrupted run resumes, and
  assembles one netCDF file in the operator schema, written atomically with reproducible
  bytes.

Determinism: profile ``i`` depends only on (seed, i, level grid, channel kinds). The
profiles are generated in fixed blocks of :data:`BLOCK_SIZE`; block ``b`` takes Sobol'
points ``b * BLOCK_SIZE ...`` of one scrambled sequence (scrambling seeded from ``seed``,
``Sobol.fast_forward`` to the block) and its Gaussian draws from a numpy Generator seeded
with ``SeedSequence([seed, b])``. Any request is served by slicing the blocks it covers, so
the numbers never depend on how a run is split into chunks or spread over workers.
"""

from __future__ import annotations

import contextlib
import functools
import hashlib
import json
import os
import warnings
from pathlib import Path
from typing import Sequence

import numpy as np
import xarray as xr
from scipy import special
from scipy.stats import qmc

from rtemu import atmosphere as atm
from rtemu import flags, physics
from rtemu import teacher as _teacher
from rtemu._checks import input_names
from rtemu._io import (assembly_size, atomic_path, check_space, exclusive_output, remove_partials,
                      write_bytes_atomic, write_text_atomic)
from rtemu._units import unit_conversion
from rtemu._warnings import RtemuWarning
from rtemu.constants import DRY_AIR_GAS_CONSTANT, EPSILON, STANDARD_GRAVITY
from rtemu.instrument import Instrument, load_instrument

__all__ = [
    "BLOCK_SIZE",
    "GENERATOR_VERSION",
    "draw_states",
    "tropopause_temperature_band",
    "envelope_description",
    "covered_envelope",
    "sample_to_netcdf",
    "read_levels_file",
]

#: Version of the state construction; changes whenever the same seed would give other numbers.
GENERATOR_VERSION = "5"
#: Profiles per deterministic block (see the module docstring).
BLOCK_SIZE = 1024
#: Largest profile index + 1 (scipy's Sobol' sequences hold 2**30 points).
MAX_PROFILES = 2**30

_KAPPA_PER_LAPSE = DRY_AIR_GAS_CONSTANT / STANDARD_GRAVITY  # d ln T / d ln p per (K m-1)
_KAPPA_DRY = DRY_AIR_GAS_CONSTANT / atm.DRY_AIR_HEAT_CAPACITY  # Poisson exponent R_d / c_pd [1]
#: High ground: the regime's surface air temperature range is for air reduced to sea level
#: at 6.5 K/km (the US 1976 lowest layer; the usual choice when reducing pressure to sea
#: level, common practice).
_SEA_LEVEL_REDUCTION_LAPSE_K_PER_KM = 6.5

# Tropopause temperature follows tropopause pressure: a line in ln p through the US 1976
# tropopause (U.S. Standard Atmosphere 1976, 11 km': 226.32 hPa, 216.65 K) rising 29 K per
# e-fold of pressure, which puts a 100 hPa tropopause at 193 K (tropical tropopause about
# 190-195 K: textbook value, from memory). Each regime draws an offset from it in its own
# range (the polar ones well below it: a 300 hPa polar-night tropopause is at about
# 210-220 K, from memory), and its own absolute limits apply.
_TROPOPAUSE_LINE = {"reference_hpa": 226.32, "reference_k": 216.65, "slope_k_per_ln_p": 29.0}

# --- the regimes --------------------------------------------------------------------------
# Each regime: weight [1], a description, and for every drawn quantity a (low, high) range
# (uniform in it; tropopause and stratopause pressure log-uniform). Values are typical
# figures from textbook climatology (Wallace & Hobbs 2006 ch. 1 and 3; Holton 2004; the
# U.S. Standard Atmosphere Supplements 1966 tropical/mid-latitude/subarctic models), all
# from memory and rounded: docs/generator.md says which and measures the result.
# boundary_layer: "parcel" (dry adiabat to the lifting condensation level of the surface
# air, pseudo-adiabat above, cooled by moist_adiabat_offset from 500 hPa up), "mixed" (dry
# adiabat from the surface to the layer top, then an inversion of inversion_strength over
# inversion_thickness), "inversion" (T linear in ln p from the surface to the layer top,
# inversion_strength warmer there; negative: a lapse). surface_temperature_at_sea_level: the
# surface_air_temperature range is for air reduced to 1013.25 hPa at 6.5 K/km, and the
# surface air is T (ps / 1013.25) ** (6.5e-3 R_d / g) (high ground is colder).
# inversion_top_temperature_max [K]: an "inversion" layer's top is at most this warm (strong
# surface inversions form over cold ground, below mild air aloft).
_REGIMES = {
    "tropical_moist": dict(
        inversion_top_temperature_max=400.0,
        surface_temperature_at_sea_level=False,
        weight=0.25, boundary_layer="parcel", humidity_jump=True,
        description="deep tropics over warm ocean: the troposphere follows the pseudo-adiabat of the "
                    "surface air up to about twice the tropopause pressure, then a constant lapse rate to a "
                    "cold, high tropopause",
        surface_air_pressure=(1000.0, 1015.0), surface_air_temperature=(297.0, 303.0),
        boundary_layer_depth=(40.0, 100.0), inversion_strength=(0.0, 0.0), inversion_thickness=(10.0, 30.0),
        moist_adiabat_offset=(0.0, 3.0), tropospheric_lapse_rate=(4.0, 9.0),
        tropopause_pressure=(80.0, 120.0), tropopause_temperature_offset=(-6.0, 4.0),
        tropopause_temperature=(185.0, 200.0),
        stratopause_pressure=(0.7, 1.5), stratopause_temperature=(255.0, 275.0),
        mesospheric_lapse_rate=(1.0, 2.8),
        relative_humidity_surface=(0.70, 0.85), relative_humidity_boundary_layer_top=(0.75, 0.92),
        relative_humidity_free_troposphere=(0.30, 0.80), relative_humidity_tropopause=(0.2, 0.7),
        skin_minus_air_temperature=(-2.0, 3.0)),
    "subtropical_subsidence": dict(
        inversion_top_temperature_max=400.0,
        surface_temperature_at_sea_level=False,
        weight=0.15, boundary_layer="mixed", humidity_jump=True,
        description="subtropical oceans under the descending branch of the Hadley cell: a moist, "
                    "well-mixed marine boundary layer capped by a trade-wind or stratocumulus inversion, "
                    "very dry subsiding air above",
        surface_air_pressure=(1010.0, 1030.0), surface_air_temperature=(286.0, 300.0),
        boundary_layer_depth=(80.0, 250.0), inversion_strength=(2.0, 12.0), inversion_thickness=(10.0, 30.0),
        moist_adiabat_offset=(0.0, 0.0), tropospheric_lapse_rate=(5.5, 7.5),
        tropopause_pressure=(90.0, 160.0), tropopause_temperature_offset=(-5.0, 5.0),
        tropopause_temperature=(190.0, 212.0),
        stratopause_pressure=(0.7, 1.5), stratopause_temperature=(255.0, 280.0),
        mesospheric_lapse_rate=(1.0, 2.8),
        relative_humidity_surface=(0.70, 0.85), relative_humidity_boundary_layer_top=(0.80, 0.98),
        relative_humidity_free_troposphere=(0.05, 0.35), relative_humidity_tropopause=(0.05, 0.5),
        skin_minus_air_temperature=(-1.0, 2.0)),
    "hot_desert": dict(
        inversion_top_temperature_max=400.0,
        surface_temperature_at_sea_level=False,
        weight=0.06, boundary_layer="mixed", humidity_jump=True,
        description="subtropical deserts on low plateaus: a deep dry-adiabatic mixed layer, very low "
                    "humidity, the ground up to 25 K hotter than the air by day and cooler by night",
        surface_air_pressure=(900.0, 1010.0), surface_air_temperature=(290.0, 318.0),
        boundary_layer_depth=(100.0, 400.0), inversion_strength=(0.0, 3.0), inversion_thickness=(10.0, 30.0),
        moist_adiabat_offset=(0.0, 0.0), tropospheric_lapse_rate=(6.0, 8.5),
        tropopause_pressure=(90.0, 150.0), tropopause_temperature_offset=(-4.0, 6.0),
        tropopause_temperature=(190.0, 212.0),
        stratopause_pressure=(0.7, 1.5), stratopause_temperature=(260.0, 285.0),
        mesospheric_lapse_rate=(1.0, 2.8),
        relative_humidity_surface=(0.05, 0.35), relative_humidity_boundary_layer_top=(0.05, 0.40),
        relative_humidity_free_troposphere=(0.05, 0.40), relative_humidity_tropopause=(0.05, 0.4),
        skin_minus_air_temperature=(-5.0, 25.0)),
    "midlatitude_summer": dict(
        inversion_top_temperature_max=400.0,
        surface_temperature_at_sea_level=False,
        weight=0.14, boundary_layer="mixed", humidity_jump=False,
        description="mid-latitude land and sea in summer: a mixed boundary layer under a weak capping "
                    "inversion, about 6-7 K/km above, tropopause near 200 hPa",
        surface_air_pressure=(995.0, 1025.0), surface_air_temperature=(285.0, 305.0),
        boundary_layer_depth=(50.0, 200.0), inversion_strength=(-1.0, 3.0), inversion_thickness=(10.0, 30.0),
        moist_adiabat_offset=(0.0, 0.0), tropospheric_lapse_rate=(5.5, 7.5),
        tropopause_pressure=(150.0, 260.0), tropopause_temperature_offset=(-4.0, 6.0),
        tropopause_temperature=(200.0, 228.0),
        stratopause_pressure=(0.7, 1.5), stratopause_temperature=(265.0, 285.0),
        mesospheric_lapse_rate=(1.0, 2.8),
        relative_humidity_surface=(0.45, 0.90), relative_humidity_boundary_layer_top=(0.50, 0.95),
        relative_humidity_free_troposphere=(0.50, 0.95), relative_humidity_tropopause=(0.1, 0.8),
        skin_minus_air_temperature=(-3.0, 12.0)),
    "midlatitude_winter": dict(
        inversion_top_temperature_max=285.0,
        surface_temperature_at_sea_level=False,
        weight=0.12, boundary_layer="inversion", humidity_jump=False,
        description="mid-latitude winter: cold surfaces with weak inversions or a shallow lapse layer, "
                    "5-7.5 K/km above, a low and relatively warm tropopause",
        surface_air_pressure=(980.0, 1050.0), surface_air_temperature=(258.0, 288.0),
        boundary_layer_depth=(30.0, 150.0), inversion_strength=(-3.0, 8.0), inversion_thickness=(10.0, 30.0),
        moist_adiabat_offset=(0.0, 0.0), tropospheric_lapse_rate=(5.0, 7.5),
        tropopause_pressure=(200.0, 350.0), tropopause_temperature_offset=(-10.0, 4.0),
        tropopause_temperature=(205.0, 230.0),
        stratopause_pressure=(0.7, 2.0), stratopause_temperature=(245.0, 275.0),
        mesospheric_lapse_rate=(1.0, 2.8),
        relative_humidity_surface=(0.60, 0.95), relative_humidity_boundary_layer_top=(0.60, 0.95),
        relative_humidity_free_troposphere=(0.60, 0.95), relative_humidity_tropopause=(0.1, 0.8),
        skin_minus_air_temperature=(-8.0, 3.0)),
    "polar_summer": dict(
        inversion_top_temperature_max=290.0,
        surface_temperature_at_sea_level=False,
        weight=0.06, boundary_layer="inversion", humidity_jump=False,
        description="sub-arctic and polar summer: cool, moist low levels, weak inversions over sea ice "
                    "and cold water, a tropopause near 300 hPa, a warm summer stratopause",
        surface_air_pressure=(990.0, 1025.0), surface_air_temperature=(268.0, 285.0),
        boundary_layer_depth=(30.0, 120.0), inversion_strength=(-2.0, 6.0), inversion_thickness=(10.0, 30.0),
        moist_adiabat_offset=(0.0, 0.0), tropospheric_lapse_rate=(5.0, 7.5),
        tropopause_pressure=(230.0, 330.0), tropopause_temperature_offset=(-6.0, 2.0),
        tropopause_temperature=(210.0, 228.0),
        stratopause_pressure=(0.7, 1.5), stratopause_temperature=(275.0, 292.0),
        mesospheric_lapse_rate=(1.0, 2.8),
        relative_humidity_surface=(0.70, 0.95), relative_humidity_boundary_layer_top=(0.70, 0.98),
        relative_humidity_free_troposphere=(0.70, 0.98), relative_humidity_tropopause=(0.2, 0.8),
        skin_minus_air_temperature=(-3.0, 5.0)),
    "polar_winter": dict(
        inversion_top_temperature_max=262.0,
        surface_temperature_at_sea_level=False,
        weight=0.09, boundary_layer="inversion", humidity_jump=False,
        description="polar night over snow and sea ice: surface-based inversions of up to 25 K, a low, "
                    "cold and weak tropopause, a cold stratosphere inside the polar vortex",
        surface_air_pressure=(990.0, 1060.0), surface_air_temperature=(225.0, 258.0),
        boundary_layer_depth=(40.0, 200.0), inversion_strength=(0.0, 25.0), inversion_thickness=(10.0, 30.0),
        moist_adiabat_offset=(0.0, 0.0), tropospheric_lapse_rate=(4.0, 7.0),
        tropopause_pressure=(250.0, 400.0), tropopause_temperature_offset=(-18.0, -5.0),
        tropopause_temperature=(200.0, 226.0),
        stratopause_pressure=(0.7, 2.0), stratopause_temperature=(235.0, 270.0),
        mesospheric_lapse_rate=(1.0, 2.8),
        relative_humidity_surface=(0.50, 0.85), relative_humidity_boundary_layer_top=(0.50, 0.90),
        relative_humidity_free_troposphere=(0.50, 0.90), relative_humidity_tropopause=(0.2, 0.7),
        skin_minus_air_temperature=(-6.0, 2.0)),
    "high_terrain": dict(
        inversion_top_temperature_max=285.0,
        surface_temperature_at_sea_level=True,
        weight=0.08, boundary_layer="inversion", humidity_jump=False,
        description="high plateaus and mountains (surface 500-850 hPa): dry, thin columns, strong "
                    "night-time or winter inversions, a hot ground by day",
        surface_air_pressure=(500.0, 850.0), surface_air_temperature=(240.0, 305.0),
        boundary_layer_depth=(20.0, 100.0), inversion_strength=(-3.0, 15.0), inversion_thickness=(10.0, 30.0),
        moist_adiabat_offset=(0.0, 0.0), tropospheric_lapse_rate=(5.0, 8.0),
        tropopause_pressure=(100.0, 300.0), tropopause_temperature_offset=(-10.0, 6.0),
        tropopause_temperature=(188.0, 228.0),
        stratopause_pressure=(0.7, 2.0), stratopause_temperature=(245.0, 285.0),
        mesospheric_lapse_rate=(1.0, 2.8),
        relative_humidity_surface=(0.15, 0.85), relative_humidity_boundary_layer_top=(0.15, 0.90),
        relative_humidity_free_troposphere=(0.15, 0.90), relative_humidity_tropopause=(0.1, 0.7),
        skin_minus_air_temperature=(-8.0, 20.0)),
    "stratospheric_warming": dict(
        inversion_top_temperature_max=270.0,
        surface_temperature_at_sea_level=False,
        weight=0.05, boundary_layer="inversion", humidity_jump=False,
        description="winter high latitudes during a sudden stratospheric warming: a cold troposphere, "
                    "the stratopause lowered to 5-10 hPa and warm, a cold mesosphere above",
        surface_air_pressure=(990.0, 1050.0), surface_air_temperature=(235.0, 275.0),
        boundary_layer_depth=(30.0, 150.0), inversion_strength=(0.0, 12.0), inversion_thickness=(10.0, 30.0),
        moist_adiabat_offset=(0.0, 0.0), tropospheric_lapse_rate=(4.5, 7.0),
        tropopause_pressure=(220.0, 350.0), tropopause_temperature_offset=(-12.0, 0.0),
        tropopause_temperature=(205.0, 226.0),
        stratopause_pressure=(5.0, 10.0), stratopause_temperature=(260.0, 300.0),
        mesospheric_lapse_rate=(1.0, 2.5),
        relative_humidity_surface=(0.55, 0.90), relative_humidity_boundary_layer_top=(0.55, 0.90),
        relative_humidity_free_troposphere=(0.55, 0.90), relative_humidity_tropopause=(0.2, 0.7),
        skin_minus_air_temperature=(-6.0, 2.0)),
}
_REGIME_NAMES = tuple(_REGIMES)
_REGIME_UNITS = {
    "surface_air_pressure": ("hPa", "surface pressure; below the default grid's bottom (1100 hPa)"),
    "surface_air_temperature": ("K", "air temperature at the surface pressure"),
    "boundary_layer_depth": ("hPa", "surface pressure minus the pressure of the boundary-layer top"),
    "inversion_strength": ("K", "temperature rise across the inversion (negative: a lapse)"),
    "inversion_thickness": ("hPa", "depth of the inversion capping a mixed layer"),
    "moist_adiabat_offset": ("K", "how much colder than the surface air's pseudo-adiabat the "
                             "tropical column is at and above 500 hPa"),
    "tropospheric_lapse_rate": ("K km-1", "limits of the constant lapse rate from the boundary-layer top "
                                "to the tropopause"),
    "tropopause_pressure": ("hPa", "log-uniform"),
    "tropopause_temperature_offset": ("K", "tropopause temperature minus the line "
                                      f"{_TROPOPAUSE_LINE['reference_k']:g} K + {_TROPOPAUSE_LINE['slope_k_per_ln_p']:g} "
                                      f"K * ln(p_t / {_TROPOPAUSE_LINE['reference_hpa']:g} hPa); where the "
                                      "lapse-rate limits do not reach it, the limit nearest it"),
    "tropopause_temperature": ("K", "absolute limits of the tropopause temperature"),
    "stratopause_pressure": ("hPa", "log-uniform"),
    "stratopause_temperature": ("K", "at the stratopause; at least tropopause + 5 K"),
    "mesospheric_lapse_rate": ("K km-1", "cooling above the stratopause"),
    "relative_humidity_surface": ("1", "over liquid water at the surface"),
    "relative_humidity_boundary_layer_top": ("1", "at the top of the boundary layer"),
    "relative_humidity_free_troposphere": ("1", "just above the boundary layer (regimes with a humidity "
                                           "jump; the others continue from the layer top)"),
    "relative_humidity_tropopause": ("1", "at the tropopause (logit(RH) linear in p in between)"),
    "skin_minus_air_temperature": ("K", "surface_temperature minus surface air temperature"),
}

# --- nominal envelope -------------------------------------------------------------------
# Each entry: (low, high, units, meaning): the quantities every regime shares, drawn the
# same way in all of them.
_GLOBAL_RANGES = {
    "relative_humidity": (0.0, 1.0, "1", "over liquid water (Bolton 1980 eq. 10); never above 1"),
    "specific_humidity_floor": (1e-7, 1e-7, "kg kg-1", "smallest specific humidity anywhere"),
    "surface_emissivity_microwave": (0.4, 1.0, "1", "per-profile value + N(0, 0.03) per channel, clipped"),
    "surface_emissivity_infrared": (0.90, 1.0, "1", "per-profile value + N(0, 0.005) per channel, clipped"),
    "sensor_zenith_angle": (0.0, 65.0, "degree", "uniform in angle"),
    "stratospheric_specific_humidity": (1.5e-6, 6e-6, "kg kg-1", "value at the tropopause; log-uniform, "
                                        "capped by saturation"),
    "stratospheric_humidity_gradient": (-0.3, 0.9, "1", "change of ln q from the tropopause to 1 hPa, linear "
                                        "in ln p (positive: moister aloft)"),
    "stratospheric_shape_mix": (0.0, 1.0, "1", "0: US 1976 stratosphere shape, 1: linear in ln p"),
}
# Vertically correlated Gaussian perturbations: correlation exp(-d^2 / (2 L^2)), d in ln p.
_TEMPERATURE_NOISE = {"troposphere_std_k": 1.0, "stratosphere_std_k": 3.0, "correlation_length_ln_p": 0.35,
                      "surface_taper_ln_p": 0.03}
_HUMIDITY_NOISE = {"logit_std": 0.5, "correlation_length_ln_p": 0.25}
# Stratospheric ln q varies with height too: without it every stratospheric humidity profile
# lay on one line (a single drawn value), and any background with a little vertical
# structure there was "novel" to the emulator (measured: 62 % of the demo's backgrounds).
_STRATOSPHERIC_HUMIDITY_NOISE = {"ln_q_std": 0.15, "correlation_length_ln_p": 0.5}
_STRATOSPHERIC_GRADIENT_TOP_HPA = 1.0  # [hPa]: where the drawn gradient is reached
_EMISSIVITY_CHANNEL_STD = {"microwave": 0.03, "infrared": 0.005}
_TRANSITION_WIDTH_LN_P = 0.1  # troposphere/stratosphere blend width [ln p]
_US76_STRATOSPHERE_BASE = (226.32, 54.7489, 1.10906)  # [hPa]: US 1976 11, 20 and 47 km' levels
_MOIST_BLEND_LN_P = 0.7  # the tropical column leaves its pseudo-adiabat 0.7 in ln p below p_t
_MOIST_OFFSET_TOP_HPA = 500.0  # [hPa]: the moist-adiabat offset is reached here
_TROPOPAUSE_DEPTH_RATIO = 0.7  # p_t at most 0.7 x the boundary-layer top pressure
_TROPOPAUSE_PRESSURE_LIMITS = (80.0, 400.0)  # [hPa]: how far a tropopause may be moved
_Q_FLOOR = 1e-7  # [kg kg-1]
_RH_CAP = 1.0 - 1e-6  # [1]; strictly subsaturated after round-off
_Q_MAX = 0.099  # [kg kg-1]; the physical model requires q < 0.1
_LOG_UNIFORM = ("tropopause_pressure", "stratopause_pressure")
_SOBOL_NAMES = ("climate_regime",) + tuple(_REGIME_UNITS) + (
    "stratospheric_specific_humidity", "stratospheric_humidity_gradient", "stratospheric_shape_mix",
    "surface_emissivity_microwave", "surface_emissivity_infrared", "sensor_zenith_angle")


def _regime_ranges() -> dict:
    """Union over the regimes of each regime quantity: (low, high, units, meaning)."""
    out = {}
    for name, (units, meaning) in _REGIME_UNITS.items():
        lows = [r[name][0] for r in _REGIMES.values()]
        highs = [r[name][1] for r in _REGIMES.values()]
        out[name] = (min(lows), max(highs), units, meaning + " (union over the regimes)")
    return out


def envelope_description() -> dict:
    """Nominal ranges of the state generator (JSON-serialisable).

    Returns
    -------
    dict
        ``{"generator_version": str, "regimes": {name: {"weight", "description",
        "boundary_layer", "humidity_jump", "ranges": {quantity: [low, high]}}},
        "ranges": {name: {"min", "max", "units", "meaning"}}`` (regime quantities: the
        union over the regimes), ``"temperature_perturbation"``, ``"humidity_perturbation"``,
        ``"stratospheric_humidity_perturbation"``, ``"emissivity_channel_std"``}. Written to
        file attributes as ``rtemu_envelope`` (JSON).
    """
    ranges = {**_regime_ranges(), **_GLOBAL_RANGES}
    regimes = {
        name: {"weight": r["weight"], "description": r["description"], "boundary_layer": r["boundary_layer"],
               "humidity_jump": r["humidity_jump"],
               "surface_temperature_at_sea_level": r["surface_temperature_at_sea_level"],
               "inversion_top_temperature_max": r["inversion_top_temperature_max"],
               "ranges": {q: list(r[q]) for q in _REGIME_UNITS}}
        for name, r in _REGIMES.items()
    }
    return {
        "generator_version": GENERATOR_VERSION,
        "regimes": regimes,
        "ranges": {
            name: {"min": lo, "max": hi, "units": units, "meaning": meaning}
            for name, (lo, hi, units, meaning) in ranges.items()
        },
        "temperature_perturbation": dict(_TEMPERATURE_NOISE),
        "humidity_perturbation": dict(_HUMIDITY_NOISE),
        "stratospheric_humidity_perturbation": dict(_STRATOSPHERIC_HUMIDITY_NOISE),
        "emissivity_channel_std": dict(_EMISSIVITY_CHANNEL_STD),
    }


# --- input validation -----------------------------------------------------------------------
def _tropopause_line(p_t):
    line = _TROPOPAUSE_LINE
    return line["reference_k"] + line["slope_k_per_ln_p"] * np.log(p_t / line["reference_hpa"])


def _regime_tropopause_band(regime: dict, p_t):
    """(lowest, highest) tropopause temperature [K] one regime draws at p_t [hPa]."""
    centre = _tropopause_line(p_t)
    off_lo, off_hi = regime["tropopause_temperature_offset"]
    t_lo, t_hi = regime["tropopause_temperature"]
    return np.clip(centre + off_lo, t_lo, t_hi), np.clip(centre + off_hi, t_lo, t_hi)


def tropopause_temperature_band(tropopause_pressure_hpa):
    """Range of tropopause temperature the generator draws at a tropopause pressure.

    Each regime draws T_t = 216.65 K + 29 K ln(p_t / 226.32 hPa) + offset, the line through
    the US 1976 tropopause [1] plus an offset in the regime's range, kept inside the
    regime's absolute tropopause-temperature limits; the band is the union over the regimes
    whose tropopause-pressure range holds p_t. The lapse-rate limits narrow it further per
    profile (:func:`draw_states`).

    Parameters
    ----------
    tropopause_pressure_hpa : array_like
        Tropopause pressure p_t [hPa].

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Lowest and highest tropopause temperature [K], shape of the input; NaN where no
        regime draws p_t.

    References
    ----------
    [1] U.S. Standard Atmosphere, 1976 (NOAA/NASA/USAF): at 11 km' geopotential height,
        22,632 Pa and 216.65 K.
    """
    p_t = np.asarray(tropopause_pressure_hpa, dtype=float)
    lo, hi = np.full(p_t.shape, np.inf), np.full(p_t.shape, -np.inf)
    for regime in _REGIMES.values():
        p_lo, p_hi = regime["tropopause_pressure"]
        inside = (p_t >= p_lo) & (p_t <= p_hi)
        r_lo, r_hi = _regime_tropopause_band(regime, p_t)
        lo = np.where(inside, np.minimum(lo, r_lo), lo)
        hi = np.where(inside, np.maximum(hi, r_hi), hi)
    none = ~np.isfinite(lo)
    return np.where(none, np.nan, lo), np.where(none, np.nan, hi)


def _check_count(count) -> int:
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)):
        raise ValueError(f"count must be an integer >= 1, got {count!r}")
    if count < 1:
        raise ValueError(f"count must be >= 1, got {count}")
    return int(count)


def _check_seed(seed) -> int:
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)):
        raise ValueError(f"seed must be an integer in [0, 2**63), got {seed!r}")
    if not 0 <= seed < 2**63:
        raise ValueError(f"seed must be an integer in [0, 2**63), got {seed}")
    return int(seed)


def _check_grid(pressure_hpa, source: str = "pressure_hpa") -> np.ndarray:
    """Validated copy of a level grid [hPa] in the caller's order."""
    if pressure_hpa is None:
        return atm.default_pressure_grid()
    try:
        p = np.array(pressure_hpa, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"{source}: air_pressure levels are not numbers") from None
    if p.ndim != 1:
        raise ValueError(f"{source}: air_pressure must be one-dimensional (level), got shape {p.shape}")
    if p.size < 2:
        raise ValueError(f"{source}: air_pressure needs at least 2 levels, got {p.size}")
    bad = ~np.isfinite(p) | (p <= 0.0)
    if bad.any():
        i = int(np.argmax(bad))
        raise ValueError(f"{source}: air_pressure level {i} is {float(p[i])!r} (rule: finite and > 0 hPa)")
    steps = np.diff(p)
    if (steps == 0).any():
        i = int(np.argmax(steps == 0))
        raise ValueError(f"{source}: air_pressure repeats {float(p[i])!r} hPa at levels {i} and {i + 1} "
                         "(rule: strictly monotonic, no repeated level)")
    if not ((steps < 0).all() or (steps > 0).all()):
        i = int(np.argmax(np.sign(steps) != np.sign(steps[0]))) + 1
        raise ValueError(f"{source}: air_pressure is not monotonic at level {i} ({float(p[i])!r} hPa) "
                         "(rule: strictly increasing or strictly decreasing)")
    if p.max() > 1100.0 or p.max() < 400.0:
        raise ValueError(f"{source}: the highest pressure is {float(p.max())!r} hPa (rule: the bottom level "
                         "lies between 400 and 1100 hPa)")
    return p


def _channel_kinds(channels) -> tuple[tuple[bool, ...], tuple[str, ...] | None]:
    """(is_microwave per channel, channel ids or None) from an Instrument or bools."""
    if isinstance(channels, Instrument):
        return tuple(bool(ch.is_microwave) for ch in channels.channels), channels.channel_ids
    if isinstance(channels, (str, os.PathLike)):
        inst = load_instrument(channels)
        return tuple(bool(ch.is_microwave) for ch in inst.channels), inst.channel_ids
    kinds = tuple(channels)
    if not kinds or not all(isinstance(k, (bool, np.bool_)) for k in kinds):
        raise ValueError("channels must be an Instrument or a non-empty list of is_microwave booleans")
    return tuple(bool(k) for k in kinds), None


# --- the construction, one block at a time --------------------------------------------------
@functools.lru_cache(maxsize=8)
def _correlation_root_cached(ln_p_bytes: bytes, length: float) -> np.ndarray:
    root = _correlation_root(np.frombuffer(ln_p_bytes, dtype=float), length)
    root.setflags(write=False)
    return root


def _correlation_root(ln_p: np.ndarray, length: float) -> np.ndarray:
    """Symmetric square root of exp(-d^2 / (2 length^2)) on the levels ln_p."""
    d = ln_p[:, None] - ln_p[None, :]
    corr = np.exp(-0.5 * (d / length) ** 2)
    values, vectors = np.linalg.eigh(corr)
    return (vectors * np.sqrt(np.clip(values, 0.0, None))) @ vectors.T


def _correlated_noise(rng: np.random.Generator, root: np.ndarray, n: int) -> np.ndarray:
    z = rng.standard_normal((n, root.shape[0]))
    # Elementwise products with pairwise sums (no BLAS), so the numbers do not depend on
    # the BLAS threading of whichever process computes the block.
    return np.stack([np.sum(z * row, axis=1) for row in root], axis=1)


def _us76_stratosphere_shape(p: np.ndarray, p_t: np.ndarray, p_sp: np.ndarray) -> np.ndarray:
    """The US 1976 stratospheric warming [1], 0 at the tropopause and 1 at the stratopause,
    stretched in ln p from the standard's (226.32 hPa, 1.109 hPa) onto (p_t, p_sp) [hPa]."""
    base, _, top = _US76_STRATOSPHERE_BASE
    stretch = np.log(base / top) / np.log(p_t / p_sp)
    mapped = np.exp(np.log(base) + (np.log(p) - np.log(p_t)) * stretch)
    mapped = np.clip(mapped, top, base)
    t_base = atm.us_standard_atmosphere_1976(base)
    t_top = atm.us_standard_atmosphere_1976(top)
    return (atm.us_standard_atmosphere_1976(mapped) - t_base) / (t_top - t_base)


def _sigmoid(x: np.ndarray) -> np.ndarray:
    # scipy's expit keeps relative precision far into the tails, where RH ~ exp(x).
    return special.expit(x)


def _logit(x: np.ndarray) -> np.ndarray:
    return np.log(x / (1.0 - x))


def _regime_values(u: dict, regime: np.ndarray) -> dict:
    """Per-profile values of every regime quantity from its Sobol' coordinate."""
    values = {}
    for name in _REGIME_UNITS:
        table = np.array([_REGIMES[r][name] for r in _REGIME_NAMES])  # (regimes, 2)
        lo, hi = table[regime, 0], table[regime, 1]
        if name in _LOG_UNIFORM:
            values[name] = np.exp(np.log(lo) + u[name] * (np.log(hi) - np.log(lo)))
        else:
            values[name] = lo + u[name] * (hi - lo)
    return values


def _scale_global(u: np.ndarray, name: str, log: bool = False) -> np.ndarray:
    lo, hi = _GLOBAL_RANGES[name][:2]
    if log:
        return np.exp(np.log(lo) + u * (np.log(hi) - np.log(lo)))
    return lo + u * (hi - lo)


def _boundary_layer(p, v, kind):
    """Temperature below the free troposphere [K] (N, L) and the free troposphere's base
    (pressure [hPa], temperature [K]) per profile (see :func:`draw_states`, step 2)."""
    pp = p[None, :]
    ps, t0 = v["surface_air_pressure"][:, None], v["surface_air_temperature"][:, None]
    p_b = ps - v["boundary_layer_depth"][:, None]
    strength = v["inversion_strength"][:, None]
    t = np.empty((ps.shape[0], p.size))
    p_f, t_f = np.empty(ps.shape[0]), np.empty(ps.shape[0])

    rows = kind == "inversion"
    if rows.any():
        frac = np.minimum(np.log(ps[rows] / pp) / np.log(ps[rows] / p_b[rows]), 1.0)  # < 0 below ground
        t[rows] = t0[rows] + strength[rows] * frac
        p_f[rows], t_f[rows] = p_b[rows, 0], (t0[rows] + strength[rows])[:, 0]
    rows = kind == "mixed"
    if rows.any():
        p_i = p_b[rows] - v["inversion_thickness"][rows, None]  # top of the capping inversion
        t_b = t0[rows] * (p_b[rows] / ps[rows]) ** _KAPPA_DRY
        jump = np.clip(np.log(p_b[rows] / pp) / np.log(p_b[rows] / p_i), 0.0, 1.0)
        t[rows] = np.where(pp >= p_b[rows], t0[rows] * (pp / ps[rows]) ** _KAPPA_DRY, t_b + strength[rows] * jump)
        p_f[rows], t_f[rows] = p_i[:, 0], (t_b + strength[rows])[:, 0]
    rows = kind == "parcel"
    if rows.any():
        q0 = atm.specific_humidity_from_relative_humidity(v["relative_humidity_surface"][rows],
                                                          t0[rows, 0], ps[rows, 0])
        p_blend = v["tropopause_pressure"][rows] * np.exp(_MOIST_BLEND_LN_P)
        targets = np.concatenate([np.maximum(pp, p_blend[:, None]), p_blend[:, None]], axis=1)
        parcel = atm.parcel_temperature(t0[rows, 0], q0, ps[rows, 0], targets)
        weight = np.clip(np.log(ps[rows] / targets) / np.log(ps[rows] / _MOIST_OFFSET_TOP_HPA), 0.0, 1.0)
        env = parcel - v["moist_adiabat_offset"][rows, None] * weight
        t[rows] = env[:, :-1]
        p_f[rows], t_f[rows] = p_blend, env[:, -1]
    return t, p_f, t_f


def _band_of(regime: np.ndarray, p_t: np.ndarray):
    """Each profile's regime tropopause band [K] at p_t [hPa]."""
    lo, hi = np.empty(p_t.shape), np.empty(p_t.shape)
    for index, name in enumerate(_REGIME_NAMES):
        rows = regime == index
        lo[rows], hi[rows] = _regime_tropopause_band(_REGIMES[name], p_t[rows])
    return lo, hi


def _increasing_root(func, lo: np.ndarray, hi: np.ndarray, iterations: int = 50) -> np.ndarray:
    """x in [lo, hi] with func(x) = 0 for an increasing func (bisection); the nearer end
    where the bracket holds no sign change."""
    f_lo, f_hi = func(lo), func(hi)
    a, b = lo.copy(), hi.copy()
    for _ in range(iterations):
        mid = 0.5 * (a + b)
        below = func(mid) < 0.0
        a, b = np.where(below, mid, a), np.where(below, b, mid)
    root = 0.5 * (a + b)
    return np.where(f_lo >= 0.0, lo, np.where(f_hi <= 0.0, hi, root))


def _reachable_tropopause(regime, p_t, p_f, t_f, gamma_lo, gamma_hi):
    """Move p_t [hPa] as little as needed for the regime's band to be reachable from the
    free troposphere's base (p_f [hPa], t_f [K]) with a lapse rate in [gamma_lo, gamma_hi]
    [K m-1]: up where even the steepest lapse rate stays warmer than the band (a warm column
    has a high tropopause), down (to at most 0.7 p_f and 400 hPa) where even the gentlest
    one is colder."""
    x0 = np.log(p_t)

    def miss(x, rows, gamma, side):
        base = t_f[rows] * np.exp(_KAPPA_PER_LAPSE * gamma[rows] * (x - np.log(p_f[rows])))
        return base - _band_of(regime[rows], np.exp(x))[side]

    lowest = np.full(x0.shape, np.log(_TROPOPAUSE_PRESSURE_LIMITS[0]))
    highest = np.maximum(np.minimum(np.log(_TROPOPAUSE_PRESSURE_LIMITS[1]),
                                    np.log(_TROPOPAUSE_DEPTH_RATIO * p_f)), x0)
    x = x0.copy()
    everyone = np.ones(x0.shape, dtype=bool)
    warm = miss(x0, everyone, gamma_hi, 1) > 0.0
    if warm.any():
        x[warm] = _increasing_root(lambda y: miss(y, warm, gamma_hi, 1), lowest[warm], x0[warm])
    cold = miss(x0, everyone, gamma_lo, 0) < 0.0
    if cold.any():
        x[cold] = _increasing_root(lambda y: miss(y, cold, gamma_lo, 0), x0[cold], highest[cold])
    return np.exp(x)


def _temperature(p, v, kind, regime, rng_noise):
    """Temperature profiles [K] (N, L), surface-first, and the construction's parameters."""
    pp = p[None, :]
    ln_p = np.log(p)
    ps = v["surface_air_pressure"]
    bl, p_f, t_f = _boundary_layer(p, v, kind)
    gamma_lo = v["tropospheric_lapse_rate_lo"] * 1e-3
    gamma_hi = v["tropospheric_lapse_rate_hi"] * 1e-3
    # The tropical column's free troposphere starts at a fixed ln-p distance below p_t, so
    # its tropopause stays where it was drawn.
    p_t = np.where(kind == "parcel", v["tropopause_pressure"],
                   _reachable_tropopause(regime, v["tropopause_pressure"], p_f, t_f, gamma_lo, gamma_hi))

    # Tropopause temperature in the regime's band, limited so that the free-tropospheric
    # lapse rate stays in the regime's range; where the two do not meet, the lapse-rate
    # limit nearest the band.
    log_ratio = np.log(p_t / p_f)
    lapse_lo = t_f * np.exp(_KAPPA_PER_LAPSE * gamma_hi * log_ratio)
    lapse_hi = t_f * np.exp(_KAPPA_PER_LAPSE * gamma_lo * log_ratio)
    band_lo, band_hi = _band_of(regime, p_t)
    tt_lo = np.maximum(lapse_lo, np.minimum(band_lo, lapse_hi))
    tt_hi = np.minimum(lapse_hi, np.maximum(band_hi, lapse_lo))
    t_t = tt_lo + v["tropopause_temperature_u"] * (tt_hi - tt_lo)
    kappa = np.log(t_f / t_t) / np.log(p_f / p_t)
    free = t_f[:, None] * (pp / p_f[:, None]) ** kappa[:, None]
    troposphere = np.where(pp >= p_f[:, None], bl, free)
    # Below the ground the surface air temperature, unchanged: the levels there are dropped
    # by a surface-aware model, and a constant adds no kink of its own (continuing the
    # boundary layer to the first level under the ground and 6.5 K/km below it raised the
    # largest off-subspace residual of a training set 1.7 times; docs/decisions.md).
    troposphere = np.where(pp > ps[:, None], v["surface_air_temperature"][:, None], troposphere)
    p_sp = v["stratopause_pressure"]
    t_sp = np.maximum(v["stratopause_temperature"], t_t + 5.0)
    mix = v["stratospheric_shape_mix"][:, None]
    linear = np.clip(np.log(p_t[:, None] / pp) / np.log(p_t / p_sp)[:, None], 0.0, 1.0)
    shape = (1.0 - mix) * _us76_stratosphere_shape(pp, p_t[:, None], p_sp[:, None]) + mix * linear
    stratosphere = t_t[:, None] + (t_sp - t_t)[:, None] * shape
    scale_height_km = DRY_AIR_GAS_CONSTANT * t_sp / STANDARD_GRAVITY * 1e-3
    mesosphere = t_sp[:, None] - (v["mesospheric_lapse_rate"] * scale_height_km)[:, None] * np.log(p_sp[:, None] / pp)
    stratosphere = np.where(pp < p_sp[:, None], mesosphere, stratosphere)
    temperature = np.where(pp >= p_t[:, None], troposphere, stratosphere)

    tropo_weight = _sigmoid((ln_p[None, :] - np.log(p_t)[:, None]) / _TRANSITION_WIDTH_LN_P)
    std = (_TEMPERATURE_NOISE["troposphere_std_k"] * tropo_weight
           + _TEMPERATURE_NOISE["stratosphere_std_k"] * (1.0 - tropo_weight))
    height = np.clip(np.log(ps)[:, None] - ln_p[None, :], 0.0, None)
    taper = 1.0 - np.exp(-height / _TEMPERATURE_NOISE["surface_taper_ln_p"])
    temperature = temperature + std * taper * rng_noise

    # Keep saturation above the humidity floor (q_sat >= 2 * floor) so RH <= 1 and
    # q >= floor can both hold; binds only in extreme corners of the design.
    e_needed = atm.vapour_pressure(2.0 * _Q_FLOOR, p) / _RH_CAP
    temperature = np.maximum(temperature, atm.dewpoint_from_vapour_pressure(e_needed)[None, :])
    temperature = np.clip(temperature, 150.0, 390.0)
    params = {
        "tropopause_pressure": p_t, "tropopause_temperature": t_t,
        "tropospheric_lapse_rate": kappa / _KAPPA_PER_LAPSE * 1e3,
        "boundary_layer_top_pressure": p_f,
        "stratopause_pressure": p_sp, "stratopause_temperature": t_sp,
    }
    return temperature, tropo_weight, params


def _specific_humidity(p, temperature, tropo_weight, logit_rh, ln_q_strat) -> np.ndarray:
    """q [kg kg-1] (N, L): RH = logistic(logit_rh) below the tropopause, ln q blended over
    0.1 in ln p into ``ln_q_strat`` above it; capped at RH = 1 - 1e-6 and q < 0.099,
    floored at 1e-7 kg kg-1."""
    pp = p[None, :]
    es = atm.saturation_vapour_pressure(temperature)
    # Where es approaches p (warm air aloft) the tropospheric branch is capped; it is
    # blended out there anyway.
    e = np.minimum(_sigmoid(logit_rh) * es, 0.5 * pp)
    q_trop = EPSILON * e / (pp - (1.0 - EPSILON) * e)  # e < p/2: always valid
    ln_q = tropo_weight * np.log(np.maximum(q_trop, 1e-300)) + (1.0 - tropo_weight) * ln_q_strat
    e_cap = _RH_CAP * es
    reachable = e_cap < 0.99 * pp
    q_cap = atm.specific_humidity_from_vapour_pressure(np.where(reachable, e_cap, 0.0), pp)
    q_max = np.where(reachable, np.minimum(q_cap, _Q_MAX), _Q_MAX)
    return np.clip(np.exp(ln_q), _Q_FLOOR, q_max)


def _relative_humidity_logit(p, v, jump, p_t, noise):
    """logit(RH) [1] (N, L): linear in p between the regime's nodes (see :func:`draw_states`)."""
    pp = p[None, :]
    ps = v["surface_air_pressure"][:, None]
    p_b = ps - v["boundary_layer_depth"][:, None]
    l_s = _logit(v["relative_humidity_surface"])[:, None]
    l_bt = _logit(v["relative_humidity_boundary_layer_top"])[:, None]
    l_f = np.where(jump, _logit(v["relative_humidity_free_troposphere"]), l_bt[:, 0])[:, None]
    l_u = _logit(v["relative_humidity_tropopause"])[:, None]
    inside = l_s + (l_bt - l_s) * np.clip((ps - pp) / (ps - p_b), 0.0, 1.0)
    above = l_f + (l_u - l_f) * np.clip((p_b - pp) / (p_b - p_t[:, None]), 0.0, 1.2)
    height = np.clip(np.log(ps) - np.log(pp), 0.0, None)
    taper = 1.0 - np.exp(-height / _TEMPERATURE_NOISE["surface_taper_ln_p"])
    return np.where(pp >= p_b, inside, above) + _HUMIDITY_NOISE["logit_std"] * taper * noise


def _draw_block(seed: int, block: int, p: np.ndarray, kinds: tuple[bool, ...]) -> dict:
    """One block of BLOCK_SIZE profiles on the surface-first grid ``p``."""
    n = BLOCK_SIZE
    sobol = qmc.Sobol(d=len(_SOBOL_NAMES), scramble=True,
                      rng=np.random.default_rng(np.random.SeedSequence([seed, 0x5EED])))
    if block:
        sobol.fast_forward(block * n)
    rng = np.random.default_rng(np.random.SeedSequence([seed, block]))
    # Shuffled within the block: Sobol' points taken at a power-of-two stride share their
    # leading digits, and a user thinning a file by stride would get a biased subset.
    points = sobol.random(n)[rng.permutation(n)]
    u = {name: points[:, i] for i, name in enumerate(_SOBOL_NAMES)}
    ln_p = np.log(p)
    roots = [_correlation_root_cached(ln_p.tobytes(), noise["correlation_length_ln_p"])
             for noise in (_TEMPERATURE_NOISE, _HUMIDITY_NOISE, _STRATOSPHERIC_HUMIDITY_NOISE)]
    t_noise = _correlated_noise(rng, roots[0], n)
    h_noise = _correlated_noise(rng, roots[1], n)
    kind = np.array(kinds, dtype=bool)
    e_noise = rng.standard_normal((n, kind.size))
    s_noise = _correlated_noise(rng, roots[2], n)

    weights = np.cumsum([_REGIMES[r]["weight"] for r in _REGIME_NAMES])
    regime = np.minimum(np.searchsorted(weights / weights[-1], u["climate_regime"], side="right"),
                        len(_REGIME_NAMES) - 1)
    v = _regime_values(u, regime)
    at_sea_level = np.array([_REGIMES[r]["surface_temperature_at_sea_level"] for r in _REGIME_NAMES])[regime]
    v["surface_air_temperature"] = np.where(
        at_sea_level, v["surface_air_temperature"] * (v["surface_air_pressure"] / atm.DEFAULT_SURFACE_PRESSURE_HPA)
        ** (_KAPPA_PER_LAPSE * _SEA_LEVEL_REDUCTION_LAPSE_K_PER_KM * 1e-3), v["surface_air_temperature"])
    # A surface below the grid's bottom level sits on it (custom grids only).
    v["surface_air_pressure"] = np.minimum(v["surface_air_pressure"], p[0])
    v["boundary_layer_depth"] = np.minimum(v["boundary_layer_depth"], 0.5 * (v["surface_air_pressure"] - p[-1]))
    bl_kind = np.array([_REGIMES[r]["boundary_layer"] for r in _REGIME_NAMES])[regime]
    top_max = np.array([_REGIMES[r]["inversion_top_temperature_max"] for r in _REGIME_NAMES])[regime]
    v["inversion_strength"] = np.where(
        bl_kind == "inversion",
        np.minimum(v["inversion_strength"], np.maximum(top_max - v["surface_air_temperature"], 0.0)),
        v["inversion_strength"])
    jump = np.array([_REGIMES[r]["humidity_jump"] for r in _REGIME_NAMES])[regime]
    # The tropopause lies well above the boundary layer (at most 0.7 x its top pressure).
    bl_top = v["surface_air_pressure"] - v["boundary_layer_depth"] - np.where(
        bl_kind == "mixed", v["inversion_thickness"], 0.0)
    v["tropopause_pressure"] = np.where(bl_kind == "parcel", v["tropopause_pressure"],
                                        np.minimum(v["tropopause_pressure"], _TROPOPAUSE_DEPTH_RATIO * bl_top))
    lapse = np.array([_REGIMES[r]["tropospheric_lapse_rate"] for r in _REGIME_NAMES])[regime]
    v["tropospheric_lapse_rate_lo"], v["tropospheric_lapse_rate_hi"] = lapse[:, 0], lapse[:, 1]
    v["tropopause_temperature_u"] = u["tropopause_temperature_offset"]
    v["stratospheric_shape_mix"] = _scale_global(u["stratospheric_shape_mix"], "stratospheric_shape_mix")

    temperature, tropo_weight, params = _temperature(p, v, bl_kind, regime, t_noise)
    p_t = params["tropopause_pressure"]
    logit_rh = _relative_humidity_logit(p, v, jump, p_t, h_noise)
    q_strat = _scale_global(u["stratospheric_specific_humidity"], "stratospheric_specific_humidity", log=True)
    gradient = _scale_global(u["stratospheric_humidity_gradient"], "stratospheric_humidity_gradient")
    height = np.clip(np.log(p_t[:, None] / p[None, :]) / np.log(p_t / _STRATOSPHERIC_GRADIENT_TOP_HPA)[:, None],
                     0.0, None)
    ln_q_strat = (np.log(q_strat)[:, None] + gradient[:, None] * height
                  + _STRATOSPHERIC_HUMIDITY_NOISE["ln_q_std"] * s_noise)
    q = _specific_humidity(p, temperature, tropo_weight, logit_rh, ln_q_strat)

    ps = v["surface_air_pressure"]
    skin = v["surface_air_temperature"] + v["skin_minus_air_temperature"]
    emissivity = np.empty((n, kind.size))
    for is_mw, name, std in ((True, "surface_emissivity_microwave", _EMISSIVITY_CHANNEL_STD["microwave"]),
                             (False, "surface_emissivity_infrared", _EMISSIVITY_CHANNEL_STD["infrared"])):
        lo, hi = _GLOBAL_RANGES[name][:2]
        base = _scale_global(u[name], name)
        cols = kind == is_mw
        emissivity[:, cols] = np.clip(base[:, None] + std * e_noise[:, cols], lo, hi)
    return {
        "air_temperature": temperature,
        "specific_humidity": q,
        "surface_temperature": skin,
        "surface_emissivity": emissivity,
        "sensor_zenith_angle": _scale_global(u["sensor_zenith_angle"], "sensor_zenith_angle"),
        "surface_air_pressure": ps,
        "total_column_water_vapour": atm.total_column_water_vapour(p, q, ps),
        "climate_regime": regime.astype(np.int8),
        "surface_air_temperature": v["surface_air_temperature"],
        "inversion_strength": np.where(bl_kind == "parcel", 0.0, v["inversion_strength"]),
        **params,
    }


@functools.lru_cache(maxsize=4)
def _cached_block(seed: int, block: int, grid: bytes, kinds: tuple[bool, ...]) -> dict:
    # Small chunks that share a block reuse it instead of recomputing it.
    block_values = _draw_block(seed, block, np.frombuffer(grid, dtype=float), kinds)
    for values in block_values.values():
        values.setflags(write=False)
    return block_values


# --- labelled output ------------------------------------------------------------------------
_INPUT_ATTRS = {
    "air_pressure": {"standard_name": "air_pressure", "long_name": "air pressure at level", "units": "hPa"},
    "air_temperature": {"standard_name": "air_temperature", "long_name": "air temperature", "units": "K"},
    "specific_humidity": {"standard_name": "specific_humidity", "long_name": "specific humidity",
                          "units": "kg kg-1"},
    "surface_temperature": {"standard_name": "surface_temperature",
                            "long_name": "surface skin temperature", "units": "K"},
    "surface_emissivity": {"standard_name": "surface_longwave_emissivity",
                           "long_name": "surface emissivity per channel", "units": "1"},
    "sensor_zenith_angle": {"standard_name": "sensor_zenith_angle",
                            "long_name": "sensor zenith angle at the surface", "units": "degree"},
    "surface_air_pressure": {"standard_name": "surface_air_pressure", "long_name": "surface air pressure",
                             "units": "hPa"},
    "total_column_water_vapour": {"standard_name": "atmosphere_mass_content_of_water_vapor",
                                  "long_name": "total column water vapour above the surface pressure "
                                  "(trapezoidal, as the model)",
                                  "units": "kg m-2"},
}
_PARAMETER_ATTRS = {
    "climate_regime": {"long_name": "climate regime the generator drew the profile from",
                       "flag_values": np.arange(len(_REGIME_NAMES), dtype=np.int8),
                       "flag_meanings": " ".join(_REGIME_NAMES)},
    "surface_air_temperature": {"long_name": "air temperature at the surface pressure drawn by the generator",
                                "units": "K"},
    "tropopause_pressure": {"long_name": "tropopause pressure drawn by the generator", "units": "hPa"},
    "tropopause_temperature": {"long_name": "tropopause temperature drawn by the generator", "units": "K"},
    "tropospheric_lapse_rate": {"long_name": "free-tropospheric lapse rate of the construction",
                                "units": "K km-1"},
    "boundary_layer_top_pressure": {"long_name": "pressure where the construction's free troposphere begins",
                                    "units": "hPa"},
    "inversion_strength": {"long_name": "temperature rise across the boundary-layer inversion drawn by the "
                           "generator", "units": "K"},
    "stratopause_pressure": {"long_name": "stratopause pressure drawn by the generator", "units": "hPa"},
    "stratopause_temperature": {"long_name": "stratopause temperature drawn by the generator", "units": "K"},
}
#: Variables written to the training file, in file order.
STATE_VARIABLES = ("air_temperature", "specific_humidity", "surface_temperature",
                   "surface_emissivity", "sensor_zenith_angle", "surface_air_pressure",
                   "total_column_water_vapour")


def draw_states(count: int, *, seed: int, pressure_hpa=None, start: int = 0, channels) -> xr.Dataset:
    """Draw ``count`` clear-sky atmospheric states (profiles ``start .. start+count-1``).

    A mixture of nine climate regimes with stated weights (moist-adiabatic tropics,
    subtropical subsidence, hot desert, mid-latitude summer and winter, polar summer and
    winter, high terrain, stratospheric warming); docs/generator.md describes each, its
    ranges and their sources, and measures the result. Per profile (surface-first grid):

    1. regime from one scrambled Sobol' coordinate (cumulative weights), the other
       coordinates mapped onto the regime's ranges (:func:`envelope_description`);
    2. surface pressure ps and surface air temperature T_s (high terrain: T_s reduced to
       1013.25 hPa at 6.5 K/km);
    3. boundary layer: "parcel" (dry adiabat to the lifting condensation level, then the
       pseudo-adiabat, :func:`rtemu.atmosphere.parcel_temperature`, cooled by a drawn
       offset reached at 500 hPa), "mixed" (dry adiabat capped by an inversion) or
       "inversion" (linear in ln p to T_s + the drawn strength);
    4. free troposphere at a constant lapse rate to the tropopause (p_t, T_t), T_t in the
       regime's band about 216.65 K + 29 K ln(p_t / 226.32 hPa)
       (:func:`tropopause_temperature_band`) and in reach of the regime's lapse-rate range
       (p_t moved as little as needed, then the nearest lapse-rate limit);
    5. stratosphere: a drawn mix of the US 1976 warming stretched onto (p_t, p_sp) and a
       ramp in ln p, cooling at a drawn rate above the stratopause p_sp;
    6. below the ground: the surface air temperature (these levels are dropped by a
       ``surface_air_pressure``-aware model);
    7. correlated Gaussian perturbations (temperature 1 K / 3 K, L = 0.35 in ln p;
       logit(RH) 0.5, L = 0.25; both zero at the ground);
    8. humidity: logit(RH) linear in p between the regime's surface, boundary-layer-top,
       free-troposphere and tropopause values, q from Bolton (1980) e_s over water,
       blended into a drawn stratospheric ln q profile; RH <= 1 - 1e-6, q >= 1e-7 kg kg-1;
    9. skin T_s + the regime's skin-air difference; emissivity per profile for microwave
       and infrared channels plus N(0, 0.03) / N(0, 0.005) per channel, clipped to
       [0.4, 1] / [0.9, 1]; sensor zenith angle U(0, 65) degree.

    Parameters
    ----------
    count : int
        Number of profiles [1], >= 1.
    seed : int
        Seed [1], 0 <= seed < 2**63.
    pressure_hpa : array_like, optional
        Level pressures [hPa], strictly monotonic in either order, bottom level between
        400 and 1100 hPa; surface pressures beyond the bottom level sit on it. Default
        :func:`rtemu.atmosphere.default_pressure_grid` (1100 to 0.5 hPa).
    start : int
        Index of the first profile [1]; profile ``i`` is the same whatever ``start`` and
        ``count`` (see the module docstring).
    channels : Instrument, str or sequence of bool
        The instrument (or its name/path), or one ``is_microwave`` flag per channel.

    Returns
    -------
    xarray.Dataset
        The physics input schema, levels in the order given: ``air_pressure`` (level)
        [hPa], ``air_temperature`` (profile, level) [K], ``specific_humidity`` (profile,
        level) [kg kg-1], ``surface_temperature`` (profile) [K], ``surface_emissivity``
        (profile, channel) [1], ``sensor_zenith_angle`` (profile) [degree],
        ``surface_air_pressure`` (profile) [hPa]; also ``total_column_water_vapour``
        (profile) [kg m-2] above the ground, ``climate_regime`` (profile) [flag, names in
        its ``flag_meanings``] and the construction parameters ``surface_air_temperature``
        [K], ``tropopause_pressure`` [hPa], ``tropopause_temperature`` [K],
        ``tropospheric_lapse_rate`` [K km-1], ``boundary_layer_top_pressure`` [hPa],
        ``inversion_strength`` [K], ``stratopause_pressure`` [hPa],
        ``stratopause_temperature`` [K] (profile).
        Coordinates ``profile`` (global indices) and, for an instrument, ``channel``
        (ids). Attributes ``rtemu_envelope`` and ``rtemu_covered_envelope`` (JSON).
    """
    count = _check_count(count)
    seed = _check_seed(seed)
    if isinstance(start, bool) or not isinstance(start, (int, np.integer)) or start < 0:
        raise ValueError(f"start must be an integer >= 0, got {start!r}")
    start = int(start)
    if start + count > MAX_PROFILES:
        raise ValueError(f"start + count must not exceed {MAX_PROFILES}, got {start + count}")
    grid = _check_grid(pressure_hpa)
    kinds, channel_ids = _channel_kinds(channels)
    top_first = grid[0] < grid[-1]
    surface_first = np.ascontiguousarray(grid[::-1] if top_first else grid)

    stop = start + count
    pieces: dict[str, list[np.ndarray]] = {}
    for block in range(start // BLOCK_SIZE, (stop - 1) // BLOCK_SIZE + 1):
        values = _cached_block(seed, block, surface_first.tobytes(), kinds)
        lo = max(start - block * BLOCK_SIZE, 0)
        hi = min(stop - block * BLOCK_SIZE, BLOCK_SIZE)
        for name, array in values.items():
            pieces.setdefault(name, []).append(array[lo:hi])
    arrays = {name: np.concatenate(parts) for name, parts in pieces.items()}
    if top_first:
        for name in ("air_temperature", "specific_humidity"):
            arrays[name] = arrays[name][:, ::-1]

    data_vars = {"air_pressure": (("level",), grid, _INPUT_ATTRS["air_pressure"])}
    for name in STATE_VARIABLES:
        values = arrays[name]
        dims = {1: ("profile",), 2: ("profile", "channel" if name == "surface_emissivity" else "level")}[values.ndim]
        data_vars[name] = (dims, np.ascontiguousarray(values), _INPUT_ATTRS[name])
    for name, attrs in _PARAMETER_ATTRS.items():
        data_vars[name] = (("profile",), arrays[name], attrs)
    coords = {"profile": ("profile", np.arange(start, stop, dtype=np.int64), {"long_name": "profile index"})}
    if channel_ids is not None:
        coords["channel"] = ("channel", np.array(channel_ids, dtype=object), {"long_name": "channel id"})
    ds = xr.Dataset(data_vars, coords=coords)
    ds.attrs["rtemu_envelope"] = json.dumps(envelope_description(), sort_keys=True)
    ds.attrs["rtemu_covered_envelope"] = json.dumps(covered_envelope(ds, kinds), sort_keys=True)
    return ds


def covered_envelope(states: xr.Dataset, kinds: Sequence[bool] | None = None) -> dict:
    """Per-variable minimum and maximum actually present in ``states``.

    Parameters
    ----------
    states : xarray.Dataset
        Output of :func:`draw_states` (or a training file).
    kinds : sequence of bool, optional
        ``is_microwave`` per channel, to report the emissivity ranges by channel kind.

    Returns
    -------
    dict
        ``{name: {"min": float, "max": float, "units": str}}`` for air_temperature [K],
        specific_humidity [kg kg-1], relative_humidity [1], surface_temperature [K],
        skin_minus_air_temperature [K] (against the air temperature at the surface
        pressure, linear in ln p, when ``surface_air_pressure`` is present, else at the
        bottom level), surface_emissivity (per kind) [1], sensor_zenith_angle [degree],
        total_column_water_vapour [kg m-2], and surface_air_pressure [hPa] and
        tropopause_pressure [hPa] when present.
    """
    arrays = {name: states[name].values for name in states.variables}
    return _envelope_of(arrays, kinds)


def _envelope_of(arrays, kinds: Sequence[bool] | None) -> dict:
    p = arrays["air_pressure"]
    t = arrays["air_temperature"]
    q = arrays["specific_humidity"]
    if "surface_air_pressure" in arrays:
        ps = arrays["surface_air_pressure"]
        surface_air = atm.value_at_pressure(p, t, ps)
    else:
        surface_air = t[:, int(np.argmax(p))]
    values = {
        "air_temperature": (t, "K"),
        "specific_humidity": (q, "kg kg-1"),
        "relative_humidity": (atm.relative_humidity(q, t, p[None, :]), "1"),
        "surface_temperature": (arrays["surface_temperature"], "K"),
        "skin_minus_air_temperature": (arrays["surface_temperature"] - surface_air, "K"),
        "sensor_zenith_angle": (arrays["sensor_zenith_angle"], "degree"),
        "total_column_water_vapour": (arrays["total_column_water_vapour"], "kg m-2"),
    }
    if "surface_air_pressure" in arrays:
        values["surface_air_pressure"] = (arrays["surface_air_pressure"], "hPa")
    emissivity = arrays["surface_emissivity"]
    if kinds is None:
        values["surface_emissivity"] = (emissivity, "1")
    else:
        kind = np.asarray(kinds, dtype=bool)
        for is_mw, label in ((True, "microwave"), (False, "infrared")):
            if (kind == is_mw).any():
                values[f"surface_emissivity_{label}"] = (emissivity[:, kind == is_mw], "1")
    if "tropopause_pressure" in arrays:
        values["tropopause_pressure"] = (arrays["tropopause_pressure"], "hPa")
    return {name: {"min": float(np.min(v)), "max": float(np.max(v)), "units": units}
            for name, (v, units) in values.items()}


def _merge_envelopes(a: dict | None, b: dict) -> dict:
    if a is None:
        return b
    return {name: {"min": min(a[name]["min"], b[name]["min"]), "max": max(a[name]["max"], b[name]["max"]),
                   "units": b[name]["units"]} for name in b}


# --- levels file ------------------------------------------------------------------------------
_HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"


def read_levels_file(path) -> np.ndarray:
    """Read a level grid for ``rtemu sample --levels FILE``.

    Accepted formats:

    * text: one pressure [hPa] per line; ``#`` starts a comment; blank lines ignored;
    * netCDF (4/HDF5 or classic): a one-dimensional ``air_pressure`` variable whose
      ``units`` attribute is a pressure unit (hPa, mbar, Pa, kPa).

    Parameters
    ----------
    path : str or os.PathLike
        The file.

    Returns
    -------
    numpy.ndarray
        Level pressures [hPa] in the file's order (strictly monotonic, positive).

    Raises
    ------
    ValueError
        Naming the file (and line) for unreadable values, missing variables or units,
        or a grid that breaks the rules of :func:`draw_states`.
    """
    path = Path(path)
    if not path.is_file():
        raise ValueError(f"levels file {str(path)!r} does not exist or is not a file")
    head = path.read_bytes()[:8]
    if head.startswith(_HDF5_SIGNATURE) or head.startswith(b"CDF"):
        levels = _read_levels_netcdf(path, "h5netcdf" if head.startswith(_HDF5_SIGNATURE) else "scipy")
    else:
        levels = _read_levels_text(path)
    return _check_grid(levels, source=f"levels file {str(path)!r}")


def _read_levels_text(path: Path) -> np.ndarray:
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise ValueError(f"levels file {str(path)!r} is neither netCDF nor UTF-8 text") from None
    levels = []
    for number, line in enumerate(text.splitlines(), start=1):
        content = line.split("#", 1)[0].strip()
        if not content:
            continue
        try:
            levels.append(float(content))
        except ValueError:
            raise ValueError(f"levels file {str(path)!r} line {number}: {content!r} is not a pressure "
                             "in hPa (rule: one number per line, '#' comments)") from None
    if not levels:
        raise ValueError(f"levels file {str(path)!r} holds no pressure values")
    return np.array(levels)


def _read_levels_netcdf(path: Path, engine: str) -> np.ndarray:
    with xr.open_dataset(path, engine=engine, decode_cf=False) as ds:
        if "air_pressure" not in ds.variables:
            raise ValueError(f"levels file {str(path)!r} has no variable 'air_pressure' "
                             f"(found: {sorted(map(str, ds.variables))})")
        var = ds["air_pressure"]
        if var.ndim != 1:
            raise ValueError(f"levels file {str(path)!r}: air_pressure has dims {var.dims} "
                             "(rule: one-dimensional)")
        units = var.attrs.get("units")
        if units is None:
            raise ValueError(f"levels file {str(path)!r}: air_pressure has no units attribute "
                             "(rule: units 'hPa' or 'Pa')")
        try:
            scale, offset = unit_conversion("air_pressure", units)
        except ValueError as exc:
            raise ValueError(f"levels file {str(path)!r}: {exc}") from None
        return np.asarray(var.values, dtype=float) * scale + offset


# --- the training-set writer -----------------------------------------------------------------
_MANIFEST = "manifest.json"
_CHUNK_PATTERN = "chunk-{:06d}.h5"


def _compute_chunk(instrument_toml: str, seed: int, start: int, count: int, grid: np.ndarray,
                   jacobian: bool, absorption_tables=None, teacher=None,
                   teacher_spec: tuple[str, str] | None = None) -> dict:
    """States and model outputs of one chunk, as plain arrays (runs on a worker).

    The model: ``teacher`` (an object, in this process), the teacher imported from
    ``teacher_spec`` = (MODULE:NAME, directory), or else rtemu's physics of the instrument.
    ``absorption_tables`` are the arrays of the instrument's table file, if it names one
    (its TOML holds their digest, checked here).
    """
    inst = Instrument.from_toml(instrument_toml, source="<sampling job>", absorption_tables=absorption_tables)
    states = draw_states(count, seed=seed, pressure_hpa=grid, start=start, channels=inst)
    inputs = states[input_names(states)]
    if teacher_spec is not None:
        teacher = _imported_teacher(*teacher_spec)
    if teacher is None:
        out = physics.simulate(inst, inputs, jacobian=jacobian)
    else:
        out = _teacher.checked_simulate(teacher, inputs, jacobian)
    arrays = {name: states[name].values for name in STATE_VARIABLES}
    for name in out.data_vars:
        arrays[name] = out[name].values
    return arrays


@functools.lru_cache(maxsize=4)
def _imported_teacher(spec: str, directory: str):
    """One import of a teacher per worker process (a model may be costly to set up)."""
    return _teacher.load_teacher(spec, directory)


def _arguments(inst: Instrument, identity, count, seed, grid, jacobian, chunk_size) -> dict:
    toml = inst.to_toml()
    return {
        "generator_version": GENERATOR_VERSION,
        "teacher": identity[0],
        "teacher_version": identity[1],
        "instrument": inst.name,
        "instrument_toml_sha256": hashlib.sha256(toml.encode("utf-8")).hexdigest(),
        "count": count,
        "seed": seed,
        "levels_sha256": hashlib.sha256(np.ascontiguousarray(grid, dtype="<f8").tobytes()).hexdigest(),
        "jacobian": bool(jacobian),
        "chunk_size": chunk_size,
    }


def _arguments_hash(arguments: dict) -> str:
    return hashlib.sha256(json.dumps(arguments, sort_keys=True).encode("utf-8")).hexdigest()


def _prepare_chunk_dir(side: Path, arguments: dict) -> None:
    """Create or reuse ``side``; stale chunks of other arguments are cleared with a warning."""
    manifest = {"arguments": arguments, "arguments_sha256": _arguments_hash(arguments)}
    if side.exists():
        manifest_path = side / _MANIFEST
        previous = None
        if manifest_path.is_file():
            with contextlib.suppress(ValueError):
                previous = json.loads(manifest_path.read_text(encoding="utf-8"))
        if not isinstance(previous, dict) or "arguments" not in previous:
            raise ValueError(f"{str(side)!r} exists but is not an rtemu chunk directory (no readable "
                             f"{_MANIFEST}); remove it or choose another output path")
        if previous.get("arguments_sha256") == manifest["arguments_sha256"]:
            return
        old = previous.get("arguments", {})
        changed = sorted(k for k in set(old) | set(arguments) if old.get(k) != arguments.get(k))
        warnings.warn(
            f"{str(side)!r} holds chunks of a run with other arguments (differing: {', '.join(changed)}); "
            "they are discarded and the run starts over", RtemuWarning, stacklevel=3)
        _remove_chunk_dir(side)
    side.mkdir(parents=True)
    write_text_atomic(side / _MANIFEST, json.dumps(manifest, sort_keys=True, indent=1) + "\n")


def _remove_chunk_dir(side: Path) -> None:
    """Remove ``side`` if it holds only files this module writes."""
    ours = [f for f in side.iterdir()
            if f.name == _MANIFEST or (f.name.startswith("chunk-") and f.name.endswith(".h5"))
            or (f.name.startswith(".chunk-") and f.name.endswith(".partial"))
            or (f.name.startswith(f".{_MANIFEST}.") and f.name.endswith(".partial"))]
    ours = [f for f in ours if f.is_file()]
    foreign = [f.name for f in side.iterdir() if f not in ours]
    if foreign:
        raise ValueError(f"{str(side)!r} holds files rtemu did not write ({foreign[:5]}); "
                         "remove them or choose another output path")
    for f in ours:
        f.unlink()
    side.rmdir()


def _chunk_ready(path: Path, expected_hash: str) -> bool:
    import h5py

    if not path.is_file():
        return False
    try:
        with h5py.File(path, "r") as f:
            return f.attrs.get("rtemu_arguments_sha256") == expected_hash
    except OSError:
        return False


def _write_chunk(path: Path, arrays: dict, index: int, arguments_hash: str) -> None:
    """One finished chunk as plain HDF5 datasets (an internal file, not netCDF).

    Built in memory and written with plain file I/O (a full disk gives a clean OSError,
    see rtemu._io.to_netcdf_atomic).
    """
    import io

    import h5py

    buffer = io.BytesIO()
    with h5py.File(buffer, "w") as f:
        f.attrs["rtemu_chunk_index"] = index
        f.attrs["rtemu_arguments_sha256"] = arguments_hash
        for name, values in arrays.items():
            f.create_dataset(name, data=values, track_times=False)
    write_bytes_atomic(path, buffer.getvalue(), durable=False)


def _compute_chunk_to_file(path: str, index: int, arguments_hash: str, *, start: int, count: int,
                           **job) -> None:
    """Compute one chunk and save it (runs on a worker that shares our file system)."""
    _write_chunk(Path(path), _compute_chunk(start=start, count=count, **job), index, arguments_hash)


@contextlib.contextmanager
def _dask_client(workers, scheduler):
    """(client or None, whether the workers share this process's file system)."""
    if scheduler is not None:
        import distributed

        with distributed.Client(scheduler) as client:
            yield client, False
    elif workers is None or workers == 1:
        yield None, True
    else:
        import dask
        import distributed

        # dask gives its workers MALLOC_TRIM_THRESHOLD_=65536, which switches off glibc's
        # adaptive mmap threshold: every large numpy temporary is then mmapped afresh and
        # the generator + physics cost ~1.7x the CPU time (measured). Our workers go without.
        # The scheduler's HTTP server takes any free port: a fixed one collides with other clusters.
        environ = dict(dask.config.get("distributed.nanny.pre-spawn-environ", default={}))
        environ.pop("MALLOC_TRIM_THRESHOLD_", None)
        with dask.config.set({"distributed.nanny.pre-spawn-environ": environ}), \
                distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                         dashboard_address=":0") as cluster, \
                distributed.Client(cluster) as client:
            yield client, True


def _run_chunks(tasks: list[tuple[int, object, dict]], client, on_done) -> None:
    """Run ``func(**kwargs)`` for each (index, func, kwargs); ``on_done(index, result)`` here."""
    if client is None:
        for index, func, kwargs in tasks:
            on_done(index, func(**kwargs))
        return
    import distributed

    # A bounded number of chunks in flight, so finished results never pile up in memory.
    in_flight = max(2, 2 * len(client.nthreads()))
    pending = iter(tasks)
    futures = {}
    queue = distributed.as_completed([])

    def submit_next():
        for index, func, kwargs in pending:
            future = client.submit(func, pure=False, **kwargs)
            futures[future] = index
            queue.add(future)
            return

    for _ in range(in_flight):
        submit_next()
    for future in queue:
        result = future.result()
        on_done(futures.pop(future), result)
        del future, result
        submit_next()


def sample_to_netcdf(
    teacher,
    output,
    *,
    count: int,
    seed: int,
    pressure_hpa=None,
    jacobian: bool = False,
    workers: int | None = None,
    scheduler: str | None = None,
    chunk_size: int = 4096,
    progress: bool = True,
) -> Path:
    """Draw ``count`` states, run the teacher (by default the physics) on them, write one netCDF file.

    The work is split into fixed chunks of ``chunk_size`` profiles (independent of the
    worker count). Each finished chunk is saved atomically in ``<output>.chunks/`` with
    a manifest holding a hash of the arguments; a rerun with the same arguments computes
    only the missing chunks and produces the same bytes as an uninterrupted run; a rerun
    with other arguments discards the old chunks (with an RtemuWarning) and starts
    over. The final file is assembled by streaming the chunks, one at a time, into a
    temporary file that is renamed onto ``output``; then the chunk directory is removed.
    The job holds :func:`rtemu._io.exclusive_output` on ``output`` throughout: a second
    job on the same output is refused naming this one, and only this job touches the
    chunk directory.

    Parameters
    ----------
    teacher : Instrument, str or Teacher
        An instrument or its shipped name/path: rtemu's physical model of it. Or any
        object in the :class:`rtemu.Teacher` protocol, run in this process; one from
        :func:`rtemu.load_teacher` (``MODULE:NAME``) also runs in worker processes, which
        import it by that name. Finished chunks are reused while the teacher's name and
        version (:func:`rtemu.teacher.teacher_identity`) stay the same.
    output : str or os.PathLike
        The netCDF file to write.
    count : int
        Number of profiles [1], >= 1.
    seed : int
        Generator seed [1], 0 <= seed < 2**63.
    pressure_hpa : array_like, optional
        Level grid [hPa] (see :func:`draw_states`); default the 64-level demo grid.
    jacobian : bool
        Also write the ``jacobian_*`` variables.
    workers : int, optional
        Local worker processes (dask.distributed LocalCluster, one thread each); None or
        1 computes in this process (the only choice for a teacher object not imported
        by name).
    scheduler : str, optional
        Address of a running dask.distributed scheduler (instead of ``workers``). The
        workers need rtemu installed; results come back to this process, which writes
        all files, so no shared file system is needed.
    chunk_size : int
        Profiles per chunk [1] (memory per chunk ~ chunk_size * channels * levels * 16
        bytes with Jacobians).
    progress : bool
        Show a tqdm progress bar over chunks.

    Returns
    -------
    pathlib.Path
        ``output``.

    File layout
    -----------
    Dimensions profile, level, channel. Variables ``air_pressure`` (level) [hPa],
    ``air_temperature``, ``specific_humidity`` (profile, level), ``surface_temperature``,
    ``sensor_zenith_angle``, ``total_column_water_vapour`` (profile),
    ``surface_emissivity``, ``brightness_temperature``, ``quality_flag`` (profile,
    channel), with ``jacobian`` also ``jacobian_air_temperature``,
    ``jacobian_specific_humidity`` (profile, channel, level),
    ``jacobian_surface_temperature``, ``jacobian_surface_emissivity`` (profile,
    channel); coordinates ``profile`` (index) and ``channel`` (ids); CF attributes.
    Global attributes: ``Conventions``, ``title``, ``rtemu_generator_version``,
    ``rtemu_teacher``, ``rtemu_teacher_version`` (the model that made the outputs),
    ``rtemu_instrument``, ``rtemu_instrument_toml``, ``rtemu_seed``, ``rtemu_count``,
    ``rtemu_jacobian``, ``rtemu_envelope`` (nominal, JSON),
    ``rtemu_covered_envelope`` (JSON), and ``rtemu_teacher_refused`` when the teacher
    returned non-finite values for some entries (flagged ``invalid_input``; also an
    RtemuWarning). No creation time: equal arguments give equal bytes.
    """
    if isinstance(teacher, (Instrument, str, os.PathLike)):
        inst, model, identity = load_instrument(teacher), None, _teacher.PHYSICS_TEACHER
    else:
        model = _teacher.check_teacher(teacher)
        inst, identity = model.instrument, _teacher.teacher_identity(model)
    count = _check_count(count)
    seed = _check_seed(seed)
    if count > MAX_PROFILES:
        raise ValueError(f"count must not exceed {MAX_PROFILES}, got {count}")
    if isinstance(chunk_size, bool) or not isinstance(chunk_size, (int, np.integer)) or chunk_size < 1:
        raise ValueError(f"chunk_size must be an integer >= 1, got {chunk_size!r}")
    chunk_size = int(chunk_size)
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, (int, np.integer))
                                or workers < 1):
        raise ValueError(f"workers must be an integer >= 1 or None, got {workers!r}")
    if scheduler is not None and workers not in (None, 1):
        raise ValueError("give either workers (a local cluster) or scheduler (a running one), not both")
    grid = _check_grid(pressure_hpa)
    output = Path(output)
    side = output.with_name(output.name + ".chunks")

    spec = (model.spec, model.path) if isinstance(model, _teacher.ImportedTeacher) else None
    if model is not None and spec is None and (scheduler is not None or workers not in (None, 1)):
        raise ValueError(f"teacher {identity[0]}: an object runs in this process only (rule: for worker "
                         "processes give the teacher as MODULE:NAME, rtemu.load_teacher)")
    with exclusive_output(output):
        arguments = _arguments(inst, identity, count, seed, grid, jacobian, chunk_size)
        arguments_hash = _arguments_hash(arguments)
        _prepare_chunk_dir(side, arguments)
        remove_partials(side)  # of a job that died; we hold the output's lock
        chunks = [(i, s, min(chunk_size, count - s)) for i, s in enumerate(range(0, count, chunk_size))]
        paths = {i: side / _CHUNK_PATTERN.format(i) for i, _, _ in chunks}
        todo = [c for c in chunks if not _chunk_ready(paths[c[0]], arguments_hash)]

        from tqdm.auto import tqdm

        bar = tqdm(total=len(chunks), initial=len(chunks) - len(todo), unit="chunk",
                   desc=f"rtemu sample {output.name}", disable=not progress)

        def on_done(index, arrays):
            if arrays is not None:
                _write_chunk(paths[index], arrays, index, arguments_hash)
            bar.update(1)

        job = {"instrument_toml": inst.to_toml(), "absorption_tables": inst.absorption_tables, "seed": seed,
               "grid": grid, "jacobian": bool(jacobian)}
        try:
            if todo:
                with _dask_client(workers, scheduler) as (client, shared_files):
                    # Worker processes import the teacher by name; this process uses the object.
                    if client is None:
                        job["teacher"] = model
                    else:
                        job["teacher_spec"] = spec
                    if client is not None and shared_files:
                        # Local workers save their own chunks: no result crosses the network.
                        tasks = [(i, _compute_chunk_to_file,
                                  dict(path=str(paths[i]), index=i, arguments_hash=arguments_hash,
                                       start=s, count=n, **job)) for i, s, n in todo]
                    else:
                        tasks = [(i, _compute_chunk, dict(start=s, count=n, **job)) for i, s, n in todo]
                    _run_chunks(tasks, client, on_done)
        finally:
            bar.close()
        _assemble(output, inst, [paths[i] for i, _, _ in chunks], grid, arguments, chunk_size)
        _remove_chunk_dir(side)
    return output


_FILE_ORDER = ("air_temperature", "specific_humidity", "surface_temperature", "surface_emissivity",
               "sensor_zenith_angle", "surface_air_pressure", "total_column_water_vapour", "brightness_temperature",
               "quality_flag", "jacobian_air_temperature", "jacobian_specific_humidity",
               "jacobian_surface_temperature", "jacobian_surface_emissivity")


_LEVEL_VARIABLES = ("air_temperature", "specific_humidity")


def _dims_of(name: str, ndim: int) -> tuple[str, ...]:
    if ndim == 1:
        return ("profile",)
    if ndim == 3:
        return ("profile", "channel", "level")
    return ("profile", "level") if name in _LEVEL_VARIABLES else ("profile", "channel")


def _assemble(output: Path, inst: Instrument, chunk_paths: list[Path], grid: np.ndarray,
              arguments: dict, chunk_size: int) -> None:
    """Stream the chunk files into one netCDF file at ``output`` (atomically)."""
    import h5netcdf
    import h5py

    count = arguments["count"]
    with h5py.File(chunk_paths[0], "r") as first:
        layout = {name: (first[name].ndim, first[name].dtype) for name in first}
    names = [n for n in _FILE_ORDER if n in layout]
    kinds = [bool(ch.is_microwave) for ch in inst.channels]
    sizes = {"profile": count, "level": grid.size, "channel": len(inst.channels)}
    profile_chunk = min(chunk_size, count)
    envelope = None
    check_space(output, assembly_size(chunk_paths))
    refused = 0  # entries the teacher gave no finite value for (drawn states are all valid)
    with atomic_path(output, suffix=".nc.partial") as tmp:
        with h5netcdf.File(tmp, "w") as f:
            f.dimensions = sizes
            _variable(f, "profile", ("profile",), np.int64, {"long_name": "profile index"},
                      profile_chunk)[:] = np.arange(count, dtype=np.int64)
            channel = f.create_variable("channel", ("channel",), dtype=h5py.string_dtype("utf-8"),
                                        track_times=False)
            channel[:] = np.array(inst.channel_ids, dtype=object)
            channel.attrs["long_name"] = "channel id"
            _variable(f, "air_pressure", ("level",), float, _INPUT_ATTRS["air_pressure"], None)[:] = grid
            variables = {}
            for name in names:
                ndim, dtype = layout[name]
                if name in _INPUT_ATTRS:
                    attrs = _INPUT_ATTRS[name]
                elif name == "quality_flag":
                    attrs = flags.flag_attrs()
                else:
                    attrs = physics.output_attrs(name)
                variables[name] = _variable(f, name, _dims_of(name, ndim), dtype, attrs, profile_chunk)
            offset = 0
            for path in chunk_paths:
                with h5py.File(path, "r") as chunk:
                    arrays = {name: chunk[name][()] for name in names}
                n = arrays["air_temperature"].shape[0]
                for name in names:
                    variables[name][offset:offset + n] = arrays[name]
                arrays["air_pressure"] = grid
                envelope = _merge_envelopes(envelope, _envelope_of(arrays, kinds))
                refused += int(np.count_nonzero(arrays["quality_flag"] & flags.INVALID_INPUT))
                offset += n
            if offset != count:
                raise ValueError(f"chunks hold {offset} profiles, expected {count}")
            teacher = (arguments["teacher"], arguments["teacher_version"])
            f.attrs.update({
                "Conventions": "CF-1.8",
                "title": f"rtemu training set for {inst.name}",
                "source": ("rtemu.sampling.sample_to_netcdf (physical clear-sky model)"
                           if teacher == _teacher.PHYSICS_TEACHER else
                           f"rtemu.sampling.sample_to_netcdf (teacher {teacher[0]} {teacher[1]})"),
                "rtemu_generator_version": GENERATOR_VERSION,
                "rtemu_teacher": teacher[0],
                "rtemu_teacher_version": teacher[1],
                "rtemu_instrument": inst.name,
                "rtemu_instrument_toml": inst.to_toml(),
                "rtemu_seed": np.int64(arguments["seed"]),
                "rtemu_count": np.int64(count),
                "rtemu_jacobian": np.int8(arguments["jacobian"]),
                "rtemu_envelope": json.dumps(envelope_description(), sort_keys=True),
                "rtemu_covered_envelope": json.dumps(envelope, sort_keys=True),
            })
            if refused:
                f.attrs["rtemu_teacher_refused"] = np.int64(refused)
    if refused:
        warnings.warn(f"teacher {arguments['teacher']}: no finite output for {refused} of "
                      f"{count * len(inst.channels)} (profile, channel) entries of valid drawn states; "
                      "they are NaN with the invalid_input flag, and training leaves them out",
                      RtemuWarning, stacklevel=3)


def _variable(f, name, dims, dtype, attrs, profile_chunk):
    chunks = None
    if profile_chunk is not None:
        chunks = tuple(profile_chunk if d == "profile" else f.dimensions[d].size for d in dims)
    var = f.create_variable(name, dims, dtype=dtype, chunks=chunks, track_times=False)
    for key, value in attrs.items():
        var.attrs[key] = value
    return var
