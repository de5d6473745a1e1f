"""Validation of operator inputs: structure, units, level order and physical rules.

Every error names the variable, the rule and the first offending profile. With
``errors="mask"`` the physical-rule violations become a per-profile validity mask instead;
structural problems (missing variables, wrong dims, unknown units, empty input) and an input
whose pressures or temperatures are implausible as a whole (a wrong unit label, see
:data:`PLAUSIBLE_BOTTOM_MIN_HPA`, :data:`PLAUSIBLE_MEDIAN_TEMPERATURE_MIN_K`) always raise.
Variables are found by name, or else by their CF ``standard_name`` attribute.
"""

from __future__ import annotations

import dataclasses
import warnings
from typing import Literal

import numpy as np
import xarray as xr

from rtemu._units import unit_conversion
from rtemu.atmosphere import saturation_specific_humidity
from rtemu.levels import GRID_TOLERANCE_HPA, LevelMap, surface_on_grid

INPUT_VARIABLES = (
    "air_pressure",
    "air_temperature",
    "specific_humidity",
    "surface_temperature",
    "surface_emissivity",
    "sensor_zenith_angle",
)
#: Inputs read when present: the ground (terrain, :func:`rtemu.levels.cut_at_surface`).
OPTIONAL_INPUT_VARIABLES = ("surface_air_pressure",)


def input_names(dataset) -> list[str]:
    """The operator inputs of ``dataset``: every required one, and the optional ones it holds."""
    return list(INPUT_VARIABLES) + [n for n in OPTIONAL_INPUT_VARIABLES if n in dataset.variables]

TEMPERATURE_RANGE_K = (100.0, 400.0)
HUMIDITY_MAX = 0.1  # [kg kg-1], exclusive
ZENITH_MAX_DEG = 85.0
SATURATION_TOLERANCE = 1e-6  # relative: a state projected onto saturation is not flagged
PRESSURE_MAX_HPA = 1200.0  # above any observed sea-level pressure (about 1084 hPa)

# Plausibility of a whole input (units, not single profiles). Beyond these bounds the input
# is refused with "units?", in either error mode: a wrong unit label, not a bad profile.
#: The median over profiles of the bottom level must lie below this height, i.e. at a
#: larger pressure [hPa]: the highest surface on Earth is at about 330 hPa (common
#: knowledge: Everest summit ~8.8 km), kPa labelled hPa puts it near 100.
PLAUSIBLE_BOTTOM_MIN_HPA = 300.0
#: The median of all air temperatures must exceed this [K]: the coldest mean stratosphere
#: or mesosphere level in a profile is about 180 K; Celsius labelled K gives below 50.
PLAUSIBLE_MEDIAN_TEMPERATURE_MIN_K = 150.0

ErrorMode = Literal["raise", "mask"]


@dataclasses.dataclass
class Prepared:
    """Validated inputs, surface-first, canonical units (see rtemu.physics.transfer)."""

    pressure_hpa: np.ndarray  # [N, L]
    air_temperature: np.ndarray  # [N, L]
    specific_humidity: np.ndarray  # [N, L]
    surface_temperature: np.ndarray  # [N]
    surface_emissivity: np.ndarray  # [N, C]
    sensor_zenith_angle: np.ndarray  # [N]
    flipped: np.ndarray  # [N] bool: profile was given top-first
    supersaturated: np.ndarray  # [N] bool: q above saturation over water at some level
    valid: np.ndarray  # [N] bool
    problems: list  # messages for invalid profiles (mask mode)
    emissivity_per_channel: bool  # input emissivity had a channel dim
    scales: dict  # variable -> unit scale (canonical per user unit)
    surface_air_pressure: np.ndarray | None = None  # [N] hPa, None without terrain

    def to_caller_order(self, levels: np.ndarray) -> np.ndarray:
        """Flip the last axis back for profiles that were given top-first."""
        out = levels.copy()
        out[self.flipped] = out[self.flipped][..., ::-1]
        return out


def _fail(message: str):
    raise ValueError(message)


