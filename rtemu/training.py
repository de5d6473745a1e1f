"""Training: recipes, training data, and the per-channel scikit-learn emulators.

Stage "training" (physics -> sampling -> training -> export -> runtime). This module fits
the models in memory; :mod:`rtemu.export` turns them into the ONNX bundle
(:func:`rtemu.export.train_to_onnx` is the one-call entry point).

Model of channel c (see :mod:`rtemu.features` for x and z)::

    BT_c = lin_c(x, e_c) + mean_c + scale_c * mlp_c(z, (e_c - m_e) / s_e)
    lin_c(x, e) = beta0 + s.beta1 + eps beta2 + eps (s.beta3)      (ridge regression)

with s the standardised raw features and eps the standardised emissivity; the network
(scikit-learn ``MLPRegressor``, tanh units) fits the standardised residual of the linear
part. Fitting the residual of a linear model leaves the network only the nonlinear part
of the radiative transfer, whose size is far smaller than the brightness-temperature
range; the e_c * x terms carry the surface-reflection product e (Ts - T_down) to first
order.

Recipes are TOML files with a fixed schema (see ``SCHEMA``); the shipped ones live in
``rtemu/recipes``.
"""

from __future__ import annotations

import dataclasses
import hashlib
import os
import sys
import time
import warnings
import zlib
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from rtemu import _checks
from rtemu import atmosphere as _atm
from rtemu._io import open_dataset
from rtemu.features import (
    HUMIDITY_TRANSFORMS,
    ZENITH_TRANSFORMS,
    FeatureConfig,
    FeatureTransform,
    channel_kernels_of,
    temperature_laws_of,
    kernel_columns,
    raw_features,
)
from rtemu.instrument import Instrument
from rtemu.teacher import PHYSICS_TEACHER

#: Recipe ``[features] instrument_kernels``: none, one kernel term per sub-band of every
#: channel, or one per channel (its sub-bands' weighted geometric-mean coefficients).
INSTRUMENT_KERNELS = ("none", "bands", "channels")
#: What the linear part of a channel sees: every z coordinate, or only the channel's own
#: kernel scalars (with Ts and s(theta)).
LINEAR_INPUTS = ("all", "own_kernel")

__all__ = [
    "Recipe",
    "load_recipe",
    "list_recipes",
    "TrainingData",
    "load_training_data",
    "ChannelFit",
    "TrainedEmulator",
    "fit_emulator",
]


# ---- recipes ------------------------------------------------------------------------------
def _int(lo=None):
    def check(v):
        if isinstance(v, bool) or not isinstance(v, int) or (lo is not None and v < lo):
            return f"an integer >= {lo}" if lo is not None else "an integer"
        return None
    return check


def _float(lo=None, hi=None, strict_lo=False):
    def check(v):  # noqa: D401 - a checker returns a problem description or None
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            return "a number"
        if lo is not None and (v <= lo if strict_lo else v < lo):
            return f"a number {'>' if strict_lo else '>='} {lo}"
        if hi is not None and v > hi:
            return f"a number <= {hi}"
        return None
    check.is_float = True
    return check


def _bool(v):
    return None if isinstance(v, bool) else "true or false"


def _str(v):
    return None if isinstance(v, str) else "a string"


def _choice(options):
    def check(v):
        return None if v in options else f"one of {list(options)}"
    return check


def _coefficients(v):
    if (not isinstance(v, list) or len(v) > 64
            or any(isinstance(k, bool) or not isinstance(k, (int, float)) or not 0 < k < float("inf") for k in v)):
        return "a list of at most 64 positive numbers [m2 kg-1]"
    return None


def _layers(v):
    if (not isinstance(v, list) or not v or len(v) > 4
            or any(isinstance(h, bool) or not isinstance(h, int) or h < 1 or h > 1024 for h in v)):
        return "a list of 1 to 4 integers in [1, 1024]"
    return None


_NETWORK = {
    "hidden_layers": _layers,
    "activation": _choice(("tanh",)),
    "solver": _choice(("lbfgs", "adam")),
    "alpha": _float(0.0),
    "max_iter": _int(1),
    "tol": _float(0.0),
    "learning_rate_init": _float(0.0, strict_lo=True),
    "batch_size": _int(1),
    "early_stopping": _bool,
    "check_every": _int(1),
    "patience": _int(1),
    "opacity_kernels": _bool,
    "profile_blocks": _bool,
    "linear_inputs": _choice(LINEAR_INPUTS),
    "jacobian_weight": _float(0.0),
    "jacobian_max_iter": _int(1),
    "jacobian_check_every": _int(1),
    "ridge_alpha": _float(0.0),
}

SCHEMA: dict[str, dict[str, Any]] = {
    "": {"name": _str, "description": _str},
    "training": {
        "seed": _int(0),
        "validation_fraction": _float(0.0, 0.9, strict_lo=True),
        "max_profiles": _int(0),
        "jacobian_profiles": _int(1),
        "jacobian_validation_profiles": _int(1),
        "jacobian_probes": _int(1),
        "jacobian_floor": _float(0.0, strict_lo=True),
    },
    "features": {
        "humidity": _choice(HUMIDITY_TRANSFORMS),
        "humidity_floor": _float(0.0, strict_lo=True),
        "zenith": _choice(ZENITH_TRANSFORMS),
        "temperature_components": _int(0),
        "humidity_components": _int(0),
        "linear_humidity_components": _int(0),
        "water_path": _bool,
        "water_path_components": _int(0),
        "water_path_floor": _float(0.0, strict_lo=True),
        "line_kernels": _coefficients,
        "continuum_kernels": _coefficients,
        "humidity_top_hpa": _float(0.0),
        "reflection_kernels": _bool,
        "instrument_kernels": _choice(INSTRUMENT_KERNELS),
        "kernel_temperature_laws": _bool,
    },
    "linear": {"residual": _bool, "ridge_alpha": _float(0.0)},
    "network": {k: v for k, v in _NETWORK.items() if k != "ridge_alpha"},
    "envelope": {"bounds_margin": _float(0.0, 1.0), "novelty_margin": _float(1.0), "tropopause_check": _bool},
}
#: Keys a ``[channels."<id>"]`` table may override (network settings and the ridge penalty).
CHANNEL_KEYS = {k: v for k, v in _NETWORK.items() if k != "activation"}

DEFAULTS = {
    "training": {"seed": 0, "validation_fraction": 0.15, "max_profiles": 0, "jacobian_profiles": 4000,
                 "jacobian_validation_profiles": 1000, "jacobian_probes": 16, "jacobian_floor": 1e-3},
    "features": {**dataclasses.asdict(FeatureConfig()), "instrument_kernels": "none",
                 "kernel_temperature_laws": False},
    "linear": {"residual": True, "ridge_alpha": 1e-3},
    "network": {
        "hidden_layers": [32, 32], "activation": "tanh", "solver": "lbfgs", "alpha": 1e-6,
        "max_iter": 2000, "tol": 0.0, "learning_rate_init": 1e-3, "batch_size": 256,
        "early_stopping": True, "check_every": 250, "patience": 3, "opacity_kernels": True, "profile_blocks": True,
        "linear_inputs": "all",
        "jacobian_weight": 0.0, "jacobian_max_iter": 600, "jacobian_check_every": 200,
    },
    "envelope": {"bounds_margin": 0.02, "novelty_margin": 1.0, "tropopause_check": True},
}


