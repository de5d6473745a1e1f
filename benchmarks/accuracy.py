"""Accuracy (and speed) of an rtemu emulator against the physical model on an independent test set.

Prints, per channel: bias, RMSE, 99.9th percentile and maximum of |BT error| [K]; Jacobian
relative error ||J_emu - J_phys|| / ||J_phys|| per (profile, channel) for the temperature
and humidity Jacobians (median and 95th percentile); flag rates on in-envelope test
profiles and on profiles moved outside the envelope; training time; and (``--speed``)
onnxruntime timings.

Targets (from the issue): ``full`` RMSE <= 0.02 K every channel, 99.9th pct <= 0.15 K,
median Jacobian error <= 2 %; ``demo`` RMSE <= 0.05 K every channel. Flags: <= 5 % of
realistic profiles flagged, >= 99 % of moved-outside profiles flagged. Uncertainty:
|error| <= 2 sigma for 90-98 % of profile-channels.

Usage::

    python benchmarks/accuracy.py --recipe demo [--train 20000] [--test 4000] [--workdir DIR]
    python benchmarks/accuracy.py --bundle model.onnx --test-data test.nc
    python benchmarks/accuracy.py --recipe full --speed
"""

from __future__ import annotations

import argparse
import os
import re
import sys
import time
from pathlib import Path

import numpy as np
import xarray as xr

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from rtemu import flags, physics  # noqa: E402
from rtemu.atmosphere import saturation_specific_humidity  # noqa: E402
from rtemu.bundle import make_session, read_bundle  # noqa: E402
from rtemu.export import train_to_onnx  # noqa: E402
from rtemu import sampling  # noqa: E402
from rtemu.instrument import Instrument  # noqa: E402
from rtemu.sampling import sample_to_netcdf  # noqa: E402


def surface_first(p) -> slice:
    """Level slice that puts a file's profiles surface first (the bundle's order)."""
    return slice(None, None, -1) if p[0] < p[-1] else slice(None)


def feeds_from(ds: xr.Dataset, channel_ids, rows=slice(None)) -> dict:
    """Bundle inputs (float32, surface-first) from a sampler file."""
    p = ds["air_pressure"].values
    order = surface_first(p)
    return {
        "air_temperature": ds["air_temperature"].values[rows][:, order].astype(np.float32),
        "specific_humidity": ds["specific_humidity"].values[rows][:, order].astype(np.float32),
        "surface_temperature": ds["surface_temperature"].values[rows].astype(np.float32),
        "surface_emissivity": ds["surface_emissivity"].sel(channel=list(channel_ids)).values[rows].astype(np.float32),
        "sensor_zenith_angle": ds["sensor_zenith_angle"].values[rows].astype(np.float32),
        "surface_air_pressure": (ds["surface_air_pressure"].values[rows] if "surface_air_pressure" in ds
                                 else np.full(len(ds["surface_temperature"].values[rows]), p.max())).astype(np.float32),
    }


def run(session, feeds, batch=4096, names=None):
    names = names or [o.name for o in session.get_outputs()]
    n = len(feeds["surface_temperature"])
    parts = {k: [] for k in names}
    for start in range(0, n, batch):
        out = session.run(names, {k: v[start:start + batch] for k, v in feeds.items()})
        for k, v in zip(names, out):
            parts[k].append(v)
    return {k: np.concatenate(v) for k, v in parts.items()}


