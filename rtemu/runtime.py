"""Observation operators for assimilation: one protocol, two implementations.

:class:`PhysicalOperator` wraps the physical model; :class:`EmulatedOperator` serves an
rtemu ONNX bundle through onnxruntime. Both offer

* ``simulate(dataset, jacobian=False) -> xarray.Dataset`` (schema of
  :func:`rtemu.physics.simulate`, with ``quality_flag``),
* ``tangent_linear(dataset, perturbation)`` (J dx) and ``adjoint(dataset, bt_perturbation)``
  (J^T dy),
* ``instrument`` and ``channels``.

Profiles on other levels (a model's, shared or per profile) are carried onto the
operator's grid with the ``grid_hpa`` (physical) or ``regrid`` (emulated) option, linear
in ln p (:class:`rtemu.levels.LevelMap`); Jacobians, tangent-linear and adjoint products
then refer to the caller's levels.

A dask-backed dataset (chunked along ``profile``) stays lazy: each chunk is computed
independently with :func:`xarray.map_blocks`; the emulator keeps one onnxruntime session
per process, not one per chunk.
"""

from __future__ import annotations

import functools
import threading
from typing import Literal

import numpy as np
import xarray as xr

from rtemu import flags as _flags
from rtemu import physics as _physics
from rtemu._checks import onto_grid, prepare_inputs
from rtemu.instrument import Instrument, load_instrument
from rtemu.levels import GRID_TOLERANCE_HPA, transfer_above_ground
from rtemu.teacher import PHYSICS_TEACHER

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
    grid_hpa : array_like [K], optional
        A pressure grid [hPa] to compute on: profiles on any levels are carried onto it
        (linear in ln p, :func:`rtemu.levels.regrid_profiles`, the source's surface as
        ``surface_air_pressure``) and the Jacobians come back on the caller's levels.
        Default: compute on the caller's levels.
    """

    #: Its identity as a teacher (recorded in the training sets it makes).
    name, version = PHYSICS_TEACHER

    def __init__(self, instrument, *, errors: ErrorMode = "mask", block_size: int = _physics.DEFAULT_BLOCK_SIZE,
                 grid_hpa=None):
        self.instrument = load_instrument(instrument)
        self.errors = errors
        self.block_size = block_size
        self.grid_hpa = None if grid_hpa is None else np.asarray(grid_hpa, dtype=float)
        self._grid_surface_first = None
        if self.grid_hpa is not None:
            grid = self.grid_hpa
            if grid.ndim != 1 or grid.size < 2 or not np.all(grid > 0) or not (
                    np.all(np.diff(grid) < 0) or np.all(np.diff(grid) > 0)):
                raise ValueError("grid_hpa: not a grid (rule: at least two positive, strictly monotonic "
                                 "pressures [hPa])")
            self._grid_surface_first = grid if grid[0] > grid[-1] else grid[::-1]

    def __repr__(self):
        return f"PhysicalOperator({self.instrument.name!r}, {len(self.channels)} channels)"

    def _simulate_eager(self, dataset, jacobian):
        return _physics._simulate(self.instrument, dataset, jacobian, self.errors, self.block_size,
                                  self._grid_surface_first)


# -- emulator -----------------------------------------------------------------------------
_REGRID_HINT = ("profiles on other levels: EmulatedOperator(..., regrid=True) or 'rtemu simulate --regrid' "
                "carries them onto the grid, linear in ln p, and returns Jacobians on their levels")
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
    threads : int or None
        onnxruntime intra-op threads (default 1, see docs/decisions.md; None:
        onnxruntime's choice).
    fallback : {None, "physics"}
        * ``None``: flagged profiles keep emulated values (and their flags).
        * ``"physics"``: profiles outside the training envelope (flag bits
          ``outside_training_bounds``, ``novel_state``, ``large_uncertainty`` or
          ``unusual_tropopause``, :data:`rtemu.flags.ENVELOPE`) are recomputed with the physical
          model and get the ``physics_fallback`` bit. Only for a bundle whose teacher is
          rtemu's physics (:attr:`rtemu.bundle.Bundle.teacher`).
    errors : {"mask", "raise"}
        * ``"mask"`` (default): invalid profiles get NaN outputs and ``invalid_input``.
        * ``"raise"``: invalid input raises ValueError.
    grid_tolerance_hpa : float
        Largest accepted difference between the dataset's and the bundle's levels [hPa].
    regrid : bool
        * ``False`` (default): profiles must be on the bundle's grid.
        * ``True``: profiles on any levels (shared or per profile) are carried onto the
          bundle's grid, linear in ln p (:func:`rtemu.levels.regrid_profiles`), and the
          Jacobians come back on the caller's levels. The source's surface (its
          ``surface_air_pressure``, or its lowest level) becomes the ground.

    ``surface_air_pressure`` (profile) [hPa] puts the ground inside the column (terrain,
    the semantics of :func:`rtemu.levels.cut_at_surface`); without it the ground is the
    bundle's bottom level.
    key : str, os.PathLike or bytes, optional
        Key file (or secret) of a keyed signature: the bundle must carry an HMAC-SHA256
        signature that verifies with it (see :func:`rtemu.bundle.sign_bundle`). Without
        it only the unkeyed digests are checked, which detect corruption, not authorship.
    """

    _extra_outputs = (("brightness_temperature_uncertainty", _UNCERTAINTY_ATTRS),)

    def __init__(self, *, path, channels=None, batch_size: int = 4096, threads: int | None = 1,
                 fallback: Literal[None, "physics"] = None, errors: ErrorMode = "mask",
                 grid_tolerance_hpa: float = GRID_TOLERANCE_HPA, regrid: bool = False, key=None):
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
        self.regrid = bool(regrid)
        self.bundle = _bundle.read_bundle(self.path, key=key)
        if fallback == "physics" and self.bundle.teacher[0] != PHYSICS_TEACHER[0]:
            raise ValueError(f"fallback='physics': {self.path} emulates teacher {self.bundle.teacher[0]!r}, not "
                             "rtemu's physics (rule: the fallback recomputes with rtemu's physics, so only for "
                             "emulators of it)")
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
                f"{self._grid_surface_first.size} (rule: the bundle's fixed pressure grid; {_REGRID_HINT})"
            )
        bad = (diff > self.grid_tolerance_hpa).any(axis=1) & prep.valid
        if bad.any():
            first = int(np.flatnonzero(bad)[0])
            raise ValueError(
                f"air_pressure: levels differ from the emulator's grid by up to "
                f"{diff[first].max():.4g} hPa (rule: within {self.grid_tolerance_hpa:g} hPa of "
                f"the bundle's grid; {_REGRID_HINT}); first offending profile index {first}"
            )

    def _surface_pressure(self, prep) -> np.ndarray:
        """ps [hPa] (N,) float32: the checked ``surface_air_pressure`` (terrain), else the
        grid's bottom pressure (no terrain)."""
        if prep.surface_air_pressure is None:
            return np.full(prep.air_temperature.shape[0], self._grid_surface_first[0], dtype=np.float32)
        return np.asarray(prep.surface_air_pressure, dtype=np.float32)

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
        caller = prepare_inputs(dataset, self.channels, errors=self.errors)
        if self.regrid:
            prep, levelmap = onto_grid(caller, self._grid_surface_first, self.errors, self.grid_tolerance_hpa)
        else:
            self._check_grid(caller)
            prep, levelmap = caller, None
        raw = self._run_session(prep, jacobian, self._surface_pressure(prep))
        flag = raw.pop("quality_flag")
        sigma = raw.pop("brightness_temperature_uncertainty")
        flag = (flag if self._subset is None else flag[:, self._subset]).astype(np.int32)
        arrays = self._caller_arrays(raw, prep)
        if self.fallback == "physics":
            outside = (flag & _flags.ENVELOPE).any(axis=1) & prep.valid
            if outside.any():
                self._recompute_with_physics(prep, outside, arrays, jacobian)
                flag[outside] |= _flags.PHYSICS_FALLBACK
        if levelmap is not None:  # Jacobians from the grid (surface first) to the caller's levels
            for name, values in arrays.items():
                if values.ndim == 3:
                    arrays[name] = caller.to_caller_order(levelmap.adjoint(values))
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
        ground = None if prep.surface_air_pressure is None else prep.surface_air_pressure[rows]
        exact = transfer_above_ground(
            functools.partial(_physics.transfer, self.instrument),
            prep.pressure_hpa[rows],
            prep.air_temperature[rows],
            prep.specific_humidity[rows],
            ground,
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
