"""``rtemu demo``: the whole chain on the invented demo instrument, in a few minutes.

1. Sample a training set for ``demo-sounder`` with the physical model, train the
   ``demo`` recipe, audit the emulator on an independent set.
2. An observing-system simulation in an INVENTED scenario (a pass of the invented
   demo-sounder over the invented Kerrow archipelago): truth states, synthetic
   observations = physics(truth) + instrument noise, backgrounds = truth + errors drawn
   from a background error covariance B.
3. 1D-Var with the emulator and with the physics on the same columns; an ensemble update
   with both.
4. Report, for both operators: analysis and background error against truth by layer,
   cost and time, the emulator's speed-up. Everything goes into one directory with a
   ``summary.json`` and figures.
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

import numpy as np
import xarray as xr

from rtemu import flags as _flags
from rtemu._checks import input_names
from rtemu._io import write_text_atomic
from rtemu.instrument import load_instrument

INSTRUMENT = "demo-sounder"
#: Embedded defaults (chosen so the whole demo takes at most about 5 minutes on 2 cores).
DEFAULTS = {
    "train_count": 20000,
    "train_seed": 101,
    "test_count": 4000,
    "test_seed": 202,
    "columns": 200,
    "truth_seed": 303,
    "error_seed": 404,
    "members": 64,
    "recipe": "demo",
    # Invented background error model (1 sigma): vertically correlated in ln p.
    "background_error_t_k": 1.5,
    "background_error_lnq": 0.3,
    "background_error_ts_k": 2.0,
    "background_error_length_lnp": 0.6,
}
#: Pressure layers for the error tables [hPa] (bottom, top).
LAYERS = ((1100.0, 700.0), (700.0, 400.0), (400.0, 100.0), (100.0, 10.0), (10.0, 0.5))


#: With fallback="physics", an envelope bit always comes with physics_fallback: the value is
#: the physical model's, so the assimilation may use it.
_ACCEPTED = _flags.PHYSICS_FALLBACK | _flags.ENVELOPE


def _workers() -> int:
    return max(1, min(2, os.cpu_count() or 1))


def _rms(x, axis=None):
    return float(np.sqrt(np.nanmean(np.square(x), axis=axis))) if axis is None else np.sqrt(np.nanmean(np.square(x), axis=axis))


def _invented_error_samples(truth: xr.Dataset, n: int, seed: int, cfg: dict) -> xr.Dataset:
    """States = a reference column + draws of the invented background error model.

    Temperature and ln q errors have Gaussian vertical correlation in ln p with length
    ``background_error_length_lnp``; the ln q error fades from its full value below 300 hPa
    to 5 % of it above 100 hPa. The estimated covariance of these states is B.
    """
    rng = np.random.default_rng(seed)
    p = truth["air_pressure"].values
    lnp = np.log(p)
    corr = np.exp(-0.5 * ((lnp[:, None] - lnp[None, :]) / cfg["background_error_length_lnp"]) ** 2)
    root = np.linalg.cholesky(corr + 1e-9 * np.eye(p.size))
    ref = truth.isel(profile=0)
    dt = cfg["background_error_t_k"] * rng.standard_normal((n, p.size)) @ root.T
    # Humidity errors fade above the tropopause region, where backgrounds are dry and
    # radiances barely sense humidity (common practice in 1D-Var set-ups).
    lnq_sd = cfg["background_error_lnq"] * np.clip((p - 100.0) / 200.0, 0.05, 1.0)
    dlnq = lnq_sd * (rng.standard_normal((n, p.size)) @ root.T)
    dts = cfg["background_error_ts_k"] * rng.standard_normal(n)
    states = xr.Dataset(
        {
            "air_pressure": truth["air_pressure"],
            "air_temperature": (("profile", "level"), ref["air_temperature"].values + dt),
            "specific_humidity": (("profile", "level"), ref["specific_humidity"].values * np.exp(dlnq)),
            "surface_temperature": (("profile",), ref["surface_temperature"].values + dts),
            "surface_emissivity": (("profile", "channel"), np.repeat(ref["surface_emissivity"].values[None], n, axis=0)),
            "sensor_zenith_angle": (("profile",), np.zeros(n)),
        },
        coords={"channel": truth["channel"]},
    )
    return states


def _above_ground(truth: xr.Dataset) -> np.ndarray:
    """bool [N, L]: levels above the ground (levels under it are not part of the column)."""
    p = np.broadcast_to(truth["air_pressure"].values, truth["air_temperature"].shape)
    if "surface_air_pressure" not in truth:
        return np.ones(p.shape, dtype=bool)
    return p <= truth["surface_air_pressure"].values[:, None]


def _temperature_error(analysis: xr.Dataset, truth: xr.Dataset) -> np.ndarray:
    """Analysis minus true temperature [K] [N, L], NaN under the ground."""
    dt = analysis["air_temperature"].values - truth["air_temperature"].values
    return np.where(_above_ground(truth), dt, np.nan)


def _layer_errors(analysis: xr.Dataset, truth: xr.Dataset) -> dict:
    p = truth["air_pressure"].values
    dt = _temperature_error(analysis, truth)
    dlnq = np.log(analysis["specific_humidity"].values) - np.log(truth["specific_humidity"].values)
    dlnq = np.where(_above_ground(truth), dlnq, np.nan)
    rows = {}
    for bottom, top in LAYERS:
        sel = (p <= bottom) & (p >= top)
        rows[f"{bottom:g}-{top:g} hPa"] = {
            "t_rmse_k": float(_rms(dt[:, sel])),
            "lnq_rmse": float(_rms(dlnq[:, sel])),
        }
    rows["all levels"] = {"t_rmse_k": float(_rms(dt)), "lnq_rmse": float(_rms(dlnq))}
    return rows


def _timed(function, *args, **kwargs):
    start = time.perf_counter()
    result = function(*args, **kwargs)
    return result, time.perf_counter() - start


def run_demo(output_dir="rtemu-demo", *, progress: bool = True, **overrides) -> dict:
    """Run the whole chain and write ``output_dir`` (see the module docstring).

    ``overrides`` replace entries of :data:`DEFAULTS` (e.g. smaller counts in tests).
    Returns the content of ``summary.json``.
    """
    from rtemu import assim
    from rtemu.audit import run_audit
    from rtemu.runtime import EmulatedOperator, PhysicalOperator
    from rtemu.sampling import draw_states, sample_to_netcdf
    from rtemu.export import train_to_onnx

    unknown = sorted(set(overrides) - set(DEFAULTS))
    if unknown:
        raise ValueError(f"run_demo: unknown setting(s) {unknown}; known: {sorted(DEFAULTS)}")
    cfg = {**DEFAULTS, **overrides}
    out = Path(output_dir)
    out.mkdir(parents=True, exist_ok=True)
    inst = load_instrument(INSTRUMENT)
    times = {}
    say = print if progress else (lambda *a, **k: None)
    wall = time.perf_counter()

    say(f"[1/4] training set: {cfg['train_count']} profiles of the physical model")
    train_path = out / "train.nc"
    _, times["sample_s"] = _timed(
        sample_to_netcdf, inst, train_path, count=cfg["train_count"], seed=cfg["train_seed"],
        workers=_workers(), progress=progress,
    )
    say(f"[2/4] training the '{cfg['recipe']}' recipe, one emulator per channel")
    model_path = out / "emulator.onnx"
    _, times["train_s"] = _timed(
        train_to_onnx, train_path, cfg["recipe"], model_path, workers=_workers(), progress=progress
    )
    say(f"[3/4] audit against the physics on {cfg['test_count']} independent profiles")
    audit_summary, times["audit_s"] = _timed(
        run_audit, model_path, out / "audit", count=cfg["test_count"], seed=cfg["test_seed"],
        progress=progress,
    )
    # A channel the audit found no unflagged entry for is, with fallback="physics" below,
    # computed by the physics wherever it is flagged: no emulator error to add to R there.
    emulator_rmse = {c: audit_summary["channels"][c]["rmse_k"] or 0.0 for c in inst.channel_ids}

    say(f"[4/4] observing-system simulation (invented scenario): {cfg['columns']} columns")
    physical = PhysicalOperator(inst)
    # Columns the emulator flags as outside its training envelope are recomputed by the
    # physics (and flagged physics_fallback, which the assimilation accepts): the safe set-up.
    emulated = EmulatedOperator.load(model_path, fallback="physics")
    states = draw_states(cfg["columns"], seed=cfg["truth_seed"], channels=inst)
    truth = states[input_names(states)]  # with the drawn ground
    rng = np.random.default_rng(cfg["error_seed"])
    clean = physical.simulate(truth)["brightness_temperature"]
    observations = clean + rng.standard_normal(clean.shape) * inst.noise_k[None, :]
    b_matrix = assim.estimate_background_covariance(
        _invented_error_samples(truth, 4000, cfg["error_seed"] + 1, cfg)
    )
    background = assim.sample_ensemble(
        truth, b_matrix, n_members=2, seed=cfg["error_seed"] + 2  # member 0: one draw
    ).isel(member=0, drop=True)

    runs = {}
    for name, operator in (("emulator", emulated), ("physics", physical)):
        # one warm-up call outside the timing: the emulator opens its Jacobian session on
        # first use (tens of ms), which is start-up cost, not per-iteration cost
        operator.simulate(background.isel(profile=slice(0, 1)), jacobian=True)
        # the demo reads analyses, costs and DFS only: no averaging-kernel / S matrices
        result, seconds = _timed(
            assim.var1d, operator, background, observations, b_matrix=b_matrix,
            emulator_error=emulator_rmse if name == "emulator" else None,
            accept_flags=_ACCEPTED, diagnostic_matrices=False,
        )
        runs[name] = {"var1d": result, "var1d_s": seconds}
    members = assim.sample_ensemble(background, b_matrix, n_members=cfg["members"],
                                    seed=cfg["error_seed"] + 3)
    for name, operator in (("emulator", emulated), ("physics", physical)):
        result, seconds = _timed(
            assim.ensemble_update, operator, members, observations,
            emulator_error=emulator_rmse if name == "emulator" else None,
            accept_flags=_ACCEPTED,
        )
        runs[name]["enkf"] = result
        runs[name]["enkf_s"] = seconds

    def t_rmse(analysis):
        return float(_rms(_temperature_error(analysis, truth)))

    var_a = {k: runs[k]["var1d"].analysis for k in runs}
    ens_a = {k: runs[k]["enkf"].analysis.mean("member") for k in runs}
    fallback = (emulated.simulate(background)["quality_flag"].values & _flags.PHYSICS_FALLBACK) > 0
    summary = {
        "background_physics_fallback_fraction": float(fallback.any(axis=1).mean()),
        "scenario": "INVENTED: a pass of the invented demo-sounder over the invented Kerrow archipelago",
        "instrument": inst.name,
        "settings": cfg,
        "emulator_rmse_k": emulator_rmse,
        "audit_verdicts": {c: audit_summary["channels"][c]["verdict"] for c in inst.channel_ids},
        "background_t_rmse_k": t_rmse(background),
        "var1d_t_rmse_emulator_k": t_rmse(var_a["emulator"]),
        "var1d_t_rmse_physics_k": t_rmse(var_a["physics"]),
        "var1d_t_diff_rms_k": float(_rms(var_a["emulator"]["air_temperature"].values
                                         - var_a["physics"]["air_temperature"].values)),
        "enkf_t_rmse_emulator_k": t_rmse(ens_a["emulator"]),
        "enkf_t_rmse_physics_k": t_rmse(ens_a["physics"]),
        "enkf_t_diff_rms_k": float(_rms(ens_a["emulator"]["air_temperature"].values
                                        - ens_a["physics"]["air_temperature"].values)),
        "var1d_seconds": {k: runs[k]["var1d_s"] for k in runs},
        "enkf_seconds": {k: runs[k]["enkf_s"] for k in runs},
        "var1d_speedup": runs["physics"]["var1d_s"] / runs["emulator"]["var1d_s"],
        "enkf_speedup": runs["physics"]["enkf_s"] / runs["emulator"]["enkf_s"],
        "var1d_converged_fraction": {
            k: float(np.mean(runs[k]["var1d"].diagnostics["converged"].values)) for k in runs},
        "var1d_mean_final_cost": {
            k: float(np.nanmean(_final_cost(runs[k]["var1d"]))) for k in runs},
        "errors_by_layer": {
            "background": _layer_errors(background, truth),
            **{f"var1d_{k}": _layer_errors(var_a[k], truth) for k in runs},
            **{f"enkf_{k}": _layer_errors(ens_a[k], truth) for k in runs},
        },
        "stage_seconds": times,
    }
    from rtemu import _plots_demo

    summary["figures"] = _plots_demo.demo_figures(out, physical, truth, background, var_a, observations)
    summary["total_seconds"] = time.perf_counter() - wall
    write_text_atomic(out / "summary.json", json.dumps(summary, indent=2, default=_jsonable))
    print(format_summary(summary))  # the readable summary, with or without progress output
    return summary


def _final_cost(result):
    d = result.diagnostics
    cost = d["cost"].values
    return cost[np.arange(cost.shape[0]), d["n_iterations"].values]


def _jsonable(value):
    if isinstance(value, (np.floating, np.integer)):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    return str(value)


def format_summary(s: dict) -> str:
    """The readable end-of-run summary."""
    lines = [
        "",
        f"rtemu demo ({s['scenario']})",
        f"  total {s['total_seconds']:.0f} s; stages: "
        + ", ".join(f"{k[:-2]} {v:.0f} s" for k, v in s["stage_seconds"].items()),
        "  emulator RMSE against physics [K] (audit verdict):",
    ]
    for c, v in s["emulator_rmse_k"].items():
        lines.append(f"    {c:<8} {v:7.3f}  {s['audit_verdicts'][c]}")
    lines += [
        f"  background T error (RMS)            {s['background_t_rmse_k']:.3f} K; backgrounds outside the "
        f"emulator's envelope (recomputed by the physics): {s['background_physics_fallback_fraction']:.0%}",
        f"  1D-Var analysis T error  emulator   {s['var1d_t_rmse_emulator_k']:.3f} K"
        f"   physics {s['var1d_t_rmse_physics_k']:.3f} K   difference {s['var1d_t_diff_rms_k']:.3f} K RMS",
        f"  ensemble analysis T error emulator  {s['enkf_t_rmse_emulator_k']:.3f} K"
        f"   physics {s['enkf_t_rmse_physics_k']:.3f} K   difference {s['enkf_t_diff_rms_k']:.3f} K RMS",
        f"  1D-Var wall time  emulator {s['var1d_seconds']['emulator']:.2f} s, physics "
        f"{s['var1d_seconds']['physics']:.2f} s: speed-up {s['var1d_speedup']:.1f}x",
        f"  ensemble wall time emulator {s['enkf_seconds']['emulator']:.2f} s, physics "
        f"{s['enkf_seconds']['physics']:.2f} s: speed-up {s['enkf_speedup']:.1f}x",
        "  written: summary.json, audit/report.md, figures " + ", ".join(s["figures"]),
    ]
    return "\n".join(lines)