def accuracy(bundle_path: Path, test: xr.Dataset) -> dict:
    b = read_bundle(bundle_path)
    ids = list(b.channel_ids)
    feeds = feeds_from(test, ids)
    out = run(make_session(bundle_path, threads=os.cpu_count()), feeds)
    ref_bt = test["brightness_temperature"].sel(channel=ids).values
    ok = (test["quality_flag"].sel(channel=ids).values == 0).all(axis=1)
    err = out["brightness_temperature"].astype(float) - ref_bt
    print(f"\nbrightness temperature error on {ok.sum()} test profiles [K]")
    print(f"{'channel':>10s} {'bias':>8s} {'rmse':>8s} {'p99.9':>8s} {'max':>8s}   {'dT med':>7s} {'dT p95':>7s}"
          f" {'dlnq med':>8s} {'dlnq p95':>8s}")
    rows = {}
    has_jac = "jacobian_air_temperature" in test
    p = test["air_pressure"].values
    order = surface_first(p)
    for i, cid in enumerate(ids):
        e = err[ok, i]
        a = np.abs(e)
        row = {"bias": e.mean(), "rmse": np.sqrt(np.mean(e**2)), "p999": np.quantile(a, 0.999), "max": a.max()}
        if has_jac:
            q = test["specific_humidity"].values[ok][:, order]
            for short, name in (("T", "jacobian_air_temperature"), ("q", "jacobian_specific_humidity")):
                phys = test[name].sel(channel=cid).values[ok][:, order]
                emu = out[name][ok, i].astype(float)
                if short == "q":  # per ln q (q dBT/dq [K]): comparable across the decades of q
                    phys, emu = phys * q, emu * q
                norm = np.linalg.norm(phys, axis=1)
                use = norm > 0
                rel = np.linalg.norm(emu - phys, axis=1)[use] / norm[use]
                row[f"j{short}_med"], row[f"j{short}_p95"] = np.median(rel), np.quantile(rel, 0.95)
        rows[cid] = row
        jac = (f"   {100 * row['jT_med']:6.2f}% {100 * row['jT_p95']:6.2f}% {100 * row['jq_med']:6.2f}% "
               f"{100 * row['jq_p95']:6.2f}%") if has_jac else ""
        print(f"{cid:>10s} {row['bias']:8.4f} {row['rmse']:8.4f} {row['p999']:8.4f} {row['max']:8.4f}{jac}")
    if has_jac:
        # spurious sensitivity: each channel's largest |dBT/d ln q| (95th percentile over the
        # profiles) as a fraction of the largest physical one over all channels
        q = test["specific_humidity"].values[ok][:, order]
        emu_q = np.abs(out["jacobian_specific_humidity"][ok].astype(float) * q[:, None, :]).max(axis=2)
        phy_q = np.abs(test["jacobian_specific_humidity"].sel(channel=ids).values[ok][:, :, order]
                       * q[:, None, :]).max(axis=2)
        scale = np.quantile(phy_q, 0.95, axis=0).max()
        print("humidity sensitivity, p95 over profiles of max |dBT/d ln q| as % of the largest physical one "
              "(emulator / physics): " + ", ".join(
                  f"{cid} {100 * np.quantile(emu_q[:, i], 0.95) / scale:.2g}/{100 * np.quantile(phy_q[:, i], 0.95) / scale:.2g}"
                  for i, cid in enumerate(ids)))
    sigma = out["brightness_temperature_uncertainty"][ok].astype(float)
    within = np.abs(err[ok]) <= 2.0 * sigma
    print("uncertainty: |error| <= 2 sigma for " + f"{100 * within.mean():.1f} % of profile-channels (per channel "
          + ", ".join(f"{100 * w:.0f}" for w in within.mean(axis=0)) + " %) [target 90-98 %]")
    worst = max(rows.values(), key=lambda r: r["rmse"])
    print(f"worst-channel RMSE {worst['rmse']:.4f} K; largest p99.9 {max(r['p999'] for r in rows.values()):.4f} K")
    if has_jac:
        print(f"largest median Jacobian error: T {100 * max(r['jT_med'] for r in rows.values()):.2f} %, "
              f"ln q {100 * max(r['jq_med'] for r in rows.values()):.2f} % (relative errors of channels "
              "with a tiny physical sensitivity are large by construction)")
    return {"rows": rows, "ok": ok, "flags": out["quality_flag"], "feeds": feeds, "bundle": b}


