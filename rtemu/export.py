"""Export: a trained emulator -> one self-describing ONNX bundle; ``train_to_onnx``.

Stage "export" (training -> export -> runtime). The export only lays the arrays of a
:class:`rtemu.training.TrainedEmulator` into the graph (:mod:`rtemu._graph`) and writes
metadata: per-channel parameters are stacked on a channel axis, gray absorbers padded to
the largest count with zero-weight absorbers and hidden layers zero-padded to the widest
channel (both exact: a padded absorber or unit contributes nothing and gets no gradient).
Metadata keys: see :mod:`rtemu.bundle`.
"""

from __future__ import annotations

import datetime as _dt
import json
from pathlib import Path

import numpy as np
import onnx

from rtemu import _graph
from rtemu import atmosphere as _atm
from rtemu import bundle as _bundle
from rtemu import flags as _flags
from rtemu._io import write_bytes_atomic
from rtemu.gray import GAS_POWERS, hat_slopes
from rtemu.training import PHYSICAL_BOUNDS, TROPOPAUSE_NEVER, TrainedEmulator, fit_emulator, load_recipe

__all__ = ["train_to_onnx", "export_bundle", "build_bundle_model"]

#: Bounded profile variables in the order of the graph's bounds vector.
_PROFILE_VARIABLES = ("air_temperature", "specific_humidity", "humidity_index", "surface_temperature",
                      "sensor_zenith_angle", "skin_minus_air_temperature", "surface_air_pressure")
_UNITS = {
    "air_temperature": "K", "specific_humidity": "kg kg-1", "surface_temperature": "K", "surface_emissivity": "1",
    "sensor_zenith_angle": "degree", "surface_air_pressure": "hPa", "humidity_index": "1",
    "skin_minus_air_temperature": "K", "brightness_temperature": "K", "jacobian_air_temperature": "K K-1",
    "jacobian_specific_humidity": "K (kg kg-1)-1", "jacobian_surface_temperature": "K K-1",
    "jacobian_surface_emissivity": "K", "brightness_temperature_uncertainty": "K", "quality_flag": "1",
}
_SHAPES = {
    "air_temperature": ["N", "L"], "specific_humidity": ["N", "L"], "surface_temperature": ["N"],
    "surface_emissivity": ["N", "C"], "sensor_zenith_angle": ["N"], "surface_air_pressure": ["N"],
    "brightness_temperature": ["N", "C"], "jacobian_air_temperature": ["N", "C", "L"],
    "jacobian_specific_humidity": ["N", "C", "L"], "jacobian_surface_temperature": ["N", "C"],
    "jacobian_surface_emissivity": ["N", "C"], "brightness_temperature_uncertainty": ["N", "C"],
    "quality_flag": ["N", "C"],
}


def _pad(a, shape):
    out = np.zeros(shape)
    out[tuple(slice(0, n) for n in np.shape(a))] = a
    return out


