"""Assimilation of radiances with any rtemu observation operator: 1D-Var and ensemble updates.

The last stage of rtemu: it consumes an observation operator through the protocol below
and uses only the physical limits of the input checks and the moisture functions of
:mod:`rtemu.atmosphere` from the earlier stages.

Operator protocol
-----------------
An operator is any object with

* ``instrument``: with ``channel_ids`` (tuple of str) and ``noise_k`` ([C] [K]);
* ``channels``: tuple of the channel ids it simulates;
* ``simulate(dataset, jacobian=False) -> xarray.Dataset`` returning
  ``brightness_temperature`` (profile, channel) [K] and ``quality_flag`` (profile,
  channel) int (nonzero: do not use), and with ``jacobian=True``
  ``jacobian_air_temperature``, ``jacobian_specific_humidity`` (profile, channel, level)
  [K K-1], [K (kg kg-1)-1], ``jacobian_surface_temperature`` [K K-1] and
  ``jacobian_surface_emissivity`` [K] (profile, channel).

The physical model behind :mod:`rtemu.physics` and the emulator runtime both qualify.

Contents
--------
* :func:`var1d` -> :class:`Var1DResult`: 1D-Var (optimal estimation) of a batch of columns.
* :func:`ensemble_update` -> :class:`EnsembleResult`: perturbed-observation EnKF or
  symmetric ETKF; :func:`sample_ensemble` draws members from a background and B.
* :func:`estimate_background_covariance`: B in control space from a sample of states,
  shrunk toward its diagonal; :func:`shrunk_covariance` is its numpy core.
* :func:`observation_error_variance`: diagonal R from the instrument noise and the
  emulator error.
* :class:`ControlLayout`: the control vector (T, ln q, Ts[, emissivity]).
* :mod:`rtemu.assim.qc`: quality-control reason codes.
"""

from rtemu.assim import qc
from rtemu.assim._control import ControlLayout, humidity_bounds
from rtemu.assim._operator import observation_error_variance
from rtemu.assim.covariance import (
    estimate_background_covariance,
    shrinkage_intensity_to_diagonal,
    shrunk_covariance,
)
from rtemu.assim.ensemble import (
    DEFAULT_ENSEMBLE_SIZE,
    EnsembleResult,
    ensemble_update,
    perturbed_observation_update,
    sample_ensemble,
    transform_update,
)
from rtemu.assim.var1d import STATUS_MEANINGS, Var1DResult, var1d

__all__ = [
    # 1D-Var
    "var1d",
    "Var1DResult",
    "STATUS_MEANINGS",
    # ensemble
    "ensemble_update",
    "EnsembleResult",
    "sample_ensemble",
    "perturbed_observation_update",
    "transform_update",
    "DEFAULT_ENSEMBLE_SIZE",
    # error covariances
    "estimate_background_covariance",
    "shrunk_covariance",
    "shrinkage_intensity_to_diagonal",
    "observation_error_variance",
    # control vector and limits
    "ControlLayout",
    "humidity_bounds",
    # quality control
    "qc",
]
