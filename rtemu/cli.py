"""The ``rtemu`` command line: one subcommand per stage of the job.

Every subcommand writes its outputs atomically, one job per output path. Exit status:
0 success; 2 an error, reported as one line ``rtemu: error: ...`` (``--debug`` adds the
traceback); 3 ``simulate`` found no valid profile (the output holds only flags);
130 interrupted.
"""

from __future__ import annotations

import argparse
import errno
import sys
import warnings
from pathlib import Path

EXIT_ERROR = 2
EXIT_NO_VALID_PROFILE = 3


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
    p.add_argument("--regrid", nargs="?", const=True, default=False, metavar="LEVELS_FILE",
                   help="profiles on other levels (e.g. a model's): carry them onto the operator's grid, "
                   "linear in ln p, their lowest level (or surface_air_pressure) as the ground; Jacobians "
                   "come back on the file's levels. With --model the bundle's grid (no file); with "
                   "--instrument the grid of LEVELS_FILE (as for 'rtemu sample --levels')")
    p.add_argument("--channels", default=None, help="comma-separated channel ids to compute (default all)")
    p.add_argument("--fallback", choices=["physics"], default=None,
                   help="with --model: compute the profiles the emulator flags as outside its training "
                        "envelope with the physical model (flag bit physics_fallback)")
    scale = p.add_mutually_exclusive_group()
    scale.add_argument("--workers", type=int, default=None, help="local worker processes (dask)")
    scale.add_argument("--scheduler", default=None, help="dask.distributed scheduler address")
    p.add_argument("--chunk-size", type=int, default=None, help="profiles per chunk when streaming")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=_run_simulate)


def _channel_list(text):
    if text is None:
        return None
    ids = [c.strip() for c in text.split(",") if c.strip()]
    if not ids:
        raise ValueError(f"--channels {text!r}: no channel id (rule: comma-separated ids)")
    return ids


def _run_simulate(args):
    from rtemu import streaming
    from rtemu._io import open_dataset

    grid = None
    if isinstance(args.regrid, str):
        from rtemu.sampling import read_levels_file

        grid = read_levels_file(args.regrid)
    if args.fallback and not args.model:
        raise ValueError("--fallback physics applies to an emulator: give --model")
    streaming.simulate_file(
        input_path=args.input,
        output_path=args.output,
        instrument=args.instrument,
        model=args.model,
        jacobian=args.jacobian,
        regrid=bool(args.regrid),
        grid_hpa=grid,
        workers=args.workers,
        scheduler=args.scheduler,
        chunk_size=args.chunk_size,
        progress=not args.quiet,
        channels=_channel_list(args.channels),
        fallback=args.fallback,
    )
    with open_dataset(args.output) as out:
        invalid = int(out.attrs.get("invalid_input_count", 0))
        total = int(out.attrs.get("profile_count", out.sizes.get("profile", 0)))
        summary = out.attrs.get("invalid_input_summary", "")
    print(f"wrote {args.output}")
    if invalid:
        print(f"rtemu: warning: {summary} (NaN and flag invalid_input in the output; the summary is "
              "kept in its attribute invalid_input_summary)", file=sys.stderr)
    if total and invalid == total:
        print(f"rtemu: error: no valid profile in {args.input}; {args.output} holds only flags",
              file=sys.stderr)
        return EXIT_NO_VALID_PROFILE
    return 0


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
    p = sub.add_parser("sample", help="draw atmospheric states and simulate them (training data)",
                       description="Draw atmospheric states and run a teacher on them: rtemu's physics of "
                       "an instrument (--instrument) or your own model (--teacher).")
    which = p.add_mutually_exclusive_group(required=True)
    which.add_argument("--instrument", help="shipped instrument name or TOML path (rtemu's physics)")
    which.add_argument("--teacher", metavar="MODULE:NAME",
                       help="your model: NAME in MODULE (the current directory is searched first) is a "
                       "teacher object or a zero-argument callable returning one")
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
    from rtemu.teacher import load_teacher

    kwargs = {}
    if args.chunk_size:
        kwargs["chunk_size"] = args.chunk_size
    from rtemu._io import refuse_input_as_output

    refuse_input_as_output(args.output, [args.levels])
    grid = sampling.read_levels_file(args.levels) if args.levels else None
    sampling.sample_to_netcdf(
        load_teacher(args.teacher) if args.teacher else load_instrument(args.instrument),
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
    from rtemu._io import exclusive_output

    channels = _channel_list(args.channels)
    with exclusive_output(args.output, inputs=[args.data]):
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
    p.add_argument("--key", default=None, help="key file: also verify the bundle's HMAC-SHA256 signature")
    p.set_defaults(func=_run_info)


def _run_info(args):
    from rtemu import bundle

    print(bundle.describe(args.model, key=args.key))


def _add_sign(sub):
    p = sub.add_parser(
        "sign", help="add a keyed signature (HMAC-SHA256) to a bundle",
        description="Sign a bundle with a secret key file (HMAC-SHA256 over the bundle's content and "
        "metadata). Unlike the SHA-256 digests every bundle carries, which detect corruption only, "
        "a signature shows the bundle was signed by a holder of the key: check it with "
        "'rtemu info --key FILE' or EmulatedOperator.load(path, key=FILE).",
    )
    p.add_argument("model", help="rtemu ONNX bundle (signed in place, atomically)")
    p.add_argument("--key", required=True, help="file holding the secret key (at least 32 bytes)")
    p.set_defaults(func=_run_sign)


def _run_sign(args):
    from rtemu import bundle
    from rtemu._io import exclusive_output

    with exclusive_output(args.model):
        bundle.sign_bundle(args.model, key=args.key)
    print(f"signed {args.model} (HMAC-SHA256)")


def _add_audit(sub):
    p = sub.add_parser("audit", help="measure an emulator against its teacher",
                       description="Measure an emulator against its teacher: --teacher, else the brightness "
                       "temperatures (and Jacobians) a --data file holds, else rtemu's physics.")
    p.add_argument("--model", required=True, help="rtemu ONNX bundle")
    p.add_argument("--teacher", metavar="MODULE:NAME", default=None,
                   help="the reference model, as for 'rtemu sample --teacher'")
    src = p.add_mutually_exclusive_group()
    src.add_argument("--data", default=None, help="independent test netCDF (from 'rtemu sample'); reference "
                     "values it holds are used unless --teacher is given")
    src.add_argument("--count", type=int, default=None, help="draw this many new test profiles")
    p.add_argument("--seed", type=int, default=None, help="seed for --count")
    p.add_argument("--output", required=True, help="directory for the report")
    p.add_argument("--threshold", type=float, default=None,
                   help="largest acceptable emulator RMSE as a fraction of channel noise")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=_run_audit)