@dataclasses.dataclass(frozen=True)
class Recipe:
    """A validated training recipe.

    Attributes
    ----------
    name : str
    description : str
    source : str
        Where it was read from (path or ``<package>/name.toml``).
    text : str
        The TOML text, stored verbatim in the bundle.
    settings : dict
        Section -> key -> value, defaults filled in.
    channels : dict
        Channel id -> overridden network keys.
    """

    name: str
    description: str
    source: str
    text: str
    settings: dict
    channels: dict

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.text.encode("utf-8")).hexdigest()

    @property
    def seed(self) -> int:
        return self.settings["training"]["seed"]

    def feature_config(self, instrument: Instrument | None = None) -> FeatureConfig:
        """The shared transform's settings; ``instrument`` fills the channel kernels when
        the recipe has ``instrument_kernels = "bands"`` or ``"channels"`` (from all its
        channels; see :func:`rtemu.features.channel_kernels_of`)."""
        settings = dict(self.settings["features"])
        kind = settings.pop("instrument_kernels")
        laws = settings.pop("kernel_temperature_laws")
        if laws and kind == "none":
            raise ValueError(f"recipe {self.source}: [features] kernel_temperature_laws = true needs "
                             "instrument_kernels = \"bands\" or \"channels\" (the laws are the instrument's)")
        if kind != "none":
            if instrument is None:
                raise ValueError(f"recipe {self.source}: instrument_kernels = {kind!r} needs the instrument "
                                 "(the training data's) to build its kernels")
            settings["channel_kernels"] = channel_kernels_of(instrument, one_per_channel=kind == "channels")
            if laws:
                settings["kernel_temperature_laws"] = temperature_laws_of(instrument)
        return FeatureConfig(**settings)

    def uses_jacobians(self, channel_ids=None) -> bool:
        """Whether any of these channels (None: any channel) has a Jacobian term
        (``jacobian_weight`` > 0), so that training needs the physical Jacobians."""
        channel_ids = None if channel_ids is None else [str(c) for c in channel_ids]
        if self.settings["network"]["jacobian_weight"] > 0 and (
                channel_ids is None or any("jacobian_weight" not in self.channels.get(c, {}) for c in channel_ids)):
            return True
        return any(v.get("jacobian_weight", 0.0) > 0 for c, v in self.channels.items()
                   if channel_ids is None or c in channel_ids)

    def network_for(self, channel_id: str) -> dict:
        """Network settings for one channel (recipe ``[network]`` + its overrides)."""
        net = dict(self.settings["network"])
        net["ridge_alpha"] = self.settings["linear"]["ridge_alpha"]
        net.update(self.channels.get(channel_id, {}))
        return net

    @classmethod
    def from_toml(cls, text: str, source: str = "<string>") -> "Recipe":
        """Parse and validate recipe TOML ``text`` (``source`` names it in errors)."""
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ValueError(f"recipe {source}: not valid TOML: {exc}") from None
        settings = {section: dict(values) for section, values in DEFAULTS.items()}
        channels: dict[str, dict] = {}
        top = {}
        for key, value in data.items():
            if key == "channels":
                if not isinstance(value, dict):
                    raise ValueError(f"recipe {source}: 'channels' must be a table of channel tables")
                for cid, overrides in value.items():
                    if not isinstance(overrides, dict):
                        raise ValueError(f"recipe {source}: 'channels.{cid}' must be a table")
                    channels[cid] = _checked(source, f"channels.{cid}", overrides, CHANNEL_KEYS)
            elif key in SCHEMA and key:
                if not isinstance(value, dict):
                    raise ValueError(f"recipe {source}: '{key}' must be a table")
                settings[key].update(_checked(source, key, value, SCHEMA[key]))
            elif key in SCHEMA[""]:
                top.update(_checked(source, "", {key: value}, SCHEMA[""]))
            else:
                raise ValueError(f"recipe {source}: unknown key '{key}'")
        if "name" not in top:
            raise ValueError(f"recipe {source}: missing key 'name'")
        depth = len(settings["network"]["hidden_layers"])
        for cid, overrides in channels.items():
            if "hidden_layers" in overrides and len(overrides["hidden_layers"]) != depth:
                raise ValueError(
                    f"recipe {source}: key 'channels.{cid}.hidden_layers' has "
                    f"{len(overrides['hidden_layers'])} layers, [network] has {depth} (rule: all "
                    "channels of a bundle share the number of hidden layers)"
                )
        try:
            FeatureConfig(**{k: v for k, v in settings["features"].items()
                             if k not in ("instrument_kernels", "kernel_temperature_laws")})
        except ValueError as exc:
            raise ValueError(f"recipe {source}: [features]: {exc}") from None
        return cls(name=top["name"], description=top.get("description", ""), source=source,
                   text=text, settings=settings, channels=channels)


def _checked(source: str, section: str, values: dict, schema: dict) -> dict:
    out = {}
    for key, value in values.items():
        where = f"{section}.{key}" if section else key
        if key not in schema:
            raise ValueError(f"recipe {source}: unknown key '{where}'")
        problem = schema[key](value)
        if problem:
            raise ValueError(f"recipe {source}: key '{where}' must be {problem}, got {value!r}")
        out[key] = float(value) if getattr(schema[key], "is_float", False) else value
    return out


def _package_dir():
    return resources.files("rtemu") / "recipes"


def list_recipes() -> list[str]:
    """Names of the recipes shipped with rtemu (``rtemu/recipes/*.toml``)."""
    return sorted(p.name[:-5] for p in _package_dir().iterdir() if p.name.endswith(".toml"))


def load_recipe(name_or_path) -> Recipe:
    """Load a shipped recipe by name (see :func:`list_recipes`) or a recipe file by path."""
    if isinstance(name_or_path, Recipe):
        return name_or_path
    text_name = str(name_or_path)
    path = Path(text_name)
    if path.suffix == ".toml" or path.exists() or "/" in text_name or "\\" in text_name:
        if not path.is_file():
            raise ValueError(f"recipe file {text_name} does not exist")
        return Recipe.from_toml(path.read_text(encoding="utf-8"), source=str(path))
    resource = _package_dir() / f"{text_name}.toml"
    if not resource.is_file():
        raise ValueError(f"unknown recipe {text_name!r}; shipped recipes: {', '.join(list_recipes())} "
                         "(or give a path to a .toml file)")
    return Recipe.from_toml(resource.read_text(encoding="utf-8"), source=f"rtemu/recipes/{text_name}.toml")


# ---- training data ----------------------------------------------------------------------
#: Physical validity range of each input (the bundle's invalid_input rule), mirroring the
#: rules of the physical model (rtemu._checks): T, Ts in [100, 400] K, 0 <= q < 0.1,
#: 0 <= e <= 1, 0 <= theta <= 85 degree.
PHYSICAL_BOUNDS = {
    "air_temperature": _checks.TEMPERATURE_RANGE_K,
    "specific_humidity": (0.0, float(np.nextafter(np.float32(_checks.HUMIDITY_MAX), np.float32(0)))),
    "surface_temperature": _checks.TEMPERATURE_RANGE_K,
    "sensor_zenith_angle": (0.0, _checks.ZENITH_MAX_DEG),
    "surface_emissivity": (0.0, 1.0),
    # derived checks of the joint state (see humidity_index); no physical limit of their own
    "humidity_index": (-3.0e38, 3.0e38),
    "skin_minus_air_temperature": (-3.0e38, 3.0e38),
}


