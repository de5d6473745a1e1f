"""Control vector of the assimilation: layout, state <-> control mapping, physical limits.

The control vector of one column is, in this order::

    air_temperature[0..L-1]        [K]      level order as stored in the dataset
    ln_specific_humidity[0..L-1]   [1]      natural log of q [kg kg-1]
    surface_temperature            [K]
    surface_emissivity             [1]      only with control_emissivity: one element when
                                            the emissivity has no channel dim, otherwise one
                                            element per operator channel, "surface_emissivity[<id>]"

Element labels (``ControlLayout.labels``) name every element; the background error
covariance carries them so that a mismatch between B and the background is an error, not
a silent misreading.
"""

from __future__ import annotations

import dataclasses
from typing import Literal

import numpy as np
import xarray as xr

from rtemu._checks import HUMIDITY_MAX, TEMPERATURE_RANGE_K
from rtemu._units import CANONICAL_UNITS, unit_conversion
from rtemu.atmosphere import saturation_specific_humidity

#: Lowest specific humidity an iterate may take [kg kg-1]; keeps ln q finite and far
#: below any tropospheric or stratospheric value (common practice).
HUMIDITY_MIN = 1e-8
#: Largest specific humidity an iterate may take [kg kg-1]: just inside the physical
#: model's validity rule q < 0.1 (rtemu._checks.HUMIDITY_MAX).
HUMIDITY_CEILING = HUMIDITY_MAX * (1.0 - 1e-6)
#: Relative humidity cap with respect to liquid water [1] applied to iterates.
MAX_RELATIVE_HUMIDITY = 1.0
#: Temperature range an iterate may take [K]: the physical model's validity rule.
TEMPERATURE_LIMITS = TEMPERATURE_RANGE_K

EmissivityMode = Literal["none", "scalar", "channel"]

COLUMN_VARIABLES = (
    "air_pressure",
    "air_temperature",
    "specific_humidity",
    "surface_temperature",
    "surface_emissivity",
    "sensor_zenith_angle",
)


def humidity_bounds(air_temperature, air_pressure, max_relative_humidity=MAX_RELATIVE_HUMIDITY):
    """Lower and upper bound of specific humidity allowed for an iterate.

    Lower: 1e-8 kg kg-1. Upper: min(max_relative_humidity q_s(T, p), 0.1 (1 - 1e-6)),
    with q_s the saturation specific humidity over liquid water of
    :func:`rtemu.atmosphere.saturation_specific_humidity` (Bolton 1980 e_s; the same
    definition the sampler uses for relative humidity). Where e_s >= p, q_s is infinite
    and the model ceiling applies.

    Parameters
    ----------
    air_temperature : array_like
        Temperature [K].
    air_pressure : array_like
        Pressure [hPa].
    max_relative_humidity : float
        Cap on relative humidity with respect to liquid water [1].

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Lower and upper bound [kg kg-1], broadcast to the inputs.
    """
    t_lo, t_hi = TEMPERATURE_LIMITS
    t = np.clip(np.asarray(air_temperature, dtype=float), t_lo, t_hi)
    upper = np.minimum(
        max_relative_humidity * saturation_specific_humidity(t, air_pressure), HUMIDITY_CEILING
    )
    upper = np.maximum(upper, HUMIDITY_MIN)
    return np.full_like(upper, HUMIDITY_MIN), upper


