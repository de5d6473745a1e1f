"""Training: recipes, training data, and the per-channel emulators.

Stage "training" (physics -> sampling -> training -> export -> runtime). This module fits
the models in memory and returns one :class:`TrainedEmulator` holding every array the
export lays into the bundle (:func:`rtemu.export.train_to_onnx` is the one-call entry).

Model of channel c, learned from the training file alone (its inputs and brightness
temperatures; nothing of the model that made them)::

    BT_c = BT_gray,c + mean_c + scale_c * mlp_c(u_c)
    u_c  = [z, BT_gray,c, f_c, g_c, r_c, Ts, sec(theta), e_c]      (standardised)

BT_gray,c and the per-absorber features f, g, r come from the channel's K learned
effective gray absorbers (:mod:`rtemu.gray`), fitted by non-linear least squares so that
the gray model alone matches the training brightness temperatures; K grows until the gray
model's validation RMSE reaches the recipe's target. z is the shared profile compression
(:mod:`rtemu.features`). The network (scikit-learn ``MLPRegressor``, tanh units, L-BFGS)
fits the standardised residual of the gray model. The channel's uncertainty is a small
error model, sigma_c = s0_c + s1_c d, with d the profile's largest novelty ratio,
calibrated on the validation profiles so that 95 % of them lie within 2 sigma.

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
from rtemu import gray as _gray
from rtemu._io import open_dataset
from rtemu.features import ProfileCompression, fit_compression, raw_profile
from rtemu.instrument import Instrument
from rtemu.planck import planck_coefficients, planck_derivative
from rtemu.teacher import PHYSICS_TEACHER

__all__ = [
    "Recipe",
    "load_recipe",
    "list_recipes",
    "TrainingData",
    "load_training_data",
    "GrayAbsorbers",
    "ChannelModel",
    "TrainedEmulator",
    "fit_emulator",
    "fit_gray_absorbers",
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


def _layers(v):
    if (not isinstance(v, list) or not v or len(v) > 4
            or any(isinstance(h, bool) or not isinstance(h, int) or h < 1 or h > 1024 for h in v)):
        return "a list of 1 to 4 integers in [1, 1024]"
    return None


_NETWORK = {
    "hidden_layers": _layers,
    "alpha": _float(0.0),
    "max_iter": _int(1),
    "check_every": _int(1),
    "patience": _int(1),
    "max_absorbers": _int(1),
}

SCHEMA: dict[str, dict[str, Any]] = {
    "": {"name": _str, "description": _str},
    "training": {
        "seed": _int(0),
        "validation_fraction": _float(0.0, 0.9, strict_lo=True),
        "max_profiles": _int(0),
    },
    "features": {"temperature_components": _int(1), "humidity_components": _int(1)},
    "absorbers": {
        "profiles": _int(10),
        "validation_profiles": _int(10),
        "max_absorbers": _int(1),
        "target_rmse_k": _float(0.0, strict_lo=True),
        "starts": _int(1),
        "start_evaluations": _int(1),
        "evaluations": _int(1),
    },
    "network": {k: v for k, v in _NETWORK.items() if k != "max_absorbers"},
    "uncertainty": {"coverage": _float(0.5, 0.999), "flag_noise_fraction": _float(0.0, strict_lo=True)},
    "envelope": {"bounds_margin": _float(0.0, 1.0), "novelty_margin": _float(1.0), "tropopause_check": _bool},
}
#: Keys a ``[channels."<id>"]`` table may override.
CHANNEL_KEYS = dict(_NETWORK)

DEFAULTS = {
    "training": {"seed": 0, "validation_fraction": 0.15, "max_profiles": 0},
    "features": {"temperature_components": 16, "humidity_components": 16},
    "absorbers": {"profiles": 2000, "validation_profiles": 2000, "max_absorbers": 4, "target_rmse_k": 0.05,
                  "starts": 6, "start_evaluations": 25, "evaluations": 100},
    "network": {"hidden_layers": [32, 32], "alpha": 1e-6, "max_iter": 1000, "check_every": 250, "patience": 2},
    "uncertainty": {"coverage": 0.95, "flag_noise_fraction": 0.5},
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
        Channel id -> overridden keys.
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

    def network_for(self, channel_id: str) -> dict:
        """Network settings (and the absorber limit) for one channel, overrides applied."""
        net = dict(self.settings["network"])
        net["max_absorbers"] = self.settings["absorbers"]["max_absorbers"]
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
    # the highest terrain has a surface pressure of about 330 hPa (common knowledge)
    "surface_air_pressure": (300.0, _checks.PRESSURE_MAX_HPA),
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
    surface_air_pressure : numpy.ndarray
        ps [hPa], shape (N,): the file's ``surface_air_pressure`` (terrain), else the
        grid's bottom pressure.
    usable : numpy.ndarray
        bool (N, C): finite brightness temperature and zero quality flag.
    sha256 : str
        SHA-256 of the training file (or of the arrays, for an in-memory dataset).
    source : str
    jacobian_air_temperature, jacobian_specific_humidity : numpy.ndarray or None
        Physical Jacobians dBT/dT [K K-1] and dBT/dq [K (kg kg-1)-1], float32, shape
        (N, C, L), levels surface-first; read only on request (``load_training_data(...,
        jacobians=True)``; the audit and the benchmarks compare against them).
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
    surface_air_pressure: np.ndarray
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
    # The emulator learns nothing of the teacher's sub-bands; they are kept (for the physics
    # fallback) unless they live in an absorption-table file the training set does not hold.
    read = Instrument.channels_from_toml if "absorption_tables" in tomllib.loads(str(toml)) else Instrument.from_toml
    inst = read(str(toml), source=f"{source}:rtemu_instrument_toml")
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
    ps = (get("surface_air_pressure", ("profile",)) if "surface_air_pressure" in ds
          else np.full(T.shape[0], p.max()))
    usable = np.isfinite(bt)
    if "quality_flag" in ds:
        usable &= get("quality_flag", ("profile", "channel")) == 0
    state_ok = (np.isfinite(T).all(1) & np.isfinite(q).all(1) & np.isfinite(ts) & np.isfinite(zen)
                & np.isfinite(em).all(1) & np.isfinite(ps))
    usable &= state_ok[:, None]
    jac = {}
    if jacobians:
        names = ("jacobian_air_temperature", "jacobian_specific_humidity")
        missing = [n for n in names if n not in ds]
        if missing:
            raise ValueError(f"training data {source}: missing {missing} (rule: Jacobians need a "
                             "training set sampled with --jacobian)")
        for name in names:
            jac[name] = np.asarray(ds[name].transpose("profile", "channel", "level").values,
                                   dtype=np.float32)[:, :, order]
            usable &= np.isfinite(jac[name]).all(axis=2)
    return TrainingData(
        instrument=inst, pressure_hpa=p[order].copy(), air_temperature=T, specific_humidity=q,
        surface_temperature=ts, surface_emissivity=em, sensor_zenith_angle=zen,
        brightness_temperature=bt, surface_air_pressure=ps, usable=usable,
        sha256=sha or _arrays_sha256(ds[[n for n in ("air_pressure", *_STATE, "brightness_temperature")]]),
        source=source, teacher=(str(ds.attrs.get("rtemu_teacher", PHYSICS_TEACHER[0])),
                                str(ds.attrs.get("rtemu_teacher_version", "unrecorded"))), **jac,
    )


# ---- gray absorbers -----------------------------------------------------------------------
@dataclasses.dataclass
class GrayAbsorbers:
    """One channel's learned effective gray absorbers (see :mod:`rtemu.gray`).

    Radiances are in units of the channel's Planck constant a (B = 1 / (exp(b / T) - 1)),
    so only b enters.

    Attributes
    ----------
    planck_b : float
        b of the channel's Planck function [K].
    log_k, pressure_exponent, temperature_exponent : numpy.ndarray
        [K, 3] each (dry, water-vapour, self-continuum terms) [1].
    weights : numpy.ndarray
        w [K], positive, summing to 1 [1].
    """

    planck_b: float
    log_k: np.ndarray
    pressure_exponent: np.ndarray
    temperature_exponent: np.ndarray
    weights: np.ndarray

    @property
    def n_absorbers(self) -> int:
        return self.weights.size

    def params(self) -> dict:
        return {"log_k": self.log_k, "pressure_exponent": self.pressure_exponent,
                "temperature_exponent": self.temperature_exponent, "weights": self.weights}

    def forward(self, air_temperature, specific_humidity, surface_temperature, surface_emissivity, sec_zenith,
                pressure_hpa) -> dict:
        """:func:`rtemu.gray.gray_forward` with these absorbers."""
        return _gray.gray_forward(self.params(), 1.0, self.planck_b, air_temperature, specific_humidity,
                                  surface_temperature, surface_emissivity, sec_zenith, pressure_hpa)


def _unpack(v: np.ndarray, K: int, b: float) -> GrayAbsorbers:
    logits = np.r_[0.0, v[9 * K:]]
    w = np.exp(logits - logits.max())
    return GrayAbsorbers(planck_b=b, log_k=v[:3 * K].reshape(K, 3), pressure_exponent=v[3 * K:6 * K].reshape(K, 3),
                         temperature_exponent=v[6 * K:9 * K].reshape(K, 3), weights=w / w.sum())


def _pack(g: GrayAbsorbers) -> np.ndarray:
    logits = np.log(np.maximum(g.weights, 1e-30))
    return np.concatenate([g.log_k.ravel(), g.pressure_exponent.ravel(), g.temperature_exponent.ravel(),
                           logits[1:] - logits[0]])


def _gray_residual(v, K, b, inputs, y):
    """Residual BT_gray - y [K] and its Jacobian with respect to the packed parameters."""
    g = _unpack(v, K, b)
    st = g.forward(*inputs)
    bt = st["brightness_temperature"]
    slope = planck_derivative(1.0, b, bt)
    w = g.weights
    H = _gray.gray_tau_adjoint(st, w[None, :] / slope[:, None])  # dBT/dtau [N, Lm, K]
    Ht = H[..., None] * st["tau_g"]  # dBT/d ln k [N, Lm, K, 3]
    phi = st["phi"]
    n = bt.size
    jac = [Ht.sum(1).reshape(n, -1), (Ht * phi[:, :, None, 0:1]).sum(1).reshape(n, -1),
           (Ht * phi[:, :, None, 1:2]).sum(1).reshape(n, -1),
           (w * (st["absorber_radiance"] - st["radiance"][:, None]) / slope[:, None])[:, 1:]]
    return bt - y, np.concatenate(jac, axis=1)


#: Bounds of the packed parameters: ln k, pressure exponent, temperature exponent, logits.
_GRAY_BOUNDS = ((-40.0, 30.0), (-2.0, 4.0), (-8.0, 8.0), (-12.0, 12.0))


def _least_squares(v0, K, b, inputs, y, evaluations):
    from scipy.optimize import least_squares

    sizes = (3 * K, 3 * K, 3 * K, K - 1)
    lo = np.concatenate([np.full(n, bd[0]) for n, bd in zip(sizes, _GRAY_BOUNDS)])
    hi = np.concatenate([np.full(n, bd[1]) for n, bd in zip(sizes, _GRAY_BOUNDS)])
    cache = {}

    def fun(v):
        r, j = _gray_residual(v, K, b, inputs, y)
        cache["v"], cache["j"] = v.copy(), j
        return r

    def jac(v):
        return cache["j"] if np.array_equal(cache.get("v"), v) else _gray_residual(v, K, b, inputs, y)[1]

    with np.errstate(over="ignore", under="ignore"):
        res = least_squares(fun, np.clip(v0, lo + 1e-9, hi - 1e-9), jac=jac, bounds=(lo, hi),
                            max_nfev=evaluations, x_scale="jac", method="trf")
    return res.x, float(np.sqrt(np.mean(res.fun ** 2)))


def fit_gray_absorbers(planck_b: float, fit_inputs: tuple, fit_bt, val_inputs: tuple, val_bt, *, max_absorbers: int,
                       target_rmse_k: float, starts: int, start_evaluations: int, evaluations: int,
                       seed: int) -> tuple[GrayAbsorbers, dict]:
    """Fit K learned gray absorbers to brightness temperatures, growing K to the target.

    For K = 1, 2, ...: ``starts`` initialisations (the absorbers found so far plus one new
    absorber whose three terms start at column optical depths drawn log-uniformly in
    [1e-3, 30], each term off with probability 0.4) are each improved for
    ``start_evaluations`` least-squares evaluations on a quarter of the profiles; the best
    is refined on all of them (``evaluations``). Stops when the validation RMSE is at most
    ``target_rmse_k`` or K reaches ``max_absorbers``; keeps the K with the lowest
    validation RMSE.

    Parameters
    ----------
    planck_b : float
        The channel's Planck b [K].
    fit_inputs, val_inputs : tuple
        (T [K], q [kg kg-1] (N, L), Ts [K], e [1], sec(theta) [1] (N,), p [hPa] (N, L)).
    fit_bt, val_bt : numpy.ndarray
        Target brightness temperatures [K] (N,).

    Returns
    -------
    (GrayAbsorbers, dict)
        The absorbers and figures (validation RMSE per K [K]).
    """
    rng = np.random.default_rng(seed)
    T, q, p = fit_inputs[0], fit_inputs[1], fit_inputs[5]
    qm = np.maximum(_gray.layer_means(q), _gray.HUMIDITY_FLOOR)
    dp = (p[:, :-1] - p[:, 1:]) / _gray.REFERENCE_PRESSURE_HPA
    column = np.array([np.median((qm ** m * dp).sum(1)) for m in _gray.GAS_POWERS])  # vertical path of each term
    sub = np.arange(0, fit_bt.size, 4)
    sub_inputs = tuple(v[sub] for v in fit_inputs)
    best, history, previous = None, [], None
    for K in range(1, max_absorbers + 1):
        candidates = []
        for _ in range(starts):
            depth = np.exp(rng.uniform(np.log(1e-3), np.log(30.0), 3))
            depth[rng.random(3) < 0.4] = 1e-5
            new = {"log_k": np.log(depth / column)[None, :], "pressure_exponent": np.ones((1, 3)),
                   "temperature_exponent": np.zeros((1, 3))}
            if previous is None:
                v0 = np.concatenate([new["log_k"].ravel(), new["pressure_exponent"].ravel(),
                                     new["temperature_exponent"].ravel()])
            else:
                w = np.append(previous.weights * 0.8, 0.2)
                v0 = _pack(GrayAbsorbers(planck_b, np.vstack([previous.log_k, new["log_k"]]),
                                         np.vstack([previous.pressure_exponent, new["pressure_exponent"]]),
                                         np.vstack([previous.temperature_exponent, new["temperature_exponent"]]), w))
            candidates.append(_least_squares(v0, K, planck_b, sub_inputs, fit_bt[sub], start_evaluations))
        start = min(candidates, key=lambda c: c[1])[0]
        v, _ = _least_squares(start, K, planck_b, fit_inputs, fit_bt, evaluations)
        previous = _unpack(v, K, planck_b)
        with np.errstate(over="ignore", under="ignore"):
            rmse = float(np.sqrt(np.mean((previous.forward(*val_inputs)["brightness_temperature"] - val_bt) ** 2)))
        history.append(rmse)
        if best is None or rmse < best[1]:
            best = (previous, rmse)
        if rmse <= target_rmse_k:
            break
    return best[0], {"gray_validation_rmse_k": history}


# ---- per-channel model --------------------------------------------------------------------
@dataclasses.dataclass
class ChannelModel:
    """One channel's fitted emulator as plain arrays, and its validation figures.

    Attributes
    ----------
    channel_id : str
    absorbers : GrayAbsorbers
    input_center, input_scale : numpy.ndarray
        Standardisation of the network input u = [z, BT_gray, f, g, r, Ts, sec(theta), e]
        [D]; the centre is rounded to float32 (exact in the bundle).
    coefs, intercepts : list of numpy.ndarray
        The network's weights [D, H1], ..., [Hd, 1] and biases on standardised u.
    target_mean, target_scale : float
        The network predicts (BT - BT_gray - mean) / scale [K].
    sigma_offset, sigma_slope : float
        Uncertainty model sigma = offset + slope d [K] (d: the profile's largest novelty ratio).
    stats : dict
        Validation figures (deterministic: no timings) stored in the bundle.
    seconds : float
        Wall time of the fit [s] (reported, not stored).
    """

    channel_id: str
    absorbers: GrayAbsorbers
    input_center: np.ndarray
    input_scale: np.ndarray
    coefs: list
    intercepts: list
    target_mean: float
    target_scale: float
    sigma_offset: float = 0.0
    sigma_slope: float = 0.0
    stats: dict = dataclasses.field(default_factory=dict)
    seconds: float = 0.0

    @property
    def hidden(self) -> tuple[int, ...]:
        return tuple(int(c.shape[1]) for c in self.coefs[:-1])

    def network_input(self, z, gray: dict, surface_temperature, sec_zenith, surface_emissivity) -> np.ndarray:
        """u [N, D] (unstandardised)."""
        return np.concatenate([z, gray["brightness_temperature"][:, None], gray["features"],
                               np.stack([surface_temperature, sec_zenith, surface_emissivity], axis=1)], axis=1)

    def network(self, u) -> np.ndarray:
        """mlp(u) [1] on unstandardised u [N, D]."""
        a = (np.asarray(u, dtype=float) - self.input_center) / self.input_scale
        for W, c in zip(self.coefs[:-1], self.intercepts[:-1]):
            a = np.tanh(a @ W + c)
        return (a @ self.coefs[-1] + self.intercepts[-1])[:, 0]

    def predict(self, z, gray: dict, surface_temperature, sec_zenith, surface_emissivity) -> np.ndarray:
        """BT [K] (N,)."""
        u = self.network_input(z, gray, surface_temperature, sec_zenith, surface_emissivity)
        return gray["brightness_temperature"] + self.target_mean + self.target_scale * self.network(u)

    def uncertainty(self, novelty) -> np.ndarray:
        """sigma [K] (N,) of the largest novelty ratio d [1] (N,)."""
        return self.sigma_offset + self.sigma_slope * np.asarray(novelty, dtype=float)


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


def _fit_channel(job: dict) -> ChannelModel:
    """Fit one channel (runs in a worker process; single-threaded BLAS for determinism)."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        return _fit_channel_inner(**job)


def _fit_channel_inner(*, channel_id, planck_b, profile, z, e, y, novelty, train, val, absorbers, net,
                       uncertainty, seed):
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.neural_network import MLPRegressor

    start = time.perf_counter()
    T, q, ts, sec, p = profile

    def inputs(rows):
        return T[rows], q[rows], ts[rows], e[rows], sec[rows], p[rows]

    fit_rows, val_rows = train[:absorbers["profiles"]], val[:absorbers["validation_profiles"]]
    gray, gray_stats = fit_gray_absorbers(
        planck_b, inputs(fit_rows), y[fit_rows], inputs(val_rows), y[val_rows],
        max_absorbers=net["max_absorbers"], target_rmse_k=absorbers["target_rmse_k"], starts=absorbers["starts"],
        start_evaluations=absorbers["start_evaluations"], evaluations=absorbers["evaluations"], seed=seed)
    with np.errstate(over="ignore", under="ignore"):
        state = gray.forward(T, q, ts, e, sec, p)
    bt_gray = state["brightness_temperature"]
    probe = ChannelModel(channel_id=channel_id, absorbers=gray, input_center=np.zeros(0), input_scale=np.zeros(0),
                         coefs=[], intercepts=[], target_mean=0.0, target_scale=1.0)
    u = probe.network_input(z, state, ts, sec, e)
    center = u[train].mean(axis=0).astype(np.float32).astype(float)
    spread = u[train].std(axis=0)
    r = y - bt_gray
    target_mean = float(r[train].mean())
    target_scale = float(r[train].std()) if r[train].std() > 1e-12 else 1.0
    model = dataclasses.replace(probe, input_center=center, input_scale=np.where(spread > 1e-9, spread, 1.0),
                                target_mean=target_mean, target_scale=target_scale)
    us = (u - model.input_center) / model.input_scale
    target = (r - target_mean) / target_scale
    mlp = MLPRegressor(hidden_layer_sizes=tuple(net["hidden_layers"]), activation="tanh", solver="lbfgs",
                       alpha=net["alpha"], tol=0.0, random_state=seed, warm_start=True, max_iter=net["max_iter"])

    def val_rmse():
        return float(np.sqrt(np.mean((bt_gray[val] + target_mean + target_scale * mlp.predict(us[val]) - y[val]) ** 2)))

    done, best, best_state, stale = 0, np.inf, None, 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # running out of iterations is the plan
        while done < net["max_iter"]:
            mlp.max_iter = min(net["check_every"], net["max_iter"] - done)
            mlp.fit(us[train], target[train])
            done += mlp.n_iter_
            score = val_rmse()
            if score < best:
                best, stale = score, 0
                best_state = ([c.copy() for c in mlp.coefs_], [b.copy() for b in mlp.intercepts_], done)
            else:
                stale += 1
            if stale >= net["patience"] or mlp.n_iter_ < mlp.max_iter:
                break
    model.coefs, model.intercepts = best_state[0], best_state[1]
    err_val = model.predict(z[val], _subset_state(state, val), ts[val], sec[val], e[val]) - y[val]
    model.sigma_offset, model.sigma_slope, calibration = _calibrate_uncertainty(err_val, novelty[val],
                                                                                uncertainty["coverage"])
    err_train = model.predict(z[train], _subset_state(state, train), ts[train], sec[train], e[train]) - y[train]
    model.stats = {
        "n_train": int(len(train)),
        "n_validation": int(len(val)),
        "n_absorbers": gray.n_absorbers,
        **gray_stats,
        "iterations": int(done),
        "best_iteration": int(best_state[2]),
        "hidden_layers": list(model.hidden),
        "seed": int(seed),
        **_error_stats(err_val, "validation"),
        "gray_only_validation_rmse_k": float(np.sqrt(np.mean((bt_gray[val] - y[val]) ** 2))),
        "train_rmse_k": float(np.sqrt(np.mean(err_train ** 2))),
        **calibration,
    }
    model.seconds = time.perf_counter() - start
    return model


def _subset_state(state: dict, rows) -> dict:
    return {"brightness_temperature": state["brightness_temperature"][rows], "features": state["features"][rows]}


def _calibrate_uncertainty(err, novelty, coverage: float) -> tuple[float, float, dict]:
    """sigma = s0 + s1 d: |err| regressed on [1, d] (non-negative least squares), then both
    scaled so that a fraction ``coverage`` of the profiles has |err| <= 2 sigma."""
    from scipy.optimize import nnls

    a = np.abs(err)
    design = np.stack([np.ones_like(novelty), novelty], axis=1)
    (s0, s1), _ = nnls(design, a)
    s0 = max(s0, 1e-4)
    ratio = a / (s0 + s1 * novelty)
    factor = float(np.quantile(ratio, coverage)) / 2.0
    s0, s1 = s0 * factor, s1 * factor
    within = float(np.mean(a <= 2.0 * (s0 + s1 * novelty)))
    return float(s0), float(s1), {"uncertainty_validation_within_2_sigma": within}


# ---- the whole emulator -------------------------------------------------------------------
@dataclasses.dataclass
class Envelope:
    """Per-variable bounds and novelty limits of the training set.

    ``lower``/``upper`` map variable names to arrays: air_temperature, specific_humidity,
    humidity_index [L] (after the terrain collapse); surface_temperature,
    sensor_zenith_angle, skin_minus_air_temperature, surface_air_pressure [];
    surface_emissivity [C] over the trained channels. ``novelty_limits`` [3]: largest
    training sum z^2/var(z) and block reconstruction errors (T, ln q), times the recipe's
    novelty_margin. ``tropopause_lower`` / ``tropopause_upper`` [M + 1] (None when the
    recipe turns the check off or the grid has no search layer): range of the temperature
    [K] at the lapse-rate tropopause per search base (:func:`tropopause_bounds`).
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
    """Everything :mod:`rtemu.export` needs to write a bundle (plain arrays and metadata).

    ``uncertainty_threshold`` [C] [K]: the recipe's flag_noise_fraction times each
    channel's noise; a larger sigma sets the ``large_uncertainty`` flag.
    """

    instrument: Instrument
    channel_ids: list
    pressure_hpa: np.ndarray
    compression: ProfileCompression
    envelope: Envelope
    channels: dict
    uncertainty_threshold: np.ndarray
    recipe: Any
    data_sha256: str
    data_source: str
    teacher: tuple  # (name, version) of the model the training data came from

    def predict(self, air_temperature, specific_humidity, surface_temperature, surface_emissivity,
                sensor_zenith_angle, surface_air_pressure=None) -> tuple[np.ndarray, np.ndarray]:
        """BT [K] and sigma [K], shape (N, C) each, in float64 (levels surface-first)."""
        T = np.asarray(air_temperature, dtype=float)
        ps = (np.full(T.shape[0], self.pressure_hpa[0]) if surface_air_pressure is None
              else np.asarray(surface_air_pressure, dtype=float))
        T, q, p = _gray.collapse_to_surface(T, specific_humidity, self.pressure_hpa, ps)
        x = raw_profile(T, q)
        z = self.compression.project(x)
        d = novelty_ratio(self.compression.novelty_scores(x), self.envelope.novelty_limits)
        ts = np.asarray(surface_temperature, dtype=float)
        sec = 1.0 / np.cos(np.radians(np.asarray(sensor_zenith_angle, dtype=float)))
        e = np.asarray(surface_emissivity, dtype=float)
        bt, sigma = [], []
        for i, cid in enumerate(self.channel_ids):
            ch = self.channels[cid]
            state = ch.absorbers.forward(T, q, ts, e[:, i], sec, p)
            bt.append(ch.predict(z, state, ts, sec, e[:, i]))
            sigma.append(ch.uncertainty(d))
        return np.stack(bt, axis=1), np.stack(sigma, axis=1)


def novelty_ratio(scores, limits) -> np.ndarray:
    """d [1] (N,): the largest of the novelty scores [N, 3] over their limits [3]."""
    return np.max(np.asarray(scores) / np.maximum(np.asarray(limits, dtype=float), 1e-30), axis=1)


def _envelope(T, q, ts, zen, ps, emissivity, pressure_hpa, scores, recipe: Recipe) -> Envelope:
    """Bounds over all used profiles (training and validation), widened by the margin."""
    margin = recipe.settings["envelope"]["bounds_margin"]
    values = {
        "air_temperature": T,
        "specific_humidity": q,
        "surface_temperature": ts,
        "sensor_zenith_angle": zen,
        "humidity_index": humidity_index(T, q, pressure_hpa),
        "skin_minus_air_temperature": ts - T[:, 0],
        "surface_air_pressure": ps,
        "surface_emissivity": emissivity,
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
    limits = scores.max(axis=0) * recipe.settings["envelope"]["novelty_margin"]
    trop = (None, None)
    if recipe.settings["envelope"]["tropopause_check"]:
        trop = tropopause_bounds(T, pressure_hpa, margin)
    return Envelope(lower=lower, upper=upper, novelty_limits=limits, bounds_margin=margin,
                    novelty_margin=recipe.settings["envelope"]["novelty_margin"],
                    tropopause_lower=trop[0], tropopause_upper=trop[1])


def fit_emulator(data, recipe, *, channels=None, workers=None, progress=True, log=None) -> TrainedEmulator:
    """Fit one emulator per channel (in parallel processes) on a training set.

    Parameters
    ----------
    data : TrainingData, str, os.PathLike or xarray.Dataset
        The training set (see :func:`load_training_data`).
    recipe : Recipe, str or os.PathLike
        Recipe or its name/path (see :func:`load_recipe`).
    channels : sequence of str, optional
        Channel ids to train (default: all of the file's instrument), in the file's order.
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
        data = load_training_data(data)
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

    ps = data.surface_air_pressure[rows]
    T, q, p = _gray.collapse_to_surface(data.air_temperature[rows], data.specific_humidity[rows],
                                        data.pressure_hpa, ps)
    x = raw_profile(T, q)
    feats = recipe.settings["features"]
    compression = fit_compression(x[train], feats["temperature_components"], feats["humidity_components"])
    z = compression.project(x)
    scores = compression.novelty_scores(x)
    ts, zen = data.surface_temperature[rows], data.sensor_zenith_angle[rows]
    envelope = _envelope(T, q, ts, zen, ps, data.surface_emissivity[rows][:, columns], data.pressure_hpa,
                         scores, recipe)
    novelty = novelty_ratio(scores, envelope.novelty_limits)
    sec = 1.0 / np.cos(np.radians(zen))
    jobs = []
    for cid, col in zip(ids, columns):
        ch = inst.channels[col]
        _, b = (planck_coefficients(frequency_ghz=ch.frequency_ghz) if ch.frequency_ghz is not None
                else planck_coefficients(wavenumber_cm1=ch.wavenumber_cm1))
        jobs.append({
            "channel_id": cid, "planck_b": float(b), "profile": (T, q, ts, sec, p), "z": z,
            "e": data.surface_emissivity[rows, col], "y": data.brightness_temperature[rows, col],
            "novelty": novelty, "train": train, "val": val, "absorbers": recipe.settings["absorbers"],
            "net": recipe.network_for(cid), "uncertainty": recipe.settings["uncertainty"],
            "seed": channel_seed(recipe.seed, cid),
        })
    fits = dict(_run_jobs(jobs, workers, progress, log))
    noise = np.array([inst.channels[c].noise_k for c in columns], dtype=float)
    return TrainedEmulator(
        instrument=inst, channel_ids=ids, pressure_hpa=data.pressure_hpa, compression=compression,
        envelope=envelope, channels={c: fits[c] for c in ids},
        uncertainty_threshold=recipe.settings["uncertainty"]["flag_noise_fraction"] * noise, recipe=recipe,
        data_sha256=data.sha256, data_source=data.source, teacher=data.teacher,
    )


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
                    f"max {fit.stats['validation_max_abs_k']:.3f} K, {fit.stats['n_absorbers']} absorbers (gray model "
                    f"{fit.stats['gray_only_validation_rmse_k']:.4f} K), {fit.stats['iterations']} iterations, "
                    f"{fit.seconds:.1f} s")
            bar.set_postfix_str(f"{fit.channel_id} val RMSE {fit.stats['validation_rmse_k']:.4f} K")
            bar.update(1)
            if log is not None:
                log(line)
            yield fit.channel_id, fit
    finally:
        bar.close()
