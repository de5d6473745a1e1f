"""Talking to an observation operator: calls, Jacobian chaining, observations, R."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import xarray as xr

from rtemu.assim._control import Columns, ControlLayout, columns_to_dataset

_JACOBIANS = (
    "jacobian_air_temperature",
    "jacobian_specific_humidity",
    "jacobian_surface_temperature",
    "jacobian_surface_emissivity",
)


def operator_channels(operator) -> tuple[str, ...]:
    for attr in ("channels", "instrument"):
        if not hasattr(operator, attr):
            raise ValueError(f"operator: has no attribute {attr!r} (rule: the operator protocol, see rtemu.assim)")
    return tuple(str(c) for c in operator.channels)


def _channel_order(out: xr.Dataset, channels) -> np.ndarray | None:
    """Positions of the operator channels in the output's channel coordinate (None: same order)."""
    index = out.indexes.get("channel")
    if index is None:
        return None
    have = [str(c) for c in index]
    if have == list(channels):
        return None
    absent = [c for c in channels if c not in have]
    if absent:
        raise ValueError(f"operator output: channel(s) {absent} missing (rule: the operator protocol)")
    return np.array([have.index(c) for c in channels])


def _take(out: xr.Dataset, name: str, channels, n: int, trailing: tuple[str, ...], order) -> np.ndarray:
    # numpy on the output variables: this runs at every iteration, and xarray's
    # transpose/sel cost more than the emulator itself for a few hundred columns.
    if name not in out:
        raise ValueError(f"operator output: variable {name!r} missing (rule: the operator protocol)")
    var = out.variables[name]
    want = ("profile", "channel", *trailing)
    if sorted(var.dims) != sorted(want):
        raise ValueError(f"operator output: {name} has dims {var.dims}, expected {want}")
    values = np.transpose(np.asarray(var.values), [var.dims.index(d) for d in want])
    if order is not None:
        values = values[:, order]
    if values.shape[:2] != (n, len(channels)):
        raise ValueError(
            f"operator output: {name} has shape {values.shape}, expected ({n}, {len(channels)}, ...)"
        )
    return values


def run_operator(operator, cols: Columns, channels, jacobian: bool) -> dict:
    """One batched operator call: BT [N, C] [K], flag [N, C] and, with ``jacobian``,
    the raw Jacobians (T, q per level; Ts; emissivity)."""
    out = operator.simulate(columns_to_dataset(cols), jacobian=jacobian)
    n = cols.n
    order = _channel_order(out, channels)
    result = {
        "bt": np.asarray(_take(out, "brightness_temperature", channels, n, (), order), dtype=float),
        "flag": np.asarray(_take(out, "quality_flag", channels, n, (), order), dtype=np.int64),
    }
    if jacobian:
        for name in _JACOBIANS:
            trailing = ("level",) if name in _JACOBIANS[:2] else ()
            result[name] = np.asarray(_take(out, name, channels, n, trailing, order), dtype=float)
    return result


def control_jacobian(raw: dict, cols: Columns, layout: ControlLayout) -> np.ndarray:
    """H = dBT/dx in control variables [N, C, n].

    The humidity part is chained to ln q: dBT/d(ln q) = q dBT/dq.
    """
    n, c = raw["bt"].shape
    h = np.zeros((n, c, layout.size))
    h[:, :, layout.temperature] = raw["jacobian_air_temperature"]
    h[:, :, layout.ln_humidity] = raw["jacobian_specific_humidity"] * cols.humidity[:, None, :]
    h[:, :, layout.surface_temperature] = raw["jacobian_surface_temperature"]
    if layout.emissivity == "scalar":
        h[:, :, layout.surface_emissivity.start] = raw["jacobian_surface_emissivity"]
    elif layout.emissivity == "channel":
        # Channel c sees only its own emissivity.
        idx = np.arange(c)
        h[:, idx, layout.surface_emissivity.start + idx] = raw["jacobian_surface_emissivity"]
    return h


