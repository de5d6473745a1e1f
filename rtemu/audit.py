"""The audit: how far an emulator is from its teacher, and what that means for assimilation.

:func:`run_audit` runs the emulator and its reference on an independent test set and
writes, into one directory,

* ``report.md``: per-channel accuracy, the same split by total column water vapour, sensor
  zenith angle and surface emissivity, the emulator's tangent-linear and adjoint checks,
  and a recommended observation error and verdict per channel;
* ``audit.nc``: the per-profile errors behind every number of the report;
* ``summary.json``: the report's figures, machine-readable;
* PNG figures (error histograms, Jacobian profiles, error against column water, RMSE
  against noise).

Definitions (also printed in the report):

The reference ("physical" below) is rtemu's physical model, any other teacher
(:class:`rtemu.Teacher`), or the brightness temperatures (and Jacobians) a test file holds.

* brightness-temperature error d = BT_emulated - BT_physical [K] per (profile, channel);
  bias = mean(d), RMSE = sqrt(mean(d^2)), and the 99.9th percentile and maximum of |d|.
* Jacobian error per (profile, channel), separately for air temperature (T) and specific
  humidity (q):  e = ||K_emulated - K_physical||_2 / ||K_physical||_2  over the levels
  [1]; undefined (NaN) where ||K_physical|| = 0. For humidity K is q dBT/dq = dBT/d(ln q)
  [K]: per unit q (kg kg-1) the norm would be ruled by the driest (upper) levels, where a
  harmless sensitivity to a relative change is magnified by 1/q ~ 1e6.
* An entry (profile, channel) whose ``quality_flag`` (emulator's or physical model's) is
  not zero is left out of every error statistic; the flag rate counts it.
* recommended observation error = sqrt(noise^2 + RMSE^2) [K]: instrument noise and
  emulator error added as independent errors, with the emulator RMSE (bias included) as
  the emulator's error standard deviation.
* verdict: a channel passes when RMSE <= threshold x noise (default threshold 0.5) and
  its flag rate on the audited profiles is below :data:`MAX_FLAG_RATE` (10 %): an emulator
  that flags most of the user's data is not usable on it, however good the rest is.

The numerical pieces are plain numpy functions (:func:`jacobian_relative_error`,
:func:`channel_statistics`, :func:`binned_statistics`, :func:`recommended_error`,
:func:`verdicts`, :func:`taylor_test`, :func:`dot_product_test`).
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
from pathlib import Path

import numpy as np
import xarray as xr

from rtemu import __version__
from rtemu import flags as _flags
from rtemu import teacher as _teacher
from rtemu._checks import INPUT_VARIABLES, input_names, prepare_inputs
from rtemu.instrument import Instrument
from rtemu.physics import JACOBIAN_NAMES
from rtemu._io import open_dataset, to_netcdf_atomic, write_bytes_atomic, write_text_atomic
from rtemu.atmosphere import total_column_water_vapour

__all__ = [
    "run_audit",
    "jacobian_relative_error",
    "channel_statistics",
    "binned_statistics",
    "recommended_error",
    "verdicts",
    "taylor_test",
    "dot_product_test",
    "DEFAULT_THRESHOLD",
    "DEFAULT_COUNT",
    "SPLITS",
]

#: Largest emulator RMSE, as a fraction of the instrument noise, for a channel to pass [1].
DEFAULT_THRESHOLD = 0.5
#: A channel passes only with a flag rate (share of (profile, channel) entries flagged by
#: either model) below this on the audited profiles [1]. 10 %: the tiny test bundle flags
#: at most 10 % of an independent draw of its own envelope (tests/test_audit.py), so a
#: sound emulator on data like its training data stays below it.
MAX_FLAG_RATE = 0.10
#: Test profiles drawn when neither ``data`` nor ``count`` is given [1].
DEFAULT_COUNT = 1000
#: Profiles per evaluation chunk [1] (memory only).
CHUNK_SIZE = 256
#: Bin edges of the split tables; bins are (lo, hi], the first one [lo, hi].
SPLITS = {
    "total_column_water_vapour": {"edges": (0.0, 10.0, 30.0, 50.0, 75.0, math.inf), "units": "kg m-2",
                                  "label": "total column water vapour"},
    "sensor_zenith_angle": {"edges": (0.0, 20.0, 40.0, 65.0, 85.0), "units": "degree",
                            "label": "sensor zenith angle"},
    "surface_emissivity": {"edges": (0.0, 0.4, 0.7, 0.9, 1.0), "units": "1",
                           "label": "surface emissivity"},
}
#: Step sizes of the Taylor test [1] (multiples of the random increment).
TAYLOR_STEPS = (1.0, 0.1, 0.01, 0.001)
#: The Taylor test passes when some step gives a ratio within this of 1 [1].
TAYLOR_TOLERANCE = 0.01
#: The dot-product test passes below this relative error [1] (common practice for a
#: float32 model; a float64 one reaches ~1e-12).
DOT_PRODUCT_TOLERANCE = 1e-4
#: Profiles used by the tangent-linear and adjoint checks [1].
DERIVATIVE_TEST_PROFILES = 8
#: Typical profiles shown in the Jacobian figures: quantiles of column water [1].
TYPICAL_QUANTILES = {"dry": 0.1, "median": 0.5, "moist": 0.9}

_VERDICT_PASS, _VERDICT_FAIL, _VERDICT_NONE = "pass", "fail", "no data"


# -- numerical pieces ----------------------------------------------------------------------
def jacobian_relative_error(emulated, physical) -> np.ndarray:
    """Relative error of a Jacobian profile, per profile and channel.

        e = ||K_e - K_p||_2 / ||K_p||_2     (norms over the last axis, the levels)

    Parameters
    ----------
    emulated, physical : ndarray [N, C, L]
        Jacobians, any one unit (e.g. [K K-1] or [K (kg kg-1)-1]).

    Returns
    -------
    ndarray [N, C]
        [1]; NaN where the physical norm is zero or either profile holds a non-finite value.
    """
    emulated = np.asarray(emulated, dtype=float)
    physical = np.asarray(physical, dtype=float)
    finite = np.isfinite(emulated).all(axis=-1) & np.isfinite(physical).all(axis=-1)
    diff = np.where(finite[..., None], emulated - physical, 0.0)
    norm_p = np.sqrt(np.sum(np.where(finite[..., None], physical, 0.0) ** 2, axis=-1))
    norm_d = np.sqrt(np.sum(diff**2, axis=-1))
    ok = finite & (norm_p > 0.0)
    return np.divide(norm_d, norm_p, out=np.full(norm_p.shape, np.nan), where=ok)


def _quantile(values: np.ndarray, q: float) -> float:
    return float(np.percentile(values, q)) if values.size else math.nan


def channel_statistics(bt_error, jacobian_t_error, jacobian_q_error, flagged, member=None) -> dict:
    """Per-channel error statistics over the unflagged, finite entries.

    Parameters
    ----------
    bt_error : ndarray [N, C]
        Emulated minus physical brightness temperature [K].
    jacobian_t_error, jacobian_q_error : ndarray [N, C]
        Relative Jacobian errors [1] (see :func:`jacobian_relative_error`).
    flagged : ndarray [N, C] of bool
        True where a quality flag is set; those entries are left out of the errors.
    member : ndarray [N, C] of bool, optional
        Restrict everything (flag rate included) to these entries (e.g. one bin).

    Returns
    -------
    dict of ndarray [C]
        ``count`` (entries used) [1], ``members`` (entries in the population) [1],
        ``flag_rate`` [1], ``bias_k``, ``rmse_k``, ``p999_abs_k``, ``max_abs_k`` [K],
        ``jacobian_t_error_median``, ``jacobian_t_error_p95``,
        ``jacobian_q_error_median``, ``jacobian_q_error_p95`` [1], and
        ``nonfinite_unflagged`` [1] (unflagged entries with a non-finite error: a defect).
        Statistics of an empty population are NaN.
    """
    bt_error = np.asarray(bt_error, dtype=float)
    flagged = np.asarray(flagged, dtype=bool)
    member = np.ones_like(flagged) if member is None else np.asarray(member, dtype=bool)
    nchan = bt_error.shape[1]
    names = ("count", "members", "flag_rate", "bias_k", "rmse_k", "p999_abs_k", "max_abs_k",
             "jacobian_t_error_median", "jacobian_t_error_p95", "jacobian_q_error_median",
             "jacobian_q_error_p95", "nonfinite_unflagged")
    out = {name: np.full(nchan, math.nan) for name in names}
    for c in range(nchan):
        pop = member[:, c]
        unflagged = pop & ~flagged[:, c]
        d = bt_error[unflagged, c]
        finite = np.isfinite(d)
        d = d[finite]
        out["members"][c] = pop.sum()
        out["count"][c] = d.size
        out["nonfinite_unflagged"][c] = (~finite).sum()
        if pop.any():
            out["flag_rate"][c] = flagged[pop, c].mean()
        if d.size:
            out["bias_k"][c] = d.mean()
            out["rmse_k"][c] = math.sqrt(np.mean(d**2))
            out["p999_abs_k"][c] = _quantile(np.abs(d), 99.9)
            out["max_abs_k"][c] = np.abs(d).max()
        for key, err in (("t", jacobian_t_error), ("q", jacobian_q_error)):
            e = np.asarray(err, dtype=float)[unflagged, c]
            e = e[np.isfinite(e)]
            out[f"jacobian_{key}_error_median"][c] = _quantile(e, 50.0)
            out[f"jacobian_{key}_error_p95"][c] = _quantile(e, 95.0)
    return out


def bin_index(values, edges) -> np.ndarray:
    """Bin of each value for bins (e_0, e_1], (e_1, e_2], ... (e_0 itself in the first).

    Parameters
    ----------
    values : ndarray
        Any shape, in the units of ``edges``.
    edges : sequence of float
        Increasing bin edges.

    Returns
    -------
    ndarray of int
        Bin number 0 .. len(edges) - 2, or -1 outside the edges or for NaN.
    """
    edges = np.asarray(edges, dtype=float)
    values = np.asarray(values, dtype=float)
    idx = np.searchsorted(edges, values, side="left")
    idx = np.where(values == edges[0], 1, idx)
    idx = np.where(np.isfinite(values) | np.isinf(values), idx, len(edges))
    return np.where((idx >= 1) & (idx < len(edges)), idx - 1, -1)


def binned_statistics(bt_error, jacobian_t_error, jacobian_q_error, flagged, values, edges) -> list:
    """:func:`channel_statistics` per bin of ``values``.

    Parameters
    ----------
    values : ndarray [N] or [N, C]
        The splitting quantity (e.g. column water [kg m-2]); per profile or per entry.
    edges : sequence of float
        Bin edges, see :func:`bin_index`.

    Returns
    -------
    list of dict
        One per bin: ``{"range": (lo, hi), **channel_statistics(...)}``.
    """
    flagged = np.asarray(flagged, dtype=bool)
    values = np.asarray(values, dtype=float)
    if values.ndim == 1:
        values = np.broadcast_to(values[:, None], flagged.shape)
    idx = bin_index(values, edges)
    return [
        {"range": (float(edges[b]), float(edges[b + 1])),
         **channel_statistics(bt_error, jacobian_t_error, jacobian_q_error, flagged, member=idx == b)}
        for b in range(len(edges) - 1)
    ]


def recommended_error(noise_k, rmse_k) -> np.ndarray:
    """Observation error for the emulated channel: sqrt(noise^2 + RMSE^2).

    Instrument noise and emulator error are taken as independent, so their variances add.

    Parameters
    ----------
    noise_k : array_like
        Instrument noise, one standard deviation [K].
    rmse_k : array_like
        Emulator RMSE against the physics [K].

    Returns
    -------
    ndarray
        [K]
    """
    return np.hypot(np.asarray(noise_k, dtype=float), np.asarray(rmse_k, dtype=float))


def verdicts(rmse_k, noise_k, threshold: float, flag_rate=None, max_flag_rate: float = MAX_FLAG_RATE) -> list[str]:
    """``"pass"`` where RMSE <= threshold x noise and the flag rate < ``max_flag_rate``,
    ``"fail"`` otherwise, ``"no data"`` where the RMSE is NaN (every entry flagged).

    Parameters
    ----------
    rmse_k, noise_k : array_like [C]
        [K]
    threshold : float
        [1]
    flag_rate : array_like [C], optional
        Share of flagged entries per channel [1]; None skips that condition.
    max_flag_rate : float
        [1]
    """
    rmse_k = np.asarray(rmse_k, dtype=float)
    rates = np.zeros(rmse_k.shape) if flag_rate is None else np.asarray(flag_rate, dtype=float)
    out = []
    for rmse, noise, rate in zip(rmse_k, np.asarray(noise_k, dtype=float), rates):
        if not math.isfinite(rmse):
            out.append(_VERDICT_NONE)
        else:
            ok = rmse <= threshold * noise and rate < max_flag_rate
            out.append(_VERDICT_PASS if ok else _VERDICT_FAIL)
    return out


# -- tangent-linear and adjoint checks -------------------------------------------------------
def _random_increment(dataset: xr.Dataset, channels, rng: np.random.Generator) -> dict:
    """Input increments in the units of ``dataset``, shaped like its variables.

    Sizes in canonical units: air temperature a random walk along the levels scaled to
    about 1 K (smooth, so the state stays like a training state rather than novel),
    specific humidity 0-10 % drier (never negative; drying keeps states generated at
    saturation from being pushed far above it), surface temperature N(0, 1 K), emissivity 0.005-0.01
    towards the middle of [0, 1] (so that x + dx stays valid).
    """
    prep = prepare_inputs(dataset, channels, errors="raise")
    scales = prep.scales

    def shaped(name, canonical):
        return canonical / scales[name]

    t = dataset["air_temperature"]
    q = dataset["specific_humidity"]
    ts = dataset["surface_temperature"]
    em = dataset["surface_emissivity"]
    em_values = np.asarray(em.values, dtype=float) * scales["surface_emissivity"]
    level_axis = t.dims.index("level")
    walk = np.cumsum(rng.normal(0.0, 1.0, t.shape), axis=level_axis) / math.sqrt(t.sizes["level"])
    return {
        "air_temperature": shaped("air_temperature", walk),
        "specific_humidity": np.asarray(q.values, dtype=float) * -rng.uniform(0.0, 0.1, q.shape),
        "surface_temperature": shaped("surface_temperature", rng.normal(0.0, 1.0, ts.shape)),
        "surface_emissivity": shaped(
            "surface_emissivity", np.where(em_values > 0.5, -1.0, 1.0) * rng.uniform(0.005, 0.01, em.shape)
        ),
    }


def _perturbed(dataset: xr.Dataset, increment: dict, step: float) -> xr.Dataset:
    # .copy(data=...) keeps each variable's attributes (its units) as they are.
    return dataset.assign(
        {name: dataset[name].copy(data=np.asarray(dataset[name].values, dtype=float) + step * dx)
         for name, dx in increment.items()}
    )


def _increment_dataset(dataset: xr.Dataset, increment: dict) -> xr.Dataset:
    return xr.Dataset({name: (dataset[name].dims, dx) for name, dx in increment.items()})


#: Flag bits under which a value is not the operator's own model output (NaN or recomputed).
_SWITCHED = _flags.INVALID_INPUT | _flags.PHYSICS_FALLBACK


def taylor_test(operator, dataset: xr.Dataset, *, steps=TAYLOR_STEPS, seed: int = 0) -> dict:
    """Taylor test of an operator's tangent linear against its own forward model.

        r(a) = ||H(x + a dx) - H(x)|| / ||a H' dx||  ->  1  as a -> 0

    Norms over the profiles of ``dataset``, per channel and over all channels. Entries
    whose value in either forward run does not come from the operator's own smooth model
    (flag bits ``invalid_input`` or ``physics_fallback``) are left out; the other flags
    mark a value but do not change it.

    Parameters
    ----------
    operator : observation operator
        Anything with ``simulate``, ``tangent_linear`` and ``channels``.
    dataset : xarray.Dataset
        A few valid profiles in the input schema.
    steps : sequence of float
        Step sizes a [1].
    seed : int
        Seed of the random increment dx (see :func:`_random_increment`).

    Returns
    -------
    dict
        ``steps`` [1], ``ratio`` (one per step, all channels) [1], ``ratio_per_channel``
        ({channel: [one per step]}) [1], ``excluded_entries`` (per step) [1],
        ``passed`` (every channel has a step with |r - 1| <= TAYLOR_TOLERANCE),
        ``tolerance``.
    """
    rng = np.random.default_rng(seed)
    channels = tuple(operator.channels)
    dx = _random_increment(dataset, channels, rng)
    base = operator.simulate(dataset)
    y0 = base["brightness_temperature"].transpose("profile", "channel").values
    flag0 = (base["quality_flag"].transpose("profile", "channel").values & _SWITCHED) != 0
    jdx = operator.tangent_linear(dataset, _increment_dataset(dataset, dx))
    jdx = jdx["brightness_temperature"].transpose("profile", "channel").values
    ratios, per_channel, excluded = [], [], []
    for step in steps:
        out = operator.simulate(_perturbed(dataset, dx, step))
        y = out["brightness_temperature"].transpose("profile", "channel").values
        use = ~flag0 & ((out["quality_flag"].transpose("profile", "channel").values & _SWITCHED) == 0)
        use &= np.isfinite(y) & np.isfinite(y0) & np.isfinite(jdx)
        excluded.append(int((~use).sum()))
        diff = np.where(use, y - y0, 0.0)
        lin = np.where(use, step * jdx, 0.0)
        ratios.append(_ratio(np.sqrt(np.sum(diff**2)), np.sqrt(np.sum(lin**2))))
        per_channel.append([_ratio(a, b) for a, b in zip(np.sqrt(np.sum(diff**2, axis=0)),
                                                         np.sqrt(np.sum(lin**2, axis=0)))])
    per_channel = np.array(per_channel)  # [steps, C]
    closeness = np.abs(per_channel - 1.0)
    tested = ~np.all(np.isnan(closeness), axis=0)
    best = np.array([np.nanmin(col) if t else math.nan for col, t in zip(closeness.T, tested)])
    passed = bool(tested.any()) and bool(np.all(best[tested] <= TAYLOR_TOLERANCE))
    return {
        "steps": [float(s) for s in steps],
        "ratio": ratios,
        "ratio_per_channel": {c: [float(v) for v in per_channel[:, i]] for i, c in enumerate(channels)},
        "excluded_entries": excluded,
        "passed": passed,
        "tolerance": TAYLOR_TOLERANCE,
    }


def _ratio(num: float, den: float) -> float:
    return float(num / den) if den > 0.0 and math.isfinite(num) and math.isfinite(den) else math.nan


def dot_product_test(operator, dataset: xr.Dataset, *, seed: int = 0, repeats: int = 3) -> dict:
    """Adjoint check: <H' dx, dy> against <dx, H'^T dy> for random dx, dy.

        relative error = |<H' dx, dy> - <dx, H'^T dy>| / max(|<H' dx, dy>|, |<dx, H'^T dy>|)

    Parameters
    ----------
    operator : observation operator
        Anything with ``tangent_linear``, ``adjoint`` and ``channels``.
    dataset : xarray.Dataset
        A few valid profiles.
    seed : int
        Seed of the random vectors.
    repeats : int
        Number of random (dx, dy) pairs [1].

    Returns
    -------
    dict
        ``relative_error`` (one per pair) [1], ``max_relative_error`` [1], ``passed``
        (max below DOT_PRODUCT_TOLERANCE), ``tolerance``.
    """
    rng = np.random.default_rng(seed)
    channels = tuple(operator.channels)
    errors = []
    for _ in range(repeats):
        dx = _random_increment(dataset, channels, rng)
        jdx = operator.tangent_linear(dataset, _increment_dataset(dataset, dx))
        jdx = jdx["brightness_temperature"].transpose("profile", "channel").values
        dy = rng.normal(0.0, 1.0, jdx.shape)
        grads = operator.adjoint(
            dataset,
            xr.DataArray(dy, dims=("profile", "channel"), coords={"channel": list(channels)}),
        )
        lhs = float(np.sum(jdx * dy))
        rhs = float(sum(np.sum(dx[name] * grads[name].transpose(*dataset[name].dims).values)
                        for name in dx))
        scale = max(abs(lhs), abs(rhs))
        errors.append(abs(lhs - rhs) / scale if scale > 0.0 and math.isfinite(scale) else math.nan)
    worst = max(errors) if all(math.isfinite(e) for e in errors) else math.nan
    return {
        "relative_error": errors,
        "max_relative_error": worst,
        "passed": bool(math.isfinite(worst) and worst <= DOT_PRODUCT_TOLERANCE),
        "tolerance": DOT_PRODUCT_TOLERANCE,
    }


# -- test data -----------------------------------------------------------------------------
def _open_test_data(data, channels, stored: bool = False) -> tuple[xr.Dataset, dict, xr.Dataset | None]:
    """The test inputs (a file is opened lazily), their description, and what to close.

    With ``stored``, reference outputs the data holds are kept beside the inputs.
    """
    if isinstance(data, xr.Dataset):
        return _select_inputs(data, channels, stored=stored), _stored_description(data, {"source": "dataset"}), None
    path = Path(data)
    if not path.is_file():
        raise FileNotFoundError(f"data {path}: no such file")
    try:
        opened = open_dataset(path)
    except Exception as exc:  # the netCDF libraries raise many types for a bad file
        raise ValueError(f"data {path}: cannot be read as netCDF ({type(exc).__name__}: {exc})") from None
    description = _stored_description(opened, {"source": "file", "path": str(path.resolve())})
    if "rtemu_seed" in opened.attrs:
        description["seed"] = int(opened.attrs["rtemu_seed"])
    try:
        return _select_inputs(opened, channels, f"data {path}", stored=stored), description, opened
    except BaseException:
        opened.close()
        raise


def _select_inputs(ds: xr.Dataset, channels, source: str = "data", stored: bool = False) -> xr.Dataset:
    """The input variables (with ``stored`` also the reference outputs it holds); a wider
    channel dimension cut to ``channels``."""
    missing = [v for v in INPUT_VARIABLES if v not in ds.variables]
    if missing:
        raise ValueError(f"{source}: missing variable(s) {missing} (rule: the physics input schema, "
                         f"all of {list(INPUT_VARIABLES)})")
    if "profile" not in ds.dims or ds.sizes["profile"] == 0:
        raise ValueError(f"{source}: no profiles (rule: dimension 'profile' with at least one entry)")
    ds = ds[input_names(ds) + ([n for n in _STORED_OUTPUTS if n in ds.variables] if stored else [])]
    if "channel" in ds.dims and "channel" in ds.coords:
        have = [str(c) for c in ds["channel"].values]
        if set(channels) <= set(have) and have != list(channels):
            # A test file of the whole instrument serves an emulator of some of its channels.
            ds = ds.sel(channel=list(channels))
    return ds


_STORED_OUTPUTS = ("brightness_temperature", *JACOBIAN_NAMES, "quality_flag")


def _stored_description(ds: xr.Dataset, description: dict) -> dict:
    """``description`` plus, for data holding brightness temperatures, who computed them."""
    if "brightness_temperature" in ds.variables:
        description["stored_outputs"] = [n for n in _STORED_OUTPUTS if n in ds.variables]
        for key in ("rtemu_teacher", "rtemu_teacher_version"):
            if key in ds.attrs:
                description[key.removeprefix("rtemu_")] = str(ds.attrs[key])
    return description


class StoredReference:
    """The reference outputs a test set holds, served as a teacher of its own profiles.

    ``simulate(block)`` returns the ``brightness_temperature`` (and Jacobians, and
    ``quality_flag``) stored in ``block``; the audit uses it when the data already holds
    what a teacher computed, so no model runs.
    """

    def __init__(self, instrument: Instrument, source: str):
        self.instrument = instrument
        self.source = source

    @property
    def channels(self) -> tuple[str, ...]:
        return self.instrument.channel_ids

    def simulate(self, dataset: xr.Dataset, jacobian: bool = False) -> xr.Dataset:
        names = [n for n in _STORED_OUTPUTS if n in dataset.variables and (jacobian or n not in JACOBIAN_NAMES)]
        return dataset[names]

    def __repr__(self):
        return f"StoredReference({self.source!r})"


def _check_stored_instrument(ds_attrs: dict, instrument: Instrument, source: str) -> None:
    """Refuse stored values computed for channels other than the emulator's (bands, position)."""
    toml = ds_attrs.get("rtemu_instrument_toml")
    if not toml:
        return
    stored = Instrument.from_toml(str(toml), source=f"{source}:rtemu_instrument_toml")
    own = {ch.id: ch for ch in stored.channels}
    for ch in instrument.channels:
        if ch.id in own and dataclasses.replace(own[ch.id], noise_k=ch.noise_k) != ch:
            raise ValueError(f"{source}: its brightness temperatures were computed for another definition of "
                             f"channel {ch.id!r} than the emulator's (rule: the same channel; give a teacher "
                             "to recompute them)")