def _channel_arrays(emu: TrainedEmulator, layout: _graph.GraphLayout) -> dict:
    """Stacked per-channel arrays (float64) of the gray absorbers, networks and uncertainty."""
    C, K, Kz, h = layout.n_channels, layout.n_absorbers, layout.n_components, layout.hidden
    V = layout.n_own_inputs
    expo = np.zeros((3, C, K, 3))
    log_k = np.full((C, K, 3), -60.0)  # padded absorbers: no opacity and zero weight
    weight = np.zeros((C, K))
    planck_b = np.zeros(C)
    w1z = np.zeros((C, Kz, h[0]))
    w1v = np.zeros((C, V, h[0]))
    own_center = np.zeros((C, 1, V))
    out = {"layer1_bias": np.zeros((C, 1, h[0])), "output_weight": np.zeros((C, h[-1], 1)),
           "output_offset": np.zeros(C), "sigma_offset": np.zeros(C), "sigma_slope": np.zeros(C)}
    for k in range(2, len(h) + 1):
        out[f"layer{k}_weight"] = np.zeros((C, h[k - 2], h[k - 1]))
        out[f"layer{k}_bias"] = np.zeros((C, 1, h[k - 1]))
    for c, cid in enumerate(emu.channel_ids):
        ch = emu.channels[cid]
        g = ch.absorbers
        n = g.n_absorbers
        log_k[c, :n], weight[c, :n], planck_b[c] = g.log_k, g.weights, g.planck_b
        expo[0, c, :n], expo[1, c, :n] = g.pressure_exponent, g.temperature_exponent
        expo[2, c, :n] = GAS_POWERS
        # u = [z, BT_gray, f (n), g (n), r (n), Ts, sec, e] -> the graph's [BT_gray, f, g, r (K each), Ts, sec, e]
        scale = ch.input_scale
        W1 = ch.coefs[0] / scale[:, None]
        center = ch.input_center
        rows = np.r_[Kz, Kz + 1 + np.arange(n), Kz + 1 + n + np.arange(n), Kz + 1 + 2 * n + np.arange(n),
                     Kz + 1 + 3 * n + np.arange(3)]
        slots = np.r_[0, 1 + np.arange(n), 1 + K + np.arange(n), 1 + 2 * K + np.arange(n), 1 + 3 * K + np.arange(3)]
        width = W1.shape[1]
        w1z[c, :, :width] = W1[:Kz]
        w1v[c, slots, :width] = W1[rows]
        own_center[c, 0, slots] = center[rows]
        # z is not centred in the graph: its centre goes into the bias
        out["layer1_bias"][c, 0, :width] = ch.intercepts[0] - center[:Kz] @ W1[:Kz]
        for k in range(2, len(h) + 1):
            out[f"layer{k}_weight"][c] = _pad(ch.coefs[k - 1], (h[k - 2], h[k - 1]))
            out[f"layer{k}_bias"][c, 0] = _pad(ch.intercepts[k - 1], (h[k - 1],))
        out["output_weight"][c] = _pad(ch.target_scale * ch.coefs[-1], (h[-1], 1))
        out["output_offset"][c] = ch.target_mean + ch.target_scale * float(ch.intercepts[-1][0])
        out["sigma_offset"][c], out["sigma_slope"][c] = ch.sigma_offset, ch.sigma_slope
    out.update({
        # term-major columns: [dry (A), water vapour (A), continuum (A)], A = C K channel-major
        "gray_exponent": expo.transpose(0, 3, 1, 2).reshape(3, 3 * C * K),
        "gray_log_k": log_k.transpose(2, 0, 1).reshape(-1),
        "gray_temperature_exponent_dry": expo[1, :, :, 0].reshape(-1),
        "gray_temperature_exponent_line": expo[1, :, :, 1].reshape(-1),
        "gray_temperature_exponent_continuum": expo[1, :, :, 2].reshape(-1),
        "absorber_weight": weight.reshape(-1), "planck_b": planck_b,
        "layer1_z": w1z.transpose(1, 0, 2).reshape(Kz, C * h[0]), "layer1_z_t": w1z.transpose(0, 2, 1),
        "layer1_own": w1v, "layer1_own_t": w1v.transpose(0, 2, 1), "own_center": own_center,
        "output_weight_row": out["output_weight"].transpose(0, 2, 1),
        "sigma_threshold": np.asarray(emu.uncertainty_threshold, dtype=float),
    })
    for k in range(2, len(h) + 1):
        out[f"layer{k}_weight_t"] = out[f"layer{k}_weight"].transpose(0, 2, 1)
    return out