def warmed_against_generator(test: xr.Dataset, grid: np.ndarray, shift: float = 30.0) -> dict | None:
    """Where a uniform warming of ``shift`` K puts each test profile against its regime's ranges.

    The test file records its seed, count and generator version, so the construction
    parameters are drawn again (and checked: the air temperature must come out the same).
    A uniform shift moves three of them by ``shift``: surface air temperature, tropopause
    temperature and stratopause temperature, and it lowers the free-tropospheric lapse rate
    (from the boundary-layer top to the tropopause). Returns ``excess`` [K] (largest excess
    of the three moved temperatures over their regime's maxima, the tropopause's the top of
    the band at the profile's tropopause pressure; <= 0 inside) and ``inside`` (also the
    lapse rate within the regime's range), or None when the file cannot be reproduced.
    Humidity is not checked (approximate: a warmed column is also drier in RH).
    """
    attrs = test.attrs
    if attrs.get("rtemu_generator_version") != sampling.GENERATOR_VERSION or "rtemu_seed" not in attrs:
        return None
    instrument = Instrument.from_toml(attrs["rtemu_instrument_toml"])
    profiles = test["profile"].values
    if not np.array_equal(profiles, np.arange(profiles[0], profiles[0] + profiles.size)):
        return None
    p = test["air_pressure"].values
    states = sampling.draw_states(profiles.size, seed=int(attrs["rtemu_seed"]), pressure_hpa=p,
                                  start=int(profiles[0]), channels=instrument)
    if not np.array_equal(states["air_temperature"].values, test["air_temperature"].values):
        return None
    regimes = sampling.envelope_description()["regimes"]
    names = list(regimes)
    regime = states["climate_regime"].values

    def regime_limit(quantity, side):
        return np.array([regimes[n]["ranges"][quantity][side] for n in names])[regime]

    t0 = states["surface_air_temperature"].values + shift
    t_max = regime_limit("surface_air_temperature", 1)
    reduced = np.array([regimes[n]["surface_temperature_at_sea_level"] for n in names])[regime]
    ps = states["surface_air_pressure"].values
    t_max = np.where(reduced, t_max * (ps / 1013.25) ** (sampling._KAPPA_PER_LAPSE * 6.5e-3), t_max)
    t_trop = states["tropopause_temperature"].values
    p_trop = states["tropopause_pressure"].values
    t_strat = states["stratopause_temperature"].values + shift
    excess = np.maximum.reduce([t0 - t_max,
                                t_trop + shift - sampling.tropopause_temperature_band(p_trop)[1],
                                t_strat - regime_limit("stratopause_temperature", 1)])
    # free troposphere T = T_f (p / p_f)^kappa from the boundary-layer top to p_t, warmed
    p_f = states["boundary_layer_top_pressure"].values
    kappa = states["tropospheric_lapse_rate"].values * 1e-3 * sampling._KAPPA_PER_LAPSE
    t_f = t_trop * (p_f / p_trop) ** kappa
    lapse = np.log((t_f + shift) / (t_trop + shift)) / np.log(p_f / p_trop) / sampling._KAPPA_PER_LAPSE * 1e3
    inside = ((excess <= 0.0) & (lapse >= regime_limit("tropospheric_lapse_rate", 0) - 1e-9)
              & (lapse <= regime_limit("tropospheric_lapse_rate", 1) + 1e-9))
    return {"excess": excess, "inside": inside}