def _choose_reference(reference, operator, dataset: xr.Dataset, attrs: dict, source: str):
    """The given teacher; else the outputs the data holds; else rtemu's physics."""
    if reference is not None:
        return reference
    bundle = getattr(operator, "bundle", None)
    if "brightness_temperature" in dataset.variables:
        _check_stored_instrument(attrs, operator.instrument, source)
        made_by = attrs.get("rtemu_teacher")
        if bundle is not None and made_by is not None and str(made_by) != bundle.teacher[0]:
            raise ValueError(f"{source}: its brightness temperatures come from teacher {str(made_by)!r}, the emulator "
                             f"learned {bundle.teacher[0]!r} (rule: audit against the emulator's own teacher)")
        return StoredReference(operator.instrument, source)
    if bundle is not None and bundle.teacher[0] != _teacher.PHYSICS_TEACHER[0]:
        raise ValueError(f"the emulator learned teacher {bundle.teacher[0]!r} (version {bundle.teacher[1]}), not "
                         "rtemu's physics (rule: audit against its own teacher: give it as reference "
                         "(--teacher MODULE:NAME) or test data holding its brightness temperatures)")
    from rtemu.runtime import PhysicalOperator

    return PhysicalOperator(operator.instrument)


def _reference_description(reference, data_description: dict) -> dict:
    if isinstance(reference, StoredReference):
        return {"kind": "stored", "source": reference.source,
                "teacher": data_description.get("teacher"), "version": data_description.get("teacher_version"),
                "jacobians": all(n in data_description.get("stored_outputs", ()) for n in JACOBIAN_NAMES)}
    name, version = _teacher.teacher_identity(reference)
    kind = "physics" if (name, version) == _teacher.PHYSICS_TEACHER else "teacher"
    entry = {"kind": kind, "teacher": name, "version": version}
    if isinstance(reference, _teacher.ImportedTeacher):
        entry["spec"] = reference.spec
    return entry


