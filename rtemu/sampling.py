"""Training-set generation: atmospheric states that fill the envelope, and their radiances.

Two parts:

* :func:`draw_states` builds clear-sky atmospheric states from a space-filling design
  (scrambled Sobol' points for the scalars) plus vertically correlated Gaussian
  perturbations; the construction is described in :func:`draw_states` and the nominal
  ranges in :func:`envelope_description`.
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
GENERATOR_VERSION = "4"
#: Profiles per deterministic block (see the module docstring).
BLOCK_SIZE = 1024
#: Largest profile index + 1 (scipy's Sobol' sequences hold 2**30 points).
MAX_PROFILES = 2**30

_KAPPA_PER_LAPSE = DRY_AIR_GAS_CONSTANT / STANDARD_GRAVITY  # d ln T / d ln p per (K m-1)

# Tropopause temperature follows tropopause pressure: a line in ln p through the US 1976
# tropopause (U.S. Standard Atmosphere 1976, 11 km': 226.32 hPa, 216.65 K) rising 29 K per
# e-fold of pressure, which puts a 100 hPa tropopause at 193 K (tropical tropopause about
# 190-195 K: textbook value, from memory). Generator v3 drew T_t anywhere in 180-240 K
# whatever p_t: a polar column warmed 30 K throughout was then a state it drew itself, and
# the emulator's envelope flag could not call it outside (DEVELOPERS.md, "Generator v4").
_TROPOPAUSE_LINE = {"reference_hpa": 226.32, "reference_k": 216.65, "slope_k_per_ln_p": 29.0}

# --- nominal envelope -------------------------------------------------------------------
# Each entry: (low, high, units, meaning). All generator constants live here so that the
# file attribute describes exactly what produced the data.
_RANGES = {
    "surface_air_temperature": (220.0, 320.0, "K", "air temperature of the lowest level"),
    "total_column_water_vapour": (0.1, 75.0, "kg m-2", "target lo*(hi/lo)**f, f in [0, 1] with "
                                  "P(f < x) = 0.25 x + 0.75 x**2.5, lo = max(0.1, 0.003*saturated), "
                                  "hi = min(75, saturated); a column whose saturated value is below "
                                  "0.1 is saturated"),  # constants: _COLUMN_* below (a test checks)
    "relative_humidity": (0.0, 1.0, "1", "over liquid water (Bolton 1980 eq. 10); never above 1"),
    "specific_humidity_floor": (1e-7, 1e-7, "kg kg-1", "smallest specific humidity anywhere"),
    "skin_minus_air_temperature": (-12.0, 12.0, "K", "surface_temperature minus lowest-level air temperature"),
    "surface_emissivity_microwave": (0.4, 1.0, "1", "per-profile value + N(0, 0.03) per channel, clipped"),
    "surface_emissivity_infrared": (0.90, 1.0, "1", "per-profile value + N(0, 0.005) per channel, clipped"),
    "sensor_zenith_angle": (0.0, 65.0, "degree", "uniform in angle"),
    "tropopause_pressure": (80.0, 300.0, "hPa", "log-uniform"),
    "tropopause_temperature": (180.0, 240.0, "K", "further limited by the lapse-rate range and the "
                               "tropopause_temperature_offset band"),
    "tropopause_temperature_offset": (-8.0, 8.0, "K", "tropopause temperature minus the line "
                                      f"{_TROPOPAUSE_LINE['reference_k']:g} K + {_TROPOPAUSE_LINE['slope_k_per_ln_p']:g} "
                                      f"K * ln(p_t / {_TROPOPAUSE_LINE['reference_hpa']:g} hPa); where the "
                                      "lapse-rate range does not reach the band, the lapse-rate limit nearest it"),
    "tropospheric_lapse_rate": (2.0, 9.5, "K km-1", "constant lapse rate of the free troposphere"),
    "inversion_strength": (-2.0, 15.0, "K", "free-troposphere temperature extrapolated to the "
                           "surface minus surface air temperature (negative: superadiabatic layer)"),
    "inversion_depth": (10.0, 150.0, "hPa", "depth of the surface layer carrying the inversion"),
    "stratopause_temperature": (235.0, 295.0, "K", "at 1.1 hPa; at least tropopause + 5 K"),
    "stratospheric_specific_humidity": (1.5e-6, 6e-6, "kg kg-1", "value at the tropopause; log-uniform, "
                                        "capped by saturation"),
    "stratospheric_humidity_gradient": (-0.3, 0.9, "1", "change of ln q from the tropopause to 1 hPa, linear "
                                        "in ln p (positive: moister aloft)"),
    "relative_humidity_decay": (-1.0, 4.0, "1", "decrease of logit(RH) from surface to tropopause"),
    "stratospheric_shape_mix": (0.0, 1.0, "1", "0: US 1976 stratosphere shape, 1: linear in ln p"),
}
# Vertically correlated Gaussian perturbations: correlation exp(-d^2 / (2 L^2)), d in ln p.
_TEMPERATURE_NOISE = {"troposphere_std_k": 1.0, "stratosphere_std_k": 3.0, "correlation_length_ln_p": 0.35,
                      "surface_taper_ln_p": 0.03}
_HUMIDITY_NOISE = {"logit_std": 0.7, "correlation_length_ln_p": 0.25}
# Stratospheric ln q varies with height too: without it every stratospheric humidity profile
# lay on one line (a single drawn value), and any background with a little vertical
# structure there was "novel" to the emulator (measured: 62 % of the demo's backgrounds).
_STRATOSPHERIC_HUMIDITY_NOISE = {"ln_q_std": 0.15, "correlation_length_ln_p": 0.5}
_STRATOSPHERIC_GRADIENT_TOP_HPA = 1.0  # [hPa]: where the drawn gradient is reached
_EMISSIVITY_CHANNEL_STD = {"microwave": 0.03, "infrared": 0.005}
_TRANSITION_WIDTH_LN_P = 0.1  # troposphere/stratosphere blend width [ln p]
_US76_STRATOSPHERE_BASE = (54.7489, 1.10906)  # [hPa]: US 1976 20 km' and 47 km' levels
_Q_FLOOR = 1e-7  # [kg kg-1]
_RH_CAP = 1.0 - 1e-6  # [1]; strictly subsaturated after round-off
_Q_MAX = 0.099  # [kg kg-1]; the physical model requires q < 0.1
_COLUMN_FRACTION_LOW = 0.003  # lowest column water as a fraction of the saturated column
#: Target column water = lo * (hi/lo)**f, f drawn from the mixture
#: P(f < x) = w x + (1 - w) x**(1/power): the power part moves weight to moist columns,
#: which a log-uniform draw leaves sparse; the log-uniform part (weight w) keeps warm, very
#: dry columns from being rare. Generator v2 used f = u**0.4 and lo = 0.01 W_sat: of its
#: columns under 1 kg m-2, 99 % had T0 below 281 K, and the emulator erred 5-7 times more
#: on warm dry columns (30 K-warmed test profiles) than on the test set (DEVELOPERS.md).
_COLUMN_WATER_POWER = 0.4
_COLUMN_WATER_LOG_UNIFORM_WEIGHT = 0.25
_SOBOL_NAMES = (
    "surface_air_temperature", "inversion_strength", "inversion_depth", "tropopause_pressure",
    "tropopause_temperature", "stratopause_temperature", "stratospheric_shape_mix",
    "relative_humidity_decay", "total_column_water_vapour", "stratospheric_specific_humidity",
    "stratospheric_humidity_gradient", "skin_minus_air_temperature", "surface_emissivity_microwave",
    "surface_emissivity_infrared", "sensor_zenith_angle",
)


def envelope_description() -> dict:
    """Nominal ranges of the state generator (JSON-serialisable).

    Returns
    -------
    dict
        ``{"generator_version": str, "ranges": {name: {"min", "max", "units", "meaning"}},
        "temperature_perturbation": {...}, "humidity_perturbation": {...},
        "emissivity_channel_std": {...}}``. Written to file attributes as
        ``rtemu_envelope`` (JSON).
    """
    return {
        "generator_version": GENERATOR_VERSION,
        "ranges": {
            name: {"min": lo, "max": hi, "units": units, "meaning": meaning}
            for name, (lo, hi, units, meaning) in _RANGES.items()
        },
        "temperature_perturbation": dict(_TEMPERATURE_NOISE),
        "humidity_perturbation": dict(_HUMIDITY_NOISE),
        "stratospheric_humidity_perturbation": dict(_STRATOSPHERIC_HUMIDITY_NOISE),
        "emissivity_channel_std": dict(_EMISSIVITY_CHANNEL_STD),
    }


# --- input validation -----------------------------------------------------------------------
def tropopause_temperature_band(tropopause_pressure_hpa):
    """Range of tropopause temperature the generator draws at a tropopause pressure.

    The line T = 216.65 K + 29 K ln(p_t / 226.32 hPa) through the US 1976 tropopause [1],
    plus and minus the half-width of ``tropopause_temperature_offset`` (8 K), kept
    inside the ``tropopause_temperature`` range. The lapse-rate range narrows it further
    per profile (:func:`draw_states`).

    Parameters
    ----------
    tropopause_pressure_hpa : array_like
        Tropopause pressure p_t [hPa].

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Lowest and highest tropopause temperature [K], shape of the input.

    References
    ----------
    [1] U.S. Standard Atmosphere, 1976 (NOAA/NASA/USAF): at 11 km' geopotential height,
        22,632 Pa and 216.65 K.
    """
    p_t = np.asarray(tropopause_pressure_hpa, dtype=float)
    line = _TROPOPAUSE_LINE
    centre = line["reference_k"] + line["slope_k_per_ln_p"] * np.log(p_t / line["reference_hpa"])
    off_lo, off_hi = _RANGES["tropopause_temperature_offset"][:2]
    t_lo, t_hi = _RANGES["tropopause_temperature"][:2]
    return np.clip(centre + off_lo, t_lo, t_hi), np.clip(centre + off_hi, t_lo, t_hi)


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


def _us76_stratosphere_shape(p: np.ndarray) -> np.ndarray:
    """US 1976 stratosphere warming, 0 at and below 20 km', 1 at the stratopause [1]."""
    lower, stratopause = _US76_STRATOSPHERE_BASE
    t_lower = atm.us_standard_atmosphere_1976(lower)
    t_top = atm.us_standard_atmosphere_1976(stratopause)
    shape = (atm.us_standard_atmosphere_1976(p) - t_lower) / (t_top - t_lower)
    return np.where(p >= lower, 0.0, shape)


