"""Export: trained emulators -> one self-describing ONNX bundle; ``train_to_onnx``.

Stage "export" (training -> export -> runtime). The bundle layout:

* shared initializers, fixed by the first training of a bundle: the affine map of the raw
  features to the scaled PCA coordinates and reconstruction residuals
  (``projection_weight``/``projection_offset``), the novelty limits, the training bounds of
  the profile variables, the humidity floor, the tropopause check (format 6: search-layer
  picks, lapse factors and the training range of the tropopause temperature per base);
* per-channel initializers, stacked on a channel axis with hidden layers zero-padded to
  the widest channel (exact: a padded unit has zero weights in and out). Each channel's
  slice is a float32 copy of its own float64 parameters, so replacing or adding channels
  (``update``) rebuilds the stacks from the old file's slices and leaves every other
  channel's numbers bit-identical;
* derived constants (bound-to-channel map, flag decoding, physical bounds) rebuilt from
  the layout.

Metadata keys: see :mod:`rtemu.bundle`.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
from pathlib import Path

import numpy as np
import onnx

from rtemu import _graph, flags as _flags
from rtemu import atmosphere as _atm
from rtemu import bundle as _bundle
from rtemu._io import write_bytes_atomic
from rtemu.features import (
    FeatureConfig,
    kernel_coefficient_matrix,
    kernel_combination_matrix,
    kernel_dry_depth,
    kernel_temperature_exponents,
    kernel_path_scales,
    kernel_temperature_matrix,
    surface_level,
    water_path_matrix,
)
from rtemu.training import (
    PHYSICAL_BOUNDS,
    TROPOPAUSE_NEVER as _TROPOPAUSE_NEVER,
    Envelope,
    TrainedEmulator,
    fit_emulator,
    load_recipe,
    load_training_data,
)

__all__ = ["train_to_onnx", "export_bundle", "FrozenTransform"]

_PROFILE_VARIABLES = ("air_temperature", "specific_humidity", "surface_temperature", "sensor_zenith_angle",
                      "humidity_index", "skin_minus_air_temperature")
_UNITS = {
    "air_temperature": "K",
    "specific_humidity": "kg kg-1",
    "surface_temperature": "K",
    "surface_emissivity": "1",
    "sensor_zenith_angle": "degree",
    "humidity_index": "1",
    "skin_minus_air_temperature": "K",
    "brightness_temperature": "K",
    "jacobian_air_temperature": "K K-1",
    "jacobian_specific_humidity": "K (kg kg-1)-1",
    "jacobian_surface_temperature": "K K-1",
    "jacobian_surface_emissivity": "K",
    "quality_flag": "1",
}
_SHAPES = {
    "air_temperature": ["N", "L"],
    "specific_humidity": ["N", "L"],
    "surface_temperature": ["N"],
    "surface_emissivity": ["N", "C"],
    "sensor_zenith_angle": ["N"],
    "brightness_temperature": ["N", "C"],
    "jacobian_air_temperature": ["N", "C", "L"],
    "jacobian_specific_humidity": ["N", "C", "L"],
    "jacobian_surface_temperature": ["N", "C"],
    "jacobian_surface_emissivity": ["N", "C"],
    "quality_flag": ["N", "C"],
}
#: Per-channel arrays: name -> channel axis in the stacked array.
_LINEAR_COLUMNS = ("linear_weight", "linear_emissivity_weight", "linear_zenith_weight")
_SHARED = ("feature_center", "projection_weight", "projection_offset", "novelty_scale", "humidity_floor",
           "log_pressure_minus_bolton_a", "water_path_matrix", "water_path_floor", "kernel_path_matrix",
           "kernel_path_scale", "kernel_coefficients", "kernel_temperature_matrix", "kernel_surface_pick",
           "kernel_dry_depth", "kernel_combination", "kernel_temperature_exponent", "kernel_reference_temperature",
           "tropopause_pick", "tropopause_factor", "tropopause_lower", "tropopause_upper")


class FrozenTransform:
    """The shared transform of an existing bundle (its float32 affine maps), for updates.

    Provides the interface :func:`rtemu.training.fit_emulator` needs: ``project``,
    ``transform`` (same as project: the scikit-learn objects are not stored),
    ``novelty_scores``, ``n_levels``, ``n_components``, ``config``.
    """

    def __init__(self, *, config: FeatureConfig, n_levels: int, n_components: int, feature_center: np.ndarray,
                 projection_weight: np.ndarray, projection_offset: np.ndarray, novelty_scale: np.ndarray):
        self.config = config
        self.center_ = np.asarray(feature_center, dtype=float)
        self.n_levels = n_levels
        self.n_components = n_components
        self.weight = np.asarray(projection_weight, dtype=float)
        self.offset = np.asarray(projection_offset, dtype=float)
        self.novelty_scale = np.asarray(novelty_scale, dtype=float)

    def project(self, x):
        return ((np.asarray(x, dtype=float) - self.center_) @ self.weight + self.offset)[:, : self.n_components]

    transform = project

    def novelty_scores(self, x):
        """Scores already divided by the bundle's limits (the limits stay the bundle's)."""
        y = (np.asarray(x, dtype=float) - self.center_) @ self.weight + self.offset
        return (y**2) @ self.novelty_scale


# ---- per-channel <-> stacked arrays -------------------------------------------------------
def _channel_parts(fit, lower_e: float, upper_e: float) -> dict:
    """float32 per-channel parameters (unpadded) of a fitted channel."""
    parts = {k: np.asarray(v, dtype=np.float32) for k, v in fit.folded().items()}
    parts["training_lower_emissivity"] = np.float32(lower_e)
    parts["training_upper_emissivity"] = np.float32(upper_e)
    return parts


def _stack(parts: list[dict], hidden: tuple[int, ...]) -> dict:
    """Stack per-channel parts on the channel axis, zero-padding hidden widths to ``hidden``."""
    out = {}
    for name in _LINEAR_COLUMNS:
        out[name] = np.stack([p[name] for p in parts], axis=1)
    depth = len(hidden)

    def pad(a, shape):
        z = np.zeros(shape, dtype=np.float32)
        z[tuple(slice(0, n) for n in a.shape)] = a
        return z

    K1 = parts[0]["layer1_weight"].shape[0]
    out["layer1_weight"] = np.stack([pad(p["layer1_weight"], (K1, hidden[0])) for p in parts])
    out["layer1_emissivity"] = np.stack([pad(p["layer1_emissivity"], (1, hidden[0])) for p in parts])
    for k in range(2, depth + 1):
        out[f"layer{k}_weight"] = np.stack([pad(p[f"layer{k}_weight"], (hidden[k - 2], hidden[k - 1]))
                                            for p in parts])
        out[f"layer{k}_bias"] = np.stack([pad(p[f"layer{k}_bias"], (1, hidden[k - 1])) for p in parts])
    out["output_weight"] = np.stack([pad(p["output_weight"], (hidden[-1], 1)) for p in parts])
    return out


def _unstack(arrays: dict, index: int, widths: list[int]) -> dict:
    """One channel's unpadded float32 parts from a bundle's stacked arrays."""
    c = index
    parts = {name: arrays[name][:, c].copy() for name in _LINEAR_COLUMNS}
    parts["layer1_weight"] = arrays["layer1_weight"][c][:, : widths[0]].copy()
    parts["layer1_emissivity"] = arrays["layer1_emissivity"][c][:, : widths[0]].copy()
    for k in range(2, len(widths) + 1):
        parts[f"layer{k}_weight"] = arrays[f"layer{k}_weight"][c][: widths[k - 2], : widths[k - 1]].copy()
        parts[f"layer{k}_bias"] = arrays[f"layer{k}_bias"][c][:, : widths[k - 1]].copy()
    parts["output_weight"] = arrays["output_weight"][c][: widths[-1]].copy()
    P0 = arrays["training_lower"].shape[1] - arrays["linear_weight"].shape[1]
    parts["training_lower_emissivity"] = arrays["training_lower"][0, P0 + c].copy()
    parts["training_upper_emissivity"] = arrays["training_upper"][0, P0 + c].copy()
    return parts


def _physical_bounds(n_levels: int, n_channels: int) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = [], []
    sizes = {"air_temperature": n_levels, "specific_humidity": n_levels, "humidity_index": n_levels,
             "surface_emissivity": n_channels}
    for name in (*_PROFILE_VARIABLES, "surface_emissivity"):
        a, b = PHYSICAL_BOUNDS[name]
        lo += [a] * sizes.get(name, 1)
        hi += [b] * sizes.get(name, 1)
    return np.array([lo], dtype=np.float32), np.array([hi], dtype=np.float32)


def _shared_from_emulator(emu: TrainedEmulator) -> tuple[dict, dict]:
    """float32 shared arrays and the shared bounds (profile variables) of a first training."""
    tr = emu.transform
    K = tr.n_components
    F = tr.projection_.shape[0]
    R = tr.reconstruction_.shape[1]
    B = tr.n_reconstruction_blocks
    weight = np.zeros((F, K + 1 + R))
    weight[:, :K] = tr.projection_
    weight[:, K + 1:] = tr.reconstruction_
    offset = np.concatenate([tr.offset_, [1.0], tr.reconstruction_offset_])
    # 1e-3 relative slack: the training maximum itself must not be flagged after float32
    # round-off of the scores
    limits = np.maximum(np.asarray(emu.envelope.novelty_limits, dtype=float), 1e-30) * (1.0 + 1e-3)
    scale = np.zeros((K + 1 + R, 1 + B))
    scale[:K, 0] = 1.0 / (tr.component_variance_ * limits[0])
    L = tr.n_levels
    for b in range(B):
        scale[K + 1 + b * L: K + 1 + (b + 1) * L, 1 + b] = 1.0 / limits[1 + b]
    shared = {
        "feature_center": tr.center_.astype(np.float32),
        "projection_weight": weight.astype(np.float32),
        "projection_offset": offset.astype(np.float32),
        "novelty_scale": scale.astype(np.float32),
        "humidity_floor": np.float32(emu.config.humidity_floor),
        "log_pressure_minus_bolton_a": (np.log(emu.pressure_hpa) - 17.67).astype(np.float32),
    }
    if emu.config.water_path:
        shared["water_path_matrix"] = water_path_matrix(emu.pressure_hpa).astype(np.float32)
        shared["water_path_floor"] = np.float32(emu.config.water_path_floor)
    shared.update(_kernel_arrays(emu.config, emu.pressure_hpa))
    shared.update(_tropopause_arrays(emu.envelope, emu.pressure_hpa))
    bounds = {name: (np.atleast_1d(emu.envelope.lower[name]).astype(np.float32),
                     np.atleast_1d(emu.envelope.upper[name]).astype(np.float32))
              for name in _PROFILE_VARIABLES}
    return shared, bounds


def _tropopause_arrays(envelope, pressure_hpa) -> dict:
    """float32 constants of the tropopause check (none when the envelope has no ranges)."""
    if envelope.tropopause_lower is None:
        return {}
    lay = _atm.tropopause_search_layers(pressure_hpa)
    m = lay["base"].size
    pick = np.zeros((np.size(pressure_hpa), 3 * m))
    for i, key in enumerate(("base", "next", "deep")):
        pick[lay[key], i * m + np.arange(m)] = 1.0
    factor = np.concatenate([_atm.layer_lapse_factor(lay["next_thickness"]),
                             _atm.layer_lapse_factor(lay["deep_thickness"])])
    arrays = {"tropopause_pick": pick, "tropopause_factor": factor,
              "tropopause_lower": envelope.tropopause_lower, "tropopause_upper": envelope.tropopause_upper}
    return {k: np.asarray(v).astype(np.float32) for k, v in arrays.items()}


def _tropopause_json(shared: dict, grid) -> dict | None:
    """The tropopause check as metadata (None when the bundle has none), read from the
    arrays the graph uses (an updated bundle keeps its first training's)."""
    if "tropopause_lower" not in shared:
        return None
    levels = np.argmax(shared["tropopause_pick"], axis=0).reshape(3, -1)  # base | next | deep
    return {
        "lapse_rate_k_per_km": _atm.TROPOPAUSE_LAPSE_RATE,
        **{f"{key}_pressure_hpa": [float(grid[k]) for k in rows]
           for key, rows in zip(("base", "next", "deep"), levels)},
        "lower_k": [float(v) for v in shared["tropopause_lower"]],
        "upper_k": [float(v) for v in shared["tropopause_upper"]],
        "rule": "the tropopause is the first base level (from the surface up) where the mean lapse rate up "
                "to the next level and up to the deep level are both at most lapse_rate_k_per_km; position "
                "M (the last entry of lower_k/upper_k) means none, with temperature 0; a range of "
                f"({_TROPOPAUSE_NEVER:g}, {-_TROPOPAUSE_NEVER:g}) is a base no training state reached",
    }


def _kernel_arrays(config: FeatureConfig, pressure_hpa) -> dict:
    """float32 constants of the gray opacity kernels (none when the recipe has no kernels)."""
    if not config.n_kernels:
        return {}
    p = np.asarray(pressure_hpa, dtype=float)
    pick = np.zeros((p.size, 1))
    pick[surface_level(p), 0] = 1.0
    arrays = {
        "kernel_path_matrix": water_path_matrix(p),
        "kernel_path_scale": kernel_path_scales(p, config.kernel_paths),
        "kernel_coefficients": kernel_coefficient_matrix(config),
        "kernel_temperature_matrix": kernel_temperature_matrix(p),
        "kernel_surface_pick": pick,
    }
    if config.kernel_temperature_laws:
        arrays["kernel_temperature_exponent"] = kernel_temperature_exponents(config)[:, None]
        arrays["kernel_reference_temperature"] = np.asarray(config.kernel_temperature_laws[0])
    elif config.channel_kernels:
        arrays["kernel_dry_depth"] = kernel_dry_depth(config, p)
    if config.channel_kernels:
        arrays["kernel_combination"] = kernel_combination_matrix(config)
    return {k: v.astype(np.float32) for k, v in arrays.items()}


def _assemble(shared: dict, bounds: dict, parts: list[dict], layout: _graph.GraphLayout) -> dict:
    arrays = dict(shared)
    arrays.update(_stack(parts, layout.hidden))
    lower = np.concatenate([bounds[n][0] for n in _PROFILE_VARIABLES]
                           + [np.array([p["training_lower_emissivity"] for p in parts], dtype=np.float32)])
    upper = np.concatenate([bounds[n][1] for n in _PROFILE_VARIABLES]
                           + [np.array([p["training_upper_emissivity"] for p in parts], dtype=np.float32)])
    arrays["training_lower"], arrays["training_upper"] = lower[None, :], upper[None, :]
    arrays["physical_lower"], arrays["physical_upper"] = _physical_bounds(layout.n_levels, layout.n_channels)
    arrays["bounds_channel_map"] = _graph.bounds_channel_map(layout.n_levels, layout.n_channels).astype(np.float32)
    decode, decode_offset = _graph.flag_decode(layout.n_channels)
    arrays["flag_decode"], arrays["flag_decode_offset"] = decode.astype(np.float32), decode_offset.astype(np.float32)
    return arrays


# ---- metadata -----------------------------------------------------------------------------
def _io_description(names, n_levels, n_channels, elem_type="float32"):
    sizes = {"L": n_levels, "C": n_channels, "N": "N"}
    return [{"name": n, "shape": [sizes[d] for d in _SHAPES[n]], "units": _UNITS[n],
             "dtype": "int32" if n == "quality_flag" else elem_type} for n in names]


def _envelope_json(bounds: dict, parts: list[dict], channel_ids) -> dict:
    out = {}
    for name in _PROFILE_VARIABLES:
        lo, hi = bounds[name]
        per_level = lo.size > 1
        out[name] = {"lower": [float(v) for v in lo] if per_level else float(lo[0]),
                     "upper": [float(v) for v in hi] if per_level else float(hi[0]),
                     "units": _UNITS[name], **({"per": "level"} if per_level else {})}
    out["surface_emissivity"] = {
        "lower": [float(p["training_lower_emissivity"]) for p in parts],
        "upper": [float(p["training_upper_emissivity"]) for p in parts],
        "units": "1", "per": "channel", "channels": list(channel_ids),
    }
    return out


def _metadata(*, layout, config, instrument, channel_ids, grid, bounds, parts, limits, margins,
              stats, recipe_name, recipe_toml, recipes, data_sha, teacher, tropopause=None) -> dict:
    import rtemu

    limit_names = ["mahalanobis_squared"] + [f"reconstruction_squared_{name}" for name, k in config.blocks() if k]
    meta = {
        "rtemu.format_version": str(_bundle.FORMAT_VERSION),
        "rtemu.version": rtemu.__version__,
        "rtemu.created": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
        "rtemu.instrument_toml": instrument.to_toml(),
        "rtemu.channels": json.dumps(list(channel_ids)),
        "rtemu.pressure_hpa": json.dumps([float(p) for p in grid]),
        "rtemu.inputs": json.dumps(_io_description(_graph.INPUT_NAMES, layout.n_levels, layout.n_channels)),
        "rtemu.outputs": json.dumps(_io_description(_graph.OUTPUT_NAMES, layout.n_levels, layout.n_channels)),
        "rtemu.graph": json.dumps({
            "n_levels": layout.n_levels, "n_channels": layout.n_channels,
            "n_components": layout.n_components, "hidden": list(layout.hidden),
            "humidity": layout.humidity, "zenith": layout.zenith,
            "n_reconstruction_blocks": layout.n_reconstruction_blocks, "opset": _graph.OPSET,
            "water_path": layout.water_path,
            "n_line_kernels": layout.n_line_kernels, "n_continuum_kernels": layout.n_continuum_kernels,
            "reflection_kernels": layout.reflection_kernels,
            "n_band_kernels": layout.n_band_kernels, "n_channel_kernels": layout.n_channel_kernels,
            "kernel_temperature_laws": layout.kernel_temperature_laws,
            "n_tropopause_layers": layout.n_tropopause_layers,
            "level_order": "surface first" if grid[0] > grid[-1] else "top first",
        }, sort_keys=True),
        "rtemu.features": config.to_json(),
        "rtemu.envelope": json.dumps(_envelope_json(bounds, parts, channel_ids)),
        "rtemu.flag_thresholds": json.dumps({
            "bounds_margin": margins[0], "novelty_margin": margins[1],
            "novelty_limits": {n: float(v) for n, v in zip(limit_names, limits)},
            "physical_bounds": {k: list(v) for k, v in PHYSICAL_BOUNDS.items()},
            "rule": "bit 2: any input outside [lower, upper] of the envelope; bit 4: any novelty "
                    "score above its limit (largest training value times novelty_margin)"
                    + (", or the temperature at the lapse-rate tropopause outside its training range "
                       "(tropopause)" if tropopause else ""),
            **({"tropopause": tropopause} if tropopause else {}),
        }, sort_keys=True),
        "rtemu.flag_meanings": json.dumps({
            str(_flags.INVALID_INPUT): "invalid_input",
            str(_flags.OUTSIDE_TRAINING_BOUNDS): "outside_training_bounds",
            str(_flags.NOVEL_STATE): "novel_state",
            str(_flags.PHYSICS_FALLBACK): "physics_fallback (set by the runtime, never by the graph)",
        }),
        "rtemu.channel_stats": json.dumps({c: stats[c] for c in channel_ids}, sort_keys=True),
        "rtemu.recipe_name": recipe_name,
        "rtemu.recipe_toml": recipe_toml,
        "rtemu.recipes": json.dumps(recipes, sort_keys=True),
        "rtemu.training_data_sha256": data_sha,
        # The model the emulator learned: the physics fallback and the audit's default
        # reference are right only for rtemu's physics.
        "rtemu.teacher": teacher[0],
        "rtemu.teacher_version": teacher[1],
    }
    return meta


def _finish(model: onnx.ModelProto, meta: dict) -> bytes:
    meta = dict(meta)
    meta["rtemu.weights_sha256"] = _bundle.weights_sha256(model)
    meta["rtemu.content_sha256"] = _bundle.content_sha256(model)
    meta["rtemu.metadata_sha256"] = _bundle.metadata_sha256(meta)
    onnx.helper.set_model_props(model, dict(sorted(meta.items())))
    onnx.checker.check_model(model, full_check=True)
    return model.SerializeToString(deterministic=True)


# ---- entry points -------------------------------------------------------------------------
def export_bundle(emu: TrainedEmulator, output, *, base=None, dtype=np.float32) -> Path:
    """Write ``emu`` as a bundle at ``output`` (atomically).

    ``base`` (a :class:`rtemu.bundle.Bundle`) merges into an existing bundle: its shared
    transform and bounds are kept, its channels are kept bit-identical unless ``emu``
    retrains them, and ``emu``'s channels are added (in the order of ``emu.instrument``).
    """
    model = build_bundle_model(emu, base=base, dtype=dtype)[0]
    output = Path(output)
    write_bytes_atomic(output, model)
    return output


def build_bundle_model(emu: TrainedEmulator, *, base=None, dtype=np.float32):
    """Serialised bundle bytes and the layout (see :func:`export_bundle`)."""
    new_parts = {}
    for i, cid in enumerate(emu.channel_ids):
        new_parts[cid] = _channel_parts(emu.channels[cid], emu.envelope.lower["surface_emissivity"][i],
                                        emu.envelope.upper["surface_emissivity"][i])
    new_stats = {}
    for cid in emu.channel_ids:
        new_stats[cid] = dict(emu.channels[cid].stats, recipe=emu.recipe.name,
                              recipe_sha256=emu.recipe.sha256, training_data_sha256=emu.data_sha256,
                              teacher_version=emu.teacher[1])
    if base is None:
        shared, bounds = _shared_from_emulator(emu)
        ids = list(emu.channel_ids)
        parts = [new_parts[c] for c in ids]
        stats = new_stats
        limits = np.asarray(emu.envelope.novelty_limits, dtype=float)
        margins = (emu.envelope.bounds_margin, emu.envelope.novelty_margin)
        recipe_name, recipe_toml = emu.recipe.name, emu.recipe.text
        recipes = {emu.recipe.sha256: emu.recipe.text}
        data_sha = emu.data_sha256
        instrument = emu.instrument.select(ids)
        K = emu.transform.n_components
    else:
        arrays = base.arrays()
        old_ids = list(base.channel_ids)
        wanted = set(old_ids) | set(emu.channel_ids)
        ids = [c for c in emu.instrument.channel_ids if c in wanted]
        shared = {k: arrays[k] for k in _SHARED if k in arrays}
        lo, hi = arrays["training_lower"][0], arrays["training_upper"][0]
        bounds, start = {}, 0
        for name in _PROFILE_VARIABLES:
            size = len(np.atleast_1d(base.envelope[name]["lower"]))
            bounds[name] = (lo[start:start + size].copy(), hi[start:start + size].copy())
            start += size
        parts = []
        for cid in ids:
            if cid in new_parts:
                parts.append(new_parts[cid])
            else:
                parts.append(_unstack(arrays, old_ids.index(cid), base.channel_stats[cid]["hidden_layers"]))
        stats = {c: (new_stats[c] if c in new_stats else base.channel_stats[c]) for c in ids}
        th = base.flag_thresholds
        limits = np.array(list(th["novelty_limits"].values()), dtype=float)
        margins = (th["bounds_margin"], th["novelty_margin"])
        recipe_name, recipe_toml = base.recipe_name, base.recipe_toml
        recipes = dict(base.recipes)
        recipes[emu.recipe.sha256] = emu.recipe.text
        data_sha = base.training_data_sha256
        instrument = emu.instrument.select(ids)
        K = base.graph["n_components"]
    hidden = tuple(int(max(stats[c]["hidden_layers"][k] for c in ids))
                   for k in range(len(stats[ids[0]]["hidden_layers"])))
    if any(len(stats[c]["hidden_layers"]) != len(hidden) for c in ids):
        raise ValueError("all channels of a bundle must have the same number of hidden layers; "
                         f"got {[stats[c]['hidden_layers'] for c in ids]} (rule: change hidden_layers "
                         "widths only, not the depth, when updating a bundle)")
    cfg = emu.config
    blocks = sum(1 for _, k in cfg.blocks() if k)
    layout = _graph.GraphLayout(n_levels=emu.pressure_hpa.size, n_channels=len(ids), n_components=K,
                                hidden=hidden, humidity=cfg.humidity, zenith=cfg.zenith,
                                n_reconstruction_blocks=blocks, water_path=cfg.water_path,
                                n_line_kernels=len(cfg.line_kernels),
                                n_continuum_kernels=len(cfg.continuum_kernels),
                                reflection_kernels=cfg.reflection_kernels,
                                n_band_kernels=cfg.n_band_kernels,
                                n_channel_kernels=len(cfg.channel_kernels),
                                kernel_temperature_laws=bool(cfg.kernel_temperature_laws),
                                n_tropopause_layers=(shared["tropopause_lower"].size - 1
                                                     if "tropopause_lower" in shared else 0))
    arrays = _assemble(shared, bounds, parts, layout)
    model = _graph.build_model(layout, arrays, dtype=dtype)
    meta = _metadata(layout=layout, config=cfg, instrument=instrument, channel_ids=ids,
                     grid=emu.pressure_hpa, bounds=bounds, parts=parts, limits=limits, margins=margins,
                     stats=stats, recipe_name=recipe_name, recipe_toml=recipe_toml, recipes=recipes,
                     data_sha=data_sha, teacher=emu.teacher,
                     tropopause=_tropopause_json(shared, emu.pressure_hpa))
    return _finish(model, meta), layout


def _frozen_from_bundle(base) -> FrozenTransform:
    arrays = base.arrays()
    return FrozenTransform(
        config=FeatureConfig(**base.features), n_levels=base.graph["n_levels"],
        n_components=base.graph["n_components"], feature_center=arrays["feature_center"],
        projection_weight=arrays["projection_weight"],
        projection_offset=arrays["projection_offset"], novelty_scale=arrays["novelty_scale"],
    )


def train_to_onnx(data, recipe, output, *, channels=None, update=None, workers=None, progress=True,
                  log=None):
    """Train per-channel emulators on ``data`` with ``recipe`` and write the ONNX bundle.

    Parameters
    ----------
    data : str, os.PathLike or xarray.Dataset
        Training set (e.g. from :func:`rtemu.sampling.sample_to_netcdf`).
    recipe : str or os.PathLike
        Recipe name (``rtemu.training.list_recipes()``) or TOML path.
    output : str or os.PathLike
        The bundle to write (atomically; may be the same file as ``update``).
    channels : sequence of str, optional
        Train only these channel ids (default: all channels of the data's instrument).
    update : str or os.PathLike, optional
        An existing bundle: the trained channels replace or join its channels; its shared
        transform (features, PCA, bounds of the profile variables, novelty limits) is
        reused, and its other channels are copied bit-identically. The data must be on the
        bundle's pressure grid and the recipe's [features] must equal the bundle's.
    workers : int, optional
        Processes fitting channels in parallel (default: one per core).
    progress : bool
        Show a tqdm bar with each channel's validation RMSE.
    log : callable, optional
        Receives one summary line per finished channel.

    Returns
    -------
    rtemu.bundle.Bundle
        The written bundle, read back and checked.
    """
    recipe = load_recipe(recipe)
    training = load_training_data(data, jacobians=recipe.uses_jacobians(channels))
    base = None
    transform = None
    if update is not None:
        base = _bundle.read_bundle(update)
        transform = _frozen_from_bundle(base)
        _check_update(base, training, recipe)
    emu = fit_emulator(training, recipe, channels=channels, transform=transform, workers=workers,
                       progress=progress, log=log)
    export_bundle(emu, output, base=base)
    return _bundle.read_bundle(output)


def _check_update(base, training, recipe) -> None:
    grid = np.asarray(base.pressure_hpa, dtype=float)
    if grid.shape != training.pressure_hpa.shape or not np.array_equal(grid, training.pressure_hpa):
        raise ValueError(f"update: the training data's pressure grid ({training.pressure_hpa.size} levels) is not "
                         f"the bundle's ({grid.size} levels) (rule: retrain channels on the bundle's grid)")
    bundle_features = FeatureConfig(**base.features)
    recipe_features = recipe.feature_config(training.instrument)
    if recipe_features != bundle_features:
        raise ValueError(f"update: recipe {recipe.source} [features] {recipe_features} differ from the "
                         f"bundle's {bundle_features} (rule: the shared transform is fixed by the first training)")
    if training.teacher[0] != base.teacher[0]:
        raise ValueError(f"update: the bundle emulates teacher {base.teacher[0]!r}, the training data comes from "
                         f"{training.teacher[0]!r} (rule: one teacher per bundle)")
    data_inst = training.instrument
    missing = [c for c in base.channel_ids if c not in data_inst.channel_ids]
    if missing:
        raise ValueError(f"update: bundle channels {missing} are not in the training data's instrument "
                         f"{data_inst.name!r}")
    if data_inst.select(list(base.channel_ids)).to_toml() != base.instrument.to_toml():
        raise ValueError("update: the training data's instrument defines the bundle's channels differently "
                         f"(instrument {data_inst.name!r} vs the bundle's {base.instrument.name!r})")
