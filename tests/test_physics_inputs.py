"""Bad input to the physical model: a clear ValueError (variable, rule, profile index) or,
with errors="mask", NaN outputs and the invalid_input quality flag.

The validity rules come from the issue: temperatures 100-400 K, 0 <= q < 0.1 kg kg-1,
0 <= emissivity <= 1, zenith 0-85 degree, pressure > 0 and strictly monotonic.
"""

from __future__ import annotations

import re

import numpy as np
import pytest
import xarray as xr

from rtemu import flags, physics
from rtemu._checks import INPUT_VARIABLES

BAD = 2  # index of the offending profile in the single-fault tests


@pytest.fixture
def profiles(small_profiles):
    return small_profiles(n=4, nlev=12, seed=21, per_profile_pressure=True)


def raises(demo_instrument, ds, *fragments, errors="raise"):
    with pytest.raises(ValueError) as info:
        physics.simulate(demo_instrument, ds, errors=errors)
    message = str(info.value)
    for fragment in fragments:
        assert re.search(fragment, message), f"{fragment!r} not in {message!r}"
    return message


def with_value(ds, name, index, value):
    out = ds.copy(deep=True)
    out[name].values[index] = value
    return out


# -- physical rules (raise) -------------------------------------------------------------------
@pytest.mark.parametrize("name", INPUT_VARIABLES)
@pytest.mark.parametrize("value", [np.nan, np.inf, -np.inf])
def test_non_finite(demo_instrument, profiles, name, value):
    index = (BAD, 5) if profiles[name].ndim == 2 else BAD
    ds = with_value(profiles, name, index, value)
    raises(demo_instrument, ds, f"^{name}: ", "non-finite", "finite", f"profile index {BAD}\\b")


def test_celsius_labelled_kelvin(demo_instrument, profiles):
    ds = profiles.copy(deep=True)
    ds["air_temperature"].values[BAD] -= 273.15  # degC values, but units say K
    raises(demo_instrument, ds, "^air_temperature: ", "outside 100-400 K", "Celsius", f"profile index {BAD}\\b")


@pytest.mark.parametrize("name", ["air_temperature", "surface_temperature"])
@pytest.mark.parametrize("value", [99.9, 400.1])
def test_temperature_out_of_range(demo_instrument, profiles, name, value):
    index = (BAD, 3) if name == "air_temperature" else BAD
    raises(demo_instrument, with_value(profiles, name, index, value), f"^{name}: ", "outside 100-400 K",
           f"profile index {BAD}\\b")


@pytest.mark.parametrize("name", ["air_temperature", "surface_temperature"])
@pytest.mark.parametrize("value", [100.0, 400.0])
def test_temperature_range_is_inclusive(demo_instrument, profiles, name, value):
    index = (BAD, 11) if name == "air_temperature" else BAD
    out = physics.simulate(demo_instrument, with_value(profiles, name, index, value))
    assert np.all(np.isfinite(out["brightness_temperature"]))


@pytest.mark.parametrize("value", [-1e-9, 0.1, 0.25])
def test_specific_humidity_out_of_range(demo_instrument, profiles, value):
    raises(demo_instrument, with_value(profiles, "specific_humidity", (BAD, 0), value),
           "^specific_humidity: ", r"outside \[0, 0.1\) kg kg-1", r"0 <= q < 0.1", f"profile index {BAD}\\b")


@pytest.mark.parametrize("value", [0.0, 0.0999])
def test_specific_humidity_limits_accepted(demo_instrument, profiles, value):
    out = physics.simulate(demo_instrument, with_value(profiles, "specific_humidity", (BAD, 0), value))
    assert np.all(np.isfinite(out["brightness_temperature"]))


@pytest.mark.parametrize("value", [-0.01, 1.01])
@pytest.mark.parametrize("per_channel", [True, False])
def test_emissivity_out_of_range(demo_instrument, small_profiles, value, per_channel):
    ds = small_profiles(n=4, nlev=10, emissivity_per_channel=per_channel)
    index = (BAD, 3) if per_channel else BAD
    raises(demo_instrument, with_value(ds, "surface_emissivity", index, value), "^surface_emissivity: ",
           r"outside \[0, 1\]", f"profile index {BAD}\\b")