def _draw_test_data(count, seed, operator) -> tuple[xr.Dataset, dict, xr.Dataset]:
    from rtemu import sampling

    if seed is None:
        # Fresh entropy, recorded in the summary, so the set can be drawn again.
        seed = int(np.random.SeedSequence().entropy % 2**63)
    grid = getattr(operator, "pressure_hpa", None)
    ds = sampling.draw_states(count, seed=seed, pressure_hpa=grid, channels=operator.instrument)
    description = {"source": "drawn", "count": int(count), "seed": int(seed),
                   "generator_version": sampling.GENERATOR_VERSION}
    return _select_inputs(ds, tuple(operator.channels)), description, None


def _training_hashes(operator) -> set:
    """SHA-256 digests of the files the emulator was trained on, if its bundle records them."""
    bundle = getattr(operator, "bundle", None)
    if bundle is None:
        return set()
    hashes = {getattr(bundle, "training_data_sha256", None)}
    hashes |= {stats.get("training_data_sha256") for stats in getattr(bundle, "channel_stats", {}).values()
               if isinstance(stats, dict)}
    return {h for h in hashes if h}


def _check_independent(data, operator) -> None:
    """Refuse the emulator's own training file as a test set: it would flatter the emulator."""
    hashes = _training_hashes(operator)
    if not hashes or isinstance(data, xr.Dataset):
        return
    from rtemu.streaming import _sha256

    if _sha256(data) in hashes:
        raise ValueError(f"data {data}: is the emulator's training file (same SHA-256) "
                         "(rule: audit on an independent test set, e.g. rtemu sample with another seed)")


