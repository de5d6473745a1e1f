"""Terrain: ``surface_air_pressure`` cuts the column at the ground (issue 17, section 1).

The semantics under test, from the issue: with levels surface first, levels with pressure
>= ps are dropped, a new bottom level is placed at ps with temperature and humidity
interpolated linearly in ln p between the two bracketing input levels (a level equal to
ps is the bottom), and the transfer runs on that column as before; ps in (top, bottom];
Jacobians on the input levels (chain rule through the two bracketing levels, zero below
the ground); without the variable nothing changes.

The reference column is built here independently of rtemu.levels: numpy.interp in ln p
on an explicitly truncated column.
"""

from __future__ import annotations

import re

import numpy as np
import pytest
import xarray as xr

from rtemu import flags, physics
from rtemu.levels import cut_at_surface
from rtemu.runtime import PhysicalOperator

JACOBIANS = ("jacobian_air_temperature", "jacobian_specific_humidity",
             "jacobian_surface_temperature", "jacobian_surface_emissivity")


@pytest.fixture
def profiles(small_profiles):
    return small_profiles(n=4, nlev=30, seed=17)


def _grounds(ds):
    """One ps between levels, one equal to a level, one equal to the bottom, one high up
    (about 440 hPa on the 30-level test grid: realistic grounds, which the plausibility
    rule of the inputs requires of a truncated column's bottom)."""
    p = ds["air_pressure"].values
    return np.array([0.5 * (p[1] + p[2]), p[4], p[0], 0.3 * p[6] + 0.7 * p[7]])


def _truncated(ds, i, ps):
    """Profile ``i`` as the explicit shorter column (surface first), by numpy.interp."""
    p = ds["air_pressure"].values
    keep = p < ps
    one = ds.isel(profile=[i])
    lnp = np.log(p[::-1])  # increasing, for numpy.interp
    values = {}
    for name in ("air_temperature", "specific_humidity"):
        x = one[name].values[0]
        surface = np.interp(np.log(ps), lnp, x[::-1])
        values[name] = (("profile", "level"), np.concatenate([[surface], x[keep]])[None, :])
    out = one.drop_vars(["air_pressure", "air_temperature", "specific_humidity"])
    return out.assign(air_pressure=(("level",), np.concatenate([[ps], p[keep]]), {"units": "hPa"}), **values)


def test_equals_the_truncated_column_to_round_off(demo_instrument, profiles):
    ps = _grounds(profiles)
    out = physics.simulate(demo_instrument, profiles.assign(surface_air_pressure=("profile", ps)),
                           jacobian=True)
    plain = physics.simulate(demo_instrument, profiles)
    for i in range(ps.size):
        short = physics.simulate(demo_instrument, _truncated(profiles, i, ps[i]), jacobian=True)
        np.testing.assert_allclose(out["brightness_temperature"].values[i],
                                   short["brightness_temperature"].values[0], rtol=0, atol=1e-10)
        for name in ("jacobian_surface_temperature", "jacobian_surface_emissivity"):
            np.testing.assert_allclose(out[name].values[i], short[name].values[0], rtol=1e-10, atol=1e-14)
        # Levels strictly above the ground but not bracketing it: the truncated column's own.
        above = np.flatnonzero(profiles["air_pressure"].values < ps[i])[1:]
        np.testing.assert_allclose(out["jacobian_air_temperature"].values[i][:, above],
                                   short["jacobian_air_temperature"].values[0][:, 2:], rtol=1e-9, atol=1e-14)
    # The ground matters: a 400 hPa-high surface changes the window channels by kelvins.
    assert np.abs(out["brightness_temperature"].values[3] - plain["brightness_temperature"].values[3]).max() > 1.0


