"""The ``rtemu`` command line: one subcommand per stage of the job.

Every subcommand writes its outputs atomically and exits non-zero with a one-line
``rtemu: error: ...`` message on bad input.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path


def _add_simulate(sub):
    p = sub.add_parser(
        "simulate",
        help="brightness temperatures (and Jacobians) of a profile file",
        description="Run the physical model (--instrument) or an emulator bundle (--model) on "
        "a netCDF file of profiles and write a netCDF file of brightness temperatures.",
    )
    which = p.add_mutually_exclusive_group(required=True)
    which.add_argument("--instrument", help="shipped instrument name or instrument TOML path (physical model)")
    which.add_argument("--model", help="rtemu ONNX bundle (emulator)")
    p.add_argument("--input", required=True, help="netCDF file of profiles")
    p.add_argument("--output", required=True, help="netCDF file to write")
    p.add_argument("--jacobian", action="store_true", help="also write the Jacobians")
    scale = p.add_mutually_exclusive_group()
    scale.add_argument("--workers", type=int, default=None, help="local worker processes (dask)")
    scale.add_argument("--scheduler", default=None, help="dask.distributed scheduler address")
    p.add_argument("--chunk-size", type=int, default=None, help="profiles per chunk when streaming")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=_run_simulate)


def _run_simulate(args):
    from rtemu import streaming

    streaming.simulate_file(
        input_path=args.input,
        output_path=args.output,
        instrument=args.instrument,
        model=args.model,
        jacobian=args.jacobian,
        workers=args.workers,
        scheduler=args.scheduler,
        chunk_size=args.chunk_size,
        progress=not args.quiet,
    )
    print(f"wrote {args.output}")


def _add_instruments(sub):
    p = sub.add_parser("instruments", help="list the shipped instruments and their channels")
    p.set_defaults(func=_run_instruments)


def _run_instruments(args):
    from rtemu.instrument import list_instruments, load_instrument

    for name in list_instruments():
        inst = load_instrument(name)
        print(f"{inst.name}: {inst.description}")
        print(f"  {'channel':<10} {'position':>16} {'noise [K]':>10} {'sub-bands':>9}")
        for ch in inst.channels:
            pos = (f"{ch.frequency_ghz:.3f} GHz" if ch.is_microwave else f"{ch.wavenumber_cm1:.2f} cm-1")
            print(f"  {ch.id:<10} {pos:>16} {ch.noise_k:>10.2f} {len(ch.bands):>9d}")


def _add_sample(sub):
    p = sub.add_parser("sample", help="draw atmospheric states and simulate them (training data)")
    p.add_argument("--instrument", required=True, help="shipped instrument name or TOML path")
    p.add_argument("--count", type=int, required=True, help="number of profiles")
    p.add_argument("--seed", type=int, required=True, help="random seed")
    p.add_argument("--output", required=True, help="netCDF file to write")
    p.add_argument("--levels", default=None, help="pressure levels file (text, one hPa value a line, or netCDF)")
    p.add_argument("--jacobian", action="store_true", help="also store Jacobians")
    scale = p.add_mutually_exclusive_group()
    scale.add_argument("--workers", type=int, default=None, help="local worker processes (dask)")
    scale.add_argument("--scheduler", default=None, help="dask.distributed scheduler address")
    p.add_argument("--chunk-size", type=int, default=None, help="profiles per chunk")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=_run_sample)


def _run_sample(args):
    from rtemu import sampling
    from rtemu.instrument import load_instrument

    kwargs = {}
    if args.chunk_size:
        kwargs["chunk_size"] = args.chunk_size
    grid = sampling.read_levels_file(args.levels) if args.levels else None
    sampling.sample_to_netcdf(
        load_instrument(args.instrument),
        args.output,
        count=args.count,
        seed=args.seed,
        pressure_hpa=grid,
        jacobian=args.jacobian,
        workers=args.workers,
        scheduler=args.scheduler,
        progress=not args.quiet,
        **kwargs,
    )
    print(f"wrote {args.output}")


def _add_train(sub):
    p = sub.add_parser("train", help="fit per-channel emulators and write one ONNX bundle")
    p.add_argument("--data", required=True, help="training netCDF from 'rtemu sample'")
    p.add_argument("--recipe", required=True, help="recipe name (demo, full) or TOML path")
    p.add_argument("--output", required=True, help="ONNX bundle to write")
    p.add_argument("--channels", default=None, help="comma-separated channel ids to train")
    p.add_argument("--workers", type=int, default=None, help="parallel channel fits")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=_run_train)


def _run_train(args):
    from rtemu import export

    channels = [c.strip() for c in args.channels.split(",") if c.strip()] if args.channels else None
    export.train_to_onnx(
        args.data,
        args.recipe,
        args.output,
        channels=channels,
        workers=args.workers,
        progress=not args.quiet,
    )
    print(f"wrote {args.output}")


def _add_info(sub):
    p = sub.add_parser("info", help="check an ONNX bundle and print its metadata")
    p.add_argument("model", help="rtemu ONNX bundle")
    p.set_defaults(func=_run_info)


def _run_info(args):
    from rtemu import bundle

    print(bundle.describe(args.model))


def _add_audit(sub):
    p = sub.add_parser("audit", help="measure an emulator against the physics")
    p.add_argument("--model", required=True, help="rtemu ONNX bundle")
    src = p.add_mutually_exclusive_group()
    src.add_argument("--data", default=None, help="independent test netCDF (from 'rtemu sample')")
    src.add_argument("--count", type=int, default=None, help="draw this many new test profiles")
    p.add_argument("--seed", type=int, default=None, help="seed for --count")
    p.add_argument("--output", required=True, help="directory for the report")
    p.add_argument("--threshold", type=float, default=None,
                   help="largest acceptable emulator RMSE as a fraction of channel noise")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=_run_audit)


def _run_audit(args):
    from rtemu import audit

    kwargs = {}
    if args.threshold is not None:
        kwargs["threshold"] = args.threshold
    audit.run_audit(
        args.model,
        args.output,
        data=args.data,
        count=args.count,
        seed=args.seed,
        progress=not args.quiet,
        **kwargs,
    )
    print(f"wrote {Path(args.output) / 'report.md'}")


def _add_demo(sub):
    p = sub.add_parser("demo", help="the whole chain on the invented demo instrument, in minutes")
    p.add_argument("--output", default="rtemu-demo", help="directory for everything it writes")
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    p.set_defaults(func=_run_demo)


def _run_demo(args):
    from rtemu import demo

    demo.run_demo(args.output, progress=not args.quiet)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rtemu",
        description="Fast, audited emulators of a clear-sky radiance observation operator.",
    )
    from rtemu import __version__

    parser.add_argument("--version", action="version", version=f"rtemu {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)
    for add in (_add_demo, _add_instruments, _add_simulate, _add_sample, _add_train, _add_info, _add_audit):
        add(sub)
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        args.func(args)
    except (ValueError, FileNotFoundError, KeyError) as exc:
        message = exc.args[0] if isinstance(exc, KeyError) and exc.args else exc
        print(f"rtemu: error: {message}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("rtemu: interrupted; finished chunks are kept, rerun the same command to resume",
              file=sys.stderr)
        return 130
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
