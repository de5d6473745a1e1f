"""Property tests (hypothesis) over the operators' inputs.

* no crash other than the documented ValueError, whatever values arrive;
* the invalid_input flag is set exactly where a physical rule is broken, and outputs are
  finite exactly where it is not;
* the emulator's outside_training_bounds flag is set exactly when a scalar input leaves its
  stored training bounds, and always when a level value above the ground leaves its
  per-level bounds.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from rtemu import flags
from rtemu.runtime import EmulatedOperator, PhysicalOperator
from rtemu.sampling import draw_states

SETTINGS = settings(max_examples=40, deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture])
VARIABLES = ("air_temperature", "specific_humidity", "surface_temperature", "surface_emissivity",
             "sensor_zenith_angle")
ANY_FLOAT = st.one_of(st.floats(allow_nan=True, allow_infinity=True, width=32),
                      st.floats(-500, 500), st.floats(0, 0.2))


@pytest.fixture(scope="module")
def emulator(tiny_bundle):
    return EmulatedOperator.load(tiny_bundle)


@pytest.fixture(scope="module")
def base(emulator, demo_instrument):
    ds = draw_states(3, seed=5, pressure_hpa=emulator.pressure_hpa, channels=demo_instrument)
    ds = ds[["air_pressure", "surface_air_pressure", *VARIABLES]].load()
    # in the envelope: no bit set but large_uncertainty, which these tests do not check (the
    # tiny bundle's sigma exceeds its recipe threshold on one channel of one of these profiles)
    assert (emulator.simulate(ds)["quality_flag"].values & ~flags.LARGE_UNCERTAINTY == 0).all()
    return ds


def _physically_valid(name, value):
    if not np.isfinite(value):
        return False
    rules = {"air_temperature": (100, 400), "surface_temperature": (100, 400),
             "specific_humidity": (0, 0.1), "surface_emissivity": (0, 1), "sensor_zenith_angle": (0, 85)}
    lo, hi = rules[name]
    return lo <= value < hi if name == "specific_humidity" else lo <= value <= hi


@pytest.mark.parametrize("which", ["physical", "emulated"])
@SETTINGS
@given(name=st.sampled_from(VARIABLES), level=st.integers(0, 59), value=ANY_FLOAT)
def test_invalid_flag_exact_and_outputs_finite(which, name, level, value, base, emulator, demo_instrument):
    op = emulator if which == "emulated" else PhysicalOperator(demo_instrument)
    ds = base.copy(deep=True)
    index = (1, level % ds[name].shape[1]) if ds[name].ndim == 2 else (1,)
    ds[name].values[index] = value
    out = op.simulate(ds, jacobian=True)
    qf, bt = out["quality_flag"].values, out["brightness_temperature"].values
    invalid = not _physically_valid(name, float(np.float64(value)))
    assert bool((qf[1] & flags.INVALID_INPUT).all()) == invalid
    assert not (qf[[0, 2]] & flags.INVALID_INPUT).any()
    assert np.isfinite(bt[1]).all() == (not invalid)
    assert np.isfinite(bt[[0, 2]]).all()
    assert np.isfinite(out["jacobian_air_temperature"].values[[0, 2]]).all()


@SETTINGS
@given(zenith=st.floats(0, 85), emissivity=st.floats(0, 1), channel=st.integers(0, 15))
def test_bounds_flag_exact_for_scalar_inputs(zenith, emissivity, channel, base, emulator):
    env = emulator.envelope
    ds = base.copy(deep=True)
    ds["sensor_zenith_angle"].values[0] = zenith
    ds["surface_emissivity"].values[0, channel] = emissivity
    qf = emulator.simulate(ds)["quality_flag"].values[0]
    z_out = not (env["sensor_zenith_angle"]["lower"] <= np.float32(zenith) <= env["sensor_zenith_angle"]["upper"])
    e_lo = env["surface_emissivity"]["lower"][channel]
    e_hi = env["surface_emissivity"]["upper"][channel]
    e_out = not (e_lo <= np.float32(emissivity) <= e_hi)
    bounds = (qf & flags.OUTSIDE_TRAINING_BOUNDS) > 0
    expected = np.full(qf.shape, z_out)
    expected[channel] |= e_out
    np.testing.assert_array_equal(bounds, expected)


@SETTINGS
@given(level=st.integers(0, 63), excess=st.floats(0.5, 60.0), up=st.booleans())
def test_bounds_flag_when_a_level_leaves_its_range(level, excess, up, base, emulator):
    """A level above the ground reaches the emulator as it is: out of its range, it is flagged.
    A level deeper than the one bracketing the ground is cut off (format 7 learns terrain,
    rtemu.levels.cut_at_surface): only the physical rule (invalid_input) still sees it."""
    env = emulator.envelope["air_temperature"]
    value = env["upper"][level] + excess if up else env["lower"][level] - excess
    ds = base.copy(deep=True)
    ds["air_temperature"].values[2, level] = value
    qf = emulator.simulate(ds)["quality_flag"].values[2]
    p = np.asarray(ds["air_pressure"].values)  # surface first
    ps = float(ds["surface_air_pressure"].values[2])
    if not 100.0 <= value <= 400.0:
        assert ((qf & flags.INVALID_INPUT) > 0).all()
    elif p[level] < ps:
        assert ((qf & flags.OUTSIDE_TRAINING_BOUNDS) > 0).all()
    elif level + 1 < p.size and p[level + 1] >= ps:  # under the level that brackets the ground
        np.testing.assert_array_equal(qf, emulator.simulate(base)["quality_flag"].values[2])
