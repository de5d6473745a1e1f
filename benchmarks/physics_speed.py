"""Speed of the physical reference model: profiles per second with and without Jacobians.

Run from the repository root:

    python benchmarks/physics_speed.py [--profiles 10000] [--repeat 3] [--cprofile]
        [--kind-profiles 100] [--memory-profiles 10000]

Uses ``rtemu.physics.simulate`` on the (invented) demo-sounder, the 60-level demo grid
(``rtemu.atmosphere.default_pressure_grid``, 1013.25 to 0.5 hPa) and synthetic but
realistic profiles. Prints the timings and the Jacobian/forward cost ratio
(target <= 3x). Not a test: figures depend on the machine.

Then, on an INVENTED 16-channel x 64-sub-band instrument and 100 levels, the cost per
sub-band-layer [ns] of each kind of sub-band absorption side by side (instrument default
laws, per-band power laws, (ln p, T) tables of 48 pressures x 25 temperatures), and the
peak resident memory of one ``simulate`` call with Jacobians over ``--memory-profiles``
profiles with the table kind, measured in a fresh process (target < 2 GB).
"""

from __future__ import annotations

import argparse
import cProfile
import os
import platform
import pstats
import resource
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402

from rtemu import physics  # noqa: E402
from rtemu.instrument import AbsorberLaw, AbsorptionTables, Band, Channel, Instrument, load_instrument  # noqa: E402

TARGET_RATIO = 3.0
TARGET_PEAK_GB = 2.0
KINDS = ("default laws", "per-band laws", "tables")


def large_instrument(kind: str, n_channels: int = 16, n_bands: int = 64, seed: int = 0) -> Instrument:
    """An INVENTED instrument of ``n_channels`` x ``n_bands`` sub-bands of one kind.

    The same coefficients in all three kinds; the per-band laws and the tables (48 x 25,
    0.005-1100 hPa, 150-350 K) hold the same (random) pressure and temperature exponents.
    """
    rng = np.random.default_rng(seed)
    shape = (n_channels, n_bands)
    k = np.stack([10 ** rng.uniform(-5, -1, shape),
                  np.where(np.arange(n_channels)[:, None] % 2, 10 ** rng.uniform(-3, 1, shape), 0.0),
                  np.where(np.arange(n_channels)[:, None] % 4 == 1, 10 ** rng.uniform(-1, 0, shape), 0.0)], axis=-1)
    n = rng.uniform(0.3, 1.3, shape + (2,))
    m = rng.uniform(-1.0, 3.0, shape + (3,))
    p_grid = np.geomspace(0.005, 1100.0, 48)
    t_grid = np.linspace(150.0, 350.0, 25)
    channels, ln_k, mask = [], [], []
    for c in range(n_channels):
        bands = []
        for b in range(n_bands):
            coefficients = dict(dry=k[c, b, 0], h2o=k[c, b, 1], continuum=k[c, b, 2])
            if kind == "per-band laws":
                coefficients.update(dry_pressure_exponent=n[c, b, 0], dry_temperature_exponent=m[c, b, 0],
                                    h2o_pressure_exponent=n[c, b, 1], h2o_temperature_exponent=m[c, b, 1],
                                    continuum_temperature_exponent=m[c, b, 2])
            if kind == "tables":
                exponents_p = np.array([n[c, b, 0], n[c, b, 1], 0.0])[:, None, None]
                x = np.log(p_grid / 1013.25)[None, :, None]
                y = np.log(273.15 / t_grid)[None, None, :]
                with np.errstate(divide="ignore"):
                    ln_k.append(np.log(k[c, b])[:, None, None] + exponents_p * x + m[c, b][:, None, None] * y)
                mask.append(k[c, b] > 0)
                coefficients = dict(table=len(ln_k) - 1)
            bands.append(Band(weight=1.0 / n_bands, **coefficients))
        microwave = c < n_channels // 2
        position = dict(frequency_ghz=50.0 + 2 * c, wavenumber_cm1=None) if microwave else \
            dict(frequency_ghz=None, wavenumber_cm1=650.0 + 60 * c)
        channels.append(Channel(id=f"x{c:02d}", noise_k=0.2, bands=tuple(bands), **position))
    tables = None
    if kind == "tables":
        ln_k = np.where(np.array(mask)[:, :, None, None], np.array(ln_k), 0.0)
        tables = AbsorptionTables(pressure_hpa=p_grid, temperature_k=t_grid, ln_k=ln_k, mask=np.array(mask))
    return Instrument(name=f"bench-{kind.replace(' ', '-')}", description="INVENTED benchmark instrument",
                      channels=tuple(channels), dry=AbsorberLaw(1.0, 0.8), h2o=AbsorberLaw(1.0, 1.5),
                      continuum=AbsorberLaw(0.0, 3.0), absorption_tables=tables,
                      absorption_tables_file="bench.nc" if tables is not None else None)


