"""The state generator measured against climatological facts, per regime and overall.

Run from the repository root:

    python benchmarks/generator_climatology.py [--count 20000] [--seed 2026]

Draws states with ``rtemu.sampling.draw_states`` on the default grid and prints one
markdown table (the one in docs/generator.md): share of the draws, 850-500 hPa lapse rate,
lapse-rate tropopause (``rtemu.atmosphere.lapse_rate_tropopause``) pressure and
temperature, column water percentiles, 500 hPa relative humidity, stratopause pressure,
surface inversion, skin minus surface air temperature, surface pressure, and for tropical
columns the share within 3 K of the surface air's pseudo-adiabat at 500 hPa. Every
diagnostic is computed from the profiles themselves (the air at the surface pressure is
interpolated linearly in ln p), not from the generator's drawn parameters.
``tests/test_sampling.py`` runs :func:`diagnostics` on 2,000 draws.
"""

from __future__ import annotations

import argparse
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import numpy as np  # noqa: E402

from rtemu import atmosphere as atm  # noqa: E402
from rtemu import sampling  # noqa: E402
from rtemu.constants import DRY_AIR_GAS_CONSTANT, STANDARD_GRAVITY  # noqa: E402

_HEIGHT_PER_LN_P = DRY_AIR_GAS_CONSTANT / STANDARD_GRAVITY  # [m K-1]: dz = (R_d T / g) d ln p


def _at(p, values, target):
    """values (N, L) at one pressure [hPa] (linear in ln p)."""
    return atm.value_at_pressure(p, values, np.full(values.shape[0], float(target)))


def diagnostics(states) -> dict:
    """Per-profile diagnostics of drawn states (default grid, surface first).

    Returns
    -------
    dict of numpy.ndarray, each (N,)
        ``regime`` (index into ``sampling.envelope_description()["regimes"]`` order),
        ``lapse_850_500`` [K km-1] (hydrostatic, mean T of the layer; NaN where the ground
        is above 850 hPa), ``tropopause_pressure`` [hPa] and ``tropopause_temperature``
        [K] of the lapse-rate tropopause (NaN if none between 500 and 40 hPa), ``tcwv``
        [kg m-2], ``rh500`` [1], ``stratopause_pressure`` [hPa] (warmest level between 50
        and 0.5 hPa), ``surface_inversion`` [K] (warmest air within 250 hPa above the
        ground minus the surface air), ``skin_minus_air`` [K], ``surface_pressure`` [hPa],
        ``moist_adiabat_departure_500`` [K] (T500 minus the surface air's parcel at
        500 hPa; NaN where the ground is above 700 hPa).
    """
    p = states["air_pressure"].values
    if p[0] < p[-1]:
        raise ValueError("diagnostics expects a surface-first grid")
    t = states["air_temperature"].transpose("profile", "level").values
    q = states["specific_humidity"].transpose("profile", "level").values
    ps = states["surface_air_pressure"].values
    n = t.shape[0]
    t_surface = atm.value_at_pressure(p, t, ps)
    q_surface = atm.value_at_pressure(p, q, ps)

    t850, t500 = _at(p, t, 850.0), _at(p, t, 500.0)
    thickness = 0.5 * (t850 + t500) * _HEIGHT_PER_LN_P * np.log(850.0 / 500.0)
    lapse = np.where(ps > 850.0, (t850 - t500) / thickness * 1e3, np.nan)

    position, t_trop = atm.lapse_rate_tropopause(t, p)
    bases = atm.tropopause_search_layers(p)["base"]
    found = position < bases.size
    p_trop = np.where(found, p[bases[np.minimum(position, bases.size - 1)]], np.nan)

    rh500 = atm.relative_humidity(_at(p, q, 500.0), t500, 500.0)
    upper = (p <= 50.0) & (p >= 0.5)
    stratopause = p[upper][np.argmax(t[:, upper], axis=1)]

    above = (p[None, :] < ps[:, None]) & (p[None, :] >= ps[:, None] - 250.0)
    inversion = np.max(np.where(above, t, -np.inf), axis=1) - t_surface

    parcel = atm.parcel_temperature(t_surface, np.maximum(q_surface, 1e-7), ps, np.array([500.0]))[:, 0]
    departure = np.where(ps > 700.0, t500 - parcel, np.nan)
    return {
        "regime": states["climate_regime"].values.astype(int),
        "lapse_850_500": lapse,
        "tropopause_pressure": p_trop,
        "tropopause_temperature": t_trop,
        "tcwv": states["total_column_water_vapour"].values,
        "rh500": rh500,
        "stratopause_pressure": stratopause,
        "surface_inversion": np.maximum(inversion, 0.0),
        "skin_minus_air": states["surface_temperature"].values - t_surface,
        "surface_pressure": ps,
        "moist_adiabat_departure_500": departure,
        "count": np.full(n, 1),
    }


