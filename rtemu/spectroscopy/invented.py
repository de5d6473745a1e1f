"""The INVENTED line lists of the demo instrument ``demo-sounder-ck``.

Positions, intensities and widths come from the simple formulas below (and one seeded random
draw for the water-vapour band): they imitate the shape of the bands a sounder uses (an
oxygen-like band at 50-68 GHz, water-vapour-like lines at 22.4 and 183.0 GHz, a CO2-like
band at 15 um with P, Q and R branches, a water-vapour-like band at 6.3 um, a water-vapour
self continuum) but are no real molecule's lines. ``python -m rtemu.spectroscopy.build
lines FOLDER`` writes them; the shipped copies live in rtemu/instruments/.
"""

from __future__ import annotations

import numpy as np

_HEADER = """\
@format = rtemu-lines 1
@title = {title}
@unit = {unit}
@shape = {shape}
@reference_temperature_k = 300.0
@reference_pressure_hpa = 1013.25
"""

_BANNER = "# INVENTED line list for the rtemu demo instrument demo-sounder-ck: NOT real spectroscopy.\n" \
          "# Written by rtemu.spectroscopy.invented; format in rtemu/spectroscopy/lines.py.\n" \
          "# line ABSORBER POSITION INTENSITY LOWER_ENERGY_CM1 HALF_WIDTH WIDTH_EXPONENT\n" \
          "# continuum POSITION K_REF TEMPERATURE_EXPONENT\n"


def _line(absorber, position, intensity, energy, width, exponent):
    return f"line {absorber} {position:.6f} {intensity:.6e} {energy:.3f} {width:.6e} {exponent:.3f}\n"


def microwave_text() -> str:
    """The INVENTED microwave line list (GHz, Van Vleck-Weisskopf)."""
    out = [_BANNER, _HEADER.format(title="INVENTED microwave lines (oxygen-like band, water-vapour-like lines)",
                                   unit="GHz", shape="vvw")]
    out.append("@molar_mass_g_mol.dry = 32.0\n@partition_exponent.dry = 1.0\n")
    out.append("@molar_mass_g_mol.h2o = 18.015\n@partition_exponent.h2o = 1.5\n")
    # Oxygen-like band: 31 lines about 0.61 GHz apart around 59.9 GHz, a Gaussian envelope
    # of strengths, lower-state energies growing away from the centre.
    for n in range(-17, 14):
        pos = 59.9 + 0.61 * n + 0.07 * np.sin(1.7 * n)
        strength = 5.0e-3 * np.exp(-(((pos - 59.9) / 3.6) ** 2)) * (0.75 + 0.25 * np.cos(0.9 * n))
        energy = 1.5 + 0.85 * n * n
        out.append(_line("dry", pos, strength, energy, 1.05e-3, 0.8))
    out.append(_line("h2o", 22.4, 1.5e-4, 140.0, 2.8e-3, 0.65))
    out.append(_line("h2o", 183.0, 8.0, 135.0, 2.9e-3, 0.7))
    out.append(_line("h2o", 323.5, 1.2e-1, 440.0, 2.8e-3, 0.7))
    out.append(_line("h2o", 380.1, 9.0e-1, 150.0, 2.9e-3, 0.7))
    # Self continuum of water vapour: k_ref ~ nu^2.
    for nu in (10.0, 30.0, 60.0, 100.0, 150.0, 200.0, 250.0):
        out.append(f"continuum {nu:.1f} {0.05 * (nu / 31.4) ** 2:.6e} 3.0\n")
    return "".join(out)


def infrared_text() -> str:
    """The INVENTED infrared line list (cm-1, Voigt, 25 cm-1 cutoff)."""
    out = [_BANNER, _HEADER.format(title="INVENTED infrared lines (CO2-like 15 um band, water-vapour-like 6.3 um band)",
                                   unit="cm-1", shape="voigt")]
    out.append("@cutoff = 25.0\n")
    out.append("@molar_mass_g_mol.dry = 44.0\n@partition_exponent.dry = 1.0\n")
    out.append("@molar_mass_g_mol.h2o = 18.015\n@partition_exponent.h2o = 1.5\n")
    centre, spacing = 667.6, 1.47
    # CO2-like P and R branches: m = 1..60, strength ~ m exp(-(m/23)^2).
    for m in range(1, 61):
        strength = 0.012 * m * np.exp(-((m / 23.0) ** 2))
        energy = 0.37 * m * (m + 1)
        width = 7.5e-5 * (1.0 - 0.3 * m / 60.0)
        out.append(_line("dry", centre - spacing * m + 0.004 * m * m / 10.0, strength, energy, width, 0.75))
        out.append(_line("dry", centre + spacing * m - 0.003 * m * m / 10.0, 0.9 * strength, energy, width, 0.75))
    # Q branch: 24 lines crowding below the band centre.
    for j in range(24):
        strength = 0.03 * np.exp(-((j / 11.0) ** 2))
        out.append(_line("dry", centre - 0.0021 * j * (j + 1) - 0.05, strength, 0.37 * j * (j + 1), 7.0e-5, 0.75))
    # A weaker hot band offset from the main one.
    for m in range(1, 41):
        strength = 0.0025 * m * np.exp(-((m / 20.0) ** 2))
        energy = 960.0 + 0.37 * m * (m + 1)
        out.append(_line("dry", centre + 0.9 - spacing * m, strength, energy, 7.0e-5, 0.75))
        out.append(_line("dry", centre + 0.9 + spacing * m, strength, energy, 7.0e-5, 0.75))
    rng = np.random.default_rng(20261205)
    # Water-vapour-like lines in the 15 um region (rotational band tail) and a few in the window.
    for pos in np.sort(rng.uniform(640.0, 990.0, 40)):
        strength = 0.6 * np.exp(-(pos - 640.0) / 60.0) * rng.lognormal(0.0, 1.0)
        out.append(_line("h2o", pos, strength, rng.uniform(100.0, 1500.0), 1.0e-4, 0.7))
    # Water-vapour-like 6.3 um band: 160 lines around 1595 cm-1, strengths lognormal under a
    # two-lobed envelope.
    for pos in np.sort(rng.uniform(1250.0, 1950.0, 160)):
        envelope = np.exp(-(((abs(pos - 1595.0) - 90.0) / 110.0) ** 2))
        strength = 40.0 * envelope * rng.lognormal(0.0, 1.3)
        out.append(_line("h2o", pos, strength, rng.uniform(20.0, 1800.0), 1.0e-4, 0.7))
    for nu, k in ((550.0, 4.0), (650.0, 2.6), (750.0, 1.8), (900.0, 1.0), (1100.0, 0.7),
                  (1300.0, 0.6), (1600.0, 0.8), (2000.0, 0.3)):
        out.append(f"continuum {nu:.1f} {k:.6e} 4.0\n")
    return "".join(out)
