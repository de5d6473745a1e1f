"""Levels: a column cut at the ground, and profiles carried between level sets.

Both are linear interpolation in ln p, value = (1 - w) x_lo + w x_hi, with
w = (ln p_lo - ln p) / (ln p_lo - ln p_hi) between the two levels that bracket p.

* :func:`cut_at_surface` puts the ground at ``surface_air_pressure`` in a surface-first
  column (used by the physical model; see :mod:`rtemu.physics`).
* :class:`LevelMap` carries profiles from any levels (a model's, shared or per profile,
  e.g. hybrid) onto an operator's grid; it is linear in the values, so its tangent linear
  is itself and its adjoint its transpose. :func:`regrid_profiles`,
  :func:`regrid_tangent_linear` and :func:`regrid_adjoint` apply it to labelled data.

Target levels outside the source levels (the rule of :class:`LevelMap`):

* above the source's top level: the top value (constant extrapolation);
* below the source's lowest level: the lowest value. These levels lie under the source's
  surface, and :func:`regrid_profiles` sets ``surface_air_pressure`` to the source's
  surface (its ``surface_air_pressure`` if it has one, else its lowest level), so that an
  operator cuts them off (:func:`cut_at_surface`): they do not reach the transfer, and
  their Jacobians are zero.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import xarray as xr

from rtemu._units import unit_conversion

#: A surface within this distance of a grid's bottom level is taken as that level [hPa]
#: (the emulator's default tolerance between a dataset's levels and its grid, too).
GRID_TOLERANCE_HPA = 1e-3


def _bracket(source_hpa: np.ndarray, target_hpa: np.ndarray):
    """Lower bracketing level and weight of ln-p interpolation, constant outside.

    Parameters
    ----------
    source_hpa : ndarray [N, L]
        Surface-first levels (strictly decreasing) [hPa].
    target_hpa : ndarray [N, K]
        Target pressures [hPa], any order.

    Returns
    -------
    index : ndarray [N, K] int
        i in 0..L-2: the target lies between source levels i and i+1 (at level i when it
        equals p_i; at level i+1 = L-1 only at the top level).
    weight : ndarray [N, K]
        w in [0, 1] [1]: value = (1 - w) x_i + w x_i+1; exactly 0 at p = p_i.
    """
    n, nlev = source_hpa.shape
    count = np.zeros(target_hpa.shape, dtype=np.intp)
    for level in range(nlev):  # levels at or below the target (p >= target)
        count += source_hpa[:, level : level + 1] >= target_hpa
    index = np.clip(count - 1, 0, nlev - 2)
    ln_lo = np.log(np.take_along_axis(source_hpa, index, axis=1))
    ln_hi = np.log(np.take_along_axis(source_hpa, index + 1, axis=1))
    weight = np.clip((ln_lo - np.log(target_hpa)) / (ln_lo - ln_hi), 0.0, 1.0)
    return index, weight


# -- terrain ---------------------------------------------------------------------------------
@dataclasses.dataclass(frozen=True)
class SurfaceCut:
    """A column cut at the ground (from :func:`cut_at_surface`).

    Attributes
    ----------
    pressure_hpa, air_temperature, specific_humidity : ndarray [N, L]
        The column the transfer runs on [hPa], [K], [kg kg-1]: levels at or below the
        ground moved to the surface pressure with the surface values.
    below : ndarray [N, L] bool
        Input levels at or below the ground (p >= surface pressure).
    index : ndarray [N] int
        The lowest bracketing input level (the highest of ``below``); ``index + 1`` is the
        other.
    weight : ndarray [N]
        Interpolation weight of level ``index + 1`` [1].
    """

    pressure_hpa: np.ndarray
    air_temperature: np.ndarray
    specific_humidity: np.ndarray
    below: np.ndarray
    index: np.ndarray
    weight: np.ndarray

    def jacobian_to_input_levels(self, jacobian: np.ndarray) -> np.ndarray:
        """Chain rule from the cut column's levels to the input levels.

        Every level in ``below`` holds the surface value x_s = (1 - w) x_i + w x_i+1, so
        dy/dx_i = (1 - w) S, dy/dx_i+1 = J_i+1 + w S with S the sum of J over ``below``;
        deeper input levels get zero.

        Parameters
        ----------
        jacobian : ndarray [N, C, L]
            Derivatives with respect to the cut column's levels [K per unit].

        Returns
        -------
        ndarray [N, C, L]
            Derivatives with respect to the input levels [K per unit].
        """
        below = self.below[:, None, :]
        total = np.where(below, jacobian, 0.0).sum(axis=2)  # S [N, C]
        out = np.where(below, 0.0, jacobian)
        rows = np.arange(out.shape[0])
        out[rows, :, self.index] += (1.0 - self.weight)[:, None] * total
        out[rows, :, self.index + 1] += self.weight[:, None] * total
        return out


def cut_at_surface(pressure_hpa, air_temperature, specific_humidity, surface_air_pressure) -> SurfaceCut:
    """The column above the ground at ``surface_air_pressure``, at fixed level count.

    The column it stands for: levels with p >= ps dropped, and a new bottom level at ps
    with temperature and humidity interpolated linearly in ln p between the two input
    levels that bracket ps (if ps equals a level's pressure, that level is the bottom).
    Here the dropped levels are kept, moved to p = ps with the surface values: their
    layers have zero mass path (p_j - p_j+1 = 0, :mod:`rtemu.physics` eq. 2), hence zero
    optical depth and zero weight in eq. 5, and the transfer returns what it returns for
    the shorter column (to round-off: sums have more zero terms).

    Parameters
    ----------
    pressure_hpa : ndarray [N, L]
        Surface-first levels, strictly decreasing [hPa].
    air_temperature : ndarray [N, L]
        [K]
    specific_humidity : ndarray [N, L]
        [kg kg-1]
    surface_air_pressure : ndarray [N]
        ps [hPa], in (top pressure, bottom pressure] of each profile (checked by the
        caller).

    Returns
    -------
    SurfaceCut
    """
    p = np.asarray(pressure_hpa, dtype=float)
    ps = np.asarray(surface_air_pressure, dtype=float).reshape(-1, 1)
    index, weight = _bracket(p, ps)
    index, weight = index[:, 0], weight[:, 0]
    below = p >= ps
    rows = np.arange(p.shape[0])

    def cut(x):
        x = np.asarray(x, dtype=float)
        surface = (1.0 - weight) * x[rows, index] + weight * x[rows, index + 1]
        return np.where(below, surface[:, None], x)

    return SurfaceCut(np.where(below, ps, p), cut(air_temperature), cut(specific_humidity),
                      below, index, weight)



def transfer_above_ground(transfer, pressure_hpa, air_temperature, specific_humidity, surface_air_pressure,
                          *surface, jacobian: bool = False, **options) -> dict:
    """Run a column transfer on the column above the ground; Jacobians on the input levels.

    Parameters
    ----------
    transfer : callable
        ``transfer(p, T, q, *surface, jacobian=..., **options) -> dict`` on surface-first
        arrays (e.g. :func:`rtemu.physics.transfer` with its instrument bound).
    pressure_hpa, air_temperature, specific_humidity : ndarray [N, L]
        Surface-first levels [hPa], [K], [kg kg-1].
    surface_air_pressure : ndarray [N] or None
        The ground [hPa] (:func:`cut_at_surface`); None: the bottom level is the ground.
    *surface
        The remaining arguments of ``transfer`` (surface temperature [K], emissivity [1],
        zenith angle [degree]).

    Returns
    -------
    dict
        ``transfer``'s outputs, the air-temperature and humidity Jacobians [N, C, L] chained
        back to the input levels (zero under the ground).
    """
    cut = None
    column = (pressure_hpa, air_temperature, specific_humidity)
    if surface_air_pressure is not None:
        cut = cut_at_surface(*column, surface_air_pressure)
        column = (cut.pressure_hpa, cut.air_temperature, cut.specific_humidity)
    arrays = transfer(*column, *surface, jacobian=jacobian, **options)
    if cut is not None:
        for name in ("jacobian_air_temperature", "jacobian_specific_humidity"):
            if name in arrays:
                arrays[name] = cut.jacobian_to_input_levels(arrays[name])
    return arrays

# -- model levels ----------------------------------------------------------------------------
class LevelMap:
    """Linear-in-ln p map of profiles from source levels to target levels.

    Parameters
    ----------
    source_hpa : array_like [L] or [N, L]
        Source levels (e.g. a model's; per profile for hybrid levels) [hPa], strictly
        monotonic along the last axis, either order.
    target_hpa : array_like [K] or [N, K]
        Target levels (e.g. an operator's grid) [hPa], any order; results follow it.

    Outside the source levels the value is constant: the top value above the top, the
    lowest value below the lowest level (see the module docstring for why that is safe
    with terrain).

    The map is linear in the values: :meth:`tangent_linear` is :meth:`apply`, and
    :meth:`adjoint` is its transpose (gradients on the target levels to gradients on the
    source levels).

    Examples
    --------
    >>> m = LevelMap([1000.0, 500.0, 100.0], [1000.0, 707.1067811865476, 50.0])
    >>> m.apply([[290.0, 250.0, 210.0]]).round(6)
    array([[290., 270., 210.]])
    >>> m.adjoint([[1.0, 1.0, 1.0]]).round(6)
    array([[1.5, 0.5, 1. ]])
    """

    def __init__(self, source_hpa, target_hpa):
        source = np.atleast_2d(np.asarray(source_hpa, dtype=float))
        target = np.atleast_2d(np.asarray(target_hpa, dtype=float))
        n = max(source.shape[0], target.shape[0])
        source = np.broadcast_to(source, (n, source.shape[1]))
        target = np.broadcast_to(target, (n, target.shape[1]))
        if source.shape[1] < 2:
            raise ValueError(f"source levels: {source.shape[1]} level(s) (rule: at least two)")
        for name, levels in (("source", source), ("target", target)):
            with np.errstate(invalid="ignore"):
                bad = ~(np.isfinite(levels) & (levels > 0)).all(axis=1)
            if bad.any():
                raise ValueError(f"{name} levels: non-finite or non-positive pressure (rule: finite, > 0 hPa); "
                                 f"first offending profile index {int(np.flatnonzero(bad)[0])}")
        steps = np.diff(source, axis=1)
        monotonic = (steps < 0).all(axis=1) | (steps > 0).all(axis=1)
        if not monotonic.all():
            raise ValueError(f"source levels: not strictly monotonic (rule: strictly monotonic per "
                             f"profile); first offending profile index {int(np.flatnonzero(~monotonic)[0])}")
        self.n_source = source.shape[1]
        top_first = source[:, 0] < source[:, -1]
        surface_first = np.where(top_first[:, None], source[:, ::-1], source)
        index, weight = _bracket(surface_first, target)
        last = self.n_source - 1
        # Indices into the caller's order of the source levels.
        self._lo = np.where(top_first[:, None], last - index, index)
        self._hi = np.where(top_first[:, None], last - index - 1, index + 1)
        self._weight = weight
        #: The source's lowest level per profile [hPa] [N].
        self.source_bottom_hpa = surface_first[:, 0].copy()

    def apply(self, values) -> np.ndarray:
        """Values on the target levels, [L], [N, L] or [N, ..., L] -> [N, (...,) K], in the
        values' units."""
        x = np.asarray(values, dtype=float)
        x2 = np.atleast_2d(x)
        x3 = x2.reshape(x2.shape[0], -1, x2.shape[-1])  # [N, M, L]
        lo = np.take_along_axis(x3, self._lo[:, None, :], axis=2)
        hi = np.take_along_axis(x3, self._hi[:, None, :], axis=2)
        w = self._weight[:, None, :]
        out = (1.0 - w) * lo + w * hi
        lead = x2.shape[:-1] if x2.shape[0] == out.shape[0] else (out.shape[0],) + x2.shape[1:-1]
        return out.reshape(lead + (out.shape[-1],))

    def tangent_linear(self, increments) -> np.ndarray:
        """Increments on the target levels, [N, L] -> [N, K] (the map is linear)."""
        return self.apply(increments)

    def adjoint(self, gradient) -> np.ndarray:
        """Gradients on the source levels, [N, ..., K] -> [N, ..., L] (the transpose)."""
        g = np.asarray(gradient, dtype=float)
        shape = g.shape
        g = g.reshape(shape[0], -1, shape[-1])
        out = np.zeros(g.shape[:2] + (self.n_source,))
        rows = np.arange(g.shape[0])
        for k in range(g.shape[2]):  # one target level: one (lo, hi) pair per profile
            out[rows, :, self._lo[:, k]] += (1.0 - self._weight[:, k])[:, None] * g[:, :, k]
            out[rows, :, self._hi[:, k]] += self._weight[:, k][:, None] * g[:, :, k]
        return out.reshape(shape[:-1] + (self.n_source,))


def surface_on_grid(surface_hpa, grid_hpa, tolerance_hpa: float = GRID_TOLERANCE_HPA) -> np.ndarray:
    """The surface pressure a profile gets on a grid [hPa]: ``surface_hpa`` [N], or the
    grid's bottom level where it lies within ``tolerance_hpa`` [hPa] of it."""
    bottom = np.max(grid_hpa)
    surface = np.asarray(surface_hpa, dtype=float)
    return np.where(np.abs(surface - bottom) <= tolerance_hpa, bottom, surface)


def _level_map(dataset: xr.Dataset, pressure_hpa) -> LevelMap:
    if "air_pressure" not in dataset.variables:
        raise ValueError("dataset has no air_pressure (rule: the source levels are needed)")
    var = dataset.variables["air_pressure"]
    scale, offset = unit_conversion("air_pressure", var.attrs.get("units"))
    if var.dims == ("level",):
        source = var.values * scale + offset
    elif set(var.dims) == {"profile", "level"}:
        source = var.transpose("profile", "level").values * scale + offset
    else:
        raise ValueError(f"air_pressure: dims {var.dims} (rule: (level,) or (profile, level))")
    return LevelMap(source, np.asarray(pressure_hpa, dtype=float))


def _map_level_variables(dataset: xr.Dataset, function, n_out: int) -> dict:
    """``function`` applied along ``level`` of every (profile, ..., level) data variable."""
    out = {}
    for name, var in dataset.data_vars.items():
        if "level" not in var.dims or name == "air_pressure":
            continue
        if var.dims[0] != "profile" or var.dims[-1] != "level":
            var = var.transpose("profile", ..., "level")
        values = np.asarray(var.values, dtype=float)
        mapped = function(values.reshape(values.shape[0], -1, values.shape[-1]))
        out[name] = xr.Variable(var.dims, mapped.reshape(values.shape[:-1] + (n_out,)), var.attrs)
    return out


def _replace_levels(dataset: xr.Dataset, mapped: dict) -> xr.Dataset:
    keep = {k: v for k, v in dataset.data_vars.items() if "level" not in v.dims}
    coords = {k: v for k, v in dataset.coords.items() if "level" not in v.dims}
    return xr.Dataset({**keep, **mapped}, coords=coords, attrs=dataset.attrs)


def regrid_profiles(dataset: xr.Dataset, pressure_hpa) -> xr.Dataset:
    """``dataset``'s profiles on the levels ``pressure_hpa``, linear in ln p.

    Every data variable with a ``level`` dimension (air_temperature, specific_humidity,
    ...) is carried onto the new levels with :class:`LevelMap` (constant beyond the
    source's top and lowest levels); ``air_pressure`` becomes ``pressure_hpa`` (level,)
    [hPa]; ``surface_air_pressure`` (profile) [hPa] is kept, or set to the source's lowest
    level, so that an operator computes the column above the source's surface only
    (within :data:`GRID_TOLERANCE_HPA` of the grid's bottom: the bottom). A surface under
    the grid's bottom is left as it is: operators refuse it (the grid does not reach the
    ground). Variables without a level dimension are kept.

    Parameters
    ----------
    dataset : xarray.Dataset
        Profiles in the input schema of :func:`rtemu.physics.simulate`, on any levels:
        ``air_pressure`` (level) or (profile, level), e.g. a model's hybrid levels.
    pressure_hpa : array_like [K]
        The target grid [hPa] (e.g. ``EmulatedOperator.pressure_hpa``).

    Returns
    -------
    xarray.Dataset
        The profiles on ``pressure_hpa`` (its order), with ``surface_air_pressure``.
    """
    grid = np.asarray(pressure_hpa, dtype=float)
    levelmap = _level_map(dataset, grid)
    mapped = _map_level_variables(dataset, levelmap.apply, grid.size)
    out = _replace_levels(dataset, mapped)
    out["air_pressure"] = xr.Variable(("level",), grid, {"units": "hPa"})
    if "surface_air_pressure" in dataset.variables:
        var = dataset.variables["surface_air_pressure"]
        scale, offset = unit_conversion("surface_air_pressure", var.attrs.get("units"))
        surface = var.values * scale + offset
    else:
        surface = levelmap.source_bottom_hpa * np.ones(dataset.sizes["profile"])
    out["surface_air_pressure"] = xr.Variable(("profile",), surface_on_grid(surface, grid), {"units": "hPa"})
    return out


def regrid_tangent_linear(dataset: xr.Dataset, pressure_hpa, perturbation: xr.Dataset) -> xr.Dataset:
    """Tangent linear of :func:`regrid_profiles`: ``perturbation`` on ``dataset``'s levels
    (variables over (profile, ..., level), any units) carried onto ``pressure_hpa`` [hPa];
    variables without a level dimension are kept (the map leaves them unchanged)."""
    grid = np.asarray(pressure_hpa, dtype=float)
    levelmap = _level_map(dataset, grid)
    mapped = _map_level_variables(perturbation, levelmap.tangent_linear, grid.size)
    return _replace_levels(perturbation, mapped)


def regrid_adjoint(dataset: xr.Dataset, pressure_hpa, gradient: xr.Dataset) -> xr.Dataset:
    """Adjoint of :func:`regrid_profiles`: gradients on ``pressure_hpa``'s levels
    (variables over (profile, ..., level), e.g. the Jacobians of an operator run on the
    regridded profiles) returned on ``dataset``'s levels (the transpose of the map);
    variables without a level dimension are kept."""
    levelmap = _level_map(dataset, np.asarray(pressure_hpa, dtype=float))
    mapped = _map_level_variables(gradient, levelmap.adjoint, levelmap.n_source)
    return _replace_levels(gradient, mapped)
