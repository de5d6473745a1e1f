"""Speed of the physical reference model: profiles per second with and without Jacobians.

Run from the repository root:

    python benchmarks/physics_speed.py [--profiles 10000] [--repeat 3] [--cprofile]

Uses ``rtemu.physics.simulate`` on the (invented) demo-sounder, the 60-level demo grid
(``rtemu.atmosphere.default_pressure_grid``, 1013.25 to 0.5 hPa) and synthetic but
realistic profiles. Prints the timings and the Jacobian/forward cost ratio
(target <= 3x). Not a test: figures depend on the machine.
"""

from __future__ import annotations

import argparse
import cProfile
import os
import platform
import pstats
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402

from rtemu import physics  # noqa: E402
from rtemu.instrument import load_instrument  # noqa: E402

TARGET_RATIO = 3.0


def pressure_grid() -> np.ndarray:
    try:
        from rtemu.atmosphere import default_pressure_grid
    except ImportError:  # fallback grid: 60 levels, log-spaced, 1013.25 to 0.5 hPa
        return np.geomspace(1013.25, 0.5, 60)
    return default_pressure_grid()


def synthetic_profiles(n: int, p: np.ndarray, nchan: int, seed: int = 0) -> xr.Dataset:
    """Mid-latitude-like temperatures with noise, humidity ~ (p/ps)^3 [K], [kg kg-1]."""
    rng = np.random.default_rng(seed)
    lnp = np.log(p)
    # rough standard-atmosphere shape (common practice): lapse to the tropopause, then warming
    t_mean = np.interp(-lnp, -np.log([1013.25, 226.0, 55.0, 9.0, 1.0, 0.5]),
                       [288.0, 217.0, 217.0, 229.0, 270.0, 265.0])
    t = t_mean + rng.normal(0.0, 4.0, (n, 1)) + rng.normal(0.0, 1.0, (n, p.size))
    q = np.maximum(rng.uniform(2e-3, 1.5e-2, (n, 1)) * (p / p[0]) ** 3, 3e-6)
    return xr.Dataset(
        {
            "air_pressure": (("level",), p, {"units": "hPa"}),
            "air_temperature": (("profile", "level"), t, {"units": "K"}),
            "specific_humidity": (("profile", "level"), q, {"units": "kg kg-1"}),
            "surface_temperature": (("profile",), t[:, 0] + rng.normal(0, 2, n), {"units": "K"}),
            "surface_emissivity": (("profile", "channel"), rng.uniform(0.6, 0.98, (n, nchan)), {"units": "1"}),
            "sensor_zenith_angle": (("profile",), rng.uniform(0, 60, n), {"units": "degree"}),
        }
    )


def best_times(funcs, repeat: int) -> list[float]:
    """Best wall time of each function; runs interleaved so load drifts hit all alike."""
    best = [float("inf")] * len(funcs)
    for _ in range(repeat):
        for i, func in enumerate(funcs):
            start = time.perf_counter()
            func()
            best[i] = min(best[i], time.perf_counter() - start)
    return best


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--profiles", type=int, default=10_000)
    parser.add_argument("--repeat", type=int, default=3, help="best of N interleaved runs")
    parser.add_argument("--cprofile", action="store_true", help="print a cProfile of the Jacobian run")
    args = parser.parse_args(argv)

    inst = load_instrument("demo-sounder")
    p = pressure_grid()
    ds = synthetic_profiles(args.profiles, p, len(inst.channels))
    n_bands = sum(len(ch.bands) for ch in inst.channels)
    print(f"rtemu.physics.simulate on {inst.name}: {len(inst.channels)} channels, {n_bands} sub-bands, "
          f"{p.size} levels ({p[0]:g} to {p[-1]:g} hPa), {args.profiles} profiles, "
          f"block_size {physics.DEFAULT_BLOCK_SIZE}")
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
          f"numpy {np.__version__}, Python {platform.python_version()}; best of {args.repeat}, "
          f"load average {os.getloadavg()[0]:.1f} at start")

    physics.simulate(inst, ds.isel(profile=slice(0, 50)), jacobian=True)  # warm-up
    t_forward, t_jacobian = best_times(
        [lambda: physics.simulate(inst, ds), lambda: physics.simulate(inst, ds, jacobian=True)], args.repeat
    )
    ratio = t_jacobian / t_forward
    print(f"forward only     : {t_forward:7.3f} s  {args.profiles / t_forward:9.0f} profiles/s")
    print(f"with Jacobians   : {t_jacobian:7.3f} s  {args.profiles / t_jacobian:9.0f} profiles/s")
    verdict = "meets" if ratio <= TARGET_RATIO else "MISSES"
    print(f"Jacobian/forward : {ratio:7.2f} x  ({verdict} the target <= {TARGET_RATIO:g} x)")

    if args.cprofile:
        profiler = cProfile.Profile()
        profiler.enable()
        physics.simulate(inst, ds, jacobian=True)
        profiler.disable()
        pstats.Stats(profiler).sort_stats("tottime").print_stats(15)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