def flag_rates(bundle_path: Path, test: xr.Dataset, result: dict) -> None:
    ok = result["ok"]
    inside = (result["flags"][ok] != 0).any(axis=1)
    print(f"\nflags: in-envelope test profiles flagged: {100 * inside.mean():.2f} % "
          f"({inside.sum()} of {ok.sum()}; bits: "
          + ", ".join(f"{name} {100 * ((result['flags'][ok] & bit) != 0).any(axis=1).mean():.2f} %"
                      for bit, name in ((flags.OUTSIDE_TRAINING_BOUNDS, "bounds"), (flags.NOVEL_STATE, "novel"),
                                        (flags.LARGE_UNCERTAINTY, "uncertainty"),
                                        (flags.UNUSUAL_TROPOPAUSE, "tropopause")))
          + ")")
    feeds = result["feeds"]
    grid = np.asarray(result["bundle"].pressure_hpa)
    moves = {}
    warm = dict(feeds)
    warm["air_temperature"] = feeds["air_temperature"] + 30.0
    warm["surface_temperature"] = feeds["surface_temperature"] + 30.0
    moves["30 K warmer throughout (air and surface)"] = warm
    warm_air = dict(feeds)
    warm_air["air_temperature"] = feeds["air_temperature"] + 30.0
    moves["30 K warmer air, same surface"] = warm_air
    wet = dict(feeds)
    qsat = saturation_specific_humidity(feeds["air_temperature"].astype(float), grid[None, :])
    wet["specific_humidity"] = (2.0 * qsat).astype(np.float32)
    moves["humidity doubled above saturation (q = 2 q_sat)"] = wet
    wet_low = dict(feeds)
    q2 = feeds["specific_humidity"].astype(float).copy()
    low = grid > 500.0
    q2[:, low] = 2.0 * qsat[:, low]
    wet_low["specific_humidity"] = q2.astype(np.float32)
    moves["q = 2 q_sat below 500 hPa only"] = wet_low
    # Is the flag right where it stays silent? The emulator's error on the moved profiles it
    # does not flag, against the physics, beside its error on the unmoved test set.
    session = make_session(bundle_path, outputs=["brightness_temperature", "quality_flag"])
    split = warmed_against_generator(test, grid)
    base_rmse = max(r["rmse"] for r in result["rows"].values())
    print(f"  (worst-channel RMSE on the unmoved test set: {base_rmse:.4f} K)")
    for label, moved in moves.items():
        sub = {k: v[ok] for k, v in moved.items()}
        out = run(session, sub)
        hit = (out["quality_flag"] != 0).any(axis=1)
        print(f"  moved outside, {label}: flagged {100 * hit.mean():.2f} %")
        if label.startswith("30 K warmer throughout") and split is not None:
            inside, excess = split["inside"][ok], split["excess"][ok]
            def share(sel):
                return f"{100 * hit[sel].mean():.2f} %" if sel.any() else "none"

            print(f"    against the generator's nominal ranges: {100 * inside.mean():.2f} % of the moved profiles "
                  f"stay inside every one (flagged {share(inside)}), {100 * (~inside).mean():.2f} % "
                  f"leave one (flagged {share(~inside)})")
            for margin in (5.0, 10.0):
                far = excess > margin
                print(f"    surface, tropopause or stratopause temperature more than {margin:.0f} K above its "
                      f"range: {100 * far.mean():.2f} % of the moved profiles, flagged {100 * hit[far].mean():.2f} %")
        if hit.all():
            continue
        quiet = ~hit
        ref = physics.transfer(result["bundle"].instrument, grid, *(sub[k][quiet].astype(float) for k in (
            "air_temperature", "specific_humidity", "surface_temperature", "surface_emissivity",
            "sensor_zenith_angle")))["brightness_temperature"]
        err = out["brightness_temperature"][quiet].astype(float) - ref
        rmse = np.sqrt(np.nanmean(err**2, axis=0))
        print(f"    unflagged moved profiles ({quiet.sum()}): worst-channel RMSE {np.nanmax(rmse):.4f} K "
              f"({result['bundle'].channel_ids[int(np.nanargmax(rmse))]}), largest |error| "
              f"{np.nanmax(np.abs(err)):.3f} K")