def test_bottom_ground_is_bit_for_bit_no_ground(demo_instrument, profiles):
    bottom = profiles["air_pressure"].values.max() * np.ones(profiles.sizes["profile"])
    with_ground = physics.simulate(demo_instrument, profiles.assign(surface_air_pressure=("profile", bottom)),
                                   jacobian=True)
    without = physics.simulate(demo_instrument, profiles, jacobian=True)
    for name in ("brightness_temperature",) + JACOBIANS:
        np.testing.assert_array_equal(with_ground[name].values, without[name].values)


def test_jacobians_against_finite_differences_around_the_ground(demo_instrument, profiles):
    """Every level from two below the bracket to two above: central differences; levels
    under the bracket do not reach the transfer at all (difference exactly zero)."""
    ps = _grounds(profiles)
    ds = profiles.assign(surface_air_pressure=("profile", ps))
    out = physics.simulate(demo_instrument, ds, jacobian=True)
    p = profiles["air_pressure"].values
    for name, h in (("air_temperature", 1e-3), ("specific_humidity", 1e-7)):
        jac = out[f"jacobian_{name}"].values
        for i, ground in enumerate(ps):
            lowest_above = int(np.flatnonzero(p < ground)[0])  # bracket: lowest_above - 1, lowest_above
            for level in range(max(0, lowest_above - 3), lowest_above + 3):
                moved = []
                for sign in (1, -1):
                    shifted = ds.copy(deep=True)
                    shifted[name].values[i, level] += sign * h
                    moved.append(physics.simulate(demo_instrument, shifted)["brightness_temperature"].values[i])
                fd = (moved[0] - moved[1]) / (2 * h)
                if level < lowest_above - 1:
                    assert np.array_equal(moved[0], moved[1]), (name, i, level)
                    assert (jac[i, :, level] == 0).all(), (name, i, level)
                else:
                    scale = np.abs(jac[i]).max()
                    np.testing.assert_allclose(jac[i, :, level], fd, rtol=0, atol=2e-6 * scale,
                                               err_msg=f"{name} profile {i} level {level}")
    # The lower bracketing level of a ground strictly between levels carries a share.
    lower = int(np.flatnonzero(p < ps[0])[0]) - 1
    assert np.abs(out["jacobian_air_temperature"].values[0, :, lower]).max() > 0


def test_chain_rule_weights_of_the_pure_function():
    """cut_at_surface by hand: ps = sqrt(500 * 100) hPa lies halfway in ln p between the
    levels 500 and 100 hPa, so the surface value is their mean and each gets half of the
    ground's sensitivity; the 1000 hPa level is under the ground."""
    p = np.array([[1000.0, 500.0, 100.0, 10.0]])
    t = np.array([[300.0, 260.0, 200.0, 220.0]])
    q = np.array([[1e-2, 5e-3, 1e-4, 3e-6]])
    ps = np.sqrt(500.0 * 100.0)
    cut = cut_at_surface(p, t, q, np.array([ps]))
    np.testing.assert_allclose(cut.pressure_hpa, [[ps, ps, 100.0, 10.0]], rtol=1e-12)
    np.testing.assert_allclose(cut.air_temperature, [[230.0, 230.0, 200.0, 220.0]], rtol=1e-12)
    np.testing.assert_allclose(cut.specific_humidity, [[2.55e-3, 2.55e-3, 1e-4, 3e-6]], rtol=1e-12)
    assert cut.air_temperature[0, 2] == 200.0  # levels above the ground untouched
    assert cut.weight[0] == pytest.approx(0.5, rel=1e-12) and cut.index[0] == 1
    jac = np.array([[[1.0, 2.0, 3.0, 4.0]]])  # d/d(cut levels): the two ground levels sum to 3
    np.testing.assert_allclose(cut.jacobian_to_input_levels(jac), [[[0.0, 1.5, 4.5, 4.0]]], rtol=1e-12)
    # A ground on a level: that level is the bottom, with its own values.
    on_level = cut_at_surface(p, t, q, np.array([500.0]))
    assert on_level.weight[0] == 0.0 and (on_level.air_temperature[0, :2] == 260.0).all()