def humidity_index(air_temperature, specific_humidity, pressure_hpa, floor: float = 1e-9) -> np.ndarray:
    """h = ln q - 17.67 (T - 273.15) / (T - 29.65) + ln p - 17.67 = ln(RH) + const [1].

    Uses the saturation vapour pressure of Bolton (1980), eq. 10,
    e_s = 6.112 exp(17.67 T_c / (T_c + 243.5)) [hPa] with T_c = T - 273.15 [degree C],
    and 17.67 T_c / (T_c + 243.5) = 17.67 - 17.67 * 243.5 / (T - 29.65); so
    h - ln(epsilon 6.112) = ln(q p / (epsilon e_s)) ~ ln RH. The bundle bounds h per level: supersaturated or
    unusually dry air for its temperature falls outside.

    Parameters
    ----------
    air_temperature : array_like
        T [K], (N, L).
    specific_humidity : array_like
        q [kg kg-1], (N, L).
    pressure_hpa : array_like
        p [hPa], (L,).
    floor : float
        q floor of the logarithm [kg kg-1].

    Returns
    -------
    numpy.ndarray
        h [1], (N, L).

    References
    ----------
    Bolton, D. (1980). The computation of equivalent potential temperature. Mon. Wea. Rev.
    108, 1046-1053, doi:10.1175/1520-0493(1980)108<1046:TCOEPT>2.0.CO;2.
    """
    T = np.asarray(air_temperature, dtype=float)
    q = np.maximum(np.asarray(specific_humidity, dtype=float), floor)
    return np.log(q) + 17.67 * 243.5 / (T - 29.65) + (np.log(np.asarray(pressure_hpa, dtype=float)) - 17.67)
_STATE = ("air_temperature", "specific_humidity", "surface_temperature", "surface_emissivity",
          "sensor_zenith_angle")


@dataclasses.dataclass
class TrainingData:
    """Training profiles as float64 arrays, levels surface-first (pressure decreasing).

    Attributes
    ----------
    instrument : Instrument
        The instrument of the file (all its channels).
    pressure_hpa : numpy.ndarray
        The fixed level grid [hPa], shape (L,).
    air_temperature, specific_humidity : numpy.ndarray
        [K], [kg kg-1], shape (N, L).
    surface_temperature, sensor_zenith_angle : numpy.ndarray
        [K], [degree], shape (N,).
    surface_emissivity, brightness_temperature : numpy.ndarray
        [1], [K], shape (N, C) over the instrument's channels.
    usable : numpy.ndarray
        bool (N, C): finite brightness temperature and zero quality flag.
    sha256 : str
        SHA-256 of the training file (or of the arrays, for an in-memory dataset).
    source : str
    jacobian_air_temperature, jacobian_specific_humidity : numpy.ndarray or None
        Physical Jacobians dBT/dT [K K-1] and dBT/dq [K (kg kg-1)-1], float32, shape
        (N, C, L), levels surface-first; read only on request (``load_training_data(...,
        jacobians=True)``), for recipes with a Jacobian term (``jacobian_weight`` > 0).
    teacher : (str, str)
        Name and version of the model that computed the outputs (file attributes
        ``rtemu_teacher``, ``rtemu_teacher_version``; without them rtemu's physics,
        version ``"unrecorded"``).
    """

    instrument: Instrument
    pressure_hpa: np.ndarray
    air_temperature: np.ndarray
    specific_humidity: np.ndarray
    surface_temperature: np.ndarray
    surface_emissivity: np.ndarray
    sensor_zenith_angle: np.ndarray
    brightness_temperature: np.ndarray
    usable: np.ndarray
    sha256: str
    source: str
    jacobian_air_temperature: Any = None
    jacobian_specific_humidity: Any = None
    teacher: tuple = (PHYSICS_TEACHER[0], "unrecorded")

    @property
    def n_profiles(self) -> int:
        return self.air_temperature.shape[0]


def _file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _arrays_sha256(ds: xr.Dataset) -> str:
    digest = hashlib.sha256()
    for name in sorted(ds.variables):
        values = np.asarray(ds[name].values)
        digest.update(name.encode() + b"\0" + str(values.dtype).encode() + str(values.shape).encode())
        digest.update(np.ascontiguousarray(values).tobytes() if values.dtype.kind != "O"
                      else "\0".join(map(str, values.ravel())).encode())
    return digest.hexdigest()


def load_training_data(data, jacobians: bool = False) -> TrainingData:
    """Read a training set (netCDF path or xarray.Dataset in the operator schema).

    The file must hold the inputs, ``brightness_temperature`` (profile, channel), the
    instrument TOML in the global attribute ``rtemu_instrument_toml`` (written by
    :func:`rtemu.sampling.sample_to_netcdf`) and one pressure grid for all profiles.
    With ``jacobians`` it must also hold ``jacobian_air_temperature`` and
    ``jacobian_specific_humidity`` (profile, channel, level) (``rtemu sample --jacobian``).
    """
    if isinstance(data, xr.Dataset):
        ds, source, sha = data, "<in-memory dataset>", None
    else:
        path = Path(data)
        if not path.is_file():
            raise ValueError(f"training data {path} does not exist")
        ds, source, sha = open_dataset(path), str(path), _file_sha256(path)
    try:
        return _read_training(ds, source, sha, jacobians)
    finally:
        if not isinstance(data, xr.Dataset):
            ds.close()