def speed(bundle_path: Path, test: xr.Dataset) -> None:
    import onnxruntime as ort

    b = read_bundle(bundle_path)
    ids = list(b.channel_ids)
    big = feeds_from(test, ids)
    n = len(big["surface_temperature"])
    reps = int(np.ceil(10000 / n))
    big = {k: np.concatenate([v] * reps)[:10000] for k, v in big.items()}
    one = {k: v[:1] for k, v in big.items()}
    print("\nspeed (onnxruntime CPU)")
    s1 = make_session(bundle_path, threads=1)
    for _ in range(50):
        s1.run(None, one)
    t = time.perf_counter()
    for _ in range(2000):
        s1.run(None, one)
    print(f"  single profile, all outputs, 1 thread: {(time.perf_counter() - t) / 2000 * 1e6:.1f} us per call")
    for threads in (1, os.cpu_count()):
        full = make_session(bundle_path, threads=threads)
        bt = make_session(bundle_path, outputs=["brightness_temperature"], threads=threads)
        for label, sess in (("all outputs", full), ("BT only (pruned)", bt)):
            sess.run(None, big)
            t = time.perf_counter()
            for _ in range(5):
                sess.run(None, big)
            dt = (time.perf_counter() - t) / 5
            print(f"  batch 10000, {label}, {threads} thread(s): {dt * 1e3:.1f} ms")
    p = test["air_pressure"].values
    order = surface_first(p)
    t = time.perf_counter()
    physics.transfer(b.instrument, p[order], big["air_temperature"].astype(float),
                     big["specific_humidity"].astype(float), big["surface_temperature"].astype(float),
                     big["surface_emissivity"].astype(float), big["sensor_zenith_angle"].astype(float),
                     jacobian=True)
    tp = time.perf_counter() - t
    full = make_session(bundle_path, threads=os.cpu_count())
    t = time.perf_counter()
    full.run(None, big)
    te = time.perf_counter() - t
    print(f"  batch 10000 with Jacobians: physics {tp:.2f} s, emulator {te * 1e3:.1f} ms -> {tp / te:.0f}x faster")
    del ort


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--recipe", default="demo")
    ap.add_argument("--bundle", type=Path, help="evaluate this bundle instead of training one")
    ap.add_argument("--train-data", type=Path)
    ap.add_argument("--test-data", type=Path)
    ap.add_argument("--train", type=int, default=20000, help="training profiles to draw (seed 11)")
    ap.add_argument("--test", type=int, default=4000, help="test profiles to draw (seed 99, with Jacobians)")
    ap.add_argument("--workers", type=int, default=None)
    ap.add_argument("--workdir", type=Path, default=Path("benchmark-out"))
    ap.add_argument("--speed", action="store_true")
    args = ap.parse_args(argv)
    args.workdir.mkdir(parents=True, exist_ok=True)
    test_path = args.test_data or args.workdir / f"test-{args.test}.nc"
    if not test_path.exists():
        print(f"drawing {args.test} test profiles (seed 99, physics with Jacobians) -> {test_path}")
        sample_to_netcdf("demo-sounder", test_path, count=args.test, seed=99, jacobian=True, progress=False)
    bundle_path = args.bundle
    if bundle_path is None:
        train_path = args.train_data or args.workdir / f"train-{args.train}.nc"
        if not train_path.exists():
            jac = False  # the shipped recipes learn from brightness temperatures alone
            print(f"drawing {args.train} training profiles (seed 11) -> {train_path}")
            t = time.perf_counter()
            sample_to_netcdf("demo-sounder", train_path, count=args.train, seed=11, progress=False,
                             workers=args.workers, jacobian=jac)
            print(f"  {time.perf_counter() - t:.0f} s")
        bundle_path = args.workdir / f"{Path(str(args.recipe)).stem}.onnx"
        print(f"training recipe {args.recipe} on {train_path} ...")
        t0 = time.perf_counter()
        lines = []

        def log(line):
            lines.append(line)
            print("  " + line, flush=True)

        train_to_onnx(train_path, args.recipe, bundle_path, workers=args.workers, progress=False, log=log)
        wall = time.perf_counter() - t0
        # each channel's line: "<id>: validation RMSE ..., <seconds> s"
        fits = sum(float(re.search(r", ([0-9.]+) s$", line).group(1)) for line in lines)
        print(f"training time: {wall:.0f} s wall on {os.cpu_count()} cores; channel fits {fits:.0f} s in total "
              f"(wall of each fit in its worker); load average now {os.getloadavg()[0]:.1f} (other jobs "
              "on the machine slow the fits)")
    with xr.open_dataset(test_path, engine="h5netcdf") as test:
        test = test.load()
    result = accuracy(bundle_path, test)
    flag_rates(bundle_path, test, result)
    if args.speed:
        speed(bundle_path, test)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
