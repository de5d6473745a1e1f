"""The teacher: whichever model an emulator learns from, and the checks on what it returns.

rtemu's own physics (:class:`rtemu.PhysicalOperator`) is one teacher; any object in the
:class:`Teacher` protocol is another. Sampling and the audit run a teacher only through
:func:`checked_simulate`, which validates the result against the physics output schema, so a
model that returns something malformed stops with an error naming the teacher, the variable
and the rule instead of writing a wrong training set.

A teacher is named on the command line as ``MODULE:NAME`` (:func:`load_teacher`): ``NAME`` in
module ``MODULE`` is a teacher object or a zero-argument callable returning one. Parallel
sampling sends that text, not the object, to its worker processes, which import it again.
"""

from __future__ import annotations

import importlib
import os
import sys
from typing import Protocol, Sequence, runtime_checkable

import numpy as np
import xarray as xr

from rtemu import __version__
from rtemu import flags as _flags
from rtemu import physics as _physics
from rtemu._checks import input_names, prepare_inputs
from rtemu._units import CANONICAL_UNITS, unit_conversion
from rtemu.instrument import Instrument

__all__ = [
    "Teacher",
    "ImportedTeacher",
    "PHYSICS_TEACHER",
    "load_teacher",
    "check_teacher",
    "teacher_identity",
    "checked_simulate",
]

#: (name, version) recorded for rtemu's own physical model.
PHYSICS_TEACHER = ("rtemu.physics", __version__)

_LEVEL_OUTPUTS = ("jacobian_air_temperature", "jacobian_specific_humidity")


@runtime_checkable
class Teacher(Protocol):
    """Any model an emulator can learn from.

    Attributes
    ----------
    channels : sequence of str
        Channel ids, in the order of the ``channel`` axis of the outputs (the ids of
        ``instrument``, in its order).
    instrument : rtemu.Instrument
        Channel positions and noise (sampling draws microwave or infrared emissivities
        from the positions; the audit judges errors against the noise).

    Optional attributes ``name`` and ``version`` (str) identify the model in the files it
    makes; without them its class and its package's ``__version__`` are recorded.
    """

    @property
    def channels(self) -> Sequence[str]: ...

    @property
    def instrument(self) -> Instrument: ...

    def simulate(self, dataset: xr.Dataset, jacobian: bool = False) -> xr.Dataset:
        """Brightness temperatures (and Jacobians) of ``dataset``.

        ``dataset`` follows the input schema of :func:`rtemu.physics.simulate`; rtemu
        passes only profiles that pass its input rules, in canonical units (hPa, K,
        kg kg-1, 1, degree), with a ``channel`` coordinate in this order. The result
        holds ``brightness_temperature`` (profile, channel) [K] and, with ``jacobian``,
        ``jacobian_air_temperature`` and ``jacobian_specific_humidity`` (profile, channel,
        level) [K K-1] and [K (kg kg-1)-1] in the dataset's level order,
        ``jacobian_surface_temperature`` [K K-1] and ``jacobian_surface_emissivity``
        [K] (profile, channel). NaN marks a profile the model refuses. A
        ``quality_flag`` (profile, channel) of :mod:`rtemu.flags` bits is optional.

        The dataset may carry ``surface_air_pressure`` (profile) [hPa], the ground
        (drawn states over terrain have it): the model must compute on the column above
        it (:func:`rtemu.levels.cut_at_surface` gives rtemu's rule) with zero Jacobians
        below it, or return NaN for those profiles. A model that ignores it learns its
        emulator wrong numbers over terrain.
        """
        ...


class ImportedTeacher:
    """A teacher imported from a ``MODULE:NAME`` text, which worker processes import again.

    Delegates ``channels``, ``instrument``, ``simulate`` and the identity to the object
    ``NAME`` gave (``teacher``).
    """

    def __init__(self, spec: str, teacher, path: str | None = None):
        self.spec = spec
        self.teacher = teacher
        self.path = path  # the directory the module was imported from, for worker processes

    @property
    def channels(self):
        return self.teacher.channels

    @property
    def instrument(self):
        return self.teacher.instrument

    def simulate(self, dataset, jacobian=False):
        return self.teacher.simulate(dataset, jacobian=jacobian)

    def __repr__(self):
        return f"ImportedTeacher({self.spec!r})"