def _dims(ds: xr.Dataset, name: str, allowed: list[tuple[str, ...]]) -> tuple[str, ...]:
    dims = ds.variables[name].dims
    for option in allowed:
        if set(dims) == set(option) and len(dims) == len(option):
            return option
    _fail(
        f"{name}: dims {dims} not allowed; expected one of {allowed} "
        f"(rule: dims are named 'profile', 'level', 'channel')"
    )


def _values(ds, name, order, take=None):
    """Canonical-unit values of ``ds[name]`` with axes in ``order`` (float64, a new array).

    Reads the Variable, not a DataArray: building DataArrays and transposing them through
    xarray cost more than all the checks together on a one-profile call. ``take``
    optionally re-orders the ``channel`` axis by position.
    """
    var = ds.variables[name]
    scale, offset = unit_conversion(name, var.attrs.get("units"))
    values = np.asarray(var.values, dtype=float)
    if var.dims != order:
        values = np.transpose(values, [var.dims.index(d) for d in order])
    if take is not None:
        values = values[..., take]
    return values * scale + offset, scale


def _by_standard_name(dataset: xr.Dataset) -> xr.Dataset:
    """Rename variables whose CF ``standard_name`` is an input variable missing by name."""
    known = INPUT_VARIABLES + OPTIONAL_INPUT_VARIABLES
    missing = [v for v in known if v not in dataset.variables]
    renames = {}
    for wanted in missing:
        found = [name for name, var in dataset.variables.items()
                 if var.attrs.get("standard_name") == wanted and name not in known]
        if len(found) > 1:
            _fail(f"{wanted}: variables {sorted(map(str, found))} all have standard_name {wanted!r} "
                  "(rule: one variable per input)")
        if found:
            renames[found[0]] = wanted
    return dataset.rename_vars(renames) if renames else dataset


def _check_plausible(p: np.ndarray, t: np.ndarray) -> None:
    """Refuse a whole input whose pressures or temperatures point at a wrong unit label."""
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN input: checked by the rules
        bottom = np.nanmedian(np.nanmax(p, axis=1))
        median_t = np.nanmedian(t)
    if bottom < PLAUSIBLE_BOTTOM_MIN_HPA:
        _fail(f"air_pressure: the bottom level lies at {bottom:.4g} hPa (median over profiles), above the "
              f"{PLAUSIBLE_BOTTOM_MIN_HPA:g} hPa of any surface: units? (kPa labelled hPa, or a top-of-"
              "atmosphere grid?) (rule: plausible units)")
    if median_t < PLAUSIBLE_MEDIAN_TEMPERATURE_MIN_K:
        _fail(f"air_temperature: median {median_t:.4g} K, below {PLAUSIBLE_MEDIAN_TEMPERATURE_MIN_K:g} K: "
              "units? (Celsius labelled K?) (rule: plausible units)")


def _first_bad(mask_rows: np.ndarray) -> int:
    return int(np.flatnonzero(mask_rows)[0])