def _scale(u: np.ndarray, name: str, log: bool = False) -> np.ndarray:
    lo, hi = _RANGES[name][:2]
    if log:
        return np.exp(np.log(lo) + u * (np.log(hi) - np.log(lo)))
    return lo + u * (hi - lo)


def _column_fraction(u: np.ndarray) -> np.ndarray:
    """f in [0, 1] [1] with P(f < x) = w x + (1 - w) x**(1/power) for u uniform on [0, 1].

    The inverse of the increasing mixture CDF, by bisection (60 halvings: exact to round-off,
    and the same numbers on every machine).
    """
    w, exponent = _COLUMN_WATER_LOG_UNIFORM_WEIGHT, 1.0 / _COLUMN_WATER_POWER
    lo, hi = np.zeros_like(u), np.ones_like(u)
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        below = w * mid + (1.0 - w) * mid**exponent < u
        lo, hi = np.where(below, mid, lo), np.where(below, hi, mid)
    return 0.5 * (lo + hi)


def _sigmoid(x: np.ndarray) -> np.ndarray:
    # scipy's expit keeps relative precision far into the tails, where RH ~ exp(x); the
    # tanh form loses it to cancellation and makes the column a step function of c there.
    return special.expit(x)


def _temperature(p, u, rng_noise):
    """Temperature profiles [K] (N, L), surface-first, and the drawn parameters."""
    ps = p[0]
    ln_p = np.log(p)
    t0 = _scale(u["surface_air_temperature"], "surface_air_temperature")
    inversion = _scale(u["inversion_strength"], "inversion_strength")
    depth = _scale(u["inversion_depth"], "inversion_depth")
    p_trop = _scale(u["tropopause_pressure"], "tropopause_pressure", log=True)
    t_free0 = t0 + inversion  # free troposphere extrapolated to the bottom level

    # Tropopause temperature, limited so that the implied lapse rate stays in range ...
    gamma_lo, gamma_hi = (g * 1e-3 for g in _RANGES["tropospheric_lapse_rate"][:2])
    tt_lo_abs, tt_hi_abs = _RANGES["tropopause_temperature"][:2]
    log_ratio = np.log(p_trop / ps)
    lapse_lo = np.maximum(tt_lo_abs, t_free0 * np.exp(_KAPPA_PER_LAPSE * gamma_hi * log_ratio))
    lapse_hi = np.minimum(tt_hi_abs, t_free0 * np.exp(_KAPPA_PER_LAPSE * gamma_lo * log_ratio))
    # ... and within the band about the tropopause line; where the two do not meet, the
    # lapse-rate limit nearest the band.
    band_lo, band_hi = tropopause_temperature_band(p_trop)
    tt_lo = np.maximum(lapse_lo, np.minimum(band_lo, lapse_hi))
    tt_hi = np.minimum(lapse_hi, np.maximum(band_hi, lapse_lo))
    t_trop = tt_lo + u["tropopause_temperature"] * (tt_hi - tt_lo)
    kappa = np.log(t_free0 / t_trop) / np.log(ps / p_trop)  # T = T0' (p/ps)^kappa

    t_sp_lo = np.maximum(_RANGES["stratopause_temperature"][0], t_trop + 5.0)
    t_sp = t_sp_lo + u["stratopause_temperature"] * (_RANGES["stratopause_temperature"][1] - t_sp_lo)
    mix = u["stratospheric_shape_mix"]

    pp = p[None, :]
    free = t_free0[:, None] * (pp / ps) ** kappa[:, None]
    surface_weight = np.clip((pp - (ps - depth[:, None])) / depth[:, None], 0.0, 1.0)
    troposphere = free - inversion[:, None] * surface_weight

    us_shape = _us76_stratosphere_shape(p)[None, :]
    stratopause = _US76_STRATOSPHERE_BASE[1]
    linear = np.clip(np.log(p_trop[:, None] / pp) / np.log(p_trop[:, None] / stratopause), 0.0, None)
    linear = np.where(pp < stratopause, us_shape, linear)
    shape = (1.0 - mix[:, None]) * us_shape + mix[:, None] * linear
    stratosphere = t_trop[:, None] + (t_sp - t_trop)[:, None] * shape
    in_troposphere = pp >= p_trop[:, None]
    temperature = np.where(in_troposphere, troposphere, stratosphere)

    tropo_weight = _sigmoid((ln_p[None, :] - np.log(p_trop)[:, None]) / _TRANSITION_WIDTH_LN_P)
    std = (_TEMPERATURE_NOISE["troposphere_std_k"] * tropo_weight
           + _TEMPERATURE_NOISE["stratosphere_std_k"] * (1.0 - tropo_weight))
    taper = 1.0 - np.exp(-(np.log(ps) - ln_p) / _TEMPERATURE_NOISE["surface_taper_ln_p"])
    temperature = temperature + std * taper[None, :] * rng_noise

    # Keep saturation above the humidity floor (q_sat >= 2 * floor) so RH <= 1 and
    # q >= floor can both hold; binds only in extreme corners of the design.
    e_needed = atm.vapour_pressure(2.0 * _Q_FLOOR, p) / _RH_CAP
    temperature = np.maximum(temperature, atm.dewpoint_from_vapour_pressure(e_needed)[None, :])
    temperature = np.clip(temperature, 150.0, 390.0)
    params = {
        "tropopause_pressure": p_trop, "tropopause_temperature": t_trop,
        "tropospheric_lapse_rate": kappa / _KAPPA_PER_LAPSE * 1e3,
        "inversion_strength": inversion, "inversion_depth": depth,
        "stratopause_temperature": t_sp,
    }
    return temperature, tropo_weight, params


