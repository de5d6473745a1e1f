"""Speed of 1D-Var with the emulator against 1D-Var with the physical model.

Run from the repository root:

    python benchmarks/assim_speed.py [--model bundle.onnx] [--columns 200] [--repeat 3]
                                     [--no-matrices] [--cprofile]

The set-up is the observing-system simulation of ``rtemu demo`` (invented scenario,
invented demo-sounder, 60 levels, 16 channels, control vector of 121 elements):
``--columns`` truth states from ``rtemu.sampling.draw_states`` (seed 303), observations =
physics(truth) + instrument noise (seed 404), B estimated from the demo's invented
background error model (seed 405) and one background per column drawn from B (seed 406).
The emulator run adds the emulator's error to R, as the demo does with its audit figure;
here it is the per-channel RMS difference emulator - physics on 500 independent states
(seed 202). As in the demo, the emulator recomputes columns outside its training envelope
with the physics (``fallback="physics"``; ``--no-fallback`` switches that off) and both
runs accept the flag bits the demo accepts.

Without ``--model`` a small bundle is trained first (``--train-count`` profiles, recipe
"demo"; a minute or two), in a temporary directory.

Printed per operator: wall time of ``rtemu.assim.var1d`` (best of ``--repeat``), the time
spent inside ``operator.simulate``, var1d's own time (the rest), and both per
column-iteration (one column in one operator call). Then the physics / emulator
wall-time ratio (project target: at least 20). Not a test: the figures depend on the
machine and its load, printed with ``os.getloadavg()``.
"""

from __future__ import annotations

import argparse
import cProfile
import os
import platform
import pstats
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import numpy as np  # noqa: E402

from rtemu import assim  # noqa: E402
from rtemu.demo import _ACCEPTED, DEFAULTS, _invented_error_samples  # noqa: E402
from rtemu.instrument import load_instrument  # noqa: E402
from rtemu.runtime import EmulatedOperator, PhysicalOperator  # noqa: E402
from rtemu.sampling import draw_states  # noqa: E402

TARGET_RATIO = 20.0
INPUTS = ["air_pressure", "air_temperature", "specific_humidity", "surface_temperature",
          "surface_emissivity", "sensor_zenith_angle"]


class TimedOperator:
    """Passes every call to ``operator`` and records when each ``simulate`` call ran."""

    def __init__(self, operator):
        self.operator = operator
        self.instrument = operator.instrument
        self.channels = operator.channels
        self.reset()

    def reset(self):
        self.spans = []  # (start, end, number of columns) per call

    @property
    def seconds(self):
        return sum(end - start for start, end, _ in self.spans)

    @property
    def calls(self):
        return len(self.spans)

    @property
    def columns(self):
        return sum(n for _, _, n in self.spans)

    def simulate(self, dataset, jacobian=False):
        start = time.perf_counter()
        out = self.operator.simulate(dataset, jacobian=jacobian)
        self.spans.append((start, time.perf_counter(), dataset.sizes["profile"]))
        return out


def train_small_bundle(directory: Path, count: int) -> Path:
    from rtemu.export import train_to_onnx
    from rtemu.sampling import sample_to_netcdf

    inst = load_instrument("demo-sounder")
    data = directory / "train.nc"
    model = directory / "emulator.onnx"
    print(f"training a small bundle: {count} profiles, recipe 'demo' -> {model}", flush=True)
    start = time.perf_counter()
    sample_to_netcdf(inst, data, count=count, seed=DEFAULTS["train_seed"], workers=2, progress=False)
    train_to_onnx(data, "demo", model, workers=2, progress=False)
    print(f"  done in {time.perf_counter() - start:.1f} s")
    return model