def _check_arguments(data, count, seed, threshold) -> float:
    if data is not None and count is not None:
        raise ValueError("give data (a test file) or count (profiles to draw), not both")
    if data is not None and seed is not None:
        raise ValueError("seed applies to drawn test profiles (count), not to a data file")
    if count is not None and (isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < 1):
        raise ValueError(f"count must be an integer >= 1, got {count!r}")
    try:
        threshold = float(threshold)
    except (TypeError, ValueError):
        raise ValueError(f"threshold must be a number > 0, got {threshold!r}") from None
    if not (math.isfinite(threshold) and threshold > 0.0):
        raise ValueError(f"threshold must be finite and > 0, got {threshold!r}")
    return threshold


# -- evaluation ----------------------------------------------------------------------------
@dataclasses.dataclass
class _Collected:
    """Per-profile results of the whole test set."""

    profile: np.ndarray  # [N] profile coordinate
    bt_error: np.ndarray  # [N, C] [K]
    bt_physical: np.ndarray  # [N, C] [K]
    jacobian_t_error: np.ndarray  # [N, C] [1]
    jacobian_q_error: np.ndarray  # [N, C] [1]
    humidity_sensitivity: np.ndarray  # [N, C] ||q dBT/dq||_2 of the physics [K]
    quality_flag: np.ndarray  # [N, C] int32
    tcwv: np.ndarray  # [N] [kg m-2]
    zenith: np.ndarray  # [N] [degree]
    emissivity: np.ndarray  # [N, C] [1]

    @property
    def flagged(self) -> np.ndarray:
        return self.quality_flag != 0


