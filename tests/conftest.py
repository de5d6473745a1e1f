"""Shared fixtures for the rtemu test suite.

Keep this file small and general: fixtures here are used by several test modules.

* ``demo_instrument``      the shipped (invented) demo-sounder, loaded once.
* ``us1976_temperature``   T(p) of the U.S. Standard Atmosphere 1976, taken from the
                           external ``fluids`` library (not from rtemu).
* ``small_profiles``       builder of small, realistic input Datasets (CF names, canonical
                           units) for operator tests.
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
import xarray as xr

from rtemu.instrument import load_instrument


@pytest.fixture(scope="session")
def demo_instrument():
    return load_instrument("demo-sounder")


@functools.lru_cache(maxsize=None)
def _us1976_temperature_at(pressure_pa: float) -> float:
    # External reference: fluids.atmosphere.ATMOSPHERE_1976 (U.S. Standard Atmosphere 1976,
    # NOAA/NASA/USAF 1976). It is parametrised by height, so invert P(z) by bisection.
    from fluids.atmosphere import ATMOSPHERE_1976

    lo, hi = -1000.0, 86000.0  # [m]; P decreases with height
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        if ATMOSPHERE_1976(mid).P > pressure_pa:
            lo = mid
        else:
            hi = mid
    return float(ATMOSPHERE_1976(0.5 * (lo + hi)).T)


def us1976_temperature_profile(pressure_hpa) -> np.ndarray:
    """U.S. Standard Atmosphere 1976 temperature [K] at ``pressure_hpa`` [hPa] (via fluids)."""
    p = np.asarray(pressure_hpa, dtype=float)
    return np.array([_us1976_temperature_at(round(float(x) * 100.0, 9)) for x in p.ravel()]).reshape(p.shape)


@pytest.fixture(scope="session")
def us1976_temperature():
    """Callable: pressure [hPa] (array) -> U.S. Standard Atmosphere 1976 temperature [K]."""
    return us1976_temperature_profile


def demo_pressure_grid(nlev: int = 30, surface_hpa: float = 1013.25, top_hpa: float = 0.5) -> np.ndarray:
    """Surface-first grid [hPa]: ln p spaced as s**1.5, so finer near the surface."""
    s = np.linspace(0.0, 1.0, nlev)
    p = surface_hpa * (top_hpa / surface_hpa) ** (s**1.5)
    p[0], p[-1] = surface_hpa, top_hpa
    return p


@pytest.fixture(scope="session")
def small_profiles(demo_instrument, us1976_temperature):
    """Builder of a small realistic input Dataset (surface-first, canonical units).

    ``small_profiles(n=3, nlev=30, seed=0, per_profile_pressure=False,
    emissivity_per_channel=True, instrument=None)``

    Temperatures are the US-1976 profile plus smooth random perturbations of a few K;
    humidity decays as (p/ps)^3 from a random surface value (2-15 g/kg) with a 3 ppmv-like
    floor, capped at 95 % relative humidity over water (so no profile is flagged
    supersaturated); zenith angles 0-60 degree; emissivities 0.6-0.98. With
    ``per_profile_pressure`` every profile gets its own grid (surface pressure 850-1030
    hPa, top 0.3-2 hPa) and ``air_pressure`` has dims (profile, level).
    """

    def build(
        n: int = 3,
        nlev: int = 30,
        seed: int = 0,
        *,
        per_profile_pressure: bool = False,
        emissivity_per_channel: bool = True,
        instrument=None,
    ) -> xr.Dataset:
        inst = demo_instrument if instrument is None else load_instrument(instrument)
        rng = np.random.default_rng(seed)
        if per_profile_pressure:
            p = np.stack(
                [
                    demo_pressure_grid(nlev, rng.uniform(850.0, 1030.0), rng.uniform(0.3, 2.0))
                    for _ in range(n)
                ]
            )
        else:
            p = np.broadcast_to(demo_pressure_grid(nlev), (n, nlev))
        t_ref = us1976_temperature(p)
        x = np.log(p)
        # smooth perturbation: a few random Gaussian bumps in ln p
        bumps = np.zeros((n, nlev))
        for _ in range(3):
            centre = rng.uniform(np.log(1.0), np.log(1000.0), (n, 1))
            bumps += rng.normal(0.0, 3.0, (n, 1)) * np.exp(-0.5 * ((x - centre) / 0.7) ** 2)
        t = t_ref + bumps + rng.normal(0.0, 0.3, (n, nlev))
        q_sfc = rng.uniform(2e-3, 1.5e-2, (n, 1))
        q = np.maximum(q_sfc * (p / p[:, :1]) ** 3, 3e-6) * rng.uniform(0.8, 1.2, (n, nlev))
        # Keep columns subsaturated (RH <= 95 % over water; Bolton 1980, eq. 10), as clear-sky
        # columns are: operators flag supersaturated input (rtemu.flags.SUPERSATURATED).
        es = 6.112 * np.exp(17.67 * (t - 273.15) / (t - 29.65))
        with np.errstate(divide="ignore"):
            q_sat = np.where(es < p, 0.622 * es / np.maximum(p - 0.378 * es, 1e-12), np.inf)
        q = np.minimum(q, 0.95 * q_sat)
        ts = t[:, 0] + rng.normal(0.0, 2.0, n)
        zen = rng.uniform(0.0, 60.0, n)
        nchan = len(inst.channels)
        ds = xr.Dataset(
            {
                "air_pressure": (("profile", "level") if per_profile_pressure else ("level",),
                                 p.copy() if per_profile_pressure else p[0].copy(), {"units": "hPa"}),
                "air_temperature": (("profile", "level"), t, {"units": "K"}),
                "specific_humidity": (("profile", "level"), q, {"units": "kg kg-1"}),
                "surface_temperature": (("profile",), ts, {"units": "K"}),
                "sensor_zenith_angle": (("profile",), zen, {"units": "degree"}),
            },
            coords={"profile": np.arange(n), "channel": list(inst.channel_ids)},
        )
        if emissivity_per_channel:
            em = rng.uniform(0.6, 0.98, (n, nchan))
            ds["surface_emissivity"] = (("profile", "channel"), em, {"units": "1"})
        else:
            ds["surface_emissivity"] = (("profile",), rng.uniform(0.6, 0.98, n), {"units": "1"})
            ds = ds.drop_vars("channel")
        return ds

    return build


# -- a small trained emulator bundle, shared by the operator, example and CLI tests --------
TINY_RECIPE = """
name = "tiny-test"
description = "Small and fast, for tests: accuracy is not the point here."
[training]
seed = 0
validation_fraction = 0.2
max_profiles = 1500
[features]
temperature_components = 8
humidity_components = 8
[absorbers]
profiles = 200
validation_profiles = 100
max_absorbers = 1
target_rmse_k = 0.1
starts = 2
start_evaluations = 8
evaluations = 20
[network]
hidden_layers = [8]
alpha = 1e-4
max_iter = 60
check_every = 60
patience = 1
[uncertainty]
coverage = 0.95
# a model this small is not accurate to half the noise: the flag would fire everywhere
flag_noise_fraction = 20.0
[envelope]
bounds_margin = 0.02
novelty_margin = 1.0
[channels."mw-t3"]
hidden_layers = [6]
"""


@pytest.fixture(scope="session")
def tiny_bundle(tmp_path_factory, demo_instrument):
    """Path of a small emulator bundle for every demo-sounder channel (trained once)."""
    from rtemu.export import train_to_onnx
    from rtemu.sampling import sample_to_netcdf

    d = tmp_path_factory.mktemp("tiny-bundle")
    (d / "tiny.toml").write_text(TINY_RECIPE)
    sample_to_netcdf(demo_instrument, d / "train.nc", count=1500, seed=0, progress=False)
    train_to_onnx(d / "train.nc", d / "tiny.toml", d / "tiny.onnx", workers=1, progress=False)
    return d / "tiny.onnx"
