"""Cost of terrain (``surface_air_pressure``) and of model levels (``grid_hpa=``) in the physics.

Run from the repository root:

    python benchmarks/terrain_regrid_cost.py [--profiles 2000] [--repeat 3]

Times ``rtemu.physics.simulate`` with Jacobians on the demo-sounder and the 60-level demo
grid: (a) as is, (b) with a ground drawn in 500-1013 hPa, and (c) ``PhysicalOperator(grid_hpa=
grid)`` on the same profiles carried onto invented per-profile hybrid levels (91 levels),
with Jacobians back on those levels. Prints the best of ``repeat`` timings and the ratios
to (a), measured side by side in one run. Not a test: figures depend on the machine.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import numpy as np  # noqa: E402

from benchmarks.physics_speed import pressure_grid, synthetic_profiles  # noqa: E402
from rtemu import physics  # noqa: E402
from rtemu.instrument import load_instrument  # noqa: E402
from rtemu.levels import LevelMap  # noqa: E402
from rtemu.runtime import PhysicalOperator  # noqa: E402


def hybrid_profiles(ds, seed: int = 1, nlev: int = 91):
    """``ds`` on invented hybrid levels p = a + b ps, ps in 500-1013 hPa."""
    rng = np.random.default_rng(seed)
    n = ds.sizes["profile"]
    ps = rng.uniform(500.0, 1013.0, n)
    eta = np.linspace(0.0, 1.0, nlev) ** 1.3
    p = (1000.0 * eta * (1 - eta) ** 2 + 0.6 * eta**4)[None, :] + ((1 - eta) ** 3)[None, :] * ps[:, None]
    grid = ds["air_pressure"].values
    m = LevelMap(grid, p)
    return ds.drop_vars(["air_pressure", "air_temperature", "specific_humidity"]).assign(
        air_pressure=(("profile", "level"), p, {"units": "hPa"}),
        air_temperature=(("profile", "level"), m.apply(ds["air_temperature"].values)),
        specific_humidity=(("profile", "level"), m.apply(ds["specific_humidity"].values)))


def best(function, repeat):
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        function()
        times.append(time.perf_counter() - start)
    return min(times)


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--profiles", type=int, default=2000)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    inst = load_instrument("demo-sounder")
    grid = pressure_grid()
    ds = synthetic_profiles(args.profiles, grid, len(inst.channels))
    ps = np.random.default_rng(2).uniform(500.0, grid[0], args.profiles)
    ground = ds.assign(surface_air_pressure=("profile", ps))
    model = hybrid_profiles(ds)
    op = PhysicalOperator(inst, grid_hpa=grid)
    cases = {
        "(a) demo grid, no ground": lambda: physics.simulate(inst, ds, jacobian=True),
        "(b) demo grid, ground 500-1013 hPa": lambda: physics.simulate(inst, ground, jacobian=True),
        "(c) 91 hybrid levels -> demo grid": lambda: op.simulate(model, jacobian=True),
    }
    base = None
    print(f"{args.profiles} profiles, Jacobians, best of {args.repeat}")
    for name, function in cases.items():
        seconds = best(function, args.repeat)
        base = base or seconds
        print(f"  {name:38s} {seconds:7.3f} s  {1e3 * seconds / args.profiles:6.3f} ms/profile  "
              f"x{seconds / base:.2f}")


if __name__ == "__main__":
    main()