def _run_audit(args):
    from rtemu import audit
    from rtemu.teacher import load_teacher

    kwargs = {}
    if args.threshold is not None:
        kwargs["threshold"] = args.threshold
    if args.teacher:
        kwargs["reference"] = load_teacher(args.teacher)
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


class _Parser(argparse.ArgumentParser):
    """argparse with the one-line error of every other rtemu failure."""

    def error(self, message):
        print(f"rtemu: error: {_one_line(message)} (see '{self.prog} --help')", file=sys.stderr)
        sys.exit(EXIT_ERROR)


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="rtemu",
        description="Fast, audited emulators of a clear-sky radiance observation operator.",
    )
    from rtemu import __version__

    parser.add_argument("--version", action="version", version=f"rtemu {__version__}")
    parser.add_argument("--debug", action="store_true",
                        help="on an error, print the full traceback (anywhere on the command line)")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)
    for add in (_add_demo, _add_instruments, _add_simulate, _add_sample, _add_train, _add_info,
                _add_sign, _add_audit):
        add(sub)
    return parser


_OS_ERRORS = {
    errno.ENOSPC: "no space left on the device",
    errno.EFBIG: "file too large for the file system or the process's file size limit",
    errno.EDQUOT: "disk quota exceeded",
    errno.EROFS: "read-only file system",
    errno.EACCES: "permission denied",
    errno.EPERM: "operation not permitted",
    errno.EISDIR: "is a directory",
    errno.ENOTDIR: "a parent is not a directory",
}


def _one_line(text) -> str:
    return " ".join(str(text).split())


def error_message(exc: BaseException) -> str:
    """The one-line ``rtemu: error: ...`` text for an exception escaping a subcommand."""
    if isinstance(exc, KeyError) and exc.args:
        return _one_line(exc.args[0])
    if isinstance(exc, OSError) and exc.errno in _OS_ERRORS:
        import os

        where = exc.filename or ""
        if exc.strerror and exc.strerror != os.strerror(exc.errno):  # rtemu's own, more precise text
            return _one_line(exc.strerror)
        hint = " (finished chunks are kept: free space and rerun the same command to resume)" \
            if exc.errno in (errno.ENOSPC, errno.EFBIG, errno.EDQUOT) else ""
        return _one_line(f"{where}: {_OS_ERRORS[exc.errno]}{hint}" if where else f"{_OS_ERRORS[exc.errno]}{hint}")
    if isinstance(exc, (ValueError, FileNotFoundError, OSError)):
        return _one_line(exc)
    module = type(exc).__module__ or ""
    if module.startswith("onnxruntime"):
        return _one_line(f"onnxruntime failed ({type(exc).__name__}): {exc}")
    return _one_line(f"unexpected {type(exc).__name__}: {exc} (rerun with --debug for the traceback)")


def _one_line_warning(message, category, filename, lineno, file=None, line=None):
    print(f"rtemu: warning: {_one_line(message)}", file=file or sys.stderr)


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    argv = [a for a in argv if a != "--debug"]
    parser = build_parser()
    args = parser.parse_args(argv)
    previous = warnings.showwarning
    if not debug:
        warnings.showwarning = _one_line_warning
    try:
        code = args.func(args)
        return code if isinstance(code, int) else 0
    except KeyboardInterrupt:
        print("rtemu: interrupted; finished chunks are kept, rerun the same command to resume",
              file=sys.stderr)
        return 130
    except Exception as exc:
        if debug:
            import traceback

            traceback.print_exc()
        print(f"rtemu: error: {error_message(exc)}", file=sys.stderr)
        return EXIT_ERROR
    finally:
        warnings.showwarning = previous


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