def _shared_arrays(emu: TrainedEmulator) -> dict:
    """Grid, terrain, compression, novelty and bounds arrays (float64)."""
    p = np.asarray(emu.pressure_hpa, dtype=float)
    L = p.size
    (up, up_w), (down, down_w) = hat_slopes(np.log(p))
    mean = np.zeros((L, L - 1))
    mean[np.arange(L - 1), np.arange(L - 1)] = 0.5
    mean[np.arange(1, L), np.arange(L - 1)] = 0.5
    thick = np.zeros((L, L - 1))
    thick[np.arange(L - 1), np.arange(L - 1)] = 1.0
    thick[np.arange(1, L), np.arange(L - 1)] = -1.0
    comp, env = emu.compression, emu.envelope
    limits = np.maximum(np.asarray(env.novelty_limits, dtype=float), 1e-30) * (1.0 + 1e-3)  # float32 slack
    recon_scale = np.zeros((2 * L, 2))
    recon_scale[:L, 0], recon_scale[L:, 1] = 1.0 / limits[1], 1.0 / limits[2]
    lower, upper, plo, phi = [], [], [], []
    for name in _PROFILE_VARIABLES:
        lo, hi = np.atleast_1d(env.lower[name]), np.atleast_1d(env.upper[name])
        lower.append(lo)
        upper.append(hi)
        plo.append(np.full(lo.size, PHYSICAL_BOUNDS[name][0]))
        phi.append(np.full(lo.size, PHYSICAL_BOUNDS[name][1]))
    arrays = {
        "pressure_grid": p, "hat_up_level": up, "hat_up_width": up_w, "hat_down_level": down,
        "hat_down_width": down_w, "layer_mean": mean, "layer_mean_t": mean.T, "layer_thickness": thick,
        "compression_center": comp.center, "compression_projection": comp.projection,
        "compression_offset": comp.offset, "compression_projection_t": comp.projection.T,
        "reconstruction": comp.reconstruction, "reconstruction_offset": comp.reconstruction_offset,
        "novelty_scale": (1.0 / (comp.component_variance * limits[0]))[:, None],
        "reconstruction_scale": recon_scale,
        "training_lower": np.concatenate(lower)[None], "training_upper": np.concatenate(upper)[None],
        "physical_lower": np.concatenate(plo)[None], "physical_upper": np.concatenate(phi)[None],
        "emissivity_lower": np.asarray(env.lower["surface_emissivity"], dtype=float)[None],
        "emissivity_upper": np.asarray(env.upper["surface_emissivity"], dtype=float)[None],
        "log_pressure_minus_bolton_a": np.log(p) - 17.67,
    }
    if env.tropopause_lower is not None:
        lay = _atm.tropopause_search_layers(p)
        m = lay["base"].size
        pick = np.zeros((L, 3 * m))
        for i, key in enumerate(("base", "next", "deep")):
            pick[lay[key], i * m + np.arange(m)] = 1.0
        arrays.update({"tropopause_pick": pick,
                       "tropopause_factor": np.concatenate([_atm.layer_lapse_factor(lay["next_thickness"]),
                                                            _atm.layer_lapse_factor(lay["deep_thickness"])]),
                       "tropopause_lower": env.tropopause_lower, "tropopause_upper": env.tropopause_upper})
    return arrays


def _layout(emu: TrainedEmulator) -> _graph.GraphLayout:
    fits = [emu.channels[c] for c in emu.channel_ids]
    depths = {len(f.hidden) for f in fits}
    if len(depths) != 1:
        raise ValueError(f"all channels of a bundle must have the same number of hidden layers; got "
                         f"{[list(f.hidden) for f in fits]}")
    hidden = tuple(max(f.hidden[k] for f in fits) for k in range(depths.pop()))
    trop = emu.envelope.tropopause_lower
    return _graph.GraphLayout(n_levels=emu.pressure_hpa.size, n_channels=len(fits),
                              n_components=emu.compression.n_components,
                              n_absorbers=max(f.absorbers.n_absorbers for f in fits), hidden=hidden,
                              n_tropopause_layers=0 if trop is None else trop.size - 1)


# ---- metadata -----------------------------------------------------------------------------
def _io_description(names, n_levels, n_channels):
    sizes = {"L": n_levels, "C": n_channels, "N": "N"}
    return [{"name": n, "shape": [sizes[d] for d in _SHAPES[n]], "units": _UNITS[n],
             "dtype": "int32" if n == "quality_flag" else "float32"} for n in names]


