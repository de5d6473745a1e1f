"""Unit handling at the API edge: every input is converted to canonical units.

Canonical units: K, hPa, kg kg-1, 1, degree. A missing ``units`` attribute means canonical.
A unit not accepted here is an error, never a guess.

Temperatures and pressures accept any spelling of the UDUNITS-2 grammar that CF uses
(``degree_Celsius``, ``degrees_Celsius``, ``hectopascal``, ``Pa``, ``mbar``, ``kPa``, ...),
converted by the ``cf-units`` library (UDUNITS-2). Humidity, emissivity and angles are
dimensionless, where UDUNITS cannot tell a mass ratio from an angle (it would convert
``degree`` to ``kg kg-1``): those take the spellings of the tables below only.
"""

from __future__ import annotations

import functools

import numpy as np

#: Dimensional variables: converted by UDUNITS-2 to the canonical unit.
_DIMENSIONAL = {
    "air_pressure": "hPa",
    "surface_air_pressure": "hPa",
    "air_temperature": "K",
    "surface_temperature": "K",
}
_CELSIUS = (1.0, 273.15)
#: Spellings UDUNITS does not read, or reads as another unit ("C" is the coulomb, "pa" a
#: pico-year), that are unambiguous for the variable; earlier rtemu versions accepted them.
_EXTRA = {
    "air_pressure": {"hpa": (1.0, 0.0), "mb": (1.0, 0.0), "pa": (0.01, 0.0)},
    "air_temperature": {"k": (1.0, 0.0), "C": _CELSIUS, "deg_K": (1.0, 0.0), "deg_C": _CELSIUS,
                        "degrees_K": (1.0, 0.0), "degrees_C": _CELSIUS},
}
_EXTRA["surface_temperature"] = _EXTRA["air_temperature"]
_EXTRA["surface_air_pressure"] = _EXTRA["air_pressure"]

# Dimensionless variables: {spelling: (scale, offset)}, canonical = value * scale + offset
_MASS_RATIO = ("kg kg-1", "kg/kg", "kg kg**-1", "kg kg^-1", "kg.kg-1", "kg.kg**-1", "1", "")
_GRAM_RATIO = ("g kg-1", "g/kg", "g kg**-1", "g kg^-1", "g.kg-1", "g.kg**-1")
_TABLES = {
    "specific_humidity": {
        **{u: (1.0, 0.0) for u in _MASS_RATIO},
        **{u: (1e-3, 0.0) for u in _GRAM_RATIO},
    },
    "surface_emissivity": {u: (1.0, 0.0) for u in ("1", "", "dimensionless")},
    "sensor_zenith_angle": {
        **{u: (1.0, 0.0) for u in ("degree", "degrees", "deg", "degrees_zenith", "arc_degree",
                                   "angular_degree")},
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


@functools.lru_cache(maxsize=256)
def _udunits_conversion(units: str, canonical: str) -> tuple[float, float] | None:
    """(scale, offset) from ``units`` to ``canonical`` by UDUNITS-2, None if not convertible."""
    import cf_units

    try:
        unit = cf_units.Unit(units)
    except ValueError:
        return None
    if unit.is_unknown() or unit.is_no_unit() or not unit.is_convertible(canonical):
        return None
    offset = float(unit.convert(0.0, canonical))
    scale = float(unit.convert(1.0, canonical)) - offset
    return scale, offset


def unit_conversion(variable: str, units: str | None) -> tuple[float, float]:
    """(scale, offset) taking ``variable`` from ``units`` to canonical units.

    Raises
    ------
    ValueError
        For a unit not accepted for that variable.
    """
    if units is None:
        return 1.0, 0.0
    key = str(units).strip()
    canonical = CANONICAL_UNITS[variable]
    if variable in _DIMENSIONAL:
        if key in _EXTRA[variable]:
            return _EXTRA[variable][key]
        found = _udunits_conversion(key, canonical) if key else None
        if found is None:
            kind = "pressure" if variable.endswith("air_pressure") else "temperature"
            raise ValueError(
                f"{variable}: unknown units {units!r} (not a {kind} unit convertible to {canonical!r}); "
                f"accepted: any UDUNITS-2 {kind} unit, e.g. "
                + ("'hPa', 'Pa', 'hectopascal', 'mbar', 'kPa'" if kind == "pressure"
                   else "'K', 'kelvin', 'degC', 'degree_Celsius', 'degrees_Celsius'")
            )
        return found
    table = _TABLES[variable]
    if key not in table:
        raise ValueError(
            f"{variable}: unknown units {units!r}; accepted: "
            f"{sorted(k for k in table if k)} (canonical {canonical!r})"
        )
    return table[key]