def _geometry(prep) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Column water above the ground [kg m-2], zenith angle [degree], emissivity [1]; NaN for
    invalid profiles."""
    tcwv = total_column_water_vapour(prep.pressure_hpa, prep.specific_humidity, prep.surface_air_pressure)
    zen = prep.sensor_zenith_angle.copy()
    em = prep.surface_emissivity.copy()
    # prepare_inputs puts a stand-in state into invalid profiles: never bin those.
    for arr in (tcwv, zen, em):
        arr[~prep.valid] = np.nan
    return tcwv, zen, em


def _outputs(result: xr.Dataset, names) -> dict:
    dims = {2: ("profile", "channel"), 3: ("profile", "channel", "level")}
    return {n: result[n].transpose(*dims[result[n].ndim]).values for n in names}


def _reference_outputs(reference, block: xr.Dataset, names) -> dict:
    """The teacher's outputs, checked (:func:`rtemu.teacher.checked_simulate`); NaN for the
    Jacobians of a reference without them."""
    result = _teacher.checked_simulate(reference, block, jacobian=True, require_jacobian=False,
                                       source=getattr(reference, "source", None))
    n, c, nlev = block.sizes["profile"], len(reference.channels), block.sizes["level"]
    out = {}
    for name in names:
        if name in result.variables:
            out[name] = _outputs(result, [name])[name]
        else:
            out[name] = np.full((n, c, nlev) if name in ("jacobian_air_temperature",
                                                          "jacobian_specific_humidity") else (n, c), np.nan)
    return out


_COMPARED = ("brightness_temperature", "jacobian_air_temperature", "jacobian_specific_humidity",
             "quality_flag")


def _evaluate(emulator, reference, dataset: xr.Dataset, progress: bool) -> _Collected:
    from tqdm.auto import tqdm

    channels = tuple(emulator.channels)
    n = dataset.sizes["profile"]
    parts: dict[str, list] = {}
    with tqdm(total=n, desc="audit", unit="profile", disable=not progress) as bar:
        for start in range(0, n, CHUNK_SIZE):
            block = dataset.isel(profile=slice(start, min(n, start + CHUNK_SIZE))).load()
            emu = _outputs(emulator.simulate(block, jacobian=True), _COMPARED)
            phys = _reference_outputs(reference, block, _COMPARED)
            prep = prepare_inputs(block, channels, errors="mask")
            tcwv, zen, em = _geometry(prep)
            q = prep.to_caller_order(prep.specific_humidity)[:, None, :]  # the Jacobians' level order
            stop = start + block.sizes["profile"]
            piece = {
                "profile": block["profile"].values if "profile" in block.coords else np.arange(start, stop),
                "bt_error": emu["brightness_temperature"] - phys["brightness_temperature"],
                "bt_physical": phys["brightness_temperature"],
                "jacobian_t_error": jacobian_relative_error(emu["jacobian_air_temperature"],
                                                            phys["jacobian_air_temperature"]),
                "jacobian_q_error": jacobian_relative_error(emu["jacobian_specific_humidity"] * q,
                                                            phys["jacobian_specific_humidity"] * q),
                "humidity_sensitivity": np.linalg.norm(phys["jacobian_specific_humidity"] * q, axis=2),
                "quality_flag": (emu["quality_flag"] | phys["quality_flag"]).astype(np.int32),
                "tcwv": tcwv,
                "zenith": zen,
                "emissivity": em,
            }
            for key, value in piece.items():
                parts.setdefault(key, []).append(np.asarray(value))
            bar.update(block.sizes["profile"])
    return _Collected(**{k: np.concatenate(v) for k, v in parts.items()})


def _clean_rows(collected: _Collected) -> np.ndarray:
    """Profiles with every channel unflagged and finite."""
    return (~collected.flagged & np.isfinite(collected.bt_error)).all(axis=1)


def _typical_profiles(collected: _Collected) -> dict:
    """{label: row} of clean profiles nearest the column-water quantiles (distinct rows)."""
    rows = np.flatnonzero(_clean_rows(collected) & np.isfinite(collected.tcwv))
    if rows.size == 0:
        return {}
    tcwv = collected.tcwv[rows]
    chosen: dict = {}
    for label, q in TYPICAL_QUANTILES.items():
        target = np.quantile(tcwv, q)
        order = np.argsort(np.abs(tcwv - target), kind="stable")
        for i in order:
            if int(rows[i]) not in chosen.values():
                chosen[label] = int(rows[i])
                break
    return chosen


def _derivative_rows(collected: _Collected) -> np.ndarray:
    rows = np.flatnonzero(_clean_rows(collected))
    if rows.size <= DERIVATIVE_TEST_PROFILES:
        return rows
    return rows[np.linspace(0, rows.size - 1, DERIVATIVE_TEST_PROFILES).round().astype(int)]


def _jacobian_examples(emulator, reference, dataset, rows: dict, tcwv: np.ndarray) -> dict:
    """Emulated and physical T and q Jacobians of the typical profiles, with their pressures.

    ``rows`` maps labels to rows of ``dataset``; ``tcwv`` [kg m-2] is the column water of
    every row.
    """
    if not rows:
        return {}
    labels = list(rows)
    block = dataset.isel(profile=[rows[k] for k in labels]).load()
    names = ("jacobian_air_temperature", "jacobian_specific_humidity")
    emu = _outputs(emulator.simulate(block, jacobian=True), names)
    phys = _reference_outputs(reference, block, names)
    prep = prepare_inputs(block, tuple(emulator.channels), errors="mask")
    pressure = prep.to_caller_order(prep.pressure_hpa)  # the Jacobians' level order
    q = prep.to_caller_order(prep.specific_humidity)[:, None, :]
    return {
        label: {
            "row": rows[label],
            "tcwv": float(tcwv[rows[label]]),
            "pressure_hpa": pressure[i],
            "emulated_t": emu["jacobian_air_temperature"][i],
            "physical_t": phys["jacobian_air_temperature"][i],
            "emulated_q": (emu["jacobian_specific_humidity"] * q)[i],  # dBT/dln q [K]
            "physical_q": (phys["jacobian_specific_humidity"] * q)[i],
        }
        for i, label in enumerate(labels)
    }


def _derivative_checks(emulator, dataset, rows) -> dict:
    if rows.size == 0:
        reason = "no profile with every channel unflagged"
        return {"tangent_linear": {"run": False, "reason": reason},
                "adjoint": {"run": False, "reason": reason}}
    block = dataset.isel(profile=rows).load()
    tl = taylor_test(emulator, block, seed=1)
    ad = dot_product_test(emulator, block, seed=2)
    return {"tangent_linear": {"run": True, "profiles": int(rows.size), **tl},
            "adjoint": {"run": True, "profiles": int(rows.size), **ad}}


# -- outputs -------------------------------------------------------------------------------
def _jsonable(value):
    """NaN/inf become null; numpy scalars and arrays become plain Python."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return _jsonable(value.tolist())
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def _per_channel(stats: dict, index: int) -> dict:
    entry = {}
    for key, values in stats.items():
        v = values[index]
        entry[key] = int(v) if key in ("count", "members", "nonfinite_unflagged") else float(v)
    return entry