class _Humidity:
    """Specific humidity as a monotone function of one shift c of logit(RH)."""

    def __init__(self, p, temperature, tropo_weight, shape_logit, ln_q_strat):
        self.p = p
        self.weight = tropo_weight
        es = atm.saturation_vapour_pressure(temperature)
        self.es = es
        self.shape = shape_logit
        # Where es approaches p (warm air aloft) the tropospheric branch is capped; it is
        # blended out there anyway.
        self.e_limit = 0.5 * p[None, :]
        self.strat_part = (1.0 - tropo_weight) * ln_q_strat
        e_cap = _RH_CAP * es
        reachable = e_cap < 0.99 * p[None, :]
        q_cap = atm.specific_humidity_from_vapour_pressure(np.where(reachable, e_cap, 0.0), p[None, :])
        self.q_max = np.where(reachable, np.minimum(q_cap, _Q_MAX), _Q_MAX)

    def specific_humidity(self, shift: np.ndarray) -> np.ndarray:
        rh = _sigmoid(self.shape + shift[:, None])
        e = np.minimum(rh * self.es, self.e_limit)
        q_trop = EPSILON * e / (self.p[None, :] - (1.0 - EPSILON) * e)  # e < p/2: always valid
        ln_q = self.weight * np.log(np.maximum(q_trop, 1e-300)) + self.strat_part
        return np.clip(np.exp(ln_q), _Q_FLOOR, self.q_max)

    def column(self, shift: np.ndarray) -> np.ndarray:
        return atm.total_column_water_vapour(self.p, self.specific_humidity(shift))