def _envelope_json(emu: TrainedEmulator) -> dict:
    out = {}
    for name in _PROFILE_VARIABLES:
        lo, hi = np.atleast_1d(emu.envelope.lower[name]), np.atleast_1d(emu.envelope.upper[name])
        per_level = lo.size > 1
        out[name] = {"lower": [float(v) for v in lo] if per_level else float(lo[0]),
                     "upper": [float(v) for v in hi] if per_level else float(hi[0]),
                     "units": _UNITS[name], **({"per": "level"} if per_level else {})}
    out["surface_emissivity"] = {"lower": [float(v) for v in emu.envelope.lower["surface_emissivity"]],
                                 "upper": [float(v) for v in emu.envelope.upper["surface_emissivity"]],
                                 "units": "1", "per": "channel", "channels": list(emu.channel_ids)}
    return out


def _tropopause_json(arrays: dict, grid) -> dict | None:
    if "tropopause_lower" not in arrays:
        return None
    levels = np.argmax(arrays["tropopause_pick"], axis=0).reshape(3, -1)  # base | next | deep
    return {
        "lapse_rate_k_per_km": _atm.TROPOPAUSE_LAPSE_RATE,
        **{f"{key}_pressure_hpa": [float(grid[k]) for k in rows] for key, rows in zip(("base", "next", "deep"), levels)},
        "lower_k": [float(v) for v in arrays["tropopause_lower"]],
        "upper_k": [float(v) for v in arrays["tropopause_upper"]],
        "rule": "the tropopause is the first base level (from the surface up) where the mean lapse rate up "
                "to the next level and up to the deep level are both at most lapse_rate_k_per_km; position "
                "M (the last entry of lower_k/upper_k) means none, with temperature 0; a range of "
                f"({TROPOPAUSE_NEVER:g}, {-TROPOPAUSE_NEVER:g}) is a base no training state reached",
    }


def _metadata(emu: TrainedEmulator, layout: _graph.GraphLayout, arrays: dict) -> dict:
    import rtemu

    grid = emu.pressure_hpa
    env = emu.envelope
    trop = _tropopause_json(arrays, grid)
    stats = {c: dict(emu.channels[c].stats, recipe=emu.recipe.name, recipe_sha256=emu.recipe.sha256,
                     training_data_sha256=emu.data_sha256, teacher_version=emu.teacher[1])
             for c in emu.channel_ids}
    meanings = dict(zip(_flags.FLAG_MEANINGS.split(), _flags.FLAG_MASKS.tolist()))
    return {
        "rtemu.format_version": str(_bundle.FORMAT_VERSION),
        "rtemu.version": rtemu.__version__,
        "rtemu.created": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
        "rtemu.instrument_toml": emu.instrument.select(list(emu.channel_ids)).to_toml(),
        "rtemu.channels": json.dumps(list(emu.channel_ids)),
        "rtemu.pressure_hpa": json.dumps([float(p) for p in grid]),
        "rtemu.inputs": json.dumps(_io_description(_graph.INPUT_NAMES, layout.n_levels, layout.n_channels)),
        "rtemu.outputs": json.dumps(_io_description(_graph.OUTPUT_NAMES, layout.n_levels, layout.n_channels)),
        "rtemu.graph": json.dumps({
            "n_levels": layout.n_levels, "n_channels": layout.n_channels, "n_components": layout.n_components,
            "n_absorbers": layout.n_absorbers, "hidden": list(layout.hidden), "opset": _graph.OPSET,
            "block": _graph.BLOCK, "n_tropopause_layers": layout.n_tropopause_layers,
            "level_order": "surface first",
        }, sort_keys=True),
        "rtemu.features": json.dumps({k: v for k, v in emu.recipe.settings["features"].items()}, sort_keys=True),
        "rtemu.envelope": json.dumps(_envelope_json(emu)),
        "rtemu.flag_thresholds": json.dumps({
            "bounds_margin": env.bounds_margin, "novelty_margin": env.novelty_margin,
            "novelty_limits": {n: float(v) for n, v in zip(
                ("mahalanobis_squared", "reconstruction_squared_temperature", "reconstruction_squared_humidity"),
                env.novelty_limits)},
            "uncertainty_threshold_k": {c: float(v) for c, v in zip(emu.channel_ids, emu.uncertainty_threshold)},
            "physical_bounds": {k: list(v) for k, v in PHYSICAL_BOUNDS.items()},
            "rule": "outside_training_bounds: any input (after the terrain collapse) outside [lower, upper] of the "
                    "envelope; novel_state: any novelty score above its limit (largest training value times "
                    "novelty_margin); large_uncertainty: brightness_temperature_uncertainty above "
                    "uncertainty_threshold_k" + ("; unusual_tropopause: the temperature at the lapse-rate "
                                                 "tropopause outside its training range (tropopause)" if trop else ""),
            **({"tropopause": trop} if trop else {}),
        }, sort_keys=True),
        "rtemu.flag_meanings": json.dumps({str(v): (k + (" (set by the runtime, never by the graph)"
                                                          if k in ("physics_fallback", "supersaturated") else ""))
                                           for k, v in meanings.items()}),
        "rtemu.channel_stats": json.dumps(stats, sort_keys=True),
        "rtemu.recipe_name": emu.recipe.name,
        "rtemu.recipe_toml": emu.recipe.text,
        "rtemu.recipes": json.dumps({emu.recipe.sha256: emu.recipe.text}, sort_keys=True),
        "rtemu.training_data_sha256": emu.data_sha256,
        # The model the emulator learned: the physics fallback and the audit's default
        # reference are right only for rtemu's physics.
        "rtemu.teacher": emu.teacher[0],
        "rtemu.teacher_version": emu.teacher[1],
    }