@dataclasses.dataclass(frozen=True)
class ControlLayout:
    """Where each variable sits in the control vector of one column."""

    n_levels: int
    emissivity: EmissivityMode = "none"
    emissivity_channels: tuple[str, ...] = ()

    @property
    def n_emissivity(self) -> int:
        return {"none": 0, "scalar": 1, "channel": len(self.emissivity_channels)}[self.emissivity]

    @property
    def size(self) -> int:
        return 2 * self.n_levels + 1 + self.n_emissivity

    @property
    def temperature(self) -> slice:
        return slice(0, self.n_levels)

    @property
    def ln_humidity(self) -> slice:
        return slice(self.n_levels, 2 * self.n_levels)

    @property
    def surface_temperature(self) -> int:
        return 2 * self.n_levels

    @property
    def surface_emissivity(self) -> slice:
        start = 2 * self.n_levels + 1
        return slice(start, start + self.n_emissivity)

    @property
    def labels(self) -> tuple[str, ...]:
        labels = [f"air_temperature[{i}]" for i in range(self.n_levels)]
        labels += [f"ln_specific_humidity[{i}]" for i in range(self.n_levels)]
        labels.append("surface_temperature")
        if self.emissivity == "scalar":
            labels.append("surface_emissivity")
        elif self.emissivity == "channel":
            labels += [f"surface_emissivity[{c}]" for c in self.emissivity_channels]
        return tuple(labels)

    @property
    def groups(self) -> tuple[str, ...]:
        """Variable name of every element (for per-variable sums, e.g. of DFS)."""
        return tuple(label.split("[")[0] for label in self.labels)


@dataclasses.dataclass
class Columns:
    """A batch of columns in canonical units, flattened over the column dims.

    Arrays are [N, L] (levels in the dataset's order), [N] or [N, Ce].
    """

    pressure: np.ndarray  # [N, L] [hPa]
    temperature: np.ndarray  # [N, L] [K]
    humidity: np.ndarray  # [N, L] [kg kg-1]
    surface_temperature: np.ndarray  # [N] [K]
    emissivity: np.ndarray  # [N] or [N, Ce] [1]
    zenith: np.ndarray  # [N] [degree]
    emissivity_channels: tuple[str, ...] | None  # None: emissivity has no channel dim
    level_coord: xr.DataArray | None
    #: Coordinates of the operator input (channel, level), built once: their indexes cost
    #: more than the rest of the dataset at every 1D-Var iteration.
    input_coords: xr.Coordinates | None = None
    #: The ground [N] [hPa], None without ``surface_air_pressure``: every operator call
    #: (first guess, trial states, ensemble members) must see the same ground.
    surface_pressure: np.ndarray | None = None

    @property
    def n(self) -> int:
        return self.temperature.shape[0]

    def subset(self, index) -> "Columns":
        return dataclasses.replace(
            self,
            pressure=self.pressure[index],
            temperature=self.temperature[index],
            humidity=self.humidity[index],
            surface_temperature=self.surface_temperature[index],
            emissivity=self.emissivity[index],
            zenith=self.zenith[index],
            surface_pressure=None if self.surface_pressure is None else self.surface_pressure[index],
        )

    def below_ground(self) -> np.ndarray:
        """Levels [N, L] (bool) under the ground that do not reach the operator.

        The physical model cuts a column at ``surface_air_pressure`` (:func:`rtemu.levels.cut_at_surface`):
        the ground's values are interpolated between the nearest level at or below it and
        the level above, and every level deeper than that one is dropped, so its Jacobians
        are zero. Those are the levels returned (none without a ground).
        """
        if self.surface_pressure is None:
            return np.zeros(self.pressure.shape, dtype=bool)
        ps = self.surface_pressure[:, None]
        # The nearest level at or below the ground still enters the interpolation.
        nearest = np.min(np.where(self.pressure >= ps, self.pressure, np.inf), axis=1, keepdims=True)
        return self.pressure > nearest


def _column_values(ds: xr.Dataset, name: str, column_dims: tuple[str, ...], trailing: tuple[str, ...]):
    """Values of ``ds[name]`` broadcast to column_dims + trailing, canonical units."""
    da = ds[name]
    allowed = set(column_dims) | set(trailing)
    extra = [d for d in da.dims if d not in allowed]
    if extra:
        raise ValueError(
            f"{name}: unexpected dimension(s) {extra} (rule: dims among {list(column_dims + trailing)})"
        )
    for dim in (*column_dims, *trailing):
        if dim not in da.dims:
            if dim not in ds.sizes:
                raise ValueError(f"{name}: dimension {dim!r} missing from the dataset")
            da = da.expand_dims({dim: ds.sizes[dim]})
    scale, offset = unit_conversion(name, da.attrs.get("units"))
    values = np.asarray(da.transpose(*column_dims, *trailing).values, dtype=float)
    n = int(np.prod([ds.sizes[d] for d in column_dims]))
    return values.reshape(n, *values.shape[len(column_dims):]) * scale + offset