def _solve_shift(humidity: _Humidity, target, lo, hi, column_lo, column_hi, tolerance=1e-12,
                 iterations=60) -> np.ndarray:
    """Shift c in [lo, hi] with column(c) = target: Illinois regula falsi on ln column.

    ln column is nearly linear in c while the air is far from saturation, so this takes
    ~10 evaluations where bisection takes ~40; the bracket keeps it safe elsewhere.
    """
    a, b = np.full(target.shape, lo), np.full(target.shape, hi)
    ln_target = np.log(target)
    fa, fb = np.log(column_lo) - ln_target, np.log(column_hi) - ln_target
    c = np.where(np.abs(fa) <= np.abs(fb), a, b)
    last_side = np.zeros(target.shape, dtype=np.int8)
    for _ in range(iterations):
        width = fb - fa
        secant = np.where(width > 0, (a * fb - b * fa) / np.where(width > 0, width, 1.0), 0.5 * (a + b))
        c = np.clip(secant, a, b)
        fc = np.log(humidity.column(c)) - ln_target
        if np.all(np.abs(fc) <= tolerance):
            break
        moves_b = fc > 0  # fa <= 0 <= fb throughout
        fa = np.where(moves_b & (last_side == 1), 0.5 * fa, fa)  # Illinois: halve the stale end
        fb = np.where(~moves_b & (last_side == -1), 0.5 * fb, fb)
        b, fb = np.where(moves_b, c, b), np.where(moves_b, fc, fb)
        a, fa = np.where(moves_b, a, c), np.where(moves_b, fa, fc)
        last_side = np.where(moves_b, 1, -1).astype(np.int8)
    return c


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

    temperature, tropo_weight, params = _temperature(p, u, t_noise)

    ps = p[0]
    p_trop = params["tropopause_pressure"]
    height_fraction = np.clip((ps - p[None, :]) / (ps - p_trop[:, None]), 0.0, 1.2)
    decay = _scale(u["relative_humidity_decay"], "relative_humidity_decay")
    shape = -decay[:, None] * height_fraction + _HUMIDITY_NOISE["logit_std"] * h_noise
    q_strat = _scale(u["stratospheric_specific_humidity"], "stratospheric_specific_humidity", log=True)
    gradient = _scale(u["stratospheric_humidity_gradient"], "stratospheric_humidity_gradient")
    height = np.clip(np.log(p_trop[:, None] / p[None, :]) / np.log(p_trop / _STRATOSPHERIC_GRADIENT_TOP_HPA)[:, None],
                     0.0, None)
    ln_q_strat = (np.log(q_strat)[:, None] + gradient[:, None] * height
                  + _STRATOSPHERIC_HUMIDITY_NOISE["ln_q_std"] * s_noise)
    humidity = _Humidity(p, temperature, tropo_weight, shape, ln_q_strat)

    w_dry = humidity.column(np.full(n, -40.0))
    w_sat = humidity.column(np.full(n, 40.0))
    w_lo_abs, w_hi_abs = _RANGES["total_column_water_vapour"][:2]
    w_hi = np.minimum(w_hi_abs, w_sat)
    w_lo = np.minimum(np.maximum(w_lo_abs, _COLUMN_FRACTION_LOW * w_sat), w_hi)
    w_lo = np.maximum(w_lo, w_dry)
    fraction = _column_fraction(u["total_column_water_vapour"])
    target = np.exp(np.log(w_lo) + fraction * (np.log(w_hi) - np.log(w_lo)))
    q = humidity.specific_humidity(_solve_shift(humidity, target, -40.0, 40.0, w_dry, w_sat))

    skin = temperature[:, 0] + _scale(u["skin_minus_air_temperature"], "skin_minus_air_temperature")
    emissivity = np.empty((n, kind.size))
    for is_mw, name, std in ((True, "surface_emissivity_microwave", _EMISSIVITY_CHANNEL_STD["microwave"]),
                             (False, "surface_emissivity_infrared", _EMISSIVITY_CHANNEL_STD["infrared"])):
        lo, hi = _RANGES[name][:2]
        base = _scale(u[name], name)
        cols = kind == is_mw
        emissivity[:, cols] = np.clip(base[:, None] + std * e_noise[:, cols], lo, hi)
    return {
        "air_temperature": temperature,
        "specific_humidity": q,
        "surface_temperature": skin,
        "surface_emissivity": emissivity,
        "sensor_zenith_angle": _scale(u["sensor_zenith_angle"], "sensor_zenith_angle"),
        "total_column_water_vapour": atm.total_column_water_vapour(p, q),
        "relative_humidity_decay": decay,
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
    "total_column_water_vapour": {"standard_name": "atmosphere_mass_content_of_water_vapor",
                                  "long_name": "total column water vapour (trapezoidal, as the model)",
                                  "units": "kg m-2"},
}
_PARAMETER_ATTRS = {
    "tropopause_pressure": {"long_name": "tropopause pressure drawn by the generator", "units": "hPa"},
    "tropopause_temperature": {"long_name": "tropopause temperature drawn by the generator", "units": "K"},
    "tropospheric_lapse_rate": {"long_name": "free-tropospheric lapse rate of the construction",
                                "units": "K km-1"},
    "inversion_strength": {"long_name": "surface inversion strength drawn by the generator", "units": "K"},
    "inversion_depth": {"long_name": "surface inversion depth drawn by the generator", "units": "hPa"},
    "stratopause_temperature": {"long_name": "stratopause temperature drawn by the generator", "units": "K"},
    "relative_humidity_decay": {"long_name": "decrease of logit(relative humidity) from the surface to the "
                                "tropopause drawn by the generator", "units": "1"},
}
#: Variables written to the training file, in file order.
STATE_VARIABLES = ("air_temperature", "specific_humidity", "surface_temperature",
                   "surface_emissivity", "sensor_zenith_angle", "total_column_water_vapour")