def demo_case(columns: int):
    """Truth, observations, B and backgrounds as in rtemu.demo.run_demo."""
    inst = load_instrument("demo-sounder")
    physical = PhysicalOperator(inst)
    truth = draw_states(columns, seed=DEFAULTS["truth_seed"], channels=inst)[INPUTS]
    rng = np.random.default_rng(DEFAULTS["error_seed"])
    clean = physical.simulate(truth)["brightness_temperature"]
    observations = clean + rng.standard_normal(clean.shape) * inst.noise_k[None, :]
    b_matrix = assim.estimate_background_covariance(
        _invented_error_samples(truth, 4000, DEFAULTS["error_seed"] + 1, DEFAULTS)
    )
    background = assim.sample_ensemble(
        truth, b_matrix, n_members=2, seed=DEFAULTS["error_seed"] + 2
    ).isel(member=0, drop=True)
    return physical, background, observations, b_matrix


def emulator_error(emulated, physical, count=500):
    """Per-channel RMS of emulator - physics [K] on independent states (seed 202)."""
    states = draw_states(count, seed=DEFAULTS["test_seed"], channels=physical.instrument)[INPUTS]
    diff = (emulated.simulate(states)["brightness_temperature"]
            - physical.simulate(states)["brightness_temperature"]).values
    rms = np.sqrt(np.nanmean(diff**2, axis=0))
    return dict(zip(emulated.channels, rms))


def run(timed, background, observations, b_matrix, repeat, **options):
    best = None
    for _ in range(repeat):
        timed.reset()
        start = time.perf_counter()
        result = assim.var1d(timed, background, observations, b_matrix=b_matrix, **options)
        end = time.perf_counter()
        if best is None or end - start < best["wall"]:
            best = {"wall": end - start, "operator": timed.seconds, "calls": timed.calls,
                    "columns": timed.columns, "spans": list(timed.spans), "start": start,
                    "end": end, "result": result}
    return best


def report(name, best):
    d = best["result"].diagnostics
    own = best["wall"] - best["operator"]
    n = best["columns"]
    print(f"{name:>9}: wall {best['wall']:7.3f} s | operator {best['operator']:7.3f} s "
          f"({best['calls']} calls, {n} column-iterations, {1e3 * best['operator'] / n:.3f} ms each) | "
          f"var1d own {own:6.3f} s ({1e3 * own / n:.3f} ms per column-iteration) | "
          f"converged {float(d['converged'].mean()):.0%}, mean iterations "
          f"{float(d['n_iterations'].mean()):.2f}")


def breakdown(name, best):
    """Per operator call: columns, time in the operator, var1d's own time after the call.

    var1d's own time after call i is everything until call i+1 starts (reading the
    outputs, accepting or rejecting, the next step); after the last call it is the
    analysis and the diagnostics. The set-up before the first call is printed apart.
    """
    spans = best["spans"]
    print(f"  {name}: set-up before the first call {1e3 * (spans[0][0] - best['start']):.1f} ms")
    print("    call  columns  operator [ms]  per column [ms]  var1d after it [ms]  per column [ms]")
    for i, (start, end, n) in enumerate(spans):
        after = (spans[i + 1][0] if i + 1 < len(spans) else best["end"]) - end
        label = " (incl. diagnostics)" if i + 1 == len(spans) else ""
        print(f"    {i:4d}  {n:7d}  {1e3 * (end - start):13.2f}  {1e3 * (end - start) / n:15.4f}  "
              f"{1e3 * after:19.2f}  {1e3 * after / n:15.4f}{label}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", help="emulator bundle (default: train a small one)")
    parser.add_argument("--train-count", type=int, default=6000,
                        help="training profiles when no --model is given")
    parser.add_argument("--columns", type=int, default=DEFAULTS["columns"])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--no-matrices", action="store_true",
                        help="var1d(diagnostic_matrices=False): no averaging kernel / S matrices")
    parser.add_argument("--no-fallback", action="store_true",
                        help="emulator without physics fallback (the demo uses fallback='physics')")
    parser.add_argument("--threads", type=int, default=1,
                        help="onnxruntime intra-op threads of the emulator (default 1, the runtime's default)")
    parser.add_argument("--compare-threads", action="store_true",
                        help="also time the emulator run with 1 and 2 intra-op threads, alternating")
    parser.add_argument("--cprofile", action="store_true", help="profile the emulator run")
    args = parser.parse_args(argv)

    print(f"python {platform.python_version()}, numpy {np.__version__}, {os.cpu_count()} CPUs, "
          f"load average {os.getloadavg()}")
    with tempfile.TemporaryDirectory() as tmp:
        # The emulator opens its onnxruntime session at the first call: keep the bundle.
        model = Path(args.model) if args.model else train_small_bundle(Path(tmp), args.train_count)
        measure(args, model)


