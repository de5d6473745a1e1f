"""Speed of the emulated against the physical operator (issue targets in brackets).

Measured side by side in one run, on the demo instrument and its 60-level grid:

* throughput [profiles/s] of the physical model and the emulator, brightness temperatures
  alone and with Jacobians, at batch sizes 1, 100, 10,000 and 100,000, through the
  runtime operators (what a user calls) and through the bare onnxruntime session;
* the emulator's FLOP rate (counted from the MatMul shapes of its graph) as a fraction of
  this machine's float32 matrix-multiply rate, measured here with onnxruntime's own MatMul
  [target: with Jacobians at batch 10,000 >= 50 %];
* single-profile latency of the emulator with Jacobians through the ONNX session
  [target < 50 us, aim 30 us];
* the speed-up with Jacobians at batch 10,000 [target >= 50x, aim 100x];
* where the time goes: onnxruntime's per-node profile, summed by operator type.

Usage:  python benchmarks/runtime_speed.py [--model emulator.onnx] [--quick]
Without --model it samples and trains the demo recipe first (a few minutes).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper

from rtemu import bundle as rb
from rtemu.runtime import EmulatedOperator, PhysicalOperator
from rtemu.sampling import draw_states


def _best_time(fn, repeats, min_time=0.2):
    fn()  # warm-up
    best = np.inf
    start = time.perf_counter()
    for i in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
        if time.perf_counter() - start > 5 * min_time and i >= 2:
            break
    return best


def matmul_rate(threads=None, size=1024, repeats=20):
    """float32 MatMul FLOP/s of onnxruntime on this machine (square matrices)."""
    a = helper.make_tensor_value_info("a", TensorProto.FLOAT, [size, size])
    b = helper.make_tensor_value_info("b", TensorProto.FLOAT, [size, size])
    c = helper.make_tensor_value_info("c", TensorProto.FLOAT, [size, size])
    graph = helper.make_graph([helper.make_node("MatMul", ["a", "b"], ["c"])], "mm", [a, b], [c])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    opts = ort.SessionOptions()
    if threads:
        opts.intra_op_num_threads = threads
    sess = ort.InferenceSession(model.SerializeToString(), opts, providers=["CPUExecutionProvider"])
    x = np.random.default_rng(0).standard_normal((size, size)).astype(np.float32)
    dt = _best_time(lambda: sess.run(None, {"a": x, "b": x}), repeats)
    return 2.0 * size**3 / dt


def graph_flops(path, outputs=None, n=16):
    """Multiply-add FLOPs per profile of the (pruned) graph, from the MatMul/Gemm operand
    shapes seen in one onnxruntime run at batch ``n`` (a multiple of the graph's padding
    block, so no padded rows are counted)."""
    model = onnx.load(str(path))
    if outputs is not None:
        model = rb.pruned_model(model, outputs)
    inits = {t.name: list(t.dims) for t in model.graph.initializer}
    nodes = [node for node in model.graph.node if node.op_type in ("MatMul", "Gemm")]
    probe = onnx.ModelProto()
    probe.CopyFrom(model)
    names = sorted({i for node in nodes for i in node.input[:2] if i not in inits})
    known = {o.name for o in probe.graph.output}
    probe.graph.output.extend(helper.make_empty_tensor_value_info(name) for name in names if name not in known)
    session = ort.InferenceSession(probe.SerializeToString(), providers=["CPUExecutionProvider"])
    feeds = {}
    for value in model.graph.input:
        dims = [n] + [d.dim_value for d in value.type.tensor_type.shape.dim[1:]]
        feeds[value.name] = np.full(dims, 1.0, np.float32)
    feeds["air_temperature"][:] = 250.0
    feeds["specific_humidity"][:] = 1e-3
    feeds["surface_temperature"][:] = 280.0
    feeds["surface_emissivity"][:] = 0.9
    feeds["sensor_zenith_angle"][:] = 10.0
    feeds["surface_air_pressure"][:] = 1013.25
    shapes = dict(inits)
    shapes.update({name: list(v.shape) for name, v in zip(names, session.run(names, feeds))})
    total = 0
    for node in nodes:
        a, b = shapes[node.input[0]], shapes[node.input[1]]
        if node.op_type == "Gemm" and any(att.name == "transB" and att.i for att in node.attribute):
            b = b[::-1]
        batch = np.broadcast_shapes(tuple(a[:-2]), tuple(b[:-2])) if len(a) > 2 or len(b) > 2 else ()
        total += 2 * int(np.prod(batch)) * a[-2] * a[-1] * b[-1]
    return total // n


def _feeds(states, channels):
    return {
        "air_temperature": states["air_temperature"].values.astype(np.float32),
        "specific_humidity": states["specific_humidity"].values.astype(np.float32),
        "surface_temperature": states["surface_temperature"].values.astype(np.float32),
        "surface_emissivity": states["surface_emissivity"].sel(channel=list(channels)).values.astype(np.float32),
        "sensor_zenith_angle": states["sensor_zenith_angle"].values.astype(np.float32),
        "surface_air_pressure": np.full(states.sizes["profile"], float(states["air_pressure"].max()), np.float32),
    }


#: Largest batch handed to a bare session in one run: a bigger one is fed in slices of this
#: size, as a user would: a run with Jacobians needs ~130 kB per profile (1.45 GB peak
#: measured at 10,000 with the demo bundle's 45 kernel terms), so 100,000 in one run with
#: two sessions alive exhausted this 24 GB machine.
SESSION_SLICE = 10_000


def _run_sliced(session, feeds):
    n = len(feeds["sensor_zenith_angle"])
    for start in range(0, n, SESSION_SLICE):
        session.run(None, {k: v[start:start + SESSION_SLICE] for k, v in feeds.items()})


def _profile_by_op(path, outputs, feeds, runs=20):
    opts = ort.SessionOptions()
    opts.enable_profiling = True
    opts.profile_file_prefix = os.path.join(tempfile.mkdtemp(), "rtemu_profile")
    source = str(path) if outputs is None else rb.pruned_model(onnx.load(str(path)), outputs).SerializeToString()
    sess = ort.InferenceSession(source, opts, providers=["CPUExecutionProvider"])
    for _ in range(runs):
        sess.run(outputs, feeds)
    trace = json.loads(Path(sess.end_profiling()).read_text())
    by_op = defaultdict(float)
    total = 0.0
    for event in trace:
        if event.get("cat") == "Node" and event["name"].endswith("_kernel_time"):
            by_op[event["args"]["op_name"]] += event["dur"]
            total += event["dur"]
        elif event.get("cat") == "Session" and event["name"] == "model_run":
            pass
    runs_total = sum(e["dur"] for e in trace if e.get("cat") == "Session" and e["name"] == "model_run")
    return {k: v / runs for k, v in sorted(by_op.items(), key=lambda kv: -kv[1])}, total / runs, runs_total / runs


def ensure_model(args):
    if args.model:
        return Path(args.model)
    from rtemu import load_instrument
    from rtemu.sampling import sample_to_netcdf
    from rtemu.export import train_to_onnx

    work = Path(tempfile.mkdtemp(prefix="rtemu-bench-"))
    print(f"no --model: sampling and training the demo recipe in {work}", flush=True)
    sample_to_netcdf(load_instrument("demo-sounder"), work / "train.nc", count=40000, seed=1,
                     workers=2, progress=False)
    train_to_onnx(work / "train.nc", "demo", work / "emulator.onnx", workers=2, progress=False)
    return work / "emulator.onnx"


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--model")
    parser.add_argument("--quick", action="store_true", help="skip batch 100,000 for the physical model")
    args = parser.parse_args(argv)
    print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores (quiet machine: < 0.5)")
    model = ensure_model(args)
    # the operator's default batch (4096 profiles per session run) bounds its memory; bare
    # sessions get at most SESSION_SLICE profiles per run
    emulated = EmulatedOperator.load(model)
    physical = PhysicalOperator(emulated.instrument)
    channels = emulated.channels
    states = draw_states(100_000, seed=777, channels=emulated.instrument)
    inputs = states[["air_pressure", "air_temperature", "specific_humidity", "surface_temperature",
                     "surface_emissivity", "sensor_zenith_angle"]]
    feeds = _feeds(states, channels)

    rate = matmul_rate()
    print(f"\nmachine float32 MatMul rate (onnxruntime, 1024^3): {rate / 1e9:.1f} GFLOP/s")

    sess_bt = rb.make_session(model, outputs=["brightness_temperature", "quality_flag"])
    sess_all = rb.make_session(model)
    sess_one = rb.make_session(model, threads=1)
    flops_bt = graph_flops(model, ["brightness_temperature", "quality_flag"])
    flops_all = graph_flops(model)
    print(f"emulator MatMul FLOPs per profile (from the graph): BT {flops_bt:,}; BT+Jacobians {flops_all:,}")

    rows = []
    for batch in (1, 100, 10_000, 100_000):
        sub = inputs.isel(profile=slice(0, batch))
        f = {k: v[:batch] for k, v in feeds.items()}
        reps = 200 if batch == 1 else (20 if batch <= 100 else 3)
        t_sess_bt = _best_time(lambda: _run_sliced(sess_bt, f), reps)
        t_sess_all = _best_time(lambda: _run_sliced(sess_all, f), reps)
        t_emu_bt = _best_time(lambda: emulated.simulate(sub), reps)
        t_emu_all = _best_time(lambda: emulated.simulate(sub, jacobian=True), reps)
        if args.quick and batch == 100_000:
            t_phy_bt = t_phy_all = np.nan
        else:
            preps = 1 if batch >= 10_000 else reps
            t_phy_bt = _best_time(lambda: physical.simulate(sub), preps)
            t_phy_all = _best_time(lambda: physical.simulate(sub, jacobian=True), preps)
        rows.append((batch, t_phy_bt, t_phy_all, t_emu_bt, t_emu_all, t_sess_bt, t_sess_all))

    print("\nthroughput [profiles/s]")
    print(f"{'batch':>8} {'physics BT':>12} {'physics +J':>12} {'emulator BT':>12} {'emulator +J':>12}"
          f" {'session BT':>12} {'session +J':>12} {'speed-up BT':>12} {'speed-up +J':>12}")
    for batch, pb, pa, eb, ea, sb, sa in rows:
        print(f"{batch:>8} {batch / pb:12.0f} {batch / pa:12.0f} {batch / eb:12.0f} {batch / ea:12.0f}"
              f" {batch / sb:12.0f} {batch / sa:12.0f} {pb / eb:12.1f} {pa / ea:12.1f}")
    r10k = [r for r in rows if r[0] == 10_000][0]
    speedup = r10k[2] / r10k[4]
    achieved = flops_bt * 10_000 / r10k[5]
    achieved_all = flops_all * 10_000 / r10k[6]
    print(f"\nwith Jacobians at batch 10,000 (runtime operators): emulator {speedup:.0f}x faster "
          f"than the physics [target >= 50x, aim 100x]; bare session +J vs physics +J: {r10k[2] / r10k[6]:.0f}x")
    print(f"emulator BT at batch 10,000 (session): {achieved / 1e9:.1f} GFLOP/s = {achieved / rate:.0%} of "
          f"the MatMul rate; with Jacobians {achieved_all / 1e9:.1f} GFLOP/s = "
          f"{achieved_all / rate:.0%} [target >= 50 %]")

    one = {k: v[:1] for k, v in feeds.items()}
    lat = []
    sess_one.run(None, one)
    for _ in range(2000):
        t0 = time.perf_counter()
        sess_one.run(None, one)
        lat.append(time.perf_counter() - t0)
    lat = np.array(lat) * 1e6
    sub1 = inputs.isel(profile=slice(0, 1))
    op_lat = []
    for _ in range(200):
        t0 = time.perf_counter()
        emulated.simulate(sub1, jacobian=True)
        op_lat.append(time.perf_counter() - t0)
    phys_lat = []
    for _ in range(200):
        t0 = time.perf_counter()
        physical.simulate(sub1, jacobian=True)
        phys_lat.append(time.perf_counter() - t0)
    print(f"single profile with Jacobians, ONNX session (1 thread): median {np.median(lat):.0f} us, "
          f"95th pct {np.percentile(lat, 95):.0f} us [target < 50 us]; through EmulatedOperator.simulate "
          f"(validation, units, xarray): median {np.median(op_lat) * 1e6:.0f} us; PhysicalOperator.simulate "
          f"(same checks and labelling): median {np.median(phys_lat) * 1e6:.0f} us")

    print("\nwhere the time goes (onnxruntime profile, mean per run, by operator type):")
    for label, outputs, f in (("BT, batch 10,000", ["brightness_temperature", "quality_flag"],
                               {k: v[:10_000] for k, v in feeds.items()}),
                              ("BT+Jacobians, batch 1", None, one)):
        by_op, node_total, run_total = _profile_by_op(model, outputs, f, runs=20 if "10,000" in label else 200)
        top = ", ".join(f"{k} {v:.0f} us ({v / node_total:.0%})" for k, v in list(by_op.items())[:6])
        print(f"  {label}: run {run_total:.0f} us, kernels {node_total:.0f} us: {top}")


if __name__ == "__main__":
    sys.exit(main())
