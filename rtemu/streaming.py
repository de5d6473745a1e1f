"""Streaming a profile file through an operator, chunk by chunk (``rtemu simulate``).

Files larger than memory pass through in fixed chunks of profiles, in-process, on local
dask worker processes or on a dask.distributed cluster. Finished chunks survive an
interruption; rerunning the same command resumes (see :mod:`rtemu._chunked`).
"""

from __future__ import annotations

import functools
import hashlib
import json
import os
import re
from pathlib import Path

import xarray as xr

from rtemu._chunked import run_chunked
from rtemu._io import open_dataset

DEFAULT_CHUNK_SIZE = 4096


def _file_identity(path: Path) -> dict:
    stat = path.stat()
    return {"path": str(path.resolve()), "size": stat.st_size, "mtime_ns": stat.st_mtime_ns}


#: One entry of an operator's ``invalid_input_summary`` (see rtemu._checks.prepare_inputs).
_PROBLEM = re.compile(r"(?P<rule>.+?); first offending profile index (?P<first>\d+) "
                      r"\((?P<count>\d+) profile\(s\)\)(?:; |$)")
#: Chunk attribute carrying the invalid-input rules as JSON, profile indices in file order.
_RULES_ATTR = "rtemu_invalid_input_rules"


def _invalid_rules(summary: str, offset: int) -> list[dict]:
    """[{"rule", "first", "count"}] of an ``invalid_input_summary``, indices shifted by ``offset``."""
    return [{"rule": m["rule"], "first": int(m["first"]) + offset, "count": int(m["count"])}
            for m in _PROBLEM.finditer(summary)]


def _select_channels(block: xr.Dataset, channels) -> xr.Dataset:
    """The input's per-channel values of the chosen ``channels`` (when the input has more)."""
    if channels is None or "channel" not in block.coords:
        return block
    have = [str(c) for c in block["channel"].values]
    missing = [c for c in channels if c not in have]
    if missing:
        raise ValueError(f"surface_emissivity: no values for channel(s) {missing} in the input "
                         f"(it has {have}) (rule: one value per chosen channel)")
    return block.sel(channel=list(channels))


def _simulate_chunk(operator, input_path: str, jacobian: bool, start: int, stop: int,
                    channels=None) -> xr.Dataset:
    with open_dataset(input_path) as ds:
        block = _select_channels(ds.isel(profile=slice(start, stop)), channels).load()
    out = operator.simulate(block, jacobian=jacobian)
    summary = out.attrs.pop("invalid_input_summary", "")
    out.attrs[_RULES_ATTR] = json.dumps(_invalid_rules(summary, start))
    return out


def _summary_line(rules: list[dict], invalid: int, total: int) -> str:
    """One line: how many profiles are invalid, then per rule its count and first profile."""
    parts = [f"{r['rule']} ({r['count']} profile(s), first index {r['first']})" for r in rules]
    return f"{invalid} of {total} profile(s) invalid: " + " | ".join(parts)


def _final_attrs(base: dict, chunk_attrs: list[dict], total: int) -> dict:
    merged: dict[str, dict] = {}
    for attrs in chunk_attrs:
        for item in json.loads(attrs.get(_RULES_ATTR, "[]")):
            entry = merged.setdefault(item["rule"], {"rule": item["rule"], "first": item["first"], "count": 0})
            entry["count"] += item["count"]
            entry["first"] = min(entry["first"], item["first"])
    attrs = dict(base)
    rules = sorted(merged.values(), key=lambda r: r["first"])
    if rules:
        # Each profile counts under its first failed rule (prepare_inputs), so the sum is exact.
        invalid = sum(r["count"] for r in rules)
        attrs["invalid_input_count"] = invalid
        attrs["invalid_input_summary"] = _summary_line(rules, invalid, total)
    else:
        attrs["invalid_input_count"] = 0
    attrs["profile_count"] = total
    return attrs


def make_operator(*, instrument=None, model=None, channels=None, fallback=None, regrid: bool = False,
                  grid_hpa=None):
    """The physical operator for ``instrument`` or the emulated one for ``model``.

    ``channels`` (ids) selects channels; ``fallback="physics"`` (emulator only) computes
    the profiles the emulator flags with the physical model (see EmulatedOperator).
    ``regrid`` (emulator) carries profiles onto the bundle's grid; ``grid_hpa`` [hPa]
    (physics) onto that grid (see :mod:`rtemu.runtime`).
    """
    if (instrument is None) == (model is None):
        raise ValueError("give exactly one of instrument or model")
    if model is not None:
        from rtemu.runtime import EmulatedOperator

        if grid_hpa is not None:
            raise ValueError("regrid: an emulator computes on its bundle's grid (rule: no levels file with a model)")
        return EmulatedOperator.load(model, channels=channels, fallback=fallback, regrid=regrid)
    if fallback is not None:
        raise ValueError("fallback applies to an emulator (model), not to the physical model")
    from rtemu.instrument import load_instrument
    from rtemu.runtime import PhysicalOperator

    if regrid and grid_hpa is None:
        raise ValueError("regrid: the physical model needs a grid to carry profiles onto (rule: a levels "
                         "file with --instrument)")
    inst = load_instrument(instrument)
    return PhysicalOperator(inst if channels is None else inst.select(list(channels)), grid_hpa=grid_hpa)


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
    channels=None,
    fallback=None,
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
    channels : sequence of str, optional
        Channel ids to compute (default all); per-channel inputs are taken for these.
    fallback : {None, "physics"}
        With a model: profiles the emulator flags are computed by the physical model.

    The output may not be the input or the model, and one job at a time writes it (see
    :func:`rtemu._io.exclusive_output`). Invalid profiles get NaN and the
    ``invalid_input`` flag; the output's global attributes ``invalid_input_count``,
    ``profile_count`` and ``invalid_input_summary`` (per rule: count and first profile
    index) say which and why.
    """
    input_path = Path(input_path)
    if not input_path.is_file():
        raise FileNotFoundError(f"--input {input_path}: no such file")
    from rtemu._io import refuse_input_as_output

    refuse_input_as_output(output_path, [input_path, model])
    operator = make_operator(instrument=instrument, model=model, channels=channels, fallback=fallback,
                             regrid=regrid, grid_hpa=grid_hpa)
    chunk_size = chunk_size or DEFAULT_CHUNK_SIZE
    with open_dataset(input_path) as ds:
        if "profile" not in ds.dims or ds.sizes["profile"] == 0:
            raise ValueError(f"{input_path}: no profiles (rule: dimension 'profile' with at least one entry)")
        count = ds.sizes["profile"]
        # Structural problems (missing variables, units, dims) fail now, not in a worker.
        operator.simulate(_select_channels(ds.isel(profile=slice(0, 1)), channels).load(), jacobian=False)
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
        "channels": list(operator.channels),
        "fallback": fallback,
        **({"regrid": True} if regrid else {}),
        **({"grid_hpa": [float(x) for x in grid_hpa]} if grid_hpa is not None else {}),
    }
    base_attrs = {
        "title": "rtemu simulated brightness temperatures",
        "source": f"rtemu simulate ({'emulator ' + Path(model).name if model else 'physical model'})",
        "instrument": operator.instrument.name,
        "input_file": input_path.name,
    }
    attrs = functools.partial(_final_attrs, base_attrs, total=count)
    compute = functools.partial(_simulate_chunk, operator, str(input_path), jacobian,
                                channels=None if channels is None else list(operator.channels))
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
        inputs=[input_path] + ([model] if model is not None else []),
    )


def _sha256(path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(functools.partial(handle.read, 1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
