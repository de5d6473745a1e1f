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
    # The numpy test first: Variable.chunks goes through protocol checks that cost tens
    # of microseconds per variable.
    return any(not isinstance(v.data, np.ndarray) and v.chunks is not None
               for v in dataset.variables.values())


def _output_template(dataset: xr.Dataset, channel_ids, jacobian: bool, extra=()) -> xr.Dataset:
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
    out = _physics.label_outputs(arrays, dataset, channel_ids, flag)
    for name, attrs in extra:
        out[name] = xr.Variable(("profile", "channel"), da.empty((n, nchan), chunks=(pchunks, nchan)), attrs)
    return out


class _OperatorBase:
    """Shared protocol: lazy dispatch, tangent linear and adjoint from the Jacobians."""

    instrument: Instrument
    #: (name, attributes) of outputs beyond the physics' schema, (profile, channel) each.
    _extra_outputs: tuple = ()

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
            template = _output_template(dataset, self.channels, jacobian, self._extra_outputs)
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
        dy = _physics.tangent_linear_arrays(arrays, _physics._increments(prep, perturbation, dataset, self.channels))
        return _physics.label_outputs(
            {"brightness_temperature": dy}, dataset, self.channels, out["quality_flag"].values
        )

    def adjoint(self, dataset: xr.Dataset, bt_perturbation) -> xr.Dataset:
        """J^T dy: gradients of <dy, BT> with respect to the inputs (units of ``dataset``)."""
        out = self._simulate_eager(dataset, True)
        prep = prepare_inputs(dataset, self.channels, errors="mask")
        arrays = {k: out[k].values for k in _physics.JACOBIAN_NAMES}
        dy = _physics._bt_array(bt_perturbation, self.channels, dataset.sizes["profile"])
        return _physics._label_gradients(_physics.adjoint_arrays(arrays, dy), prep, dataset, self.channels)


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


# -- emulator -----------------------------------------------------------------------------
_SESSIONS: dict = {}
_SESSIONS_LOCK = threading.Lock()


def _session_for(path: str, digest: str, threads: int | None, jacobian: bool):
    """One onnxruntime session per (file content, threads, outputs) per process.

    Without Jacobians the session runs a pruned copy of the graph that computes only the
    brightness temperatures and flags (onnxruntime evaluates every node otherwise).
    """
    from rtemu import bundle as _bundle

    key = (path, digest, threads, jacobian)
    with _SESSIONS_LOCK:
        session = _SESSIONS.get(key)
        if session is None:
            outputs = None if jacobian else ["brightness_temperature", "brightness_temperature_uncertainty",
                                             "quality_flag"]
            session = _bundle.make_session(path, outputs=outputs, threads=threads, check=False)
            _SESSIONS[key] = session
    return session


_UNCERTAINTY_ATTRS = {"long_name": "emulator uncertainty of the brightness temperature (one standard deviation)",
                      "units": "K"}