def kind_costs(n_profiles: int, repeat: int) -> None:
    """ns per sub-band-layer of each kind, forward and with Jacobians, interleaved runs."""
    p = np.geomspace(1013.25, 0.5, 100)
    instruments = [large_instrument(kind) for kind in KINDS]
    n_bands = sum(len(ch.bands) for ch in instruments[0].channels)
    ds = synthetic_profiles(n_profiles, p, len(instruments[0].channels), seed=1)
    units = n_profiles * n_bands * (p.size - 1)
    block = physics._Bands(instruments[0]).block_size(physics.DEFAULT_BLOCK_SIZE, p.size - 1)
    print(f"\nper sub-band-layer on an INVENTED {len(instruments[0].channels)} x "
          f"{n_bands // len(instruments[0].channels)} sub-band instrument, {p.size} levels, {n_profiles} profiles "
          f"({block} profiles per block); ratios to the default laws:")
    for inst in instruments:
        physics.simulate(inst, ds.isel(profile=slice(0, 5)), jacobian=True)  # warm-up
    funcs = [lambda inst=inst, j=j: physics.simulate(inst, ds, jacobian=j) for inst in instruments for j in (False, True)]
    times = best_times(funcs, repeat)
    base = times[0], times[1]
    print(f"  {'kind':<15} {'forward ns':>11} {'ratio':>6} {'Jacobian ns':>12} {'ratio':>6}")
    for i, kind in enumerate(KINDS):
        fwd, jac = times[2 * i], times[2 * i + 1]
        print(f"  {kind:<15} {fwd / units * 1e9:11.1f} {fwd / base[0]:6.2f} {jac / units * 1e9:12.1f} "
              f"{jac / base[1]:6.2f}")


def peak_rss_child(n_profiles: int) -> None:
    """(Child process) one simulate with Jacobians on the table kind; prints RSS figures."""
    inst = large_instrument("tables")
    ds = synthetic_profiles(n_profiles, np.geomspace(1013.25, 0.5, 100), len(inst.channels), seed=2)
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20  # Linux: KiB -> GiB
    start = time.perf_counter()
    out = physics.simulate(inst, ds, jacobian=True)
    elapsed = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    output_gb = sum(v.nbytes for v in out.data_vars.values()) / 2**30
    print(f"{before:.3f} {peak:.3f} {output_gb:.3f} {elapsed:.1f}")


def peak_rss(n_profiles: int) -> None:
    result = subprocess.run([sys.executable, os.path.abspath(__file__), "--peak-rss-child", str(n_profiles)],
                            check=True, capture_output=True, text=True)
    before, peak, output_gb, elapsed = (float(v) for v in result.stdout.split()[-4:])
    verdict = "meets" if peak < TARGET_PEAK_GB else "MISSES"
    print(f"\npeak RSS, simulate with Jacobians, tables kind, 16 x 64 sub-bands, 100 levels, {n_profiles} profiles "
          f"(fresh process): {peak:.2f} GiB ({verdict} the target < {TARGET_PEAK_GB:g} GB); "
          f"peak {before:.2f} GiB before the call (imports, building the inputs and tables); outputs "
          f"{output_gb:.2f} GiB; "
          f"{elapsed:.0f} s")


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
    parser.add_argument("--kind-profiles", type=int, default=100,
                        help="profiles for the per-kind costs (0 skips them)")
    parser.add_argument("--memory-profiles", type=int, default=10_000,
                        help="profiles for the peak-memory run (0 skips it)")
    parser.add_argument("--peak-rss-child", type=int, default=0, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.peak_rss_child:
        peak_rss_child(args.peak_rss_child)
        return 0

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
    if args.kind_profiles:
        kind_costs(args.kind_profiles, args.repeat)
    if args.memory_profiles:
        peak_rss(args.memory_profiles)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