def _finish(model: onnx.ModelProto, meta: dict) -> bytes:
    meta = dict(meta)
    meta["rtemu.weights_sha256"] = _bundle.weights_sha256(model)
    meta["rtemu.content_sha256"] = _bundle.content_sha256(model)
    meta["rtemu.metadata_sha256"] = _bundle.metadata_sha256(meta)
    onnx.helper.set_model_props(model, dict(sorted(meta.items())))
    onnx.checker.check_model(model, full_check=True)
    return model.SerializeToString(deterministic=True)


# ---- entry points -------------------------------------------------------------------------
def build_bundle_model(emu: TrainedEmulator, *, dtype=np.float32):
    """Serialised bundle bytes and the layout of ``emu`` (``dtype`` float64: same graph in
    double precision, for tests)."""
    layout = _layout(emu)
    arrays = {**_shared_arrays(emu), **_channel_arrays(emu, layout)}
    model = _graph.build_model(layout, arrays, dtype=dtype)
    return _finish(model, _metadata(emu, layout, arrays)), layout


def export_bundle(emu: TrainedEmulator, output, *, dtype=np.float32) -> Path:
    """Write ``emu`` as a bundle at ``output`` (atomically)."""
    output = Path(output)
    write_bytes_atomic(output, build_bundle_model(emu, dtype=dtype)[0])
    return output


def train_to_onnx(data, recipe, output, *, channels=None, workers=None, progress=True, log=None):
    """Train per-channel emulators on ``data`` with ``recipe`` and write the ONNX bundle.

    Parameters
    ----------
    data : str, os.PathLike or xarray.Dataset
        Training set (e.g. from :func:`rtemu.sampling.sample_to_netcdf`).
    recipe : str or os.PathLike
        Recipe name (``rtemu.training.list_recipes()``) or TOML path.
    output : str or os.PathLike
        The bundle to write (atomically).
    channels : sequence of str, optional
        Train only these channel ids (default: all channels of the data's instrument).
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
    emu = fit_emulator(data, load_recipe(recipe), channels=channels, workers=workers, progress=progress, log=log)
    export_bundle(emu, output)
    return _bundle.read_bundle(output)