def read_columns(
    ds: xr.Dataset, column_dims: tuple[str, ...], channels: tuple[str, ...], what: str
) -> Columns:
    """Read the column variables of ``ds`` into flat canonical-unit arrays.

    ``what`` names the dataset in error messages ("background", "ensemble", ...).
    """
    if not isinstance(ds, xr.Dataset):
        raise ValueError(f"{what}: must be an xarray.Dataset, got {type(ds).__name__}")
    missing = [v for v in COLUMN_VARIABLES if v not in ds.variables]
    if missing:
        raise ValueError(f"{what}: missing variable(s) {missing} (rule: all of {list(COLUMN_VARIABLES)} are required)")
    for dim in (*column_dims, "level"):
        if dim not in ds.sizes:
            raise ValueError(f"{what}: no {dim!r} dimension (rule: dims {list(column_dims)} and 'level')")
    if ds.sizes["level"] < 2:
        raise ValueError(f"{what}: air_temperature has {ds.sizes['level']} level(s) (rule: at least two)")
    emis = ds["surface_emissivity"]
    if "channel" in emis.dims:
        if "channel" in ds.coords:
            have = [str(c) for c in ds["channel"].values]
            if sorted(have) != sorted(channels):
                raise ValueError(
                    f"{what}: surface_emissivity channels {have} differ from the operator's "
                    f"{list(channels)} (rule: one value per operator channel)"
                )
            if have != list(channels):
                ds = ds.assign(surface_emissivity=emis.sel(channel=list(channels)))
        elif ds.sizes["channel"] != len(channels):
            raise ValueError(
                f"{what}: surface_emissivity has {ds.sizes['channel']} channels, the operator "
                f"{len(channels)} (rule: one value per operator channel)"
            )
        emissivity = _column_values(ds, "surface_emissivity", column_dims, ("channel",))
        emissivity_channels = tuple(channels)
    else:
        emissivity = _column_values(ds, "surface_emissivity", column_dims, ())
        emissivity_channels = None
    coords = {}
    if emissivity_channels is not None:
        coords["channel"] = np.array(emissivity_channels, dtype=object)
    if "level" in ds.coords:
        coords["level"] = ds.coords["level"].values
    return Columns(
        pressure=_column_values(ds, "air_pressure", column_dims, ("level",)),
        temperature=_column_values(ds, "air_temperature", column_dims, ("level",)),
        humidity=_column_values(ds, "specific_humidity", column_dims, ("level",)),
        surface_temperature=_column_values(ds, "surface_temperature", column_dims, ()),
        emissivity=emissivity,
        zenith=_column_values(ds, "sensor_zenith_angle", column_dims, ()),
        emissivity_channels=emissivity_channels,
        level_coord=ds.coords["level"] if "level" in ds.coords else None,
        input_coords=xr.Coordinates(coords),
        surface_pressure=(_column_values(ds, "surface_air_pressure", column_dims, ())
                          if "surface_air_pressure" in ds.variables else None),
    )


