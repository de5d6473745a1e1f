"""The same simulation in-process and on a dask.distributed cluster (INVENTED scenario).

Starts a LocalCluster of two worker processes (on a real cluster, pass its scheduler
address instead: ``rtemu simulate ... --scheduler tcp://host:8786``), streams the shipped
example profiles (an invented pass of the invented demo-sounder) through the physical
model or an emulator bundle on it, and checks the file equals the in-process run byte for
byte.

Usage:  python examples/dask_cluster_simulation.py [--model emulator.onnx] [--output-dir DIR]
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

from distributed import LocalCluster

from rtemu.streaming import simulate_file

HERE = Path(__file__).resolve().parent
PROFILES = HERE / "data" / "example_profiles.nc"


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", help="emulator bundle (default: the physical model)")
    parser.add_argument("--output-dir", default=None)
    args = parser.parse_args(argv)
    out = Path(args.output_dir or tempfile.mkdtemp(prefix="rtemu-dask-"))
    operator = {"model": args.model} if args.model else {"instrument": "demo-sounder"}

    local = simulate_file(PROFILES, out / "in_process.nc", jacobian=True, chunk_size=6,
                          progress=False, **operator)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        print(f"cluster scheduler at {cluster.scheduler_address} with 2 workers")
        remote = simulate_file(PROFILES, out / "on_cluster.nc", jacobian=True, chunk_size=6,
                               scheduler=cluster.scheduler_address, progress=False, **operator)
    same = local.read_bytes() == remote.read_bytes()
    print(f"in-process: {local}\non cluster: {remote}\nidentical bytes: {same}")
    return 0 if same else 1


if __name__ == "__main__":
    raise SystemExit(main())