class EmulatedOperator(_OperatorBase):
    """An rtemu ONNX bundle as an observation operator.

    Create with :meth:`load`. Inputs are checked against the bundle (pressure grid,
    channels), converted to canonical units and float32, run in batches and returned as
    float64 in the schema of :func:`rtemu.physics.simulate`.

    Parameters
    ----------
    path : str or Path
        The bundle file (checked on load: ONNX validity, format version, metadata, weights
        hash).
    channels : sequence of str, optional
        Serve only these channel ids (default: all of the bundle).
    batch_size : int
        Profiles per onnxruntime call [1].
    threads : int, optional
        onnxruntime intra-op threads (default: onnxruntime's choice).
    fallback : {None, "physics"}
        * ``None``: flagged profiles keep emulated values (and their flags).
        * ``"physics"``: profiles outside the training envelope (flag bits
          ``outside_training_bounds``, ``novel_state``, ``large_uncertainty`` or
          ``unusual_tropopause``, :data:`rtemu.flags.ENVELOPE`) are recomputed with the physical
          model and get the ``physics_fallback`` bit.
    errors : {"mask", "raise"}
        * ``"mask"`` (default): invalid profiles get NaN outputs and ``invalid_input``.
        * ``"raise"``: invalid input raises ValueError.
    grid_tolerance_hpa : float
        Largest accepted difference between the dataset's and the bundle's levels [hPa].
    """

    _extra_outputs = (("brightness_temperature_uncertainty", _UNCERTAINTY_ATTRS),)

    def __init__(self, *, path, channels=None, batch_size: int = 4096, threads: int | None = None,
                 fallback: Literal[None, "physics"] = None, errors: ErrorMode = "mask",
                 grid_tolerance_hpa: float = 1e-3):
        from rtemu import bundle as _bundle

        if fallback not in (None, "physics"):
            raise ValueError(f"fallback must be None or 'physics', got {fallback!r}")
        if batch_size < 1:
            raise ValueError(f"batch_size must be >= 1, got {batch_size}")
        self.path = str(path)
        self.batch_size = int(batch_size)
        self.threads = threads
        self.fallback = fallback
        self.errors = errors
        self.grid_tolerance_hpa = float(grid_tolerance_hpa)
        self.bundle = _bundle.read_bundle(self.path)
        self.model_instrument = self.bundle.instrument
        model_ids = self.model_instrument.channel_ids
        self.instrument = (
            self.model_instrument if channels is None else self.model_instrument.select(list(channels))
        )
        self._columns = np.array([model_ids.index(c) for c in self.instrument.channel_ids])
        # None when the operator serves every channel of the bundle in its order: no
        # emissivity scatter and no output gather then.
        self._subset = None if self._columns.tolist() == list(range(len(model_ids))) else self._columns
        grid = np.asarray(self.bundle.pressure_hpa, dtype=float)
        self._top_first = grid[0] < grid[-1]
        self._grid_surface_first = grid[::-1] if self._top_first else grid
        self._physics = None

    @classmethod
    def load(cls, path, **options) -> "EmulatedOperator":
        """Open and check an rtemu ONNX bundle; ``options`` as in the class docstring."""
        return cls(path=path, **options)

    def __repr__(self):
        return f"EmulatedOperator({self.path!r}, {len(self.channels)} channels)"

    def __getstate__(self):  # the session is per process: never pickled
        state = dict(self.__dict__)
        state["_physics"] = None
        return state

    @property
    def pressure_hpa(self) -> np.ndarray:
        """The bundle's pressure grid, in the order its inputs use [hPa]."""
        return np.asarray(self.bundle.pressure_hpa, dtype=float)

    @property
    def envelope(self) -> dict:
        """The training envelope stored in the bundle."""
        return self.bundle.envelope

    def _session(self, jacobian: bool):
        return _session_for(self.path, self.bundle.weights_sha256, self.threads, jacobian)

    def _check_grid(self, prep) -> None:
        diff = np.abs(prep.pressure_hpa - self._grid_surface_first[None, :]) \
            if prep.pressure_hpa.shape[1] == self._grid_surface_first.size else None
        if diff is None:
            raise ValueError(
                f"air_pressure: {prep.pressure_hpa.shape[1]} levels, the emulator was trained on "
                f"{self._grid_surface_first.size} (rule: the bundle's fixed pressure grid; "
                "interpolate first)"
            )
        bad = (diff > self.grid_tolerance_hpa).any(axis=1) & prep.valid
        if bad.any():
            first = int(np.flatnonzero(bad)[0])
            raise ValueError(
                f"air_pressure: levels differ from the emulator's grid by up to "
                f"{diff[first].max():.4g} hPa (rule: within {self.grid_tolerance_hpa:g} hPa of "
                f"the bundle's grid); first offending profile index {first}"
            )

    def _surface_pressure(self, dataset, n: int) -> np.ndarray:
        """ps [hPa] (N,) float32: the dataset's ``surface_air_pressure`` (terrain), else the
        grid's bottom pressure (no terrain)."""
        if "surface_air_pressure" not in dataset:
            return np.full(n, self._grid_surface_first[0], dtype=np.float32)
        from rtemu._units import unit_conversion

        var = dataset["surface_air_pressure"]
        if var.dims != ("profile",):
            raise ValueError(f"surface_air_pressure: dims {var.dims}, expected ('profile',)")
        scale, offset = unit_conversion("air_pressure", var.attrs.get("units"))
        return (np.asarray(var.values, dtype=float) * scale + offset).astype(np.float32)

    def _run_session(self, prep, jacobian: bool, surface_air_pressure=None) -> dict:
        """onnxruntime's outputs over all bundle channels, as it returns them: float32,
        levels in the bundle's order, ``quality_flag`` int32."""
        session = self._session(jacobian)
        n = prep.air_temperature.shape[0]
        order = slice(None, None, -1) if self._top_first else slice(None)
        if self._subset is None:
            emissivity = prep.surface_emissivity.astype(np.float32)
        else:
            emissivity = np.full((n, len(self.model_instrument.channels)), 0.95, dtype=np.float32)
            emissivity[:, self._subset] = prep.surface_emissivity
        feeds_all = {
            "air_temperature": prep.air_temperature[:, order].astype(np.float32),
            "specific_humidity": prep.specific_humidity[:, order].astype(np.float32),
            "surface_temperature": prep.surface_temperature.astype(np.float32),
            "surface_emissivity": emissivity,
            "sensor_zenith_angle": prep.sensor_zenith_angle.astype(np.float32),
            "surface_air_pressure": (np.full(n, self._grid_surface_first[0], dtype=np.float32)
                                     if surface_air_pressure is None else surface_air_pressure),
        }
        names = ["brightness_temperature", "brightness_temperature_uncertainty", "quality_flag"]
        if jacobian:
            names += list(_physics.JACOBIAN_NAMES)
        if n <= self.batch_size:
            return dict(zip(names, session.run(names, feeds_all)))
        out = {}
        for start in range(0, n, self.batch_size):
            sl = slice(start, min(n, start + self.batch_size))
            result = session.run(names, {k: v[sl] for k, v in feeds_all.items()})
            for name, value in zip(names, result):
                out.setdefault(name, []).append(value)
        return {k: np.concatenate(v) for k, v in out.items()}

    def _caller_arrays(self, raw: dict, prep) -> dict:
        """float64 outputs over the operator's channels, levels in the caller's order.

        One conversion per array: a profile's levels come back from the session in the
        bundle's order, which is the caller's when the caller gave them in that order.
        """
        reverse = prep.flipped != self._top_first  # rows whose caller order is reversed
        arrays = {}
        for name, values in raw.items():
            if self._subset is not None:
                values = values[:, self._subset]
            if values.ndim == 3 and reverse.all():
                values = values[..., ::-1]
            values = np.array(values, dtype=np.float64)  # C-ordered copy
            if values.ndim == 3 and reverse.any() and not reverse.all():
                values[reverse] = values[reverse][..., ::-1]
            arrays[name] = values
        return arrays

    def _simulate_eager(self, dataset, jacobian):
        prep = prepare_inputs(dataset, self.channels, errors=self.errors)
        self._check_grid(prep)
        raw = self._run_session(prep, jacobian, self._surface_pressure(dataset, prep.air_temperature.shape[0]))
        flag = raw.pop("quality_flag")
        sigma = raw.pop("brightness_temperature_uncertainty")
        flag = (flag if self._subset is None else flag[:, self._subset]).astype(np.int32)
        arrays = self._caller_arrays(raw, prep)
        if self.fallback == "physics":
            outside = (flag & _flags.ENVELOPE).any(axis=1) & prep.valid
            if outside.any():
                self._recompute_with_physics(prep, outside, arrays, jacobian)
                flag[outside] |= _flags.PHYSICS_FALLBACK
        invalid = ~prep.valid
        if invalid.any():
            flag[invalid] |= _flags.INVALID_INPUT
            for values in arrays.values():
                values[invalid] = np.nan
        flag[prep.supersaturated] |= _flags.SUPERSATURATED
        sigma = np.array(sigma if self._subset is None else sigma[:, self._subset], dtype=np.float64)
        sigma[(flag & _flags.PHYSICS_FALLBACK) != 0] = 0.0  # the physics' own values
        sigma[~prep.valid] = np.nan
        out = _physics.label_outputs(arrays, dataset, self.channels, flag)
        out["brightness_temperature_uncertainty"] = xr.Variable(("profile", "channel"), sigma,
                                                                dict(self._extra_outputs[0][1]))
        if prep.problems:
            out.attrs["invalid_input_summary"] = "; ".join(prep.problems)
        return out

    def _recompute_with_physics(self, prep, rows, arrays, jacobian):
        exact = _physics.transfer(
            self.instrument,
            prep.pressure_hpa[rows],
            prep.air_temperature[rows],
            prep.specific_humidity[rows],
            prep.surface_temperature[rows],
            prep.surface_emissivity[rows],
            prep.sensor_zenith_angle[rows],
            jacobian=jacobian,
        )
        flipped = prep.flipped[rows]  # physics returns surface-first levels; arrays hold the caller's
        for name, values in exact.items():
            if values.ndim == 3 and flipped.any():
                values[flipped] = values[flipped][..., ::-1]
            arrays[name][rows] = values