def columns_to_dataset(cols: Columns) -> xr.Dataset:
    """An operator input dataset (dims profile, level[, channel]) in canonical units."""
    # Built from xarray Variables (no per-variable DataArray conversion): 1D-Var calls
    # this at every iteration.
    def var(dims, values, name):
        return xr.Variable(dims, values, {"units": CANONICAL_UNITS[name]})

    pl = ("profile", "level")
    data = {
        "air_pressure": var(pl, cols.pressure, "air_pressure"),
        "air_temperature": var(pl, cols.temperature, "air_temperature"),
        "specific_humidity": var(pl, cols.humidity, "specific_humidity"),
        "surface_temperature": var(("profile",), cols.surface_temperature, "surface_temperature"),
        "sensor_zenith_angle": var(("profile",), cols.zenith, "sensor_zenith_angle"),
    }
    if cols.emissivity_channels is None:
        data["surface_emissivity"] = var(("profile",), cols.emissivity, "surface_emissivity")
    else:
        data["surface_emissivity"] = var(("profile", "channel"), cols.emissivity, "surface_emissivity")
    if cols.surface_pressure is not None:
        data["surface_air_pressure"] = var(("profile",), cols.surface_pressure, "surface_air_pressure")
    coords = cols.input_coords
    if coords is None:
        coords = {}
        if cols.emissivity_channels is not None:
            coords["channel"] = np.array(cols.emissivity_channels, dtype=object)
        if cols.level_coord is not None:
            coords["level"] = cols.level_coord.values
    return xr.Dataset(data, coords=coords)


def layout_for(cols: Columns, control_emissivity: bool) -> ControlLayout:
    if not control_emissivity:
        return ControlLayout(n_levels=cols.temperature.shape[1])
    if cols.emissivity_channels is None:
        return ControlLayout(n_levels=cols.temperature.shape[1], emissivity="scalar")
    return ControlLayout(
        n_levels=cols.temperature.shape[1], emissivity="channel",
        emissivity_channels=cols.emissivity_channels,
    )


def to_control(cols: Columns, layout: ControlLayout, what: str) -> np.ndarray:
    """Control vectors [N, n] of ``cols``; q must be positive (ln q is the control)."""
    bad = ~(cols.humidity > 0).all(axis=1)
    if bad.any():
        raise ValueError(
            f"{what}: specific_humidity <= 0 or non-finite (rule: q > 0 kg kg-1 because the "
            f"control variable is ln q); first offending profile index {int(np.flatnonzero(bad)[0])}"
        )
    x = np.empty((cols.n, layout.size))
    x[:, layout.temperature] = cols.temperature
    x[:, layout.ln_humidity] = np.log(cols.humidity)
    x[:, layout.surface_temperature] = cols.surface_temperature
    if layout.emissivity != "none":
        x[:, layout.surface_emissivity] = cols.emissivity.reshape(cols.n, -1)
    return x


def from_control(x: np.ndarray, cols: Columns, layout: ControlLayout,
                 held: np.ndarray | None = None) -> tuple[Columns, np.ndarray]:
    """Columns of control vectors ``x`` [N, n], projected onto the physical limits.

    Temperatures are clipped to the physical model's range (100-400 K), q to
    [1e-8, min(q_s(T, p), 0.1)] kg kg-1 with the clipped T, emissivity to [0, 1].
    Elements ``held`` [N, n] (bool, optional; levels under the ground, which never reach
    the operator) are taken as they are. Returns the new columns and the projected control
    vectors (so that cost and state always agree).
    """
    t_lo, t_hi = TEMPERATURE_LIMITS
    t_raw, lnq_raw = x[:, layout.temperature], x[:, layout.ln_humidity]
    temperature = np.clip(t_raw, t_lo, t_hi)
    q_lo, q_hi = humidity_bounds(temperature, cols.pressure)
    ln_q = np.clip(lnq_raw, np.log(q_lo), np.log(q_hi))
    if held is not None:
        temperature = np.where(held[:, layout.temperature], t_raw, temperature)
        ln_q = np.where(held[:, layout.ln_humidity], lnq_raw, ln_q)
    surface_temperature = np.clip(x[:, layout.surface_temperature], t_lo, t_hi)
    emissivity = cols.emissivity
    if layout.emissivity != "none":
        emissivity = np.clip(x[:, layout.surface_emissivity], 0.0, 1.0).reshape(cols.emissivity.shape)
    new = dataclasses.replace(
        cols,
        temperature=temperature,
        humidity=np.exp(ln_q),
        surface_temperature=surface_temperature,
        emissivity=emissivity,
    )
    projected = x.copy()
    projected[:, layout.temperature] = temperature
    projected[:, layout.ln_humidity] = ln_q
    projected[:, layout.surface_temperature] = surface_temperature
    if layout.emissivity != "none":
        projected[:, layout.surface_emissivity] = emissivity.reshape(cols.n, -1)
    return new, projected