def _model_description(model, emulator) -> dict:
    if model is None:
        return {"path": None, "sha256": None, "operator": repr(emulator)}
    from rtemu.streaming import _sha256

    path = Path(model)
    return {"path": str(path.resolve()), "sha256": _sha256(path) if path.is_file() else None,
            "operator": repr(emulator), "training_data_sha256": sorted(_training_hashes(emulator))}


def _flag_counts(quality_flag: np.ndarray) -> dict:
    meanings = _flags.FLAG_MEANINGS.split()
    return {name: int(((quality_flag & int(mask)) != 0).sum())
            for name, mask in zip(meanings, _flags.FLAG_MASKS)}


def _summary(collected, emulator, model, data_description, threshold, checks) -> dict:
    inst = emulator.instrument
    channels = tuple(emulator.channels)
    noise = np.array([ch.noise_k for ch in inst.channels], dtype=float)
    stats = channel_statistics(collected.bt_error, collected.jacobian_t_error,
                               collected.jacobian_q_error, collected.flagged)
    rec = recommended_error(noise, stats["rmse_k"])
    verdict = verdicts(stats["rmse_k"], noise, threshold, flag_rate=stats["flag_rate"])
    per_channel = {}
    for i, cid in enumerate(channels):
        entry = {"noise_k": float(noise[i]), **_per_channel(stats, i)}
        usable = collected.humidity_sensitivity[~collected.flagged[:, i], i]
        usable = usable[np.isfinite(usable)]
        entry["humidity_sensitivity_median_k"] = _quantile(usable, 50.0)
        entry["rmse_over_noise"] = entry["rmse_k"] / noise[i]
        entry["recommended_error_k"] = float(rec[i])
        entry["verdict"] = verdict[i]
        per_channel[cid] = entry
    splits = {}
    for name, spec in SPLITS.items():
        values = {"total_column_water_vapour": collected.tcwv, "sensor_zenith_angle": collected.zenith,
                  "surface_emissivity": collected.emissivity}[name]
        bins = binned_statistics(collected.bt_error, collected.jacobian_t_error,
                                 collected.jacobian_q_error, collected.flagged, values, spec["edges"])
        splits[name] = {
            "units": spec["units"],
            "edges": list(spec["edges"]),
            "bins": [{"range": list(b["range"]),
                      "channels": {cid: _per_channel({k: v for k, v in b.items() if k != "range"}, i)
                                   for i, cid in enumerate(channels)}}
                     for b in bins],
        }
    n = collected.bt_error.shape[0]
    return _jsonable({
        "rtemu_version": __version__,
        "instrument": inst.name,
        "model": _model_description(model, emulator),
        "data": data_description,
        "profiles": n,
        "profiles_fully_unflagged": int(_clean_rows(collected).sum()),
        "flag_counts": _flag_counts(collected.quality_flag),
        "threshold": threshold,
        "verdict_rule": f"pass when rmse_k <= {threshold:g} x noise_k and flag_rate < {MAX_FLAG_RATE:g}",
        "max_flag_rate": MAX_FLAG_RATE,
        "recommended_error_rule": "sqrt(noise_k**2 + rmse_k**2), rmse_k the emulator RMSE (bias included)",
        "jacobian_error_definition": "||K_emulated - K_physical||_2 / ||K_physical||_2 over levels, per "
                                     "profile and channel, separately for air temperature (t: K = "
                                     "dBT/dT) and specific humidity (q: K = q dBT/dq = dBT/dln q)",
        "statistics_exclude": "entries (profile, channel) with a non-zero quality_flag of either model",
        "channels": per_channel,
        "splits": splits,
        **checks,
    })


def _audit_dataset(collected: _Collected, emulator, summary: dict) -> xr.Dataset:
    channels = list(emulator.channels)
    pc = ("profile", "channel")
    ds = xr.Dataset(
        {
            "brightness_temperature_error": (pc, collected.bt_error, {
                "long_name": "emulated minus physical brightness temperature", "units": "K"}),
            "brightness_temperature_physical": (pc, collected.bt_physical, {
                "standard_name": "toa_brightness_temperature",
                "long_name": "brightness temperature of the physical model", "units": "K"}),
            "jacobian_air_temperature_error": (pc, collected.jacobian_t_error, {
                "long_name": "relative error of the air-temperature Jacobian profile",
                "units": "1", "comment": summary["jacobian_error_definition"]}),
            "jacobian_specific_humidity_error": (pc, collected.jacobian_q_error, {
                "long_name": "relative error of the specific-humidity Jacobian profile",
                "units": "1", "comment": summary["jacobian_error_definition"]}),
            "humidity_sensitivity": (pc, collected.humidity_sensitivity, {
                "long_name": "norm over levels of q dBT/dq of the physical model (the denominator of "
                             "jacobian_specific_humidity_error)", "units": "K"}),
            "quality_flag": (pc, collected.quality_flag.astype(np.int32), {
                **_flags.flag_attrs(),
                "comment": "bitwise or of the emulator's and the physical model's flags; "
                           + _flags.flag_attrs()["comment"]}),
            "total_column_water_vapour": (("profile",), collected.tcwv, {
                "standard_name": "atmosphere_mass_content_of_water_vapor", "units": "kg m-2"}),
            "sensor_zenith_angle": (("profile",), collected.zenith, {
                "standard_name": "sensor_zenith_angle", "units": "degree"}),
            "surface_emissivity": (pc, collected.emissivity, {
                "long_name": "surface emissivity", "units": "1"}),
            "instrument_noise": (("channel",), np.array([summary["channels"][c]["noise_k"] for c in channels]), {
                "long_name": "instrument noise (one standard deviation)", "units": "K"}),
        },
        coords={"profile": ("profile", collected.profile), "channel": ("channel", np.array(channels, dtype=object))},
    )
    ds.attrs = {
        "title": "rtemu emulator audit: per-profile errors",
        "instrument": summary["instrument"],
        "model": summary["model"]["path"] or summary["model"]["operator"],
        "rtemu_version": __version__,
        "rtemu_threshold": summary["threshold"],
    }
    return ds