@pytest.mark.parametrize("value", [-0.5, 85.01, 90.0])
def test_zenith_out_of_range(demo_instrument, profiles, value):
    raises(demo_instrument, with_value(profiles, "sensor_zenith_angle", BAD, value), "^sensor_zenith_angle: ",
           r"outside \[0, 85\] degree", f"profile index {BAD}\\b")


def test_zenith_limits_accepted(demo_instrument, profiles):
    ds = profiles.copy(deep=True)
    ds["sensor_zenith_angle"].values[:] = [0.0, 85.0, 0.0, 85.0]
    assert np.all(np.isfinite(physics.simulate(demo_instrument, ds)["brightness_temperature"]))


def test_pressure_not_monotonic(demo_instrument, profiles):
    ds = profiles.copy(deep=True)
    ds["air_pressure"].values[BAD, [4, 5]] = ds["air_pressure"].values[BAD, [5, 4]]
    raises(demo_instrument, ds, "^air_pressure: ", "not strictly monotonic", f"profile index {BAD}\\b")


def test_pressure_repeated_level(demo_instrument, profiles):
    ds = profiles.copy(deep=True)
    ds["air_pressure"].values[BAD, 6] = ds["air_pressure"].values[BAD, 5]
    raises(demo_instrument, ds, "^air_pressure: ", "a level is repeated", f"profile index {BAD}\\b")


@pytest.mark.parametrize("value", [0.0, -1.0])
def test_pressure_not_positive(demo_instrument, profiles, value):
    ds = with_value(profiles, "air_pressure", (BAD, -1), value)
    raises(demo_instrument, ds, "^air_pressure: ", "non-positive", r"pressure > 0", f"profile index {BAD}\\b")


def test_shared_pressure_grid_problem_names_profile_zero(demo_instrument, small_profiles):
    ds = small_profiles(n=3, nlev=10)
    ds["air_pressure"].values[3] = ds["air_pressure"].values[2]  # (level,) grid shared by all
    raises(demo_instrument, ds, "^air_pressure: ", "repeated", "profile index 0\\b")


def test_first_offending_profile_is_named(demo_instrument, profiles):
    ds = with_value(profiles, "surface_temperature", 3, 500.0)
    ds = with_value(ds, "surface_temperature", 1, 50.0)
    raises(demo_instrument, ds, "^surface_temperature: ", "profile index 1\\b")


# -- structural problems (always raise) -------------------------------------------------------
@pytest.mark.parametrize("name", INPUT_VARIABLES)
@pytest.mark.parametrize("errors", ["raise", "mask"])
def test_missing_variable(demo_instrument, profiles, name, errors):
    raises(demo_instrument, profiles.drop_vars(name), "missing variable", name, errors=errors)


@pytest.mark.parametrize("errors", ["raise", "mask"])
def test_empty_input(demo_instrument, profiles, errors):
    raises(demo_instrument, profiles.isel(profile=slice(0, 0)), "empty", "at least one profile", errors=errors)


def test_single_level(demo_instrument, profiles):
    raises(demo_instrument, profiles.isel(level=[0]), "1 level", "at least two levels")


def test_no_profile_dimension(demo_instrument, profiles):
    raises(demo_instrument, profiles.isel(profile=0), "no 'profile' dimension", "expand_dims")


@pytest.mark.parametrize(
    "name, dims",
    [
        ("air_temperature", ("profile", "height")),
        ("specific_humidity", ("profile",)),
        ("surface_temperature", ("profile", "level")),
        ("sensor_zenith_angle", ("level",)),
        ("air_pressure", ("profile",)),
    ],
)
def test_mismatched_dims(demo_instrument, profiles, name, dims):
    ds = profiles.copy(deep=True)
    shape = tuple({"profile": 4, "level": 12, "height": 12}[d] for d in dims)
    ds[name] = (dims, np.full(shape, 250.0))
    raises(demo_instrument, ds, f"^{name}: dims", "not allowed", "profile")