def prepare_inputs(
    dataset: xr.Dataset, channel_ids: tuple[str, ...], errors: ErrorMode = "raise"
) -> Prepared:
    """Check ``dataset`` against the input schema and return canonical arrays.

    Parameters
    ----------
    dataset : xarray.Dataset
        Variables of :data:`INPUT_VARIABLES` with dims profile, level (and channel);
        optionally ``surface_air_pressure`` (profile) [hPa], the ground.
    channel_ids : tuple of str
        The operator's channels; a ``channel`` coordinate in ``dataset`` must equal them
        (in any order).
    errors : {"raise", "mask"}
        * ``"raise"``: a physical-rule violation raises ValueError.
        * ``"mask"``: the profile is marked invalid instead; its inputs are replaced by a
          harmless valid profile so that the batch computes.
    """
    if errors not in ("raise", "mask"):
        raise ValueError(f"errors must be 'raise' or 'mask', got {errors!r}")
    if not isinstance(dataset, xr.Dataset):
        raise ValueError(f"input must be an xarray.Dataset, got {type(dataset).__name__}")
    dataset = _by_standard_name(dataset)
    missing = [v for v in INPUT_VARIABLES if v not in dataset.variables]
    if missing:
        _fail(f"input dataset is missing variable(s) {missing} (rule: all of {list(INPUT_VARIABLES)} are required)")
    if "profile" not in dataset.dims:
        _fail("air_temperature: no 'profile' dimension (rule: inputs have dims (profile, level); "
              "for one profile use dataset.expand_dims('profile'))")
    n = dataset.sizes["profile"]
    if n == 0:
        _fail("input dataset is empty (rule: at least one profile)")
    nlev = dataset.sizes.get("level", 0)
    if nlev < 2:
        _fail(f"air_temperature: {nlev} level(s) (rule: at least two levels along dim 'level')")

    p_order = _dims(dataset, "air_pressure", [("level",), ("profile", "level")])
    for name in ("air_temperature", "specific_humidity"):
        _dims(dataset, name, [("profile", "level")])
    for name in ("surface_temperature", "sensor_zenith_angle"):
        _dims(dataset, name, [("profile",)])
    e_order = _dims(dataset, "surface_emissivity", [("profile",), ("profile", "channel")])
    terrain = "surface_air_pressure" in dataset.variables
    if terrain:
        _dims(dataset, "surface_air_pressure", [("profile",)])
    nchan = len(channel_ids)

    take = None
    if "channel" in e_order:
        if "channel" in dataset.coords:
            have = [str(c) for c in dataset.variables["channel"].values]
            if have != list(channel_ids):
                unknown = [c for c in have if c not in channel_ids]
                absent = [c for c in channel_ids if c not in have]
                if unknown or absent:
                    _fail(
                        f"surface_emissivity: channel coordinate does not match the operator's channels "
                        f"(unknown: {unknown}, missing: {absent}) (rule: one value per operator channel; "
                        f"select with dataset.sel(channel=[...]))"
                    )
                if len(set(have)) != len(have):
                    repeated = sorted({c for c in have if have.count(c) > 1})
                    _fail(f"surface_emissivity: channel(s) {repeated} repeated in the channel coordinate "
                          "(rule: one value per operator channel)")
                # Positions instead of .sel: the same values, without an index lookup.
                take = np.array([have.index(c) for c in channel_ids])
        elif dataset.sizes["channel"] != nchan:
            _fail(f"surface_emissivity: {dataset.sizes['channel']} channels, operator has {nchan} "
                  "(rule: one value per operator channel)")
    ds = dataset

    p, p_scale = _values(ds, "air_pressure", p_order)
    p = np.broadcast_to(p, (n, nlev)).copy() if p.ndim == 1 else p
    t, t_scale = _values(ds, "air_temperature", ("profile", "level"))
    q, q_scale = _values(ds, "specific_humidity", ("profile", "level"))
    ts, ts_scale = _values(ds, "surface_temperature", ("profile",))
    zen, z_scale = _values(ds, "sensor_zenith_angle", ("profile",))
    em, e_scale = _values(ds, "surface_emissivity", e_order, take=take)
    em = np.broadcast_to(em.reshape(n, -1), (n, nchan)).copy() if em.ndim == 1 else em
    ps, ps_scale = _values(ds, "surface_air_pressure", ("profile",)) if terrain else (None, None)

    _check_plausible(p, t)
    bad = np.zeros(n, dtype=bool)
    problems: list[str] = []

    def rule(name: str, offending: np.ndarray, text: str):
        rows = offending.reshape(n, -1).any(axis=1) & ~bad
        if not rows.any():
            return
        first = _first_bad(rows)
        message = f"{name}: {text}; first offending profile index {first}"
        if errors == "raise":
            _fail(message)
        problems.append(f"{message} ({int(rows.sum())} profile(s))")
        bad[rows] = True

    for name, arr in (("air_pressure", p), ("air_temperature", t), ("specific_humidity", q),
                      ("surface_temperature", ts), ("surface_emissivity", em),
                      ("sensor_zenith_angle", zen)) + ((("surface_air_pressure", ps),) if terrain else ()):
        rule(name, ~np.isfinite(arr), "non-finite value (rule: all values finite)")
    lo, hi = TEMPERATURE_RANGE_K
    with np.errstate(invalid="ignore"):
        rule("air_pressure", p <= 0, "non-positive pressure (rule: pressure > 0 hPa)")
        steps = np.diff(p, axis=1)
        rule("air_pressure", steps == 0, "a level is repeated (rule: strictly monotonic pressure, no repeated level)")
        rule("air_pressure", ~((steps < 0).all(axis=1) | (steps > 0).all(axis=1)),
             "pressure not strictly monotonic along 'level' (rule: strictly monotonic per profile)")
        rule("air_temperature", (t < lo) | (t > hi), f"outside {lo:g}-{hi:g} K (rule: physical range; Celsius labelled K?)")
        rule("surface_temperature", (ts < lo) | (ts > hi), f"outside {lo:g}-{hi:g} K (rule: physical range)")
        rule("specific_humidity", (q < 0) | (q >= HUMIDITY_MAX),
             f"outside [0, {HUMIDITY_MAX:g}) kg kg-1 (rule: 0 <= q < {HUMIDITY_MAX:g})")
        rule("surface_emissivity", (em < 0) | (em > 1), "outside [0, 1] (rule: 0 <= emissivity <= 1)")
        rule("sensor_zenith_angle", (zen < 0) | (zen > ZENITH_MAX_DEG),
             f"outside [0, {ZENITH_MAX_DEG:g}] degree (rule: plane-parallel geometry)")

    rule("air_pressure", p > PRESSURE_MAX_HPA,
         f"above {PRESSURE_MAX_HPA:g} hPa (rule: physical range; Pa labelled hPa?)")
    if terrain:
        with np.errstate(invalid="ignore"):
            outside = (ps <= p.min(axis=1)) | (ps > p.max(axis=1))
        rule("surface_air_pressure", outside,
             "outside the profile's levels (rule: top pressure < surface_air_pressure <= bottom pressure)")

    valid = ~bad
    if bad.any():
        # Give invalid profiles a harmless valid stand-in so the batch computes; their
        # outputs are set to NaN by the caller. A valid profile of the batch serves if any.
        if valid.any():
            ref = int(np.flatnonzero(valid)[0])
            stand_in = (p[ref], t[ref], q[ref], ts[ref], em[ref], zen[ref])
        else:
            stand_in = (np.geomspace(1000.0, 1.0, nlev), 250.0, 1e-4, 250.0, 0.5, 0.0)
        for arr, value in zip((p, t, q, ts, em, zen), stand_in):
            arr[bad] = value
        if terrain:
            ps[bad] = np.max(stand_in[0])  # the stand-in's own bottom: no terrain

    flipped = p[:, 0] < p[:, -1]
    if flipped.all():
        p, t, q = (np.ascontiguousarray(arr[:, ::-1]) for arr in (p, t, q))
    elif flipped.any():
        for arr in (p, t, q):
            arr[flipped] = arr[flipped][:, ::-1]

    supersaturated = _supersaturated(p, t, q, ps, valid)
    return Prepared(
        pressure_hpa=p,
        air_temperature=t,
        specific_humidity=q,
        surface_temperature=ts,
        surface_emissivity=em,
        sensor_zenith_angle=zen,
        flipped=flipped,
        supersaturated=supersaturated,
        valid=valid,
        problems=problems,
        emissivity_per_channel="channel" in e_order,
        scales={
            "air_pressure": p_scale,
            "air_temperature": t_scale,
            "specific_humidity": q_scale,
            "surface_temperature": ts_scale,
            "surface_emissivity": e_scale,
            "sensor_zenith_angle": z_scale,
            **({"surface_air_pressure": ps_scale} if terrain else {}),
        },
        surface_air_pressure=ps,
    )