def draw_states(count: int, *, seed: int, pressure_hpa=None, start: int = 0, channels) -> xr.Dataset:
    """Draw ``count`` clear-sky atmospheric states (profiles ``start .. start+count-1``).

    Construction (surface-first grid, bottom pressure ps; drawn quantities in the
    nominal ranges of :func:`envelope_description`, scalars from a scrambled Sobol'
    sequence):

    1. Free troposphere with constant lapse rate: T = T0' (p/ps)^kappa, T0' = T0 + dI
       (T0 surface air temperature, dI inversion strength), kappa from the drawn
       tropopause (p_t log-uniform; T_t within 8 K of a line in ln p_t through the US 1976
       tropopause, :func:`tropopause_temperature_band`, and inside the range the lapse-rate
       limits allow: where the two do not meet, the limit nearest the band); lapse rate =
       kappa g / R_d.
    2. Surface layer of drawn depth D: T = T_free - dI * clip((p - (ps - D)) / D, 0, 1),
       so the bottom level holds T0 exactly (inversion for dI > 0).
    3. Stratosphere (p < p_t): T = T_t + (T_sp - T_t) * shape, shape a drawn mix of the
       US 1976 warming profile (0 below 20 km', 1 at 1.1 hPa) and a ramp linear in ln p
       from the tropopause to 1.1 hPa; above 1.1 hPa the US 1976 shape for both.
    4. Vertically correlated Gaussian perturbations, correlation exp(-d^2 / (2 L^2)) with
       d the ln-p distance: temperature L = 0.35, std 1 K in the troposphere rising to
       3 K in the stratosphere (blend over 0.1 in ln p), tapered to 0 at the bottom level.
    5. Humidity: RH = logistic(-a s(p) + 0.7 n(p) + c), s = (ps - p) / (ps - p_t) clipped
       to [0, 1.2], a the drawn decay, n a unit correlated perturbation (L = 0.25);
       q_trop = eps e / (p - (1-eps) e), e = RH es(T) (Bolton). ln q is blended over 0.1
       in ln p around p_t into a stratospheric profile ln q_s + g h(p) + 0.15 m(p): q_s
       the drawn value at the tropopause, g the drawn gradient reached at 1 hPa, h the
       height ln(p_t/p) / ln(p_t/1 hPa), m a unit correlated perturbation (L = 0.5); q is capped at
       RH = 1 - 1e-6 and floored at 1e-7 kg kg-1 (temperatures are floored so the two
       limits never cross). The shift c is solved by bisection so that the column
       (trapezoidal, as the model) equals the target lo (hi/lo)^f, lo = max(0.1,
       0.003 W_sat), hi = min(75, W_sat), W_sat the saturated column; f is the Sobol'
       coordinate mapped through the inverse of P(f < x) = 0.25 x + 0.75 x^2.5 (the
       x^2.5 part moves weight to moist columns, the log-uniform quarter keeps warm
       very dry columns covered).
    6. Skin temperature T0 + U(-12, 12) K; emissivity per profile for microwave and for
       infrared channels plus N(0, 0.03) / N(0, 0.005) per channel, clipped to
       [0.4, 1] / [0.9, 1]; sensor zenith angle U(0, 65) degree.

    Parameters
    ----------
    count : int
        Number of profiles [1], >= 1.
    seed : int
        Seed [1], 0 <= seed < 2**63.
    pressure_hpa : array_like, optional
        Level pressures [hPa], strictly monotonic in either order, bottom level between
        400 and 1100 hPa. Default :func:`rtemu.atmosphere.default_pressure_grid`.
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
        (profile, channel) [1], ``sensor_zenith_angle`` (profile) [degree]; also
        ``total_column_water_vapour`` (profile) [kg m-2] and the drawn construction
        parameters ``tropopause_pressure`` [hPa], ``tropopause_temperature`` [K],
        ``tropospheric_lapse_rate`` [K km-1], ``inversion_strength`` [K],
        ``inversion_depth`` [hPa], ``stratopause_temperature`` [K],
        ``relative_humidity_decay`` [1] (profile).
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
        skin_minus_air_temperature [K], surface_emissivity (per kind) [1],
        sensor_zenith_angle [degree], total_column_water_vapour [kg m-2] and
        tropopause_pressure [hPa] when present.
    """
    arrays = {name: states[name].values for name in states.variables}
    return _envelope_of(arrays, kinds)


