"""Train an emulator for a new instrument file, check it, and audit it (INVENTED instrument).

`examples/data/tern-7x.toml` describes an invented five-channel sounder. This script
validates it, prints its weighting-function peaks, samples a training set with the physical
model, trains a recipe, checks the bundle and audits it against the physics.

Usage:  python examples/train_new_instrument.py [--count N] [--recipe demo|full|PATH] [--output-dir DIR]
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np

import rtemu
from rtemu.atmosphere import default_pressure_grid, specific_humidity_from_relative_humidity, us_standard_atmosphere_1976

HERE = Path(__file__).resolve().parent
INSTRUMENT = HERE / "data" / "tern-7x.toml"


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--count", type=int, default=20000, help="training profiles")
    parser.add_argument("--recipe", default="demo")
    parser.add_argument("--audit-count", type=int, default=1000)
    parser.add_argument("--output-dir", default=None)
    args = parser.parse_args(argv)
    out = Path(args.output_dir or tempfile.mkdtemp(prefix="rtemu-tern-"))

    inst = rtemu.load_instrument(INSTRUMENT)  # a bad key or value stops here, naming it
    p = default_pressure_grid()
    t = us_standard_atmosphere_1976(p)
    q = np.maximum(specific_humidity_from_relative_humidity(np.where(p > 300, 0.5, 1e-3), t, p), 1e-7)
    layer_p, weights = rtemu.physics.weighting_functions(inst, p, t, q)
    print(f"{inst.name}: {inst.description}")
    for ch, w in zip(inst.channels, weights):
        print(f"  {ch.id:<9} weighting function peak at {layer_p[np.argmax(w)]:7.1f} hPa")

    train = out / "train.nc"
    rtemu.sample_to_netcdf(inst, train, count=args.count, seed=1, progress=False)
    model = out / "tern-7x.onnx"
    rtemu.train_to_onnx(train, args.recipe, model, progress=False)
    bundle = rtemu.read_bundle(model)  # integrity and metadata checks
    print(f"trained {len(bundle.channel_ids)} channels on {args.count} profiles -> {model}")
    summary = rtemu.run_audit(model, out / "audit", count=args.audit_count, seed=2, progress=False)
    for cid in bundle.channel_ids:
        c = summary["channels"][cid]
        print(f"  {cid:<9} RMSE {c['rmse_k']:.3f} K  recommended error {c['recommended_error_k']:.3f} K  {c['verdict']}")
    print(f"audit report: {out / 'audit' / 'report.md'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