def load_teacher(spec: str, path: str | os.PathLike | None = None) -> ImportedTeacher:
    """Import the teacher named ``MODULE:NAME`` and check it.

    Parameters
    ----------
    spec : str
        ``MODULE:NAME``: ``MODULE`` a dotted module name, ``NAME`` an attribute of it (dots
        allowed) that is a teacher object or a zero-argument callable returning one.
    path : str or os.PathLike, optional
        Directory searched first for ``MODULE`` (default: the current directory).

    Raises
    ------
    ValueError
        A one-line message naming what failed: the form of ``spec``, the import (with the
        module's own error), the attribute, the call, or the protocol.
    """
    text = str(spec).strip()
    module_name, sep, attribute = text.partition(":")
    if not sep or not module_name or not attribute or ":" in attribute:
        raise ValueError(f"teacher {text!r}: expected MODULE:NAME (e.g. mymodel:teacher)")
    directory = os.path.abspath(path if path is not None else os.getcwd())
    if directory not in sys.path:
        sys.path.insert(0, directory)
    try:
        module = importlib.import_module(module_name)
    except Exception as exc:  # the user's module may raise anything while importing
        raise ValueError(f"teacher {text!r}: cannot import module {module_name!r} "
                         f"({type(exc).__name__}: {exc})") from None
    obj = module
    for part in attribute.split("."):
        if not hasattr(obj, part):
            raise ValueError(f"teacher {text!r}: module {module_name!r} has no attribute {attribute!r}")
        obj = getattr(obj, part)
    if isinstance(obj, type) or (not isinstance(obj, Teacher) and callable(obj)):
        try:
            obj = obj()
        except Exception as exc:
            raise ValueError(f"teacher {text!r}: calling {attribute}() failed "
                             f"({type(exc).__name__}: {exc})") from None
    return ImportedTeacher(text, check_teacher(obj, f"teacher {text!r}"), directory)


def check_teacher(teacher, source: str = "teacher"):
    """Return ``teacher`` if it follows the :class:`Teacher` protocol, else raise ValueError.

    Rules: ``simulate`` is callable, ``instrument`` is an :class:`rtemu.Instrument`,
    ``channels`` equals the instrument's channel ids in their order.
    """
    missing = [a for a in ("channels", "instrument", "simulate") if not hasattr(teacher, a)]
    if missing:
        raise ValueError(f"{source}: {type(teacher).__name__} object has no {', '.join(missing)} "
                         "(rule: a teacher has channels, instrument and simulate(dataset, jacobian=False))")
    if not callable(teacher.simulate):
        raise ValueError(f"{source}: simulate is not callable")
    if not isinstance(teacher.instrument, Instrument):
        raise ValueError(f"{source}: instrument is a {type(teacher.instrument).__name__}, not an "
                         "rtemu.Instrument (rule: load one with rtemu.load_instrument)")
    channels = tuple(str(c) for c in teacher.channels)
    if channels != teacher.instrument.channel_ids:
        raise ValueError(f"{source}: channels {list(channels)} differ from its instrument's "
                         f"{list(teacher.instrument.channel_ids)} (rule: the same ids in the same order)")
    return teacher


def teacher_identity(teacher) -> tuple[str, str]:
    """(name, version) of a teacher, as training sets record them.

    ``teacher.name`` and ``teacher.version`` when the object has them; otherwise the
    qualified class name and the ``__version__`` of its top-level package (``"unknown"``
    without one). An :class:`ImportedTeacher` answers for the object it imported.
    """
    if isinstance(teacher, ImportedTeacher):
        teacher = teacher.teacher
    cls = type(teacher)
    name = getattr(teacher, "name", None)
    if not isinstance(name, str) or not name:
        name = f"{cls.__module__}.{cls.__qualname__}"
    version = getattr(teacher, "version", None)
    if not isinstance(version, str) or not version:
        package = sys.modules.get(cls.__module__.partition(".")[0])
        version = getattr(package, "__version__", None)
        version = version if isinstance(version, str) and version else "unknown"
    return name, version