def test_units_level_order_and_per_profile_pressure(demo_instrument, profiles):
    ps = _grounds(profiles)
    reference = physics.simulate(demo_instrument, profiles.assign(surface_air_pressure=("profile", ps)),
                                 jacobian=True)
    in_pa = profiles.assign(surface_air_pressure=("profile", ps * 100.0, {"units": "Pa"}))
    np.testing.assert_allclose(physics.simulate(demo_instrument, in_pa)["brightness_temperature"].values,
                               reference["brightness_temperature"].values, rtol=0, atol=1e-9)
    flipped = profiles.isel(level=slice(None, None, -1)).assign(surface_air_pressure=("profile", ps))
    out = physics.simulate(demo_instrument, flipped, jacobian=True)
    np.testing.assert_allclose(out["brightness_temperature"].values, reference["brightness_temperature"].values,
                               rtol=0, atol=1e-9)
    np.testing.assert_allclose(out["jacobian_air_temperature"].values[..., ::-1],
                               reference["jacobian_air_temperature"].values, rtol=1e-9, atol=1e-13)
    per_profile = profiles.assign(
        air_pressure=(("profile", "level"), np.tile(profiles["air_pressure"].values, (ps.size, 1))),
        surface_air_pressure=("profile", ps))
    np.testing.assert_array_equal(physics.simulate(demo_instrument, per_profile)["brightness_temperature"].values,
                                  physics.simulate(demo_instrument, profiles.assign(
                                      surface_air_pressure=("profile", ps)))["brightness_temperature"].values)


@pytest.mark.parametrize("where", ["above_bottom", "at_top", "above_top", "nan"])
def test_ground_outside_the_column(demo_instrument, profiles, where):
    p = profiles["air_pressure"].values
    ps = _grounds(profiles)
    ps[2] = {"above_bottom": p[0] + 0.01, "at_top": p[-1], "above_top": 0.5 * p[-1], "nan": np.nan}[where]
    ds = profiles.assign(surface_air_pressure=("profile", ps))
    with pytest.raises(ValueError) as info:
        physics.simulate(demo_instrument, ds)
    message = str(info.value)
    assert message.startswith("surface_air_pressure: ")
    assert re.search(r"rule: .*finite|rule: top pressure < surface_air_pressure <= bottom pressure", message)
    assert "profile index 2" in message
    masked = physics.simulate(demo_instrument, ds, jacobian=True, errors="mask")
    assert np.isnan(masked["brightness_temperature"].values[2]).all()
    assert (masked["quality_flag"].values[2] & flags.INVALID_INPUT).all()
    good = physics.simulate(demo_instrument, ds.isel(profile=[0, 1, 3]), jacobian=True)
    for name in ("brightness_temperature",) + JACOBIANS:
        np.testing.assert_array_equal(masked[name].values[[0, 1, 3]], good[name].values)


def test_wrong_dims_or_units_refused(demo_instrument, profiles):
    ps = _grounds(profiles)
    with pytest.raises(ValueError, match=r"^surface_air_pressure: dims"):
        physics.simulate(demo_instrument, profiles.assign(
            surface_air_pressure=(("profile", "level"), np.ones((ps.size, profiles.sizes["level"])))))
    with pytest.raises(ValueError, match=r"^surface_air_pressure: unknown units 'K'"):
        physics.simulate(demo_instrument, profiles.assign(surface_air_pressure=("profile", ps, {"units": "K"})))


def test_supersaturation_under_the_ground_is_not_flagged(demo_instrument, profiles):
    ps = _grounds(profiles)
    ds = profiles.assign(surface_air_pressure=("profile", ps))
    wet = ds.copy(deep=True)
    wet["specific_humidity"].values[3, 0] = 0.09  # far above saturation, 400 hPa under the ground
    out = physics.simulate(demo_instrument, wet)
    assert not (out["quality_flag"].values[3] & flags.SUPERSATURATED).any()
    np.testing.assert_array_equal(out["brightness_temperature"].values, physics.simulate(
        demo_instrument, ds)["brightness_temperature"].values)
    bare = physics.simulate(demo_instrument, wet.drop_vars("surface_air_pressure"))
    assert (bare["quality_flag"].values[3] & flags.SUPERSATURATED).all()