def _envelope_of(arrays, kinds: Sequence[bool] | None) -> dict:
    p = arrays["air_pressure"]
    t = arrays["air_temperature"]
    q = arrays["specific_humidity"]
    bottom = int(np.argmax(p))
    values = {
        "air_temperature": (t, "K"),
        "specific_humidity": (q, "kg kg-1"),
        "relative_humidity": (atm.relative_humidity(q, t, p[None, :]), "1"),
        "surface_temperature": (arrays["surface_temperature"], "K"),
        "skin_minus_air_temperature": (arrays["surface_temperature"] - t[:, bottom], "K"),
        "sensor_zenith_angle": (arrays["sensor_zenith_angle"], "degree"),
        "total_column_water_vapour": (arrays["total_column_water_vapour"], "kg m-2"),
    }
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
                   jacobian: bool) -> dict:
    """States and model outputs of one chunk, as plain arrays (runs on a worker)."""
    inst = Instrument.from_toml(instrument_toml, source="<sampling job>")
    states = draw_states(count, seed=seed, pressure_hpa=grid, start=start, channels=inst)
    inputs = states[["air_pressure", "air_temperature", "specific_humidity", "surface_temperature",
                     "surface_emissivity", "sensor_zenith_angle"]]
    out = physics.simulate(inst, inputs, jacobian=jacobian)
    arrays = {name: states[name].values for name in STATE_VARIABLES}
    for name in out.data_vars:
        arrays[name] = out[name].values
    return arrays


