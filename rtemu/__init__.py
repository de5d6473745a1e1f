"""rtemu: fast, audited emulators of a clear-sky radiance observation operator.

The public API, grouped by stage (physics -> teachers -> sampling -> training -> runtime -> audit ->
assimilation). Names of later stages are imported on first use, so that ``import rtemu``
and the command line start quickly; everything not listed here is internal.
"""

from __future__ import annotations

import importlib

__version__ = "0.2.0"

from rtemu import flags, physics
from rtemu.instrument import AbsorptionTables, Band, Channel, Instrument, list_instruments, load_instrument

_LAZY = {
    # teachers
    "Teacher": "rtemu.teacher",
    "load_teacher": "rtemu.teacher",
    # sampling
    "draw_states": "rtemu.sampling",
    "sample_to_netcdf": "rtemu.sampling",
    "default_pressure_grid": "rtemu.atmosphere",
    # model levels and terrain
    "LevelMap": "rtemu.levels",
    "regrid_profiles": "rtemu.levels",
    "regrid_tangent_linear": "rtemu.levels",
    "regrid_adjoint": "rtemu.levels",
    # training and export
    "train_to_onnx": "rtemu.export",
    "load_recipe": "rtemu.training",
    "list_recipes": "rtemu.training",
    "read_bundle": "rtemu.bundle",
    "sign_bundle": "rtemu.bundle",
    "BundleError": "rtemu.bundle",
    # runtime
    "PhysicalOperator": "rtemu.runtime",
    "EmulatedOperator": "rtemu.runtime",
    "simulate_file": "rtemu.streaming",
    # audit
    "run_audit": "rtemu.audit",
    # demo
    "run_demo": "rtemu.demo",
    # line spectroscopy (teachers)
    "LineByLineOperator": "rtemu.spectroscopy",
    "build_correlated_k": "rtemu.spectroscopy",
}
_LAZY_MODULES = ("assim", "atmosphere", "levels", "teacher", "sampling", "training", "bundle", "runtime", "audit",
                 "spectroscopy")

__all__ = [
    "__version__",
    # instruments and physics
    "AbsorptionTables",
    "Band",
    "Channel",
    "Instrument",
    "list_instruments",
    "load_instrument",
    "physics",
    "flags",
    "atmosphere",
    # teachers: the models an emulator learns from
    "Teacher",
    "load_teacher",
    "teacher",
    # sampling
    "draw_states",
    "sample_to_netcdf",
    "default_pressure_grid",
    # model levels and terrain
    "levels",
    "LevelMap",
    "regrid_profiles",
    "regrid_tangent_linear",
    "regrid_adjoint",
    # training and export
    "train_to_onnx",
    "load_recipe",
    "list_recipes",
    "read_bundle",
    "sign_bundle",
    "BundleError",
    # runtime
    "PhysicalOperator",
    "EmulatedOperator",
    "simulate_file",
    # audit
    "run_audit",
    # assimilation
    "assim",
    # demo
    "run_demo",
    # line spectroscopy
    "spectroscopy",
    "LineByLineOperator",
    "build_correlated_k",
]


def __getattr__(name):
    if name in _LAZY:
        return getattr(importlib.import_module(_LAZY[name]), name)
    if name in _LAZY_MODULES:
        return importlib.import_module(f"rtemu.{name}")
    raise AttributeError(f"module 'rtemu' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(__all__))