def test_saturated_levels_around_the_ground_are_not_flagged(demo_instrument, profiles):
    """Two saturated levels bracketing the ground: no level is supersaturated, although q
    linear in ln p between them lies above q_s at the interpolated ground (q_s convex in T,
    Bolton 1980 e_s). A supersaturated level above the ground is still flagged."""
    from rtemu.atmosphere import saturation_specific_humidity

    ps = _grounds(profiles)
    ds = profiles.assign(surface_air_pressure=("profile", ps))
    p = ds["air_pressure"].values
    t = ds["air_temperature"].values
    wet = ds.copy(deep=True)
    q = wet["specific_humidity"].values
    q[0, :3] = saturation_specific_humidity(t[0, :3], p[:3])  # profile 0: ground between levels 1 and 2
    q[0, 1] = saturation_specific_humidity(t[0, 1] + 6.0, p[1])  # ... with a kink in T at level 1
    wet["air_temperature"].values[0, 1] = t[0, 1] + 6.0
    cut = cut_at_surface(p[None, :], wet["air_temperature"].values[:1], q[:1], ps[:1])
    ground_q_s = saturation_specific_humidity(cut.air_temperature[0, 0], ps[0])
    assert cut.specific_humidity[0, 0] > ground_q_s * (1 + 1e-4)  # the interpolation overshoots
    out = physics.simulate(demo_instrument, wet)
    assert not (out["quality_flag"].values[0] & flags.SUPERSATURATED).any()
    q[0, 2] *= 1.01
    out = physics.simulate(demo_instrument, wet)
    assert (out["quality_flag"].values[0] & flags.SUPERSATURATED).all()


def test_tangent_linear_and_adjoint_functions_with_terrain(demo_instrument, profiles):
    """rtemu.physics.tangent_linear / adjoint (the plain functions) with a ground: the
    dot-product test <J dx, dy> = <dx, J^T dy>, and no sensitivity under the ground."""
    ps = _grounds(profiles)
    ds = profiles.assign(surface_air_pressure=("profile", ps))
    rng = np.random.default_rng(2)
    n, nlev = profiles.sizes["profile"], profiles.sizes["level"]
    dx = xr.Dataset({"air_temperature": (("profile", "level"), rng.normal(size=(n, nlev))),
                     "specific_humidity": (("profile", "level"), 1e-4 * rng.normal(size=(n, nlev)))})
    dy = xr.DataArray(rng.normal(size=(n, len(demo_instrument.channels))), dims=("profile", "channel"),
                      coords={"channel": list(demo_instrument.channel_ids)})
    jdx = physics.tangent_linear(demo_instrument, ds, dx)["brightness_temperature"].values
    grads = physics.adjoint(demo_instrument, ds, dy)
    lhs = np.sum(jdx * dy.values)
    rhs = sum(np.sum(grads[k].values * dx[k].values) for k in dx.data_vars)
    assert abs(lhs - rhs) <= 1e-12 * abs(lhs)
    p = profiles["air_pressure"].values
    for i, ground in enumerate(ps):
        deep = p > ground
        deep[int(np.flatnonzero(p < ground)[0]) - 1] = False  # the lower bracketing level
        assert (grads["air_temperature"].values[i, deep] == 0).all()


