"""Write the shipped example profile file (INVENTED scenario).

Scenario (invented for demonstration): a late-autumn pass of the invented `demo-sounder`
over the invented archipelago of Kerrow, from a cold, dry polar air mass in the north to
a moist subtropical one in the south. The profiles are drawn with rtemu's own state
generator on the demo level grid, keeping the first 24 columns of its sea-level ocean
regimes (polar and mid-latitude winter, subtropical subsidence, moist tropics); nothing
here is observed data. The grid reaches 1100 hPa and the file carries the drawn ground,
``surface_air_pressure`` (990-1060 hPa for these regimes): every bundle (format 7) and the
physics use the column above it. Without it the ground would be the grid's bottom, 1100 hPa,
outside the pressures an emulator is trained on, and an emulator flags every column.
``total_column_water_vapour`` is the generator's, above the drawn ground.

Usage:  python examples/make_example_profiles.py [OUTPUT]   (default examples/data/example_profiles.nc)
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

from rtemu import load_instrument
from rtemu._io import to_netcdf_atomic
from rtemu.sampling import draw_states

HERE = Path(__file__).resolve().parent
DEFAULT_OUTPUT = HERE / "data" / "example_profiles.nc"
COUNT = 24
SEED = 20261201
#: The regimes a late-autumn ocean pass from polar to subtropical air crosses.
REGIMES = ("polar_winter", "midlatitude_winter", "subtropical_subsidence", "tropical_moist")
DRAWN = 256


def make_profiles():
    states = draw_states(DRAWN, seed=SEED, channels=load_instrument("demo-sounder"))
    names = states["climate_regime"].attrs["flag_meanings"].split()
    wanted = [names.index(r) for r in REGIMES]
    chosen = np.flatnonzero(np.isin(states["climate_regime"].values, wanted))[:COUNT]
    states = states.isel(profile=chosen)
    # Order the pass from the driest (north) to the moistest (south) column.
    order = np.argsort(states["total_column_water_vapour"].values)
    keep = ["air_pressure", "air_temperature", "specific_humidity", "surface_temperature",
            "surface_emissivity", "sensor_zenith_angle", "surface_air_pressure", "total_column_water_vapour"]
    ds = states[keep].isel(profile=order)
    ds = ds.assign_coords(profile=np.arange(COUNT))
    ds.attrs = {
        "title": "rtemu example profiles (INVENTED scenario: a pass over the invented Kerrow archipelago)",
        "comment": "Drawn with rtemu.sampling.draw_states; not observed data.",
        "source": f"examples/make_example_profiles.py, seed {SEED}",
    }
    return ds


def main(argv=None):
    parser = argparse.ArgumentParser(description="Write the example profile file (INVENTED scenario).")
    parser.add_argument("output", nargs="?", type=Path, default=DEFAULT_OUTPUT,
                        help=f"netCDF file to write (default {DEFAULT_OUTPUT.relative_to(HERE.parent)})")
    output = parser.parse_args(argv).output
    to_netcdf_atomic(make_profiles(), output)
    print(f"wrote {output}")


if __name__ == "__main__":
    main()
