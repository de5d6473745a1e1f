"""Small INVENTED test instruments for the per-band laws, absorption tables and sidebands.

Not any real sensor: made-up positions, coefficients and tables, sized so that the
optical depths span the atmosphere (surface to stratosphere) on the test profiles.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from rtemu.instrument import AbsorptionTables, load_instrument

HEAD = '''name = "{name}"
description = "INVENTED test instrument ({kind}): not any real sensor"
{tables}
[reference]
pressure_hpa = 1013.25
temperature_k = 273.15

[absorbers.dry]
pressure_exponent = 1.0
temperature_exponent = 0.8

[absorbers.h2o]
pressure_exponent = 1.0
temperature_exponent = 1.5

[absorbers.continuum]
temperature_exponent = 3.0
'''

LAW_CHANNELS = '''
[[channels]]
id = "mw-lo"
frequency_ghz = 54.0
noise_k = 0.2
bands = [
  { weight = 0.3, dry = 2e-4, dry_pressure_exponent = 1.2, dry_temperature_exponent = 1.1 },
  { weight = 0.4, dry = 1e-3, dry_pressure_exponent = 0.6, dry_temperature_exponent = -0.5 },
  { weight = 0.3, dry = 5e-3, dry_pressure_exponent = 0.3 },
]

[[channels]]
id = "ir-co2"
wavenumber_cm1 = 700.0
noise_k = 0.2
bands = [
  { weight = 0.5, dry = 3e-4, h2o = 0.02, continuum = 0.2, dry_pressure_exponent = 0.8, h2o_pressure_exponent = 1.3, h2o_temperature_exponent = 2.0, continuum_temperature_exponent = 4.0 },
  { weight = 0.5, dry = 3e-3, h2o = 0.01, dry_temperature_exponent = 1.4 },
]

[[channels]]
id = "ir-h2o"
wavenumber_cm1 = 1500.0
noise_k = 0.3
bands = [
  { weight = 0.6, h2o = 0.3, h2o_pressure_exponent = 0.7, h2o_temperature_exponent = 0.5 },
  { weight = 0.4, h2o = 3.0, continuum = 0.5, h2o_pressure_exponent = 0.4, continuum_temperature_exponent = 2.0 },
]
'''

TABLE_CHANNELS = '''
[[channels]]
id = "mw-lo"
frequency_ghz = 54.0
noise_k = 0.2
bands = [ { weight = 0.5, table = 0 }, { weight = 0.5, table = 1 } ]

[[channels]]
id = "ir-co2"
wavenumber_cm1 = 700.0
noise_k = 0.2
bands = [ { weight = 0.25, table = 2 }, { weight = 0.75, table = 3 } ]

[[channels]]
id = "ir-h2o"
wavenumber_cm1 = 1500.0
noise_k = 0.3
bands = [ { weight = 0.7, table = 4 }, { weight = 0.3, table = 5 } ]
'''

# Sidebands (band positions of their own) over all three kinds of absorption in one channel.
SIDEBAND_CHANNELS = '''
[[channels]]
id = "mw-dsb"
frequency_ghz = 118.0
noise_k = 0.4
bands = [
  { weight = 0.25, dry = 4e-4, frequency_ghz = 116.5 },
  { weight = 0.25, dry = 6e-4, dry_pressure_exponent = 0.7, frequency_ghz = 116.5 },
  { weight = 0.25, table = 0, frequency_ghz = 119.5 },
  { weight = 0.25, table = 1, frequency_ghz = 119.5 },
]

[[channels]]
id = "mw-wv"
frequency_ghz = 183.0
noise_k = 0.5
bands = [
  { weight = 0.5, h2o = 0.05, continuum = 0.3, frequency_ghz = 180.0 },
  { weight = 0.5, table = 5, frequency_ghz = 186.0 },
]

[[channels]]
id = "ir-co2"
wavenumber_cm1 = 700.0
noise_k = 0.2
bands = [
  { weight = 0.5, table = 2, wavenumber_cm1 = 695.0 },
  { weight = 0.5, dry = 3e-3, h2o = 0.01, h2o_temperature_exponent = 0.4, wavenumber_cm1 = 705.0 },
]
'''


def smooth_tables(count: int = 6, seed: int = 0, *, n_pressure: int = 25, n_temperature: int = 9) -> AbsorptionTables:
    """INVENTED tables: ln k = A(ln p) + B(ln p) (T - 250 K), curved in ln p, linear in T.

    Linear in T at every pressure node, so the bilinear interpolation has a continuous
    T-derivative (no kinks at the temperature nodes): Taylor tests stay second order.
    Table i uses absorber mask row ``MASKS[i % 6]``.
    """
    rng = np.random.default_rng(seed)
    p = np.geomspace(0.005, 1100.0, n_pressure)
    t = np.linspace(150.0, 350.0, n_temperature)
    x = np.log(p / 1013.25)[:, None]
    reference = np.log([3e-4, 0.03, 0.3])  # dry, h2o, continuum at the reference state [m2 kg-1]
    masks = np.array([[1, 0, 0], [1, 0, 0], [1, 1, 1], [1, 1, 0], [0, 1, 0], [0, 1, 1]], dtype=bool)
    ln_k = np.zeros((count, 3, p.size, t.size))
    for i in range(count):
        for a in range(3):
            scale = reference[a] + rng.uniform(-1.5, 1.5)
            slope_p = rng.uniform(0.3, 1.3) if a < 2 else 0.0
            curve = rng.uniform(-0.4, 0.4)
            slope_t = rng.uniform(-0.008, 0.002)
            a_of_p = scale + slope_p * x + curve * np.sin(0.7 * x)
            b_of_p = slope_t * (1.0 + 0.2 * np.cos(0.5 * x))
            ln_k[i, a] = a_of_p + b_of_p * (t[None, :] - 250.0)
    mask = masks[np.arange(count) % len(masks)]
    return AbsorptionTables(pressure_hpa=p, temperature_k=t, ln_k=ln_k, mask=mask)


def write_instrument(folder, name: str, channels: str, tables: AbsorptionTables | None = None,
                     kind: str = "test"):
    """Write ``name``.toml (and its table file) into ``folder``; return the loaded instrument."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    line = ""
    if tables is not None:
        tables.to_netcdf(folder / f"{name}.nc", title=f"INVENTED absorption tables for {name}",
                         comment="made-up numbers for tests")
        line = f'absorption_tables = "{name}.nc"\n'
    path = folder / f"{name}.toml"
    path.write_text(HEAD.format(name=name, kind=kind, tables=line) + channels, encoding="utf-8")
    return load_instrument(path)


def law_instrument(folder):
    return write_instrument(folder, "law-test", LAW_CHANNELS, kind="per-band power laws")


def table_instrument(folder):
    return write_instrument(folder, "table-test", TABLE_CHANNELS, smooth_tables(), kind="absorption tables")


def sideband_instrument(folder):
    return write_instrument(folder, "sideband-test", SIDEBAND_CHANNELS, smooth_tables(),
                            kind="sidebands over default laws, per-band laws and tables")
