"""Command line of the spectroscopy stage.

``python -m rtemu.spectroscopy.build lines FOLDER``
    Write the INVENTED demo line lists (rtemu.spectroscopy.invented) into FOLDER.
``python -m rtemu.spectroscopy.build instrument PASSBANDS OUTPUT.toml``
    Reduce the passbands (and the line lists they name) to correlated-k sub-bands; write
    OUTPUT.toml and OUTPUT.tables.nc; print per channel the sub-band count, the weighting
    function peak and the difference from the line-by-line teacher.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

from rtemu._io import write_text_atomic


def _lines(args) -> int:
    from rtemu.spectroscopy import invented

    stem = Path(args.folder) / "demo-sounder-ck"
    write_text_atomic(f"{stem}.lines-mw", invented.microwave_text())
    write_text_atomic(f"{stem}.lines-ir", invented.infrared_text())
    print(f"wrote {stem}.lines-mw and {stem}.lines-ir")
    return 0


def weighting_function_peaks(operator, pressure_hpa, air_temperature, specific_humidity) -> dict:
    """Layer pressure [hPa] of each channel's weighting-function maximum (line-by-line)."""
    layer_p, weights = operator.weighting_functions(pressure_hpa, air_temperature, specific_humidity)
    return {cid: float(layer_p[np.argmax(w)]) for cid, w in zip(operator.channels, weights)}


def _instrument(args) -> int:
    from rtemu.spectroscopy.ckd import build_correlated_k, reference_atmospheres, write_instrument
    from rtemu.spectroscopy.linebyline import LineByLineOperator

    result = build_correlated_k(args.passbands, progress=lambda line: print(line, flush=True))
    toml_path, nc_path = write_instrument(result, args.output)
    peaks = weighting_function_peaks(LineByLineOperator(result.passbands), *reference_atmospheres()["us76"])
    names = list(result.reports[0].lbl_difference_k)
    print(f"\nwrote {toml_path} and {nc_path}\n")
    print("| channel | frequencies (LBL) | sub-bands | converged | WF peak US76 [hPa] | "
          + " | ".join(f"ck - LBL {n} [K]" for n in names) + " |")
    print("|---" * (5 + len(names)) + "|")
    for r in result.reports:
        print(f"| {r.id} | {r.frequency_count} | {r.sub_band_count} | {'yes' if r.converged else 'no'} | "
              f"{peaks[r.id]:.0f} | " + " | ".join(f"{r.lbl_difference_k[n]:+.4f}" for n in names) + " |")
    return 0


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m rtemu.spectroscopy.build", description=__doc__.split("\n")[0])
    sub = parser.add_subparsers(dest="command", required=True)
    p = sub.add_parser("lines", help="write the INVENTED demo line lists")
    p.add_argument("folder")
    p.set_defaults(func=_lines)
    p = sub.add_parser("instrument", help="build a correlated-k instrument from a passband file")
    p.add_argument("passbands")
    p.add_argument("output", help="instrument TOML to write (tables beside it)")
    p.set_defaults(func=_instrument)
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except (ValueError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