def _supersaturated(p, t, q, ps, valid) -> np.ndarray:
    """[N] bool: q above saturation over water at some level that reaches the transfer.

    Not an error: the clear-sky model is defined for any q < 0.1, but a state above
    saturation is one it cannot represent; operators flag it (rtemu.flags.SUPERSATURATED).
    With a ground ``ps`` the levels tested are the given levels above it and the nearest
    given level at or under it (the two the ground's values are interpolated from), each
    at its own pressure; deeper levels do not reach the transfer and do not count. The
    interpolated ground value itself is not tested: q linear in ln p between two saturated
    levels lies above saturation at the interpolated T (q_s is convex in T; 1.4-2.1 % above
    it between saturated levels 24 hPa apart), so testing it would flag a state none of
    whose levels is supersaturated, and a 1D-Var could not keep its trial states unflagged.
    """
    supersaturated = np.zeros(p.shape[0], dtype=bool)
    if not valid.any():
        return supersaturated
    rows = slice(None) if valid.all() else valid  # a slice: no copies in the usual case
    with np.errstate(invalid="ignore"):
        over = q[rows] > saturation_specific_humidity(t[rows], p[rows]) * (1.0 + SATURATION_TOLERANCE)
        if ps is not None:
            p_rows, ps_rows = p[rows], np.reshape(ps, (-1, 1))[rows]
            nearest = np.min(np.where(p_rows >= ps_rows, p_rows, np.inf), axis=1, keepdims=True)
            over &= ~(p_rows > nearest)
    supersaturated[rows] = over.any(axis=1)
    return supersaturated