def test_transposed_dims_are_accepted(demo_instrument, profiles):
    ds = profiles.copy(deep=True)
    ds["air_temperature"] = ds["air_temperature"].transpose("level", "profile")
    np.testing.assert_array_equal(physics.simulate(demo_instrument, ds)["brightness_temperature"],
                                  physics.simulate(demo_instrument, profiles)["brightness_temperature"])


def test_emissivity_channel_count_mismatch(demo_instrument, profiles):
    ds = profiles.drop_vars("channel").isel(channel=slice(0, 5))
    raises(demo_instrument, ds, "^surface_emissivity: ", "5 channels, operator has 16", "one value per operator channel")


def test_emissivity_channel_ids_mismatch(demo_instrument, profiles):
    ids = list(profiles["channel"].values)
    ds = profiles.assign_coords(channel=["bogus", *ids[1:]])
    raises(demo_instrument, ds, "^surface_emissivity: ", "unknown: \\['bogus'\\]", f"missing: \\['{ids[0]}'\\]")


def test_emissivity_channel_order_follows_coordinate(demo_instrument, profiles):
    reordered = profiles.isel(channel=slice(None, None, -1))
    np.testing.assert_array_equal(physics.simulate(demo_instrument, reordered)["brightness_temperature"],
                                  physics.simulate(demo_instrument, profiles)["brightness_temperature"])


@pytest.mark.parametrize("name, units", [("air_pressure", "furlongs"), ("air_temperature", "m s-1"),
                                         ("specific_humidity", "ppmv"), ("surface_temperature", "R"),
                                         ("surface_emissivity", "percent"), ("sensor_zenith_angle", "grad")])
def test_unknown_units(demo_instrument, profiles, name, units):
    ds = profiles.copy(deep=True)
    ds[name].attrs["units"] = units
    raises(demo_instrument, ds, f"^{name}: unknown units '{units}'", "accepted", errors="mask")


def test_not_a_dataset_and_bad_errors_option(demo_instrument, profiles):
    with pytest.raises(ValueError, match="must be an xarray.Dataset"):
        physics.simulate(demo_instrument, profiles["air_temperature"])
    with pytest.raises(ValueError, match="errors must be 'raise' or 'mask'"):
        physics.simulate(demo_instrument, profiles, errors="ignore")


def test_bad_perturbations(demo_instrument, profiles):
    with pytest.raises(ValueError, match=r"perturbation: unknown variable\(s\) \['air_pressure'\]"):
        physics.tangent_linear(demo_instrument, profiles, profiles[["air_pressure"]])
    bad = xr.Dataset({"air_temperature": (("profile", "level"), np.zeros((4, 3)))})
    with pytest.raises(ValueError, match=r"perturbation: air_temperature has shape \(4, 3\), expected \(4, 12\)"):
        physics.tangent_linear(demo_instrument, profiles, bad)
    dy = xr.DataArray(np.zeros((4, 3)), dims=("profile", "channel"))
    with pytest.raises(ValueError, match=r"bt_perturbation: shape \(4, 3\), expected \(4, 16\)"):
        physics.adjoint(demo_instrument, profiles, dy)


# -- errors="mask" --------------------------------------------------------------------------
@pytest.fixture
def masked_case(small_profiles):
    ds = small_profiles(n=6, nlev=12, seed=22, per_profile_pressure=True)
    bad = ds.copy(deep=True)
    bad["air_temperature"].values[1, 4] = np.nan
    bad["specific_humidity"].values[3, 0] = 0.2
    bad["air_pressure"].values[4, 7] = bad["air_pressure"].values[4, 6]
    return ds, bad, [1, 3, 4]