def _read_training(ds: xr.Dataset, source: str, sha: str | None, jacobians: bool = False) -> TrainingData:
    toml = ds.attrs.get("rtemu_instrument_toml")
    if not toml:
        raise ValueError(f"training data {source}: no 'rtemu_instrument_toml' attribute (rule: make "
                         "training sets with rtemu.sampling.sample_to_netcdf or add the instrument)")
    inst = Instrument.from_toml(str(toml), source=f"{source}:rtemu_instrument_toml")
    missing = [n for n in ("air_pressure", *_STATE, "brightness_temperature") if n not in ds]
    if missing:
        raise ValueError(f"training data {source}: missing variables {missing}")
    ids = [str(c) for c in ds["channel"].values] if "channel" in ds.coords else None
    if ids != list(inst.channel_ids):
        raise ValueError(f"training data {source}: channel coordinate {ids} does not match the "
                         f"instrument's channels {list(inst.channel_ids)}")
    p = np.asarray(ds["air_pressure"].values, dtype=float)
    if p.ndim == 2:
        if not np.all(p == p[:1]):
            first = int(np.flatnonzero(np.any(p != p[:1], axis=1))[0])
            raise ValueError(f"training data {source}: air_pressure differs between profiles (rule: "
                             f"one fixed grid); first offending profile index {first}")
        p = p[0]
    if p.ndim != 1 or p.size < 2 or not (np.all(np.diff(p) < 0) or np.all(np.diff(p) > 0)):
        raise ValueError(f"training data {source}: air_pressure must be a strictly monotonic level grid")
    flip = p[0] < p[-1]  # top-first on file: store surface-first
    order = slice(None, None, -1) if flip else slice(None)

    def get(name, dims):
        da = ds[name]
        if set(da.dims) != set(dims):
            raise ValueError(f"training data {source}: {name} has dims {da.dims}, expected {dims}")
        return np.asarray(da.transpose(*dims).values, dtype=float)

    T = get("air_temperature", ("profile", "level"))[:, order]
    q = get("specific_humidity", ("profile", "level"))[:, order]
    ts = get("surface_temperature", ("profile",))
    zen = get("sensor_zenith_angle", ("profile",))
    em = ds["surface_emissivity"]
    em = (np.repeat(get("surface_emissivity", ("profile",))[:, None], len(ids), axis=1)
          if em.ndim == 1 else get("surface_emissivity", ("profile", "channel")))
    bt = get("brightness_temperature", ("profile", "channel"))
    usable = np.isfinite(bt)
    if "quality_flag" in ds:
        usable &= get("quality_flag", ("profile", "channel")) == 0
    state_ok = (np.isfinite(T).all(1) & np.isfinite(q).all(1) & np.isfinite(ts) & np.isfinite(zen)
                & np.isfinite(em).all(1))
    usable &= state_ok[:, None]
    jac = {}
    if jacobians:
        names = ("jacobian_air_temperature", "jacobian_specific_humidity")
        missing = [n for n in names if n not in ds]
        if missing:
            raise ValueError(f"training data {source}: missing {missing} (rule: a recipe with a Jacobian term, "
                             "jacobian_weight > 0, needs a training set sampled with --jacobian)")
        for name in names:
            jac[name] = np.asarray(ds[name].transpose("profile", "channel", "level").values,
                                   dtype=np.float32)[:, :, order]
            usable &= np.isfinite(jac[name]).all(axis=2)
    return TrainingData(
        instrument=inst, pressure_hpa=p[order].copy(), air_temperature=T, specific_humidity=q,
        surface_temperature=ts, surface_emissivity=em, sensor_zenith_angle=zen,
        brightness_temperature=bt, usable=usable,
        sha256=sha or _arrays_sha256(ds[[n for n in ("air_pressure", *_STATE, "brightness_temperature")]]),
        source=source, teacher=(str(ds.attrs.get("rtemu_teacher", PHYSICS_TEACHER[0])),
                                str(ds.attrs.get("rtemu_teacher_version", "unrecorded"))), **jac,
    )


# ---- per-channel fit ----------------------------------------------------------------------
@dataclasses.dataclass
class ChannelFit:
    """One channel's fitted emulator (scikit-learn objects) and its validation figures.

    The linear part acts on the compressed coordinates z (not on the raw profiles): with
    32+ components per block the subspace holds the physical Jacobians to well under 1 %
    and the linear residual is the same as on the raw features (measured on the demo
    sounder), while its Jacobian then needs no per-channel raw-space product.

    Attributes
    ----------
    channel_id : str
    ridge : sklearn.linear_model.Ridge or None
        Linear part on the design [zs, eps, eps * zs, sig * zs] (None when the recipe
        disables it); zs, eps, sig standardised z, emissivity and s(theta).
    z_mean, z_scale : numpy.ndarray
        Standardisation of z in the design [1].
    s_mean, s_scale : float
        Standardisation of s(theta) [1].
    e_mean, e_scale : float
        Standardisation of the channel's emissivity [1].
    target_mean, target_scale : float
        Standardisation of the network's target (the linear residual) [K].
    mlp : sklearn.neural_network.MLPRegressor
    z_columns : numpy.ndarray or None
        Columns of z the channel uses (None: all). A channel trained without the opacity
        kernels (recipe ``opacity_kernels = false``) leaves out their columns: its linear
        and first-layer weights on them are zero in the bundle. (Measured on the demo
        sounder: the kernels cut the humidity and window channels' errors 3-10x but made
        the temperature-sounding channels' fits converge more slowly, e.g. 0.046 -> 0.060 K
        RMSE for the lowest-peaking one at 600 iterations.) A channel with
        ``profile_blocks = false`` sees only the kernel scalars, Ts and s(theta).
    n_components : int
        K, the width of the shared z (with ``z_columns``) [1].
    stats : dict
        Validation figures (deterministic: no timings) stored in the bundle.
    seconds : float
        Wall time of the fit [s] (reported, not stored).
    linear_mask : numpy.ndarray or None
        0/1 per used z column [K_used]: the columns the linear part sees (None: all).
        With ``linear_inputs = "own_kernel"`` only the channel's own kernel scalars, Ts
        and s(theta): a gray channel's brightness temperature is f + (1 - e) r of its own
        kernel, and a ridge on every column (the 16 channels' kernels are nearly collinear
        in value, not in their Jacobians) fitted the values with Jacobians 57 % off
        (demo sounder, mw-win, measured), which the network then had to undo.
    """

    channel_id: str
    ridge: Any
    z_mean: np.ndarray
    z_scale: np.ndarray
    s_mean: float
    s_scale: float
    e_mean: float
    e_scale: float
    target_mean: float
    target_scale: float
    mlp: Any
    stats: dict
    z_columns: Any = None
    n_components: int = 0
    seconds: float = 0.0
    linear_mask: Any = None

    @property
    def hidden(self) -> tuple[int, ...]:
        return tuple(int(c.shape[1]) for c in self.mlp.coefs_[:-1])

    def design(self, z: np.ndarray, s: np.ndarray, e: np.ndarray) -> np.ndarray:
        """Linear design [zs, eps, eps * zs, sig * zs].

        The products make the linear coefficients affine in the emissivity (surface
        reflection: dR/de = t0 (B(Ts) - R_down)) and in the slant-path factor (the
        weighting functions move with sec(theta)).
        """
        zs = (self._z(z) - self.z_mean) / self.z_scale
        if self.linear_mask is not None:  # columns outside the linear inputs: zero, so zero coefficients
            zs = zs * self.linear_mask
        eps = ((e - self.e_mean) / self.e_scale)[:, None]
        sig = ((s - self.s_mean) / self.s_scale)[:, None]
        return np.concatenate([zs, eps, eps * zs, sig * zs], axis=1)

    def _z(self, z: np.ndarray) -> np.ndarray:
        return z if self.z_columns is None else z[:, self.z_columns]

    def network_input(self, z: np.ndarray, e: np.ndarray) -> np.ndarray:
        return np.concatenate([self._z(z), ((e - self.e_mean) / self.e_scale)[:, None]], axis=1)

    def linear(self, z: np.ndarray, s: np.ndarray, e: np.ndarray) -> np.ndarray:
        if self.ridge is None:
            return np.zeros(z.shape[0])
        return self.ridge.predict(self.design(z, s, e))

    def predict(self, z: np.ndarray, s: np.ndarray, e: np.ndarray) -> np.ndarray:
        """BT [K] from compressed z [N, K], s(theta) [N] [1] and emissivity e [N] [1]."""
        net = self.mlp.predict(self.network_input(z, e))
        return self.linear(z, s, e) + self.target_mean + self.target_scale * net

    def ridge_coefficients(self) -> tuple:
        """(b0, b1, b2, b3, b4): the ridge intercept and its coefficients on [zs, eps, eps zs,
        sig zs] (see :meth:`design`); zeros without a linear part."""
        K = self.z_mean.size
        if self.ridge is None:
            return 0.0, np.zeros(K), 0.0, np.zeros(K), np.zeros(K)
        coef = np.asarray(self.ridge.coef_, dtype=float).ravel()
        return (float(np.ravel(self.ridge.intercept_)[0]), coef[:K], coef[K], coef[K + 1:2 * K + 1],
                coef[2 * K + 1:])

    def folded(self) -> dict[str, np.ndarray]:
        """The channel's parameters in the bundle's form (float64), on z1 = [z, 1].

        Keys: linear_weight, linear_emissivity_weight, linear_zenith_weight [K+1] (last
        entry: the constant), layer1_weight [K+1, H1] (last row: bias), layer1_emissivity
        [1, H1], layer{k}_weight, layer{k}_bias [1, Hk], output_weight [Hd, 1]; the graph
        computes y = a_d w_out + z1.l + e (z1.m) + s (z1.n).
        Algebra: zs = (z - mu)/sigma, eps = (e - m)/w, sig = (s - ms)/ws, ridge
        coefficients (b0, b1, b2, b3, b4) on [zs, eps, eps zs, sig zs]; v3 = b3/sigma,
        c3 = mu.v3, v4 = b4/sigma, c4 = mu.v4:
        l = b1/sigma - (m/w) v3 - (ms/ws) v4,  l_1 = b0 - mu.(b1/sigma) - m b2/w + (m/w) c3
        + (ms/ws) c4 (+ the network's output constant);  m = v3/w, m_1 = (b2 - c3)/w;
        n = v4/ws, n_1 = -c4/ws.
        """
        b0, b1, b2, b3, b4 = self.ridge_coefficients()
        mu, sigma, m, w, ms, ws = self.z_mean, self.z_scale, self.e_mean, self.e_scale, self.s_mean, self.s_scale
        v3, v4 = b3 / sigma, b4 / sigma
        c3, c4 = float(mu @ v3), float(mu @ v4)
        coefs, intercepts = self.mlp.coefs_, self.mlp.intercepts_
        constant = (b0 - float(mu @ (b1 / sigma)) - m * b2 / w + (m / w) * c3 + (ms / ws) * c4
                    + self.target_mean + self.target_scale * float(intercepts[-1][0]))
        out = {
            "linear_weight": np.append(b1 / sigma - (m / w) * v3 - (ms / ws) * v4, constant),
            "linear_emissivity_weight": np.append(v3 / w, (b2 - c3) / w),
            "linear_zenith_weight": np.append(v4 / ws, -c4 / ws),
        }
        w1 = coefs[0]  # [K+1, H1]: z rows then the eps row
        w1e = w1[-1] / w
        out["layer1_weight"] = np.concatenate([w1[:-1], (intercepts[0] - m * w1e)[None, :]], axis=0)
        out["layer1_emissivity"] = w1e[None, :]
        for k in range(1, len(coefs) - 1):
            out[f"layer{k + 1}_weight"] = coefs[k]
            out[f"layer{k + 1}_bias"] = intercepts[k][None, :]
        out["output_weight"] = self.target_scale * coefs[-1]
        if self.z_columns is not None:  # zero weights on the z columns the channel leaves out
            for key, value in out.items():
                if key.startswith("linear_") or key == "layer1_weight":
                    full = np.zeros((self.n_components + 1,) + value.shape[1:])
                    full[self.z_columns] = value[:-1]
                    full[-1] = value[-1]
                    out[key] = full
        return out


