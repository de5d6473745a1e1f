"""Cost per profile of the two teachers of demo-sounder-ck: line-by-line and gray sub-bands.

Run from the repository root:

    python benchmarks/teacher_cost.py [--lbl-profiles 3] [--gray-profiles 2000]

* line-by-line: ``rtemu.spectroscopy.LineByLineOperator`` on the INVENTED passbands and line
  lists of demo-sounder-ck (all 16 channels, monochromatic grids as shipped), forward and
  with Jacobians, one process; the per-channel split of the forward cost is printed too;
* gray sub-bands: ``rtemu.physics.simulate`` on the built instrument
  ``rtemu/instruments/demo-sounder-ck.toml`` (its (ln p, T) absorption tables).

Profiles from ``rtemu.sampling.draw_states`` on the 60-level demo grid. Prints seconds per
profile and the cost ratio. Not a test: figures depend on the machine.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import numpy as np  # noqa: E402

from rtemu import physics  # noqa: E402
from rtemu.instrument import load_instrument  # noqa: E402
from rtemu.sampling import draw_states  # noqa: E402
from rtemu.spectroscopy import LineByLineOperator  # noqa: E402

FOLDER = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "rtemu", "instruments")


def _timed(func, repeat=1):
    best = np.inf
    for _ in range(repeat):
        start = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - start)
    return best


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--lbl-profiles", type=int, default=3)
    parser.add_argument("--gray-profiles", type=int, default=2000)
    args = parser.parse_args(argv)
    lbl = LineByLineOperator(os.path.join(FOLDER, "demo-sounder-ck.passbands"))
    gray = load_instrument(os.path.join(FOLDER, "demo-sounder-ck.toml"))
    n_lbl, n_gray = args.lbl_profiles, args.gray_profiles
    ds_lbl = draw_states(n_lbl, seed=1, channels=lbl.instrument)
    ds_gray = draw_states(n_gray, seed=1, channels=lbl.instrument)
    print(f"line-by-line: {sum(lbl.frequency_count.values())} monochromatic frequencies over "
          f"{len(lbl.channels)} channels; gray: {sum(len(c.bands) for c in gray.channels)} sub-bands "
          "(demo-sounder-ck.toml, (ln p, T) tables)")
    t_lbl = _timed(lambda: lbl.simulate(ds_lbl)) / n_lbl
    t_lbl_j = _timed(lambda: lbl.simulate(ds_lbl, jacobian=True)) / n_lbl
    t_gray = _timed(lambda: physics.simulate(gray, ds_gray), repeat=3) / n_gray
    t_gray_j = _timed(lambda: physics.simulate(gray, ds_gray, jacobian=True), repeat=3) / n_gray
    print(f"{'teacher':<28} {'forward [s/profile]':>20} {'with Jacobians [s/profile]':>27}")
    print(f"{'line-by-line':<28} {t_lbl:>20.4g} {t_lbl_j:>27.4g}")
    print(f"{'gray sub-bands (physics)':<28} {t_gray:>20.4g} {t_gray_j:>27.4g}")
    print(f"ratio line-by-line / gray: forward {t_lbl / t_gray:.0f}x, with Jacobians {t_lbl_j / t_gray_j:.0f}x")
    print("\nline-by-line forward cost per channel [s/profile]:")
    one = draw_states(1, seed=2, channels=lbl.instrument)
    for cid, count in lbl.frequency_count.items():
        single = LineByLineOperator(_select(lbl, cid))
        t = _timed(lambda: single.simulate(one.sel(channel=[cid])))
        print(f"  {cid:<8} {count:>6} frequencies  {t:.4f}")
    return 0


def _select(lbl, cid):
    import dataclasses

    pbf = lbl.passbands
    return dataclasses.replace(pbf, channels=tuple(c for c in pbf.channels if c.id == cid))


if __name__ == "__main__":
    sys.exit(main())