def checked_simulate(teacher, dataset: xr.Dataset, jacobian: bool = False, *,
                     require_jacobian: bool = True, source: str | None = None) -> xr.Dataset:
    """Run ``teacher.simulate`` on the valid profiles of ``dataset`` and check the result.

    The teacher receives the inputs in canonical units (hPa, K, kg kg-1, 1, degree; with
    ``units`` attributes saying so), in the dataset's level order, with a ``channel``
    coordinate in its own channel order. Profiles that break rtemu's input rules are not
    passed to it: they get NaN and the ``invalid_input`` flag, as from the physics. On the
    others the result must follow the physics output schema (see :class:`Teacher`); a
    non-finite value in an entry whose inputs are valid is the teacher refusing that
    state: the entry (all its outputs) is NaN with the ``invalid_input`` flag (training
    leaves flagged entries out), and the count is in the attribute ``teacher_refused``.

    Parameters
    ----------
    teacher : Teacher
    dataset : xarray.Dataset
        Inputs in the schema of :func:`rtemu.physics.simulate`.
    jacobian : bool
        Ask for the four Jacobians.
    require_jacobian : bool
        With ``jacobian``: a missing Jacobian is an error (True) or left out (False).
    source : str, optional
        How errors name the teacher (default its identity).

    Returns
    -------
    xarray.Dataset
        The physics output schema with ``quality_flag``: teacher bits | input bits.

    Raises
    ------
    ValueError
        ``simulate`` raised (the message names its error), or the result is not a
        Dataset, lacks a variable, has other dims, sizes or channel ids, or holds a
        brightness temperature <= 0 K or non-numeric values.
    """
    channels = tuple(str(c) for c in teacher.channels)
    source = source or "teacher {} {}".format(*teacher_identity(teacher))
    prep = prepare_inputs(dataset, channels, errors="mask")
    n, nlev = dataset.sizes["profile"], dataset.sizes["level"]
    rows = np.flatnonzero(prep.valid)
    flag = np.where(prep.valid, 0, _flags.INVALID_INPUT) | np.where(prep.supersaturated, _flags.SUPERSATURATED, 0)
    flag = np.repeat(flag.astype(np.int32)[:, None], len(channels), axis=1)
    names = ("brightness_temperature",) + (_physics.JACOBIAN_NAMES if jacobian else ())
    arrays = {name: np.full((n, len(channels), nlev) if name in _LEVEL_OUTPUTS else (n, len(channels)), np.nan)
              for name in names}
    refused = 0
    if rows.size:
        part = _as_teacher_input(dataset if rows.size == n else dataset.isel(profile=rows), channels)
        try:
            result = teacher.simulate(part, jacobian=jacobian)
        except Exception as exc:  # the model's own error, as one line for the command line
            raise ValueError(f"{source}: simulate failed ({type(exc).__name__}: {exc})") from exc
        values, teacher_flag = _check_result(result, source, channels, rows.size, nlev, jacobian, require_jacobian)
        bad = np.zeros((rows.size, len(channels)), dtype=bool)
        for name, v in values.items():
            bad |= ~np.isfinite(v).reshape(rows.size, len(channels), -1).all(axis=2)
        arrays = {name: arrays[name] for name in values}  # without the Jacobians a teacher left out
        for name, v in values.items():
            v = np.where(bad.reshape(bad.shape + (1,) * (v.ndim - 2)), np.nan, v)
            arrays[name][rows] = v
        flag[rows] |= teacher_flag | np.where(bad, _flags.INVALID_INPUT, 0).astype(np.int32)
        refused = int(bad.sum())
    elif jacobian and not require_jacobian:
        arrays = {"brightness_temperature": arrays["brightness_temperature"]}
    out = _physics.label_outputs(arrays, dataset, channels, flag)
    out.attrs["teacher_refused"] = refused
    if prep.problems:
        out.attrs["invalid_input_summary"] = "; ".join(prep.problems)
    return out