def run_audit(
    model,
    output_dir,
    *,
    data=None,
    count: int | None = None,
    seed: int | None = None,
    threshold: float = DEFAULT_THRESHOLD,
    progress: bool = True,
    operator=None,
    reference=None,
) -> dict:
    """Measure an emulator against its teacher and write the audit directory.

    Parameters
    ----------
    model : str or Path or None
        The rtemu ONNX bundle (opened with ``EmulatedOperator.load``); may be None when
        ``operator`` is given.
    output_dir : str or Path
        Directory for ``report.md``, ``summary.json``, ``audit.nc`` and the PNG figures
        (created if needed). Nothing is written unless the whole audit succeeds;
        ``report.md`` is written last.
    data : str, Path or xarray.Dataset, optional
        Independent test profiles in the physics input schema (e.g. from ``rtemu
        sample``). A ``channel`` dimension holding more channels than the emulator is
        reduced to the emulator's channels. Data that holds ``brightness_temperature``
        (and the Jacobians, and ``quality_flag``) is its own reference unless
        ``reference`` is given: the audit compares against those values and runs no
        model (without stored Jacobians the Jacobian errors are left empty).
    count : int, optional
        Instead of ``data``: draw this many test profiles with
        :func:`rtemu.sampling.draw_states` on the emulator's pressure grid. With neither,
        :data:`DEFAULT_COUNT` profiles are drawn.
    seed : int, optional
        Seed of the drawn profiles; default a fresh random seed (recorded in the summary).
        Use a seed other than the training set's: the same seed draws the same profiles.
    threshold : float
        A channel passes when its emulator RMSE <= threshold x instrument noise [1].
    progress : bool
        Show a tqdm progress bar.
    operator : observation operator, optional
        Use this object as the emulator instead of loading ``model`` (anything with
        ``instrument``, ``channels``, ``simulate``, ``tangent_linear``, ``adjoint``).
    reference : Teacher, optional
        The truth: any object in the :class:`rtemu.Teacher` protocol with the emulator's
        channels (its output is checked, see :func:`rtemu.teacher.checked_simulate`);
        default the values ``data`` holds, else ``PhysicalOperator(emulator.instrument)``.

    Returns
    -------
    dict
        The content of ``summary.json``.

    Raises
    ------
    ValueError
        Bad arguments, an unreadable data file or input that breaks the schema; nothing is
        written then.
    """
    threshold = _check_arguments(data, count, seed, threshold)
    output_dir = Path(output_dir)
    if output_dir.exists() and not output_dir.is_dir():
        raise ValueError(f"output {output_dir}: exists and is not a directory")
    if operator is None:
        if model is None:
            raise ValueError("give model (an rtemu ONNX bundle) or operator")
        from rtemu.runtime import EmulatedOperator

        operator = EmulatedOperator.load(model)
    if reference is not None:
        _teacher.check_teacher(reference, "reference")
        if tuple(reference.channels) != tuple(operator.channels):
            raise ValueError(f"reference channels {list(reference.channels)} differ from the emulator's "
                             f"{list(operator.channels)} (rule: the same channels in the same order)")

    if data is not None:
        dataset, data_description, opened = _open_test_data(data, tuple(operator.channels),
                                                            stored=reference is None)
        try:
            _check_independent(data, operator)
            attrs = opened.attrs if opened is not None else data.attrs
            reference = _choose_reference(reference, operator, dataset, attrs, data_description.get("path", "data"))
        except BaseException:
            if opened is not None:
                opened.close()
            raise
    else:
        dataset, data_description, opened = _draw_test_data(count or DEFAULT_COUNT, seed, operator)
        reference = _choose_reference(reference, operator, dataset, {}, "drawn")
    reference_description = _reference_description(reference, data_description)
    from tqdm.auto import tqdm

    from rtemu import _plots

    try:
        collected = _evaluate(operator, reference, dataset, progress)
        # The steps after the profile loop take a while too (figures above all): show them.
        with tqdm(total=4, desc="audit: checks, figures, files", unit="step", disable=not progress) as steps:
            checks = _derivative_checks(operator, dataset, _derivative_rows(collected))
            steps.update()
            examples = _jacobian_examples(operator, reference, dataset, _typical_profiles(collected),
                                          collected.tcwv)
            steps.update()
            summary = _summary(collected, operator, model, data_description, threshold, checks)
            summary["reference"] = _jsonable(reference_description)
            _relative_paths(summary, output_dir)
            audit_ds = _audit_dataset(collected, operator, summary)
            figures = _plots.render_all(collected, summary, examples, tuple(operator.channels))
            summary["figures"] = sorted(figures)
            report = _report(summary, examples)
            steps.update()

            # Everything is computed; write, report.md last so that its presence means "complete".
            to_netcdf_atomic(audit_ds, output_dir / "audit.nc")
            write_text_atomic(output_dir / "summary.json", json.dumps(summary, indent=2, allow_nan=False) + "\n")
            for name, png in figures.items():
                write_bytes_atomic(output_dir / name, png)
            write_text_atomic(output_dir / "report.md", report)
            steps.update()
    finally:
        if opened is not None:
            opened.close()
    return summary


def _relative_paths(summary: dict, output_dir: Path) -> None:
    """Paths of the model and data relative to the audit directory (the report moves with it)."""
    for part in (summary["model"], summary["data"]):
        if part.get("path"):
            part["path"] = os.path.relpath(part["path"], output_dir.resolve())


# -- the report ----------------------------------------------------------------------------
def _fmt(value, spec=".3f", missing="–"):
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return missing
    return format(value, spec)


def _table(header: list[str], rows: list[list[str]]) -> list[str]:
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    lines += ["| " + " | ".join(r) + " |" for r in rows]
    return lines


def _range_label(lo, hi, units):
    hi_text = "∞" if hi is None or hi == math.inf else f"{hi:g}"
    return f"{lo:g}–{hi_text} {units}".strip()


def _reference_text(reference: dict) -> str:
    made_by = (f"teacher `{reference['teacher']}` version {reference['version']}" if reference.get("teacher")
               else "an unrecorded model")
    if reference["kind"] == "stored":
        jacobians = "" if reference["jacobians"] else "; no Jacobians stored, so no Jacobian errors"
        return f"the values stored in the test set, computed by {made_by}{jacobians}"
    if reference["kind"] == "physics":
        return f"rtemu's physical model (version {reference['version']})"
    spec = f" (`{reference['spec']}`)" if reference.get("spec") else ""
    return f"{made_by}{spec}"


def _bottom_line(summary: dict) -> str:
    """The verdict in one paragraph: how many channels pass, and why each other one does not."""
    channels = summary["channels"]
    passed = [c for c, s in channels.items() if s["verdict"] == _VERDICT_PASS]
    reasons = []
    for c, s in channels.items():
        if s["verdict"] == _VERDICT_NONE:
            reasons.append(f"`{c}` no data (every entry flagged)")
        elif s["verdict"] == _VERDICT_FAIL:
            why = []
            if not s["rmse_over_noise"] <= summary["threshold"]:
                why.append(f"RMSE {_fmt(s['rmse_over_noise'], '.2f')} × noise")
            if not s["flag_rate"] < summary["max_flag_rate"]:
                why.append(f"flag rate {_fmt(s['flag_rate'], '.1%')}")
            reasons.append(f"`{c}` ({', '.join(why)})")
    text = (f"**Bottom line: {len(passed)} of {len(channels)} channels pass** (RMSE ≤ "
            f"{summary['threshold']:g} × noise and flag rate < {summary['max_flag_rate']:.0%} on these "
            "profiles).")
    if reasons:
        text += " Not trusted here: " + "; ".join(reasons) + "."
    return text