def channel_seed(seed: int, channel_id: str) -> int:
    """Per-channel seed: independent of which other channels are trained [1]."""
    return int(np.random.SeedSequence([seed, zlib.crc32(channel_id.encode())]).generate_state(1)[0])


def _error_stats(err: np.ndarray, prefix: str) -> dict:
    a = np.abs(err)
    return {
        f"{prefix}_bias_k": float(np.mean(err)),
        f"{prefix}_rmse_k": float(np.sqrt(np.mean(err**2))),
        f"{prefix}_p999_abs_k": float(np.quantile(a, 0.999)),
        f"{prefix}_max_abs_k": float(np.max(a)),
    }


def _fit_channel(job: dict) -> ChannelFit:
    """Fit one channel (runs in a worker process; single-threaded BLAS for determinism)."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        return _fit_channel_inner(**job)


def _fit_channel_inner(*, channel_id, s, z, e, y, train, val, net, seed, residual, z_columns=None,
                       uses_kernels=False, uses_profiles=True, linear_columns=None, jacobian=None):
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.linear_model import Ridge
    from sklearn.neural_network import MLPRegressor

    start = time.perf_counter()
    zt, st, et, yt = z[train], s[train], e[train], y[train]

    def spread(v):  # a constant input carries no information: leave it unscaled
        sd = v.std(axis=0)
        return np.where(sd > 1e-9, sd, 1.0)

    # z is not standardised per component: the ridge penalty then damps the directions
    # the training set barely spans (their coefficients would be pure noise in the Jacobian)
    used = zt if z_columns is None else zt[:, z_columns]
    fit = ChannelFit(channel_id=channel_id, ridge=None, z_mean=used.mean(axis=0), z_scale=np.ones(used.shape[1]),
                     s_mean=float(st.mean()), s_scale=float(spread(st)), e_mean=float(et.mean()),
                     e_scale=float(spread(et)), target_mean=0.0, target_scale=1.0, mlp=None, stats={},
                     z_columns=z_columns, n_components=zt.shape[1])
    if linear_columns is not None:
        full = np.arange(zt.shape[1]) if z_columns is None else np.asarray(z_columns)
        fit.linear_mask = np.isin(full, linear_columns).astype(float)
    if residual:
        fit.ridge = Ridge(alpha=net["ridge_alpha"] * len(train), solver="cholesky")
        fit.ridge.fit(fit.design(zt, st, et), yt)
    r = yt - fit.linear(zt, st, et)
    fit.target_mean = float(r.mean())
    fit.target_scale = float(r.std()) if r.std() > 1e-12 else 1.0
    target = (r - fit.target_mean) / fit.target_scale
    ut = fit.network_input(z[train], et)
    uv = fit.network_input(z[val], e[val])
    mlp = MLPRegressor(
        hidden_layer_sizes=tuple(net["hidden_layers"]), activation="tanh", solver=net["solver"],
        alpha=net["alpha"], tol=net["tol"], random_state=seed, warm_start=True,
        learning_rate_init=net["learning_rate_init"], batch_size=min(net["batch_size"], len(train)),
        max_iter=net["max_iter"], n_iter_no_change=10**9 if net["solver"] != "lbfgs" else 10,
        shuffle=True,
    )
    fit.mlp = mlp
    yv = y[val]
    lin_v = fit.linear(z[val], s[val], e[val])

    def val_rmse():
        pred = lin_v + fit.target_mean + fit.target_scale * mlp.predict(uv)
        return float(np.sqrt(np.mean((pred - yv) ** 2)))

    chunk = net["check_every"] if net["early_stopping"] else net["max_iter"]
    done, best, best_state, stale = 0, np.inf, None, 0
    with warnings.catch_warnings():
        # running out of iterations is the plan here, not a problem
        warnings.simplefilter("ignore", ConvergenceWarning)
        while done < net["max_iter"]:
            mlp.max_iter = min(chunk, net["max_iter"] - done)
            mlp.fit(ut, target)
            done += mlp.n_iter_
            score = val_rmse()
            if score < best:
                best, stale = score, 0
                best_state = ([c.copy() for c in mlp.coefs_], [b.copy() for b in mlp.intercepts_], done)
            else:
                stale += 1
            if stale >= net["patience"] or mlp.n_iter_ < mlp.max_iter:
                break
    mlp.coefs_, mlp.intercepts_ = best_state[0], best_state[1]
    refined = {}
    if jacobian is not None and net["jacobian_weight"] > 0:
        refined = _refine_with_jacobians(fit, net, jacobian, ut, target, uv,
                                         (yv - lin_v - fit.target_mean) / fit.target_scale, s, e, train, val)
    fit.stats = {
        "n_train": int(len(train)),
        "n_validation": int(len(val)),
        "iterations": int(done),
        "best_iteration": int(best_state[2]),
        "hidden_layers": list(fit.hidden),
        "opacity_kernels": bool(uses_kernels),
        "profile_blocks": bool(uses_profiles),
        "linear_inputs": "all" if linear_columns is None else "own_kernel",
        "seed": int(seed),
        **refined,
        **_error_stats(fit.predict(z[val], s[val], e[val]) - yv, "validation"),
        **({"linear_only_validation_rmse_k": float(np.sqrt(np.mean((lin_v - yv) ** 2)))} if residual else {}),
        "train_rmse_k": float(np.sqrt(np.mean((fit.predict(zt, st, et) - yt) ** 2))),
    }
    fit.seconds = time.perf_counter() - start
    return fit


def _refine_with_jacobians(fit: ChannelFit, net: dict, jac: dict, ut, tt, uv, tv, s, e, train, val) -> dict:
    """Continue the channel's network fit with the Jacobian term (:mod:`rtemu.jacobian_fit`).

    ``jac``: ``train_rows``/``val_rows`` (positions in train/val), ``directions`` [M, P, K]
    and ``target`` [M, P] for each (prefix ``val_`` for validation). The linear part's
    directional derivatives are taken off the targets, so the network fits what the
    linear part misses. Returns the statistics to store.
    """
    from rtemu.jacobian_fit import pack, probe_relative_error, refine_network, refinement_loss

    _, b1, _, b3, b4 = fit.ridge_coefficients()

    def prepare(prefix, index):
        d = jac[prefix + "directions"]
        d = d if fit.z_columns is None else d[:, :, fit.z_columns]
        eps = ((e[index] - fit.e_mean) / fit.e_scale)[:, None]
        sig = ((s[index] - fit.s_mean) / fit.s_scale)[:, None]
        grad_lin = (b1[None, :] + eps * b3[None, :] + sig * b4[None, :]) / fit.z_scale  # d lin / d z [M, K]
        r = jac[prefix + "target"] - np.einsum("mpk,mk->mp", d, grad_lin)
        u_dot = np.concatenate([d, np.zeros(d.shape[:2] + (1,))], axis=2).astype(np.float32)  # emissivity fixed
        return u_dot, r

    rows_t, rows_v = jac["train_rows"], jac["val_rows"]
    ud_t, r_t = prepare("", train[rows_t])
    ud_v, r_v = prepare("val_", val[rows_v])
    weight, scale = net["jacobian_weight"], fit.target_scale

    def score(coefs, intercepts):
        return refinement_loss(pack(coefs, intercepts), [w.shape for w in coefs], uv, tv, rows_v, ud_v, r_v,
                               weight=weight, alpha=0.0, scale=scale)[0]

    ut, uv = ut.astype(np.float32), uv.astype(np.float32)  # the passes in float32: half the time
    before = probe_relative_error(fit.mlp.coefs_, fit.mlp.intercepts_, uv[rows_v], ud_v, r_v, scale)
    coefs, intercepts, info = refine_network(
        fit.mlp.coefs_, fit.mlp.intercepts_, ut, tt, rows_t, ud_t, r_t, weight=weight, alpha=net["alpha"],
        max_iter=net["jacobian_max_iter"], scale=scale, check_every=net["jacobian_check_every"], score=score)
    fit.mlp.coefs_, fit.mlp.intercepts_ = coefs, intercepts
    after = probe_relative_error(coefs, intercepts, uv[rows_v], ud_v, r_v, scale)
    return {
        "jacobian_iterations": int(info["iterations"]),
        "jacobian_best_iteration": int(info["best_iteration"]),
        "jacobian_profiles": int(rows_t.size),
        "validation_jacobian_error_median_before": float(np.median(before)),
        "validation_jacobian_error_median": float(np.median(after)),
    }


# ---- the whole emulator -------------------------------------------------------------------
@dataclasses.dataclass
class Envelope:
    """Per-variable bounds [N-independent] and novelty limits of the training set.

    ``lower``/``upper`` map variable names to arrays: air_temperature, specific_humidity
    [L]; surface_temperature, sensor_zenith_angle []; surface_emissivity [C] over the
    trained channels. ``novelty_limits`` [1 + B]: largest training ||z||^2 and block
    reconstruction errors, times the recipe's novelty_margin. ``tropopause_lower`` /
    ``tropopause_upper`` [M + 1] (None when the recipe turns the check off or the grid has
    no search layer): range of the temperature [K] at the lapse-rate tropopause per search
    base (:func:`tropopause_bounds`).
    """

    lower: dict
    upper: dict
    novelty_limits: np.ndarray
    bounds_margin: float
    novelty_margin: float
    tropopause_lower: np.ndarray | None = None
    tropopause_upper: np.ndarray | None = None


@dataclasses.dataclass
class TrainedEmulator:
    """Everything :mod:`rtemu.export` needs to write a bundle (in memory)."""

    instrument: Instrument
    channel_ids: list
    pressure_hpa: np.ndarray
    config: FeatureConfig
    transform: Any  # FeatureTransform, or the frozen transform of an existing bundle
    envelope: Envelope
    channels: dict
    recipe: Any
    data_sha256: str
    data_source: str
    teacher: tuple  # (name, version) of the model the training data came from

    def predict(self, air_temperature, specific_humidity, surface_temperature, surface_emissivity,
                sensor_zenith_angle) -> np.ndarray:
        """BT [K], shape (N, C), through the scikit-learn objects (levels surface-first)."""
        x = raw_features(air_temperature, specific_humidity, surface_temperature, sensor_zenith_angle,
                         self.config, self.pressure_hpa)
        z = self.transform.transform(x)
        e = np.asarray(surface_emissivity, dtype=float)
        return np.stack([self.channels[c].predict(z, x[:, -1], e[:, i]) for i, c in enumerate(self.channel_ids)],
                        axis=1)


def _envelope(data: TrainingData, columns: list[int], transform, x: np.ndarray,
              recipe: Recipe) -> Envelope:
    """Bounds over all used profiles (training and validation), widened by the margin."""
    margin = recipe.settings["envelope"]["bounds_margin"]
    values = {
        "air_temperature": data.air_temperature,
        "specific_humidity": data.specific_humidity,
        "surface_temperature": data.surface_temperature,
        "sensor_zenith_angle": data.sensor_zenith_angle,
        "humidity_index": humidity_index(data.air_temperature, data.specific_humidity, data.pressure_hpa,
                                         recipe.settings["features"]["humidity_floor"]),
        "skin_minus_air_temperature": data.surface_temperature - data.air_temperature[:, 0],
        "surface_emissivity": data.surface_emissivity[:, columns],
    }
    lower, upper = {}, {}
    for name, v in values.items():
        lo, hi = v.min(axis=0), v.max(axis=0)
        plo, phi = PHYSICAL_BOUNDS[name]
        if name == "specific_humidity":
            # humidity spans decades: widen in ln q (a linear margin would reach q = 0)
            lo, hi = np.log(np.maximum(lo, 1e-30)), np.log(np.maximum(hi, 1e-30))
            width = hi - lo
            lower[name] = np.clip(np.exp(lo - margin * width), plo, phi)
            upper[name] = np.clip(np.exp(hi + margin * width), plo, phi)
            continue
        width = hi - lo
        lower[name] = np.clip(lo - margin * width, plo, phi)
        upper[name] = np.clip(hi + margin * width, plo, phi)
    scores = transform.novelty_scores(x)
    limits = scores.max(axis=0) * recipe.settings["envelope"]["novelty_margin"]
    trop = (None, None)
    if recipe.settings["envelope"]["tropopause_check"]:
        trop = tropopause_bounds(data.air_temperature, data.pressure_hpa, margin)
    return Envelope(lower=lower, upper=upper, novelty_limits=limits, bounds_margin=margin,
                    novelty_margin=recipe.settings["envelope"]["novelty_margin"],
                    tropopause_lower=trop[0], tropopause_upper=trop[1])


#: Stands for "no training state here" in the tropopause ranges [K]: a range (NEVER, -NEVER)
#: flags every state, (-NEVER, NEVER) none.
TROPOPAUSE_NEVER = 1.0e4


def tropopause_bounds(air_temperature, pressure_hpa, margin: float):
    """Training range of the temperature at the lapse-rate tropopause, per search base.

    :func:`rtemu.atmosphere.lapse_rate_tropopause` places each training state's tropopause
    at one of the M search bases (or at M: none found). Per base, the range of the
    temperature found there, widened on both sides by ``margin`` times the range over all
    bases; a base no training state reached gets the empty range (NEVER, -NEVER). At M the
    temperature is taken as 0: the range is (-NEVER, NEVER) when some training state has no
    tropopause in the search range, else empty.

    Parameters
    ----------
    air_temperature : numpy.ndarray
        Training temperatures [K], (N, L) on ``pressure_hpa``.
    pressure_hpa : numpy.ndarray
        Level pressures [hPa], [L].
    margin : float
        Relative widening [1] (the recipe's bounds_margin).

    Returns
    -------
    (numpy.ndarray, numpy.ndarray) or (None, None)
        Lower and upper temperature [K], [M + 1] each; (None, None) when the grid has no
        search layer.
    """
    m = _atm.tropopause_search_layers(pressure_hpa)["base"].size
    if not m:
        return None, None
    position, t = _atm.lapse_rate_tropopause(air_temperature, pressure_hpa)
    lower, upper = np.full(m + 1, TROPOPAUSE_NEVER), np.full(m + 1, -TROPOPAUSE_NEVER)
    found = position < m
    if found.any():
        width = np.ptp(t[found])
        lo = np.full(m, np.inf)
        hi = np.full(m, -np.inf)
        np.minimum.at(lo, position[found], t[found])
        np.maximum.at(hi, position[found], t[found])
        seen = np.isfinite(lo)
        lower[:m][seen], upper[:m][seen] = lo[seen] - margin * width, hi[seen] + margin * width
    if (~found).any():
        lower[m], upper[m] = -TROPOPAUSE_NEVER, TROPOPAUSE_NEVER
    return lower, upper


def fit_emulator(data, recipe, *, channels=None, transform=None, workers=None, progress=True,
                 log=None) -> TrainedEmulator:
    """Fit one emulator per channel (in parallel processes) on a training set.

    Parameters
    ----------
    data : TrainingData, str, os.PathLike or xarray.Dataset
        The training set (see :func:`load_training_data`).
    recipe : Recipe, str or os.PathLike
        Recipe or its name/path (see :func:`load_recipe`).
    channels : sequence of str, optional
        Channel ids to train (default: all of the file's instrument), in the file's order.
    transform : object, optional
        A fitted shared transform to reuse (an existing bundle's, for updates); it must
        provide ``project``, ``transform``, ``novelty_scores``, ``config`` and ``n_levels``.
        Default: fit a :class:`~rtemu.features.FeatureTransform` on the training part.
    workers : int, optional
        Worker processes (joblib, loky backend) [1]; default min(cores, channels); 1 fits
        in this process. The result does not depend on it.
    progress : bool
        tqdm bar over channels with each channel's validation RMSE.
    log : callable, optional
        Receives one line per finished channel (besides the bar).

    Returns
    -------
    TrainedEmulator
    """
    recipe = load_recipe(recipe)
    if not isinstance(data, TrainingData):
        data = load_training_data(data, jacobians=recipe.uses_jacobians(channels))
    inst = data.instrument
    ids = list(inst.channel_ids) if channels is None else [str(c) for c in channels]
    unknown = [c for c in ids if c not in inst.channel_ids]
    if unknown:
        raise ValueError(f"channels {unknown} are not channels of the training data's instrument "
                         f"{inst.name!r} ({', '.join(inst.channel_ids)})")
    if len(set(ids)) != len(ids):
        raise ValueError(f"channels: duplicate ids in {ids}")
    ids = [c for c in inst.channel_ids if c in ids]
    columns = [list(inst.channel_ids).index(c) for c in ids]
    rows = np.flatnonzero(data.usable[:, columns].all(axis=1))
    limit = recipe.settings["training"]["max_profiles"]
    if limit:
        rows = rows[:limit]
    fraction = recipe.settings["training"]["validation_fraction"]
    n_val = int(round(fraction * rows.size))
    if rows.size - n_val < 10 or n_val < 1:
        raise ValueError(f"training data {data.source}: {rows.size} usable profiles are too few for a "
                         f"validation fraction of {fraction}")
    perm = np.random.default_rng(np.random.SeedSequence([recipe.seed, 0x7a11])).permutation(rows.size)
    val = np.sort(perm[:n_val])
    train = np.sort(perm[n_val:])

    config = recipe.feature_config(inst)
    L = data.pressure_hpa.size
    x = raw_features(data.air_temperature[rows], data.specific_humidity[rows],
                     data.surface_temperature[rows], data.sensor_zenith_angle[rows], config, data.pressure_hpa)
    if transform is None:
        transform = FeatureTransform(config=config, n_levels=L, pressure_hpa=data.pressure_hpa).fit(x[train])
    elif transform.n_levels != L:
        raise ValueError(f"the shared transform has {transform.n_levels} levels, the data {L}")
    z = transform.project(x)
    envelope = _envelope(_subset(data, rows), columns, transform, x, recipe)
    jacobians = None
    if recipe.uses_jacobians(ids):
        if data.jacobian_air_temperature is None:
            raise ValueError(f"training data {data.source}: no Jacobians loaded (rule: a recipe with "
                             "jacobian_weight > 0 needs load_training_data(..., jacobians=True) on a set "
                             "sampled with --jacobian)")
        jacobians = _jacobian_sets(data, rows, train, val, transform, config, recipe)

    jobs = []
    for cid, col in zip(ids, columns):
        net = recipe.network_for(cid)
        jobs.append({
            "channel_id": cid, "s": x[:, -1], "z": z, "e": data.surface_emissivity[rows, col],
            "y": data.brightness_temperature[rows, col], "train": train, "val": val,
            "net": net, "seed": channel_seed(recipe.seed, cid),
            "residual": recipe.settings["linear"]["residual"],
            "z_columns": _channel_columns(config, L, z.shape[1], net, cid, recipe.source),
            "uses_kernels": bool(config.n_kernels) and net["opacity_kernels"],
            "uses_profiles": net["profile_blocks"],
            "linear_columns": _own_kernel_columns(config, L, z.shape[1], net, cid, col, recipe.source),
            "jacobian": None if jacobians is None or net["jacobian_weight"] <= 0 else jacobians(col),
        })
    fits = dict(_run_jobs(jobs, workers, progress, log))
    return TrainedEmulator(
        instrument=inst, channel_ids=ids, pressure_hpa=data.pressure_hpa, config=config,
        transform=transform, envelope=envelope, channels={c: fits[c] for c in ids}, recipe=recipe,
        data_sha256=data.sha256, data_source=data.source, teacher=data.teacher,
    )


def _channel_columns(config: FeatureConfig, n_levels: int, width: int, net: dict, channel_id: str, source: str):
    """Columns of z a channel sees (None: all of them).

    ``opacity_kernels = false`` leaves out the kernel scalars; ``profile_blocks = false``
    the principal components of the profile blocks (T, h(q), q, ln W), so that the channel's
    air-temperature and humidity sensitivity can only come through the kernels' physically
    shaped Jacobians (Ts and s(theta) stay in either case).
    """
    kernels = kernel_columns(config, n_levels) if config.n_kernels else np.array([], dtype=int)
    if not net["profile_blocks"] and (not net["opacity_kernels"] or not config.n_kernels):
        raise ValueError(f"recipe {source}: channel {channel_id!r} has profile_blocks = false but no opacity "
                         "kernels (rule: a channel without the profile blocks needs [features] kernels and "
                         "opacity_kernels = true)")
    if net["profile_blocks"] and (net["opacity_kernels"] or not config.n_kernels):
        return None
    everything = np.arange(width)
    if not net["opacity_kernels"]:
        return np.setdiff1d(everything, kernels)
    return everything[kernels[0]:]  # the kernel scalars, Ts and s(theta)


def _own_kernel_columns(config: FeatureConfig, n_levels: int, width: int, net: dict, channel_id: str,
                        column: int, source: str):
    """Columns of z for ``linear_inputs = "own_kernel"``: the channel's own kernel scalars
    [f, t_s, (r)], Ts and s(theta) (None for ``"all"``). ``column``: the channel's index in
    the instrument, which orders the channel kernels after the bank's."""
    if net["linear_inputs"] == "all":
        return None
    n_bank = len(config.line_kernels) + len(config.continuum_kernels)
    if not config.channel_kernels or not net["opacity_kernels"] or column >= len(config.channel_kernels):
        raise ValueError(f"recipe {source}: channel {channel_id!r} has linear_inputs = \"own_kernel\" but no "
                         "kernel of its own (rule: it needs [features] instrument_kernels = \"bands\" or "
                         "\"channels\" and opacity_kernels = true)")
    first = kernel_columns(config, n_levels)[0]
    own = [first + g * config.n_kernels + n_bank + column for g in range(config.n_kernel_scalars)]
    return np.array(own + [width - 2, width - 1])


def _jacobian_sets(data: TrainingData, rows, train, val, transform, config, recipe: Recipe):
    """Per-channel inputs of the Jacobian term: returns ``channel column -> job dict``.

    Draws (seeded) up to ``jacobian_profiles`` training and ``jacobian_validation_profiles``
    validation profiles, computes dz/d(T, ln q) for them once (shared by all channels) and
    fixed probe vectors; each channel's directions and targets are made on request.
    """
    from rtemu.jacobian_fit import probe_directions, state_jacobian

    tr = recipe.settings["training"]
    rng = np.random.default_rng(np.random.SeedSequence([recipe.seed, 0x1AC0B]))
    rows_t = np.sort(rng.permutation(train.size)[:min(tr["jacobian_profiles"], train.size)])
    rows_v = np.sort(rng.permutation(val.size)[:min(tr["jacobian_validation_profiles"], val.size)])
    picked = rows[np.concatenate([train[rows_t], val[rows_v]])]
    q = data.specific_humidity[picked]
    G = state_jacobian(transform.project, config, data.air_temperature[picked], q,
                       data.surface_temperature[picked], data.sensor_zenith_angle[picked], data.pressure_hpa)
    n_probes = tr["jacobian_probes"]
    probes = rng.standard_normal((picked.size, G.shape[1], n_probes)) / np.sqrt(n_probes)
    m = rows_t.size

    def for_channel(col: int) -> dict:
        jt = data.jacobian_air_temperature[picked, col].astype(float)
        jq = data.jacobian_specific_humidity[picked, col].astype(float) * q  # per ln q [K]
        d, target, _ = probe_directions(G, jt, jq, probes, tr["jacobian_floor"])
        return {"train_rows": rows_t, "val_rows": rows_v, "directions": d[:m], "target": target[:m],
                "val_directions": d[m:], "val_target": target[m:]}

    return for_channel


def _subset(data: TrainingData, rows: np.ndarray) -> TrainingData:
    return dataclasses.replace(
        data,
        air_temperature=data.air_temperature[rows], specific_humidity=data.specific_humidity[rows],
        surface_temperature=data.surface_temperature[rows],
        surface_emissivity=data.surface_emissivity[rows],
        sensor_zenith_angle=data.sensor_zenith_angle[rows],
        brightness_temperature=data.brightness_temperature[rows], usable=data.usable[rows],
        jacobian_air_temperature=None, jacobian_specific_humidity=None,
    )


def _run_jobs(jobs: list[dict], workers, progress: bool, log):
    from tqdm.auto import tqdm

    if workers is None:
        workers = min(os.cpu_count() or 1, len(jobs))
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise ValueError(f"workers must be an integer >= 1, got {workers!r}")
    bar = tqdm(total=len(jobs), desc="rtemu train", unit="channel", disable=not progress)
    try:
        if workers == 1 or len(jobs) == 1:
            results = (_fit_channel(job) for job in jobs)
        else:
            from joblib import Parallel, delayed

            # max_nbytes=None: arrays travel through the pipe, never as memmapped dump files
            results = Parallel(n_jobs=workers, backend="loky", return_as="generator_unordered",
                               max_nbytes=None)(delayed(_fit_channel)(job) for job in jobs)
        for fit in results:
            line = (f"{fit.channel_id}: validation RMSE {fit.stats['validation_rmse_k']:.4f} K, "
                    f"max {fit.stats['validation_max_abs_k']:.3f} K, {fit.stats['iterations']} iterations, "
                    f"{fit.seconds:.1f} s")
            if "jacobian_iterations" in fit.stats:
                line += (f"; Jacobian term: {fit.stats['jacobian_iterations']} iterations, median relative "
                         f"Jacobian error (validation probes) {fit.stats['validation_jacobian_error_median_before']:.3f}"
                         f" -> {fit.stats['validation_jacobian_error_median']:.3f}")
            bar.set_postfix_str(f"{fit.channel_id} val RMSE {fit.stats['validation_rmse_k']:.4f} K")
            bar.update(1)
            if log is not None:
                log(line)
            yield fit.channel_id, fit
    finally:
        bar.close()