def measure(args, model):
    emulated = EmulatedOperator.load(model, threads=args.threads,
                                     fallback=None if args.no_fallback else "physics")
    physical, background, observations, b_matrix = demo_case(args.columns)
    sigma_emu = emulator_error(emulated, physical)
    options = {"diagnostic_matrices": not args.no_matrices, "accept_flags": _ACCEPTED}
    print(f"{args.columns} columns, {background.sizes['level']} levels, {len(physical.channels)} "
          f"channels, control vector {b_matrix.sizes['control_row']}; diagnostic_matrices="
          f"{options['diagnostic_matrices']}; emulator fallback {emulated.fallback}, threads "
          f"{emulated.threads}; best of {args.repeat}")

    timed_emu, timed_phys = TimedOperator(emulated), TimedOperator(physical)
    # Warm-up: onnxruntime session, first-call caches.
    assim.var1d(timed_emu, background.isel(profile=slice(0, 2)), observations.isel(profile=slice(0, 2)),
                b_matrix=b_matrix, emulator_error=sigma_emu, accept_flags=_ACCEPTED)
    emu = run(timed_emu, background, observations, b_matrix, args.repeat, emulator_error=sigma_emu, **options)
    phys = run(timed_phys, background, observations, b_matrix, args.repeat, **options)
    report("emulator", emu)
    report("physics", phys)
    breakdown("emulator", emu)
    breakdown("physics", phys)
    ratio = phys["wall"] / emu["wall"]
    bound = phys["operator"] / emu["operator"]
    print(f"ratio physics / emulator wall time: {ratio:.1f}x (target >= {TARGET_RATIO:g}x: "
          f"{'met' if ratio >= TARGET_RATIO else 'NOT met'}); operator time alone: {bound:.1f}x "
          "(the ratio if var1d's own time were zero)")
    print(f"load average at the end {os.getloadavg()}")
    if args.compare_threads:
        compare_threads(model, emulated.fallback, background, observations, b_matrix, sigma_emu, options,
                        args.repeat)
    if args.cprofile:
        profiler = cProfile.Profile()
        profiler.enable()
        assim.var1d(emulated, background, observations, b_matrix=b_matrix, emulator_error=sigma_emu, **options)
        profiler.disable()
        pstats.Stats(profiler).sort_stats("cumulative").print_stats(30)


def compare_threads(model, fallback, background, observations, b_matrix, sigma_emu, options, repeat):
    """Emulator 1D-Var wall and operator time with 1 and 2 onnxruntime threads, runs alternating."""
    timed = {t: TimedOperator(EmulatedOperator.load(model, threads=t, fallback=fallback)) for t in (1, 2)}
    times = {1: [], 2: []}
    for _ in range(max(repeat, 3)):
        for t, op in timed.items():
            best = run(op, background, observations, b_matrix, 1, emulator_error=sigma_emu, **options)
            times[t].append((best["wall"], best["operator"]))
    med = {t: np.median(np.array(v), axis=0) for t, v in times.items()}
    for t in (1, 2):
        print(f"threads {t}: median wall {med[t][0]:.3f} s, operator {med[t][1]:.3f} s")
    print(f"2 threads / 1 thread: wall {med[2][0] / med[1][0]:.2f}x, operator {med[2][1] / med[1][1]:.2f}x "
          f"(load average {os.getloadavg()})")


if __name__ == "__main__":
    main()