def _report(summary: dict, examples: dict) -> str:
    channels = summary["channels"]
    ids = list(channels)
    data = summary["data"]
    if data["source"] == "drawn":
        data_text = (f"{summary['profiles']} profiles drawn with rtemu.sampling.draw_states "
                     f"(seed {data['seed']}, generator version {data['generator_version']})")
    elif data["source"] == "file":
        data_text = f"{summary['profiles']} profiles from `{data['path']}`"
    else:
        data_text = f"{summary['profiles']} profiles from an in-memory dataset"
    model = summary["model"]
    model_text = (f"`{model['path']}` (SHA-256 {model['sha256']})" if model["path"]
                  else f"stand-in operator `{model['operator']}`")
    lines = [
        f"# Emulator audit: {summary['instrument']}",
        "",
        _bottom_line(summary),
        "",
        f"Profiles used: {data_text}; {summary['profiles_fully_unflagged']} of them with every channel "
        "unflagged.",
        "",
        f"- Emulator: {model_text}",
        f"- Test set: {data_text}",
        f"- Reference: {_reference_text(summary['reference'])}",
        f"- Profiles with every channel unflagged: {summary['profiles_fully_unflagged']} of {summary['profiles']}",
        "- Flag counts (profile, channel entries): "
        + ", ".join(f"{k} {v}" for k, v in summary["flag_counts"].items()),
        f"- rtemu {summary['rtemu_version']}",
        "",
        "## Rules used",
        "",
        f"- **Verdict**: a channel passes when the emulator RMSE ≤ {summary['threshold']:g} × instrument "
        f"noise (threshold set with `threshold`) and its flag rate on these profiles is below "
        f"{summary['max_flag_rate']:.0%}.",
        "- **Recommended observation error** = sqrt(noise² + RMSE²), with the emulator RMSE "
        "(bias included) standing for the emulator error; the two are taken as independent.",
        "- **BT error** = emulated − physical brightness temperature; bias = mean, RMSE = root mean "
        "square, p99.9 and max of the absolute error.",
        "- **Jacobian error** = ‖K_emulated − K_physical‖₂ / ‖K_physical‖₂ over the levels, per profile "
        "and channel; reported separately for air temperature (T, K = ∂BT/∂T) and specific humidity "
        "(q, K = q ∂BT/∂q = ∂BT/∂ln q, the response to a relative change: per kg kg-1 the driest upper "
        "levels would dominate through 1/q) as median and 95th percentile over profiles. "
        "`q sensitivity` is the median ‖q ∂BT/∂q‖₂ of the physics, the denominator: where it is tiny "
        "(channels that hardly see humidity) any emulated humidity sensitivity makes the relative "
        "q error large.",
        "- Entries (profile, channel) with any quality flag set (emulator or physics) are left out of "
        "all error statistics; the flag rate is their share.",
    ]
    if summary["profiles"] < 10000:
        lines.append(f"- With {summary['profiles']} profiles the 99.9th percentile rests on fewer than "
                     "10 errors above it; read it as a rough tail estimate.")
    defects = [c for c in ids if channels[c]["nonfinite_unflagged"]]
    if defects:
        lines += ["", "**Defect:** unflagged non-finite emulator output in channel(s) "
                  + ", ".join(f"{c} ({channels[c]['nonfinite_unflagged']})" for c in defects)
                  + "; these entries are left out of the statistics."]

    lines += ["", "## Per-channel accuracy", ""]
    header = ["channel", "noise [K]", "used", "flag rate", "bias [K]", "RMSE [K]", "p99.9 abs [K]",
              "max abs [K]", "T-Jac err median", "T-Jac err p95", "q-Jac err median", "q-Jac err p95", "q sensitivity [K]",
              "RMSE / noise", "recommended error [K]", "verdict"]
    rows = []
    for c in ids:
        s = channels[c]
        rows.append([f"`{c}`", _fmt(s["noise_k"], ".2f"), str(s["count"]), _fmt(s["flag_rate"], ".1%"),
                     _fmt(s["bias_k"], "+.3f"), _fmt(s["rmse_k"]), _fmt(s["p999_abs_k"]), _fmt(s["max_abs_k"]),
                     _fmt(s["jacobian_t_error_median"], ".3g"), _fmt(s["jacobian_t_error_p95"], ".3g"),
                     _fmt(s["jacobian_q_error_median"], ".3g"), _fmt(s["jacobian_q_error_p95"], ".3g"),
                     _fmt(s["humidity_sensitivity_median_k"], ".2g"),
                     _fmt(s["rmse_over_noise"], ".2f"), _fmt(s["recommended_error_k"]),
                     f"**{s['verdict']}**" if s["verdict"] == _VERDICT_FAIL else s["verdict"]])
    lines += _table(header, rows)

    for name, split in summary["splits"].items():
        spec = SPLITS[name]
        bins = [b for b in split["bins"] if any(b["channels"][c]["members"] for c in ids)]
        lines += ["", f"## By {spec['label']}", "",
                  "RMSE [K] (bias [K]) per bin; `n` = unflagged entries used. Empty bins are left out; "
                  "summary.json holds every statistic of every bin.", ""]
        header = ["channel"] + [_range_label(*b["range"], split["units"]) for b in bins]
        rows = []
        for c in ids:
            cells = []
            for b in bins:
                s = b["channels"][c]
                cells.append(f"{_fmt(s['rmse_k'])} ({_fmt(s['bias_k'], '+.3f')}), n={s['count']}"
                             if s["count"] else "–")
            rows.append([f"`{c}`"] + cells)
        lines += _table(header, rows)

    lines += ["", "## Tangent linear and adjoint of the emulator", ""]
    tl, ad = summary["tangent_linear"], summary["adjoint"]
    if not tl["run"]:
        lines.append(f"Not run: {tl['reason']}.")
    else:
        lines += [
            f"Taylor test on {tl['profiles']} unflagged profiles: r(a) = ‖H(x + a dx) − H(x)‖ / ‖a H′dx‖ "
            "should approach 1 as the step a shrinks. dx: air temperature a smooth random profile of about "
            "1 K, specific humidity 0–10 % drier, surface temperature N(0, 1 K), emissivity 0.005–0.01. "
            f"Passed when every channel has a step with |r − 1| ≤ {tl['tolerance']:g}: "
            f"**{'passed' if tl['passed'] else 'failed'}**.",
            "",
        ]
        header = ["channel"] + [f"a = {s:g}" for s in tl["steps"]]
        rows = [["all channels"] + [_fmt(r, ".5f") for r in tl["ratio"]]]
        rows += [[f"`{c}`"] + [_fmt(r, ".5f") for r in tl["ratio_per_channel"][c]] for c in ids]
        lines += _table(header, rows)
        if any(tl["excluded_entries"]):
            lines += ["", "Entries left out per step (invalid input or physics fallback in a perturbed run): "
                      + ", ".join(map(str, tl["excluded_entries"]))]
        errs = ", ".join(_fmt(e, ".2e") for e in ad["relative_error"])
        lines += [
            "",
            f"Dot-product test on the same profiles: |⟨H′dx, dy⟩ − ⟨dx, H′ᵀdy⟩| / max(|⟨H′dx, dy⟩|, "
            f"|⟨dx, H′ᵀdy⟩|) = {errs} for {len(ad['relative_error'])} random pairs (dy ~ N(0, 1 K)); "
            f"passed below {ad['tolerance']:g}: **{'passed' if ad['passed'] else 'failed'}**.",
        ]

    lines += ["", "## Figures", ""]
    captions = {
        "rmse_over_noise.png": "Emulator RMSE as a fraction of instrument noise, with the verdict threshold.",
        "error_histograms.png": "Distribution of emulated − physical brightness temperature per channel "
                                "(unflagged entries); dotted lines at ± instrument noise.",
        "error_vs_tcwv.png": "Error against total column water vapour per channel: points, and bias and "
                             "RMSE in column-water bins.",
        "jacobians_temperature.png": "Air-temperature Jacobians of typical profiles: physical (wide, pale) "
                                     "and emulated (dashed).",
        "jacobians_humidity.png": "Humidity Jacobians (∂BT/∂ln q) of typical profiles: physical (wide, "
                                  "pale) and emulated (dashed).",
    }
    for name in summary["figures"]:
        lines += [f"![{captions.get(name, name)}]({name})", "", captions.get(name, ""), ""]
    if examples:
        lines.append("Typical profiles (nearest the 10 %, 50 % and 90 % quantiles of column water among the "
                     f"{summary['profiles_fully_unflagged']} fully unflagged profiles of {summary['profiles']}; "
                     "when many are flagged they are not typical of the whole test set): "
                     + ", ".join(f"{k} = row {v['row']} ({v['tcwv']:.1f} kg m-2)" for k, v in examples.items())
                     + ".")
    lines += ["", "Per-profile errors: `audit.nc`; every number of this report: `summary.json`.", ""]
    return "\n".join(lines)
