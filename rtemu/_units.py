"""Unit handling at the API edge: every input is converted to canonical units.

Canonical units: K, hPa, kg kg-1, 1, degree. A missing ``units`` attribute means canonical.
A unit not listed here is an error, never a guess.
"""

from __future__ import annotations

import numpy as np

# variable -> {spelling: (scale, offset)}: canonical = value * scale + offset
_TEMPERATURE = {
    **{u: (1.0, 0.0) for u in ("K", "k", "kelvin", "Kelvin", "degK", "deg_K", "degrees_K")},
    **{u: (1.0, 273.15) for u in ("degC", "deg_C", "celsius", "Celsius", "degrees_C", "°C", "C")},
}
_PRESSURE = {
    **{u: (1.0, 0.0) for u in ("hPa", "hpa", "mbar", "mb", "millibar")},
    **{u: (0.01, 0.0) for u in ("Pa", "pa", "pascal")},
    "kPa": (10.0, 0.0),
}
_UNITS = {
    "air_pressure": _PRESSURE,
    "surface_air_pressure": _PRESSURE,
    "air_temperature": _TEMPERATURE,
    "surface_temperature": _TEMPERATURE,
    "specific_humidity": {
        **{u: (1.0, 0.0) for u in ("kg kg-1", "kg/kg", "kg kg**-1", "kg kg^-1", "1", "")},
        **{u: (1e-3, 0.0) for u in ("g kg-1", "g/kg", "g kg**-1", "g kg^-1")},
    },
    "surface_emissivity": {u: (1.0, 0.0) for u in ("1", "", "dimensionless")},
    "sensor_zenith_angle": {
        **{u: (1.0, 0.0) for u in ("degree", "degrees", "deg", "degrees_zenith")},
        **{u: (180.0 / np.pi, 0.0) for u in ("rad", "radian", "radians")},
    },
}

CANONICAL_UNITS = {
    "air_pressure": "hPa",
    "surface_air_pressure": "hPa",
    "air_temperature": "K",
    "surface_temperature": "K",
    "specific_humidity": "kg kg-1",
    "surface_emissivity": "1",
    "sensor_zenith_angle": "degree",
}


def unit_conversion(variable: str, units: str | None) -> tuple[float, float]:
    """(scale, offset) taking ``variable`` from ``units`` to canonical units.

    Raises
    ------
    ValueError
        For a unit not known for that variable.
    """
    if units is None:
        return 1.0, 0.0
    table = _UNITS[variable]
    key = str(units).strip()
    if key not in table:
        raise ValueError(
            f"{variable}: unknown units {units!r}; accepted: "
            f"{sorted(k for k in table if k)} (canonical {CANONICAL_UNITS[variable]!r})"
        )
    return table[key]
