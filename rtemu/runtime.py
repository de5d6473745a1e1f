"""Observation operators for assimilation: one protocol, two implementations.

:class:`PhysicalOperator` wraps the physical model; :class:`EmulatedOperator` serves an
rtemu ONNX bundle through onnxruntime. Both offer

* ``simulate(dataset, jacobian=False) -> xarray.Dataset`` (schema of
  :func:`rtemu.physics.simulate`, with ``quality_flag``),
* ``tangent_linear(dataset, perturbation)`` (J dx) and ``adjoint(dataset, bt_perturbation)``
  (J^T dy),
* ``instrument`` and ``channels``.

A dask-backed dataset (chunked along ``profile``) stays lazy: each chunk is computed
independently with :func:`xarray.map_blocks`; the emulator keeps one onnxruntime session
per process, not one per chunk.
"""

from __future__ import annotations

import threading
from typing import Literal

import numpy as np
import xarray as xr

from rtemu import flags as _flags
from rtemu import physics as _physics
from rtemu._checks import prepare_inputs
from rtemu.instrument import Instrument, load_instrument

ErrorMode = Literal["raise", "mask"]


def _is_lazy(dataset: xr.Dataset) -> bool:
    return any(v.chunks is not None for v in dataset.variables.values())


def _output_template(dataset: xr.Dataset, channel_ids, jacobian: bool) -> xr.Dataset:
    """A lazy Dataset with the output schema, chunked like ``dataset`` along profile."""
    import dask.array as da

    n = dataset.sizes["profile"]
    nlev = dataset.sizes["level"]
    nchan = len(channel_ids)
    pchunks = dataset.chunks.get("profile", (n,)) if dataset.chunks else (n,)
    arrays = {"brightness_temperature": da.empty((n, nchan), chunks=(pchunks, nchan))}
    if jacobian:
        for name in ("jacobian_air_temperature", "jacobian_specific_humidity"):
            arrays[name] = da.empty((n, nchan, nlev), chunks=(pchunks, nchan, nlev))
        for name in ("jacobian_surface_temperature", "jacobian_surface_emissivity"):
            arrays[name] = da.empty((n, nchan), chunks=(pchunks, nchan))
    flag = da.zeros((n, nchan), chunks=(pchunks, nchan), dtype=np.int32)
    return _physics.label_outputs(arrays, dataset, channel_ids, flag)


class _OperatorBase:
    """Shared protocol: lazy dispatch, tangent linear and adjoint from the Jacobians."""

    instrument: Instrument

    @property
    def channels(self) -> tuple[str, ...]:
        return self.instrument.channel_ids

    def simulate(self, dataset: xr.Dataset, jacobian: bool = False) -> xr.Dataset:
        """Brightness temperatures [K] (and Jacobians) with ``quality_flag``.

        See :func:`rtemu.physics.simulate` for the schema. A dask-backed dataset returns
        a lazy result (one task per profile chunk).
        """
        if _is_lazy(dataset):
            # Structural checks now (cheap, on the first profile); values per chunk later.
            self._simulate_eager(dataset.isel(profile=slice(0, 1)).compute(), False)
            template = _output_template(dataset, self.channels, jacobian)
            return xr.map_blocks(
                _simulate_block, dataset, args=(self, jacobian), template=template
            )
        return self._simulate_eager(dataset, jacobian)

    def _simulate_eager(self, dataset, jacobian):  # pragma: no cover - abstract
        raise NotImplementedError

    def tangent_linear(self, dataset: xr.Dataset, perturbation: xr.Dataset) -> xr.Dataset:
        """J dx: brightness-temperature increments [K] for input increments ``perturbation``.

        ``perturbation`` holds any of air_temperature, specific_humidity (profile, level),
        surface_temperature (profile), surface_emissivity, in the units of ``dataset``.
        """
        out = self._simulate_eager(dataset, True)
        prep = prepare_inputs(dataset, self.channels, errors="mask")
        arrays = {k: out[k].values for k in _physics.JACOBIAN_NAMES}
        dy = _physics.tangent_linear_arrays(arrays, _physics._increments(prep, perturbation, dataset))
        return _physics.label_outputs(
            {"brightness_temperature": dy}, dataset, self.channels, out["quality_flag"].values
        )

    def adjoint(self, dataset: xr.Dataset, bt_perturbation) -> xr.Dataset:
        """J^T dy: gradients of <dy, BT> with respect to the inputs (units of ``dataset``)."""
        out = self._simulate_eager(dataset, True)
        prep = prepare_inputs(dataset, self.channels, errors="mask")
        arrays = {k: out[k].values for k in _physics.JACOBIAN_NAMES}
        dy = _physics._bt_array(bt_perturbation, self.channels, dataset.sizes["profile"])
        return _physics._label_gradients(_physics.adjoint_arrays(arrays, dy), prep, dataset)


def _simulate_block(block: xr.Dataset, operator: _OperatorBase, jacobian: bool) -> xr.Dataset:
    return operator._simulate_eager(block, jacobian)


class PhysicalOperator(_OperatorBase):
    """The physical model as an observation operator.

    Parameters
    ----------
    instrument : Instrument or str
        Instrument or its shipped name / file path.
    errors : {"mask", "raise"}
        * ``"mask"`` (default, batch use): invalid profiles get NaN and the
          ``invalid_input`` flag, the rest of the batch is exact.
        * ``"raise"``: invalid input raises ValueError.
    block_size : int
        Profiles per vectorised block [1].
    """

    def __init__(self, instrument, *, errors: ErrorMode = "mask", block_size: int = _physics.DEFAULT_BLOCK_SIZE):
        self.instrument = load_instrument(instrument)
        self.errors = errors
        self.block_size = block_size

    def __repr__(self):
        return f"PhysicalOperator({self.instrument.name!r}, {len(self.channels)} channels)"

    def _simulate_eager(self, dataset, jacobian):
        return _physics.simulate(
            self.instrument, dataset, jacobian, errors=self.errors, block_size=self.block_size
        )