def test_emulator_takes_terrain_and_a_ground_at_its_bottom_is_no_ground(tiny_bundle, demo_instrument):
    """Format 7 learns terrain: surface_air_pressure inside the column is accepted (not
    invalid, finite outputs, the other profiles of the batch bit for bit as without it),
    changes that profile's BTs, and leaves no sensitivity under the level that brackets the
    ground (rtemu.levels.cut_at_surface). A ground at the grid's bottom is the same as no
    ground, bit for bit."""
    from rtemu.runtime import EmulatedOperator
    from rtemu.sampling import draw_states

    op = EmulatedOperator.load(tiny_bundle)
    ds = draw_states(3, seed=5, pressure_hpa=op.pressure_hpa, channels=demo_instrument)
    ds = ds[["air_pressure", "air_temperature", "specific_humidity", "surface_temperature",
             "surface_emissivity", "sensor_zenith_angle"]]
    bottom = op.pressure_hpa.max()
    same = op.simulate(ds.assign(surface_air_pressure=("profile", np.full(3, bottom))), jacobian=True)
    plain = op.simulate(ds, jacobian=True)
    for name in ("brightness_temperature", "brightness_temperature_uncertainty", "quality_flag") + JACOBIANS:
        np.testing.assert_array_equal(same[name].values, plain[name].values)
    ps = np.array([bottom, bottom, 700.0])
    high = op.simulate(ds.assign(surface_air_pressure=("profile", ps)), jacobian=True)
    assert not (high["quality_flag"].values & flags.INVALID_INPUT).any()
    assert np.isfinite(high["brightness_temperature"].values).all()
    for name in ("brightness_temperature",) + JACOBIANS:
        np.testing.assert_array_equal(high[name].values[:2], plain[name].values[:2])
    assert not np.array_equal(high["brightness_temperature"].values[2], plain["brightness_temperature"].values[2])
    p = np.asarray(ds["air_pressure"].values)
    deep = p > 700.0
    deep[int(np.flatnonzero(p < 700.0)[0]) - 1] = False  # the lower bracketing level
    assert deep.any()
    for name in ("jacobian_air_temperature", "jacobian_specific_humidity"):
        assert (high[name].isel(profile=2, level=np.flatnonzero(deep)).values == 0).all(), name
        assert (plain[name].isel(profile=2, level=np.flatnonzero(deep)).values != 0).any(), name  # without ground


def test_physical_operator_and_cli_take_terrain(tmp_path, demo_instrument, profiles):
    from rtemu._io import open_dataset
    from rtemu.cli import main

    ds = profiles.assign(surface_air_pressure=("profile", _grounds(profiles) * 100.0, {"units": "Pa"}))
    direct = PhysicalOperator(demo_instrument).simulate(ds, jacobian=True)
    ds.to_netcdf(tmp_path / "in.nc")
    assert main(["simulate", "--instrument", "demo-sounder", "--input", str(tmp_path / "in.nc"),
                 "--output", str(tmp_path / "out.nc"), "--jacobian", "--quiet"]) == 0
    with open_dataset(tmp_path / "out.nc") as out:
        for name in ("brightness_temperature",) + JACOBIANS:
            np.testing.assert_allclose(out[name].values, direct[name].values, rtol=1e-12, atol=0)


def test_emulator_flags_an_invalid_ground_like_any_bad_value(tiny_bundle, demo_instrument):
    """A non-finite or out-of-column surface_air_pressure is invalid input (flagged), not
    terrain: the emulator masks that profile and computes the others exactly."""
    from rtemu.runtime import EmulatedOperator
    from rtemu.sampling import draw_states

    op = EmulatedOperator.load(tiny_bundle)
    ds = draw_states(3, seed=6, pressure_hpa=op.pressure_hpa, channels=demo_instrument)
    ds = ds[["air_pressure", "air_temperature", "specific_humidity", "surface_temperature",
             "surface_emissivity", "sensor_zenith_angle"]]
    bottom = op.pressure_hpa.max()
    out = op.simulate(ds.assign(surface_air_pressure=("profile", [bottom, np.nan, bottom + 5.0])))
    plain = op.simulate(ds)
    assert (out["quality_flag"].values[1:] & flags.INVALID_INPUT).all()
    assert np.isnan(out["brightness_temperature"].values[1:]).all()
    np.testing.assert_array_equal(out["brightness_temperature"].values[0], plain["brightness_temperature"].values[0])
    assert "surface_air_pressure: non-finite" in out.attrs["invalid_input_summary"]
