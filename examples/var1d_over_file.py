"""A 1D-Var loop over a file of columns (INVENTED scenario: an observing-system simulation).

Takes a file of columns (default: the shipped example profiles, an invented pass of the
invented demo-sounder) as the truth, makes synthetic observations = physics(truth) +
instrument noise and backgrounds = truth + errors drawn from an invented background error
covariance, retrieves every column with 1D-Var (physical model, or an emulator bundle with
``--model``), and writes the analysis and its diagnostics to netCDF.

Usage:  python examples/var1d_over_file.py [--columns FILE] [--model emulator.onnx [--fallback]]
                                            [--output-dir DIR]

With ``--model`` alone, a column whose background the emulator flags (outside its training
envelope) has its observations rejected by the quality control; ``--fallback`` computes
such columns with the physical model instead (``fallback="physics"``), as the demo does.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np

from rtemu import assim, flags
from rtemu._io import open_dataset, to_netcdf_atomic
from rtemu.runtime import EmulatedOperator, PhysicalOperator

HERE = Path(__file__).resolve().parent
PROFILES = HERE / "data" / "example_profiles.nc"


def invented_b(layout: assim.ControlLayout, pressure_hpa, sd_t=1.5, sd_lnq=0.3, sd_ts=2.0, length=0.6):
    """An invented B: Gaussian correlation in ln p within T and within ln q, no cross terms."""
    lnp = np.log(pressure_hpa)
    corr = np.exp(-0.5 * ((lnp[:, None] - lnp[None, :]) / length) ** 2)
    corr = 0.99 * corr + 0.01 * np.eye(lnp.size)  # a little white noise keeps B well conditioned
    b = np.zeros((layout.size, layout.size))
    b[layout.temperature, layout.temperature] = sd_t**2 * corr
    b[layout.ln_humidity, layout.ln_humidity] = sd_lnq**2 * corr
    b[layout.surface_temperature, layout.surface_temperature] = sd_ts**2
    return b


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--columns", default=str(PROFILES), help="netCDF file of truth columns")
    parser.add_argument("--model", help="emulator bundle (default: the physical model)")
    parser.add_argument("--fallback", action="store_true",
                        help="with --model: compute flagged columns with the physical model")
    parser.add_argument("--output-dir", default=None)
    parser.add_argument("--seed", type=int, default=7)
    args = parser.parse_args(argv)
    out = Path(args.output_dir or tempfile.mkdtemp(prefix="rtemu-1dvar-"))

    with open_dataset(args.columns) as ds:
        truth = ds[["air_pressure", "air_temperature", "specific_humidity", "surface_temperature",
                    "surface_emissivity", "sensor_zenith_angle", "surface_air_pressure"]].load()
    physical = PhysicalOperator("demo-sounder")
    if args.model:
        operator = EmulatedOperator.load(args.model, fallback="physics" if args.fallback else None)
    else:
        operator = physical
    rng = np.random.default_rng(args.seed)
    clean = physical.simulate(truth)["brightness_temperature"]
    observations = clean + rng.standard_normal(clean.shape) * physical.instrument.noise_k

    layout = assim.ControlLayout(n_levels=truth.sizes["level"])
    b = invented_b(layout, truth["air_pressure"].values)
    background = assim.sample_ensemble(truth, b, n_members=2, seed=args.seed + 1).isel(member=0, drop=True)

    # With the fallback, a flagged column's values are the physical model's (the flag then
    # carries physics_fallback beside the envelope bits), so its observations may be used.
    accept = (flags.PHYSICS_FALLBACK | flags.ENVELOPE) if args.fallback else 0
    result = assim.var1d(operator, background, observations, b_matrix=b, max_iter=10, accept_flags=accept)
    d = result.diagnostics
    err_b = background["air_temperature"] - truth["air_temperature"]
    err_a = result.analysis["air_temperature"] - truth["air_temperature"]
    print(f"{truth.sizes['profile']} columns with {operator!r}")
    print(f"  converged: {int(d['converged'].sum())} of {truth.sizes['profile']}; "
          f"mean DFS {float(d['dfs'].mean()):.1f}")
    print(f"  temperature RMS error: background {float(np.sqrt((err_b**2).mean())):.2f} K, "
          f"analysis {float(np.sqrt((err_a**2).mean())):.2f} K")
    counts = dict(zip(d["qc_category"].values.tolist(), d["qc_count"].values.tolist()))
    print(f"  observations used {counts['used']} of {sum(counts.values())}; rejected: "
          + ", ".join(f"{k} {v}" for k, v in counts.items() if k != "used"))
    if counts.get("operator_flag") and args.model and not args.fallback:
        print("  (operator_flag: the emulator flagged those columns as outside its training envelope; "
              "--fallback computes them with the physics)")
    to_netcdf_atomic(result.analysis, out / "analysis.nc")
    to_netcdf_atomic(d.drop_vars([v for v in ("averaging_kernel", "analysis_error_covariance") if v in d]),
                     out / "diagnostics.nc")
    print(f"  wrote {out / 'analysis.nc'} and {out / 'diagnostics.nc'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