def onto_grid(prep: Prepared, grid_hpa: np.ndarray, errors: ErrorMode = "raise",
              tolerance_hpa: float = GRID_TOLERANCE_HPA) -> tuple[Prepared, LevelMap]:
    """``prep``'s profiles carried onto an operator's grid (:class:`rtemu.levels.LevelMap`).

    The result is surface-first on ``grid_hpa``; its ``surface_air_pressure`` is the
    source's (or its lowest level) [hPa], within ``tolerance_hpa`` of the grid's bottom
    taken as the bottom. A surface outside the grid, (top, bottom], makes the profile
    invalid (ValueError with ``errors="raise"``).

    Parameters
    ----------
    prep : Prepared
        Validated profiles on the caller's levels.
    grid_hpa : ndarray [K]
        The operator's levels, surface first [hPa].

    Returns
    -------
    (Prepared, LevelMap)
        The profiles on the grid (``flipped`` all False), and the map from ``prep``'s
        surface-first levels to the grid (its adjoint takes Jacobians back).
    """
    grid = np.asarray(grid_hpa, dtype=float)
    levelmap = LevelMap(prep.pressure_hpa, grid)
    n = prep.valid.size
    ps = levelmap.source_bottom_hpa if prep.surface_air_pressure is None else prep.surface_air_pressure
    ps = surface_on_grid(ps, grid, tolerance_hpa)
    outside = ((ps <= grid[-1]) | (ps > grid[0])) & prep.valid
    problems = list(prep.problems)
    if outside.any():
        first = int(np.flatnonzero(outside)[0])
        message = (f"surface_air_pressure: {ps[first]:.6g} hPa (the profile's surface, or its lowest level) "
                   f"is outside the operator's grid {grid[-1]:g}-{grid[0]:g} hPa (rule: grid top < surface "
                   f"<= grid bottom); first offending profile index {first}")
        if errors == "raise":
            _fail(message)
        problems.append(f"{message} ({int(outside.sum())} profile(s))")
    valid = prep.valid & ~outside
    ps = np.where(valid, ps, grid[0])
    on_grid = dataclasses.replace(
        prep,
        pressure_hpa=np.broadcast_to(grid, (n, grid.size)).copy(),
        air_temperature=levelmap.apply(prep.air_temperature),
        specific_humidity=levelmap.apply(prep.specific_humidity),
        flipped=np.zeros(n, dtype=bool),
        valid=valid,
        problems=problems,
        surface_air_pressure=ps,
    )
    return on_grid, levelmap