def _pct(x, qs):
    x = x[np.isfinite(x)]
    return np.percentile(x, qs) if x.size else np.full(len(qs), np.nan)


def table(d: dict) -> str:
    """Markdown table of the diagnostics per regime and overall."""
    names = list(sampling.envelope_description()["regimes"])
    weights = [sampling.envelope_description()["regimes"][r]["weight"] for r in names]
    header = ("| regime | weight | share | lapse 850-500 hPa [K/km] p5/50/95 | tropopause [hPa] p5/50/95 "
              "| tropopause T [K] p5/50/95 | TCWV [kg m-2] p5/25/50/75/95 | RH 500 hPa median "
              "| stratopause [hPa] p5/50/95 | surface inversion [K] p50/95/max | skin - air [K] min/p50/max "
              "| surface pressure [hPa] min/max | within 3 K of the pseudo-adiabat at 500 hPa |")
    lines = [header, "|" + "---|" * 13]
    rows = [(name, weights[i], d["regime"] == i) for i, name in enumerate(names)]
    rows.append(("all", 1.0, np.ones(d["regime"].size, dtype=bool)))

    def f(values, fmt="{:.1f}"):
        return "/".join(fmt.format(v) for v in values)

    for name, weight, s in rows:
        dep = d["moist_adiabat_departure_500"][s]
        dep = dep[np.isfinite(dep)]
        within = f"{100 * np.mean(np.abs(dep) <= 3.0):.0f} %" if name == "tropical_moist" else ""
        inv = d["surface_inversion"][s]
        skin = d["skin_minus_air"][s]
        lines.append(
            f"| {name} | {weight:.2f} | {s.mean():.3f} | {f(_pct(d['lapse_850_500'][s], [5, 50, 95]))} "
            f"| {f(_pct(d['tropopause_pressure'][s], [5, 50, 95]), '{:.0f}')} "
            f"| {f(_pct(d['tropopause_temperature'][s], [5, 50, 95]))} "
            f"| {f(_pct(d['tcwv'][s], [5, 25, 50, 75, 95]))} | {np.median(d['rh500'][s]):.2f} "
            f"| {f(_pct(d['stratopause_pressure'][s], [5, 50, 95]), '{:.2g}')} "
            f"| {np.median(inv):.1f}/{np.percentile(inv, 95):.1f}/{inv.max():.1f} "
            f"| {skin.min():.1f}/{np.median(skin):.1f}/{skin.max():.1f} "
            f"| {d['surface_pressure'][s].min():.0f}/{d['surface_pressure'][s].max():.0f} | {within} |")
    return "\n".join(lines)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--count", type=int, default=20000)
    parser.add_argument("--seed", type=int, default=2026)
    args = parser.parse_args(argv)
    states = sampling.draw_states(args.count, seed=args.seed, channels=[True, False])
    d = diagnostics(states)
    print(f"generator version {sampling.GENERATOR_VERSION}, {args.count} draws, seed {args.seed}, "
          f"default grid ({states.sizes['level']} levels)\n")
    print(table(d))
    none = np.isnan(d["tropopause_pressure"]).mean()
    print(f"\nno lapse-rate tropopause between 500 and 40 hPa: {100 * none:.2f} % of the draws")


if __name__ == "__main__":
    main()
