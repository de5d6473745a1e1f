"""Streaming a profile file through an operator, chunk by chunk (``rtemu simulate``).

Files larger than memory pass through in fixed chunks of profiles, in-process, on local
dask worker processes or on a dask.distributed cluster. Finished chunks survive an
interruption; rerunning the same command resumes (see :mod:`rtemu._chunked`).
"""

from __future__ import annotations

import functools
import hashlib
import os
from pathlib import Path

import xarray as xr

from rtemu._chunked import run_chunked
from rtemu._io import open_dataset

DEFAULT_CHUNK_SIZE = 4096


def _file_identity(path: Path) -> dict:
    stat = path.stat()
    return {"path": str(path.resolve()), "size": stat.st_size, "mtime_ns": stat.st_mtime_ns}


def _simulate_chunk(operator, input_path: str, jacobian: bool, start: int, stop: int) -> xr.Dataset:
    with open_dataset(input_path) as ds:
        block = ds.isel(profile=slice(start, stop)).load()
    return operator.simulate(block, jacobian=jacobian)


def make_operator(*, instrument=None, model=None, regrid: bool = False, grid_hpa=None):
    """The physical operator for ``instrument`` or the emulated one for ``model``.

    ``regrid`` (emulator) carries profiles onto the bundle's grid; ``grid_hpa`` [hPa]
    (physics) onto that grid (see :mod:`rtemu.runtime`).
    """
    if (instrument is None) == (model is None):
        raise ValueError("give exactly one of instrument or model")
    if model is not None:
        from rtemu.runtime import EmulatedOperator

        if grid_hpa is not None:
            raise ValueError("regrid: an emulator computes on its bundle's grid (rule: no levels file with a model)")
        return EmulatedOperator.load(model, regrid=regrid)
    from rtemu.runtime import PhysicalOperator

    if regrid and grid_hpa is None:
        raise ValueError("regrid: the physical model needs a grid to carry profiles onto (rule: a levels "
                         "file with --instrument)")
    return PhysicalOperator(instrument, grid_hpa=grid_hpa)


def simulate_file(
    input_path,
    output_path,
    *,
    instrument=None,
    model=None,
    jacobian: bool = False,
    regrid: bool = False,
    grid_hpa=None,
    workers: int | None = None,
    scheduler: str | None = None,
    chunk_size: int | None = None,
    progress: bool = True,
) -> Path:
    """Simulate every profile of ``input_path`` and write ``output_path`` atomically.

    Parameters
    ----------
    input_path : path
        netCDF file in the input schema of :func:`rtemu.physics.simulate`.
    instrument, model : optional
        Exactly one: an instrument (physical model) or an rtemu ONNX bundle (emulator).
    regrid, grid_hpa : optional
        Carry the profiles onto the bundle's grid (``regrid``, emulator) or onto
        ``grid_hpa`` [hPa] (physical model); Jacobians come back on the file's levels.
    workers, scheduler : optional
        Local dask worker processes, or the address of a dask.distributed scheduler whose
        workers can read ``input_path``.
    chunk_size : int, optional
        Profiles per chunk (default 4096); part of the job's identity for resuming.
    """
    input_path = Path(input_path)
    if not input_path.is_file():
        raise FileNotFoundError(f"--input {input_path}: no such file")
    operator = make_operator(instrument=instrument, model=model, regrid=regrid, grid_hpa=grid_hpa)
    chunk_size = chunk_size or DEFAULT_CHUNK_SIZE
    with open_dataset(input_path) as ds:
        if "profile" not in ds.dims or ds.sizes["profile"] == 0:
            raise ValueError(f"{input_path}: no profiles (rule: dimension 'profile' with at least one entry)")
        count = ds.sizes["profile"]
        # Structural problems (missing variables, units, dims) fail now, not in a worker.
        operator.simulate(ds.isel(profile=slice(0, 1)).load(), jacobian=False)
    if model is not None:
        operator_id = {"model_sha256": _sha256(model)}
    else:
        operator_id = {"instrument_toml": operator.instrument.to_toml()}
    job = {
        "kind": "simulate",
        "input": _file_identity(input_path),
        "operator": operator_id,
        "jacobian": jacobian,
        "chunk_size": chunk_size,
        **({"regrid": True} if regrid else {}),
        **({"grid_hpa": [float(x) for x in grid_hpa]} if grid_hpa is not None else {}),
    }
    attrs = {
        "title": "rtemu simulated brightness temperatures",
        "source": f"rtemu simulate ({'emulator ' + Path(model).name if model else 'physical model'})",
        "instrument": operator.instrument.name,
        "input_file": input_path.name,
    }
    compute = functools.partial(_simulate_chunk, operator, str(input_path), jacobian)
    return run_chunked(
        output_path,
        count=count,
        chunk_size=chunk_size,
        compute_chunk=compute,
        job=job,
        workers=workers,
        scheduler=scheduler,
        progress=progress,
        description="simulate",
        attrs=attrs,
    )


def _sha256(path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(functools.partial(handle.read, 1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