def test_mask_flags_invalid_profiles_and_keeps_the_others_exact(demo_instrument, masked_case):
    ds, bad, invalid = masked_case
    out = physics.simulate(demo_instrument, bad, jacobian=True, errors="mask")
    valid = [i for i in range(6) if i not in invalid]
    assert flags.INVALID_INPUT == 1
    np.testing.assert_array_equal(out["quality_flag"].values[invalid], flags.INVALID_INPUT)
    np.testing.assert_array_equal(out["quality_flag"].values[valid], 0)
    for name in ("brightness_temperature", *physics.JACOBIAN_NAMES):
        assert np.all(np.isnan(out[name].values[invalid])), name
    summary = out.attrs["invalid_input_summary"]
    for fragment in ("air_temperature: non-finite", "specific_humidity: outside", "air_pressure: a level is repeated"):
        assert fragment in summary
    for i in valid:  # exactly what the profile gives alone
        alone = physics.simulate(demo_instrument, ds.isel(profile=[i]), jacobian=True)
        for name in ("brightness_temperature", *physics.JACOBIAN_NAMES):
            assert np.array_equal(out[name].values[i], alone[name].values[0]), (i, name)


def test_mask_with_every_profile_invalid(demo_instrument, masked_case):
    _, bad, _ = masked_case
    bad = bad.copy(deep=True)
    bad["sensor_zenith_angle"][:] = 89.0
    out = physics.simulate(demo_instrument, bad, errors="mask")
    assert np.all(np.isnan(out["brightness_temperature"]))
    assert np.all(out["quality_flag"] == flags.INVALID_INPUT)


def test_mask_in_tangent_linear_and_adjoint(demo_instrument, masked_case):
    _, bad, invalid = masked_case
    dx = xr.Dataset({"surface_temperature": (("profile",), np.ones(6))})
    tl = physics.tangent_linear(demo_instrument, bad, dx, errors="mask")
    assert np.all(np.isnan(tl["brightness_temperature"].values[invalid]))
    assert np.all(tl["quality_flag"].values[invalid] == flags.INVALID_INPUT)
    valid = [i for i in range(6) if i not in invalid]
    assert np.all(np.isfinite(tl["brightness_temperature"].values[valid]))
    dy = xr.DataArray(np.ones((6, 16)), dims=("profile", "channel"))
    grads = physics.adjoint(demo_instrument, bad, dy, errors="mask")
    assert np.all(np.isnan(grads["air_temperature"].values[invalid]))
    assert np.all(np.isfinite(grads["air_temperature"].values[valid]))


# -- pressure upper bound and the supersaturation flag ---------------------------------------
def test_pascal_labelled_hpa(demo_instrument, profiles):
    ds = profiles.copy(deep=True)
    ds["air_pressure"].values[BAD] *= 100.0  # Pa values, but units say hPa
    raises(demo_instrument, ds, "^air_pressure: ", "above 1200 hPa", "Pa labelled hPa", f"profile index {BAD}\\b")


def test_supersaturated_profile_is_flagged_not_rejected(demo_instrument, profiles):
    # q = 50 g/kg at ~290 K near 1000 hPa is far above saturation (q_sat ~ 11-12 g/kg;
    # Bolton 1980, MWR 108, 1046, from memory: e_s(15 degC) = 17.0 hPa).
    ds = with_value(profiles, "specific_humidity", (BAD, 0), 0.05)
    out = physics.simulate(demo_instrument, ds, jacobian=True, errors="raise")
    flag = out["quality_flag"].values
    assert flags.SUPERSATURATED == 16
    np.testing.assert_array_equal(flag[BAD], flags.SUPERSATURATED)
    np.testing.assert_array_equal(np.delete(flag, BAD, axis=0), 0)
    assert np.all(np.isfinite(out["brightness_temperature"].values[BAD]))
    alone = physics.simulate(demo_instrument, ds.isel(profile=[BAD]), jacobian=True)
    np.testing.assert_array_equal(out["brightness_temperature"].values[BAD], alone["brightness_temperature"].values[0])
    # both bits together in mask mode
    both = with_value(ds, "sensor_zenith_angle", 0, 89.0)
    masked = physics.simulate(demo_instrument, both, errors="mask")["quality_flag"].values
    assert np.all(masked[0] == flags.INVALID_INPUT) and np.all(masked[BAD] == flags.SUPERSATURATED)