def read_observations(observations, channels, n_profiles: int, profile_coord, what="observations") -> np.ndarray:
    """Observed brightness temperatures [N, C] [K] in operator channel order (NaN = missing)."""
    if isinstance(observations, xr.Dataset):
        if "brightness_temperature" not in observations:
            raise ValueError(f"{what}: dataset has no variable 'brightness_temperature'")
        observations = observations["brightness_temperature"]
    if not isinstance(observations, xr.DataArray):
        raise ValueError(
            f"{what}: must be an xarray DataArray or Dataset of brightness_temperature with "
            f"dims (profile, channel), got {type(observations).__name__}"
        )
    da = observations
    if "profile" not in da.dims:
        if n_profiles != 1:
            raise ValueError(f"{what}: no 'profile' dimension but {n_profiles} profiles to analyse")
        da = da.expand_dims("profile")
    if set(da.dims) != {"profile", "channel"}:
        raise ValueError(f"{what}: dims {da.dims}, expected (profile, channel)")
    if da.sizes["profile"] != n_profiles:
        raise ValueError(f"{what}: {da.sizes['profile']} profiles, the background has {n_profiles}")
    if profile_coord is not None and "profile" in da.coords:
        if not np.array_equal(np.asarray(da["profile"].values), np.asarray(profile_coord.values)):
            raise ValueError(f"{what}: profile coordinate differs from the background's (rule: exact alignment)")
    units = da.attrs.get("units", "K")
    if units not in ("K", "kelvin"):
        raise ValueError(f"{what}: units {units!r}, expected 'K'")
    if "channel" in da.coords:
        have = [str(c) for c in da["channel"].values]
        absent = [c for c in channels if c not in have]
        if absent:
            raise ValueError(
                f"{what}: no channel(s) {absent} of the operator (rule: every operator channel "
                "present; use NaN for a missing observation)"
            )
        da = da.sel(channel=list(channels))
    elif da.sizes["channel"] != len(channels):
        raise ValueError(f"{what}: {da.sizes['channel']} channels, the operator has {len(channels)}")
    y = np.asarray(da.transpose("profile", "channel").values, dtype=float)
    infinite = np.isinf(y).any(axis=1)
    if infinite.any():
        raise ValueError(
            f"{what}: infinite brightness temperature (rule: finite or NaN for missing); "
            f"first offending profile index {int(np.flatnonzero(infinite)[0])}"
        )
    return y


def _per_channel(value, channels, name: str) -> np.ndarray:
    if isinstance(value, Mapping):
        absent = [c for c in channels if c not in value]
        if absent:
            raise ValueError(f"{name}: no entry for channel(s) {absent} (rule: one value per operator channel)")
        arr = np.array([float(value[c]) for c in channels])
    elif isinstance(value, xr.DataArray):
        if value.dims != ("channel",):
            raise ValueError(f"{name}: dims {value.dims}, expected ('channel',)")
        if "channel" in value.coords:
            have = [str(c) for c in value["channel"].values]
            absent = [c for c in channels if c not in have]
            if absent:
                raise ValueError(f"{name}: no entry for channel(s) {absent}")
            value = value.sel(channel=list(channels))
        arr = np.asarray(value.values, dtype=float)
    else:
        arr = np.asarray(value, dtype=float)
    if arr.shape != (len(channels),):
        raise ValueError(f"{name}: shape {arr.shape}, expected ({len(channels)},) (one value per channel)")
    if not np.isfinite(arr).all() or (arr < 0).any():
        raise ValueError(f"{name}: values must be finite and >= 0 K, got {arr}")
    return arr


def observation_error_variance(operator, observation_error=None, emulator_error=None) -> np.ndarray:
    """Diagonal of the observation error covariance R [K2], in operator channel order.

    R_ii = sigma_obs_i^2 + sigma_emu_i^2: the instrument noise (or ``observation_error``)
    and, when given, the emulator's audited error added in quadrature, assuming the two
    are independent.

    Parameters
    ----------
    operator : observation operator
        Supplies ``channels`` and ``instrument.noise_k`` / ``instrument.channel_ids``.
    observation_error : Mapping[str, float], xarray.DataArray (channel) or array_like [C], optional
        Observation error standard deviation [K]; default the instrument noise.
    emulator_error : Mapping[str, float], xarray.DataArray (channel) or array_like [C], optional
        Emulator error standard deviation [K] (e.g. the audit's per-channel figure).

    Returns
    -------
    numpy.ndarray
        R diagonal [K2], shape [C].
    """
    channels = operator_channels(operator)
    if observation_error is None:
        inst = operator.instrument
        noise = dict(zip([str(c) for c in inst.channel_ids], np.asarray(inst.noise_k, dtype=float)))
        observation_error = noise
    sigma = _per_channel(observation_error, channels, "observation_error")
    variance = sigma**2
    if emulator_error is not None:
        variance = variance + _per_channel(emulator_error, channels, "emulator_error") ** 2
    if (variance <= 0).any():
        bad = [c for c, v in zip(channels, variance) if v <= 0]
        raise ValueError(f"observation error variance is zero for channel(s) {bad} (rule: R_ii > 0)")
    return variance