def _as_teacher_input(dataset: xr.Dataset, channels) -> xr.Dataset:
    """``dataset`` in canonical units (hPa, K, kg kg-1, 1, degree), channels in the teacher's order."""
    converted = {}
    for name in input_names(dataset):
        var = dataset.variables[name]
        scale, offset = unit_conversion(name, var.attrs.get("units"))
        if (scale, offset) != (1.0, 0.0) or var.attrs.get("units") != CANONICAL_UNITS[name]:
            values = np.asarray(var.values, dtype=float) * scale + offset
            converted[name] = xr.Variable(var.dims, values, {**var.attrs, "units": CANONICAL_UNITS[name]})
    if converted:
        dataset = dataset.assign(converted)
    if "channel" in dataset.coords and tuple(str(c) for c in dataset["channel"].values) != channels:
        dataset = dataset.sel(channel=list(channels))
    return dataset


def _check_result(result, source, channels, n, nlev, jacobian, require_jacobian) -> tuple[dict, np.ndarray]:
    """Output arrays (profile, channel[, level]) as float64 and the teacher's flag bits."""
    if not isinstance(result, xr.Dataset):
        raise ValueError(f"{source}: simulate returned a {type(result).__name__} (rule: an xarray.Dataset)")
    expected = {"profile": n, "channel": len(channels), "level": nlev}
    names = ["brightness_temperature"]
    if jacobian:
        present = [name for name in _physics.JACOBIAN_NAMES if name in result.variables]
        missing = [name for name in _physics.JACOBIAN_NAMES if name not in present]
        if missing and require_jacobian:
            raise ValueError(f"{source}: simulate(jacobian=True) returned no {', '.join(missing)} "
                             f"(rule: all of {list(_physics.JACOBIAN_NAMES)})")
        names += present
    if "brightness_temperature" not in result.variables:
        raise ValueError(f"{source}: simulate returned no brightness_temperature (rule: a variable "
                         "brightness_temperature (profile, channel) [K])")
    if "channel" in result.coords:
        got = tuple(str(c) for c in np.asarray(result["channel"].values).ravel())
        if got != channels:
            raise ValueError(f"{source}: channel coordinate {list(got)} differs from its channels "
                             f"{list(channels)} (rule: the same ids in the same order)")
    values = {}
    for name in names:
        dims = ("profile", "channel", "level") if name in _LEVEL_OUTPUTS else ("profile", "channel")
        values[name] = _checked_array(result[name], name, dims, expected, source)
    bt = values["brightness_temperature"]
    if (bt <= 0.0).any():
        i, c = (int(k[0]) for k in np.nonzero(bt <= 0.0))
        raise ValueError(f"{source}: brightness_temperature {float(bt[i, c]):g} K in channel {channels[c]!r} of "
                         f"returned profile {i} (rule: > 0 K)")
    teacher_flag = np.zeros((n, len(channels)), dtype=np.int32)
    if "quality_flag" in result.variables:
        raw = _checked_array(result["quality_flag"], "quality_flag", ("profile", "channel"), expected, source,
                             numeric=False)
        if raw.dtype.kind not in "iu" or (raw < 0).any():
            raise ValueError(f"{source}: quality_flag is {raw.dtype} (rule: non-negative integer bits of "
                             "rtemu.flags)")
        teacher_flag = raw.astype(np.int32)
    return values, teacher_flag


def _checked_array(da, name, dims, expected, source, numeric=True) -> np.ndarray:
    if set(da.dims) != set(dims) or len(da.dims) != len(dims):
        raise ValueError(f"{source}: {name} has dims {da.dims} (rule: {dims})")
    sizes = {d: da.sizes[d] for d in dims}
    wrong = {d: s for d, s in sizes.items() if s != expected[d]}
    if wrong:
        d = next(iter(wrong))
        raise ValueError(f"{source}: {name} has {wrong[d]} entries along {d!r} (rule: {expected[d]}, as "
                         "the input profiles, levels and the teacher's channels)")
    values = np.asarray(da.transpose(*dims).values)
    if not numeric:
        return values
    if values.dtype.kind not in "fiu":
        raise ValueError(f"{source}: {name} is {values.dtype} (rule: numbers)")
    return values.astype(np.float64)
