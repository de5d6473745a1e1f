"""Resumable chunked jobs that end in one netCDF file.

A job is split into fixed chunks of profiles (independent of the number of workers).
Each finished chunk is written atomically into a side directory ``<output>.chunks/``
with a manifest fingerprinting the job's arguments. A rerun with the same arguments
computes only the missing chunks; the final file is assembled by streaming the chunk
files (never the whole set in memory), written atomically, and the side directory is
removed. Chunks run in-process, on local dask worker processes, or on a
dask.distributed scheduler; results come back to the caller, which does all writing
(no shared filesystem needed).
"""

from __future__ import annotations

import hashlib
import json
import shutil
import sys
from pathlib import Path
from typing import Callable

import dask
import xarray as xr

from rtemu._io import (assembly_size, atomic_path, check_space, exclusive_output, open_dataset,
                      remove_partials, to_netcdf_atomic, write_text_atomic)

MANIFEST = "manifest.json"


def fingerprint(arguments: dict) -> str:
    """SHA-256 of a JSON-serialisable description of a job."""
    text = json.dumps(arguments, sort_keys=True, default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def chunk_bounds(count: int, chunk_size: int) -> list[tuple[int, int]]:
    """[(start, stop), ...] covering ``count`` items in chunks of ``chunk_size``."""
    if chunk_size < 1:
        raise ValueError(f"chunk_size must be >= 1, got {chunk_size}")
    return [(s, min(count, s + chunk_size)) for s in range(0, count, chunk_size)]


def _side_directory(output: Path, job_hash: str) -> Path:
    side = Path(str(output) + ".chunks")
    manifest = side / MANIFEST
    if side.exists():
        try:
            recorded = json.loads(manifest.read_text())["fingerprint"]
        except (OSError, ValueError, KeyError):
            recorded = None
        if recorded != job_hash:
            print(
                f"rtemu: {side} holds chunks of a run with other arguments; starting over",
                file=sys.stderr,
            )
            shutil.rmtree(side)
    side.mkdir(parents=True, exist_ok=True)
    if not manifest.exists():
        write_text_atomic(manifest, json.dumps({"fingerprint": job_hash}))
    return side


def _readable(path: Path) -> bool:
    """A finished chunk: present and readable (chunks are not fsynced, see atomic_path)."""
    if not path.exists():
        return False
    try:
        with open_dataset(path) as ds:
            ds.load()
        return True
    except Exception:  # unreadable after a crash: recompute it
        path.unlink()
        return False


def _client(workers, scheduler):
    from distributed import Client, LocalCluster

    if scheduler:
        return Client(scheduler), None
    cluster = LocalCluster(
        n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None
    )
    return Client(cluster), cluster


def run_chunked(
    output,
    *,
    count: int,
    chunk_size: int,
    compute_chunk: Callable[[int, int], xr.Dataset],
    job: dict,
    workers: int | None = None,
    scheduler: str | None = None,
    progress: bool = True,
    description: str = "chunks",
    attrs: dict | None = None,
    inputs=(),
) -> Path:
    """Run ``compute_chunk(start, stop)`` over all chunks and assemble ``output``.

    Parameters
    ----------
    compute_chunk : callable
        Picklable; returns the Dataset for profiles [start, stop) along ``profile``.
    job : dict
        Everything that determines the result (fingerprinted for resuming).
    workers : int, optional
        Local dask worker processes; None or 1 runs in this process.
    scheduler : str, optional
        Address of a dask.distributed scheduler (takes precedence over ``workers``).
    attrs : dict or callable, optional
        Global attributes of the final file, or a function of the list of the chunks'
        attributes returning them.
    inputs : iterable of path
        Files the job reads: ``output`` may not be one of them.

    The job holds :func:`rtemu._io.exclusive_output` on ``output`` throughout: a second
    job on the same output is refused, and the chunk folder is only touched by this job.
    """
    with exclusive_output(output, inputs):
        return _run_locked(Path(output), count=count, chunk_size=chunk_size, compute_chunk=compute_chunk,
                           job=job, workers=workers, scheduler=scheduler, progress=progress,
                           description=description, attrs=attrs)


def _run_locked(output: Path, *, count, chunk_size, compute_chunk, job, workers, scheduler, progress,
                description, attrs) -> Path:
    from tqdm.auto import tqdm

    side = _side_directory(output, fingerprint(job))
    remove_partials(side)  # of a job that died; we hold the output's lock
    bounds = chunk_bounds(count, chunk_size)
    paths = [side / f"chunk-{i:06d}.nc" for i in range(len(bounds))]
    todo = [i for i, p in enumerate(paths) if not _readable(p)]
    bar = tqdm(
        total=len(bounds), initial=len(bounds) - len(todo), desc=description,
        unit="chunk", disable=not progress,
    )
    try:
        if todo and (scheduler or (workers and workers > 1)):
            from distributed import as_completed

            client, cluster = _client(workers, scheduler)
            try:
                # A bounded window of chunks in flight keeps memory flat on both sides.
                window = 2 * max(1, len(client.scheduler_info()["workers"]))
                pending = iter(todo)
                futures = {}
                running = as_completed()
                for i in pending:
                    future = client.submit(compute_chunk, *bounds[i], pure=False)
                    futures[future] = i
                    running.add(future)
                    if len(futures) >= window:
                        break
                for future in running:
                    index = futures.pop(future)
                    to_netcdf_atomic(future.result(), paths[index], durable=False)
                    bar.update()
                    nxt = next(pending, None)
                    if nxt is not None:
                        new_future = client.submit(compute_chunk, *bounds[nxt], pure=False)
                        futures[new_future] = nxt
                        running.add(new_future)
            finally:
                client.close()
                if cluster is not None:
                    cluster.close()
        else:
            for i in todo:
                to_netcdf_atomic(compute_chunk(*bounds[i]), paths[i], durable=False)
                bar.update()
    finally:
        bar.close()
    if callable(attrs):
        chunk_attrs = []
        for path in paths:
            with open_dataset(path) as part:
                chunk_attrs.append(dict(part.attrs))
        attrs = attrs(chunk_attrs)
    assemble(paths, output, attrs=attrs)
    shutil.rmtree(side)
    return output


def assemble(paths: list[Path], output: Path, attrs: dict | None = None) -> None:
    """Concatenate chunk files along ``profile`` into ``output`` by streaming."""
    check_space(output, assembly_size(paths))
    parts = [open_dataset(p, chunks={}) for p in paths]
    try:
        combined = xr.concat(parts, dim="profile", data_vars="minimal", coords="minimal",
                             compat="override", join="override")
        combined.attrs = dict(attrs or parts[0].attrs)
        # HDF5 places a variable's data where it is first written, so the file's bytes
        # depend on write order. Writing one variable at a time, in a fixed order, with a
        # synchronous scheduler makes them reproducible (and still streams chunk by chunk).
        with atomic_path(output, suffix=".nc.partial") as tmp, dask.config.set(scheduler="synchronous"):
            for index, name in enumerate(combined.data_vars):
                piece = combined[[name]]
                piece.attrs = combined.attrs if index == 0 else {}
                piece.to_netcdf(tmp, mode="w" if index == 0 else "a", engine="h5netcdf")
    finally:
        for part in parts:
            part.close()