def _arguments(inst: Instrument, count, seed, grid, jacobian, chunk_size) -> dict:
    toml = inst.to_toml()
    return {
        "generator_version": GENERATOR_VERSION,
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
    instrument,
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
    """Draw ``count`` states, run the physical model on them and write one netCDF file.

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
    instrument : Instrument or str
        The instrument or its name/path.
    output : str or os.PathLike
        The netCDF file to write.
    count : int
        Number of profiles [1], >= 1.
    seed : int
        Generator seed [1], 0 <= seed < 2**63.
    pressure_hpa : array_like, optional
        Level grid [hPa] (see :func:`draw_states`); default the 60-level demo grid.
    jacobian : bool
        Also write the ``jacobian_*`` variables.
    workers : int, optional
        Local worker processes (dask.distributed LocalCluster, one thread each); None or
        1 computes in this process.
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
    ``rtemu_instrument``, ``rtemu_instrument_toml``, ``rtemu_seed``, ``rtemu_count``,
    ``rtemu_jacobian``, ``rtemu_envelope`` (nominal, JSON),
    ``rtemu_covered_envelope`` (JSON). No creation time: equal arguments give equal bytes.
    """
    inst = load_instrument(instrument)
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

    with exclusive_output(output):
        arguments = _arguments(inst, count, seed, grid, jacobian, chunk_size)
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

        job = {"instrument_toml": inst.to_toml(), "seed": seed, "grid": grid, "jacobian": bool(jacobian)}
        try:
            if todo:
                with _dask_client(workers, scheduler) as (client, shared_files):
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
               "sensor_zenith_angle", "total_column_water_vapour", "brightness_temperature",
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
                offset += n
            if offset != count:
                raise ValueError(f"chunks hold {offset} profiles, expected {count}")
            f.attrs.update({
                "Conventions": "CF-1.8",
                "title": f"rtemu training set for {inst.name}",
                "source": "rtemu.sampling.sample_to_netcdf (physical clear-sky model)",
                "rtemu_generator_version": GENERATOR_VERSION,
                "rtemu_instrument": inst.name,
                "rtemu_instrument_toml": inst.to_toml(),
                "rtemu_seed": np.int64(arguments["seed"]),
                "rtemu_count": np.int64(count),
                "rtemu_jacobian": np.int8(arguments["jacobian"]),
                "rtemu_envelope": json.dumps(envelope_description(), sort_keys=True),
                "rtemu_covered_envelope": json.dumps(envelope, sort_keys=True),
            })


def _variable(f, name, dims, dtype, attrs, profile_chunk):
    chunks = None
    if profile_chunk is not None:
        chunks = tuple(profile_chunk if d == "profile" else f.dimensions[d].size for d in dims)
    var = f.create_variable(name, dims, dtype=dtype, chunks=chunks, track_times=False)
    for key, value in attrs.items():
        var.attrs[key] = value
    return var