def control_bounds(cols: Columns, layout: ControlLayout) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper limits [N, n] of every control element at the state ``cols``.

    The ln q limits depend on the temperature of ``cols`` (the relative humidity cap), so
    they are exactly the limits :func:`from_control` applied when it produced ``cols``.
    """
    t_lo, t_hi = TEMPERATURE_LIMITS
    lo = np.empty((cols.n, layout.size))
    hi = np.empty((cols.n, layout.size))
    lo[:, layout.temperature], hi[:, layout.temperature] = t_lo, t_hi
    q_lo, q_hi = humidity_bounds(cols.temperature, cols.pressure)
    lo[:, layout.ln_humidity], hi[:, layout.ln_humidity] = np.log(q_lo), np.log(q_hi)
    lo[:, layout.surface_temperature], hi[:, layout.surface_temperature] = t_lo, t_hi
    lo[:, layout.surface_emissivity], hi[:, layout.surface_emissivity] = 0.0, 1.0
    return lo, hi


def humidity_ceiling_slope(cols: Columns) -> np.ndarray:
    """d(ln q upper limit)/dT [K-1] at every level of ``cols`` [N, L].

    Where saturation sets the ln q limit it moves with the temperature of the same level
    (about 0.06 K-1 near 280 K, the Clausius-Clapeyron rate); where the model ceiling
    or the temperature range sets it, the slope is 0. A centred difference of
    :func:`humidity_bounds` over +-0.01 K: the slope of exactly the limit
    :func:`from_control` applies (relative error ~1e-6).
    """
    dt = 0.01
    t = cols.temperature
    upper = [np.log(humidity_bounds(t + sign * dt, cols.pressure)[1]) for sign in (1.0, -1.0)]
    return (upper[0] - upper[1]) / (2.0 * dt)


def write_columns(
    template: xr.Dataset, cols: Columns, column_dims: tuple[str, ...], control_emissivity: bool
) -> xr.Dataset:
    """``template`` with its controlled variables replaced by ``cols`` (canonical units).

    Variables keep their original dim order; their ``units`` attribute becomes canonical.
    """
    shape = tuple(template.sizes[d] for d in column_dims)
    new = {}

    def put(name, values, trailing):
        dims = (*column_dims, *trailing)
        values = values.reshape(*shape, *values.shape[1:])
        attrs = dict(template[name].attrs)
        attrs["units"] = CANONICAL_UNITS[name]
        old_dims = template.variables[name].dims
        order = [d for d in old_dims if d in dims] + [d for d in dims if d not in old_dims]
        # Variables, not DataArrays: no index alignment against the template.
        new[name] = xr.Variable(dims, values, attrs).transpose(*order)

    put("air_temperature", cols.temperature, ("level",))
    put("specific_humidity", cols.humidity, ("level",))
    put("surface_temperature", cols.surface_temperature, ())
    if control_emissivity:
        if cols.emissivity_channels is None:
            put("surface_emissivity", cols.emissivity, ())
        else:
            values = cols.emissivity
            if "channel" in template.coords:
                # Columns hold the operator's channel order; the template may use another.
                order = [list(cols.emissivity_channels).index(str(c)) for c in template["channel"].values]
                values = values[:, order]
            put("surface_emissivity", values, ("channel",))
    out = template.copy()
    out.update(new)
    return out
