"""Model levels (issue 17, section 2): profiles carried onto an operator's grid, linear in
ln p, with tangent linear and adjoint, so that Jacobians come back on the caller's levels.

Checks: the adjoint dot-product test, exactness on a grid that contains the target grid,
an analytic case (a profile linear in ln p is reproduced exactly), Jacobians on model
levels against finite differences of the composed operator, per-profile (hybrid) levels,
the rule outside the source levels, and the operators' and command line's options.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from conftest import demo_pressure_grid
from rtemu import physics
from rtemu.levels import LevelMap, regrid_adjoint, regrid_profiles, regrid_tangent_linear
from rtemu.runtime import PhysicalOperator

GRID = demo_pressure_grid(45, 1050.0, 0.5)  # an operator's grid, surface first [hPa]


def _hybrid_levels(n, nlev, seed):
    """Invented hybrid-like levels p_k = a_k + b_k ps, per profile, surface first [hPa]."""
    rng = np.random.default_rng(seed)
    ps = rng.uniform(600.0, 1040.0, n)
    eta = np.linspace(0.0, 1.0, nlev) ** 1.3
    a = 1000.0 * eta * (1.0 - eta) ** 2 + 1.0 * eta**4  # [hPa]
    b = (1.0 - eta) ** 3
    return a[None, :] + b[None, :] * ps[:, None], ps


@pytest.fixture
def model_profiles(small_profiles):
    """small_profiles carried onto per-profile hybrid levels (numpy.interp in ln p)."""
    ds = small_profiles(n=4, nlev=70, seed=9)
    p, _ = _hybrid_levels(4, 37, seed=10)
    grid = ds["air_pressure"].values
    values = {}
    for name in ("air_temperature", "specific_humidity"):
        values[name] = (("profile", "level"), np.stack(
            [np.interp(np.log(p[i]), np.log(grid[::-1]), ds[name].values[i][::-1]) for i in range(4)]))
    return ds.drop_vars(["air_pressure", "air_temperature", "specific_humidity"]).assign(
        air_pressure=(("profile", "level"), p, {"units": "hPa"}), **values)


@pytest.mark.parametrize("per_profile", [False, True])
@pytest.mark.parametrize("top_first", [False, True])
def test_adjoint_dot_product(per_profile, top_first):
    rng = np.random.default_rng(1)
    source = _hybrid_levels(5, 23, seed=2)[0] if per_profile else demo_pressure_grid(23, 980.0, 2.0)
    if top_first:
        source = source[..., ::-1]
    m = LevelMap(source, GRID)
    dx = rng.normal(size=(5, 23))
    dy = rng.normal(size=(5, 45))
    lhs = np.sum(m.tangent_linear(dx) * dy)
    rhs = np.sum(dx * m.adjoint(dy))
    assert abs(lhs - rhs) <= 1e-13 * np.abs(dx).sum() * np.abs(dy).max()
    # The adjoint of a [N, C, K] Jacobian-shaped array is the same, channel by channel.
    jac = rng.normal(size=(5, 3, 45))
    np.testing.assert_allclose(m.adjoint(jac)[:, 1], m.adjoint(jac[:, 1]), rtol=1e-14)


def test_exact_on_a_grid_that_contains_the_target():
    rng = np.random.default_rng(3)
    extra = np.sort(rng.uniform(0.5, 1050.0, 30))[::-1]
    source = np.sort(np.concatenate([GRID, extra]))  # top first: either order is accepted
    values = rng.normal(250.0, 20.0, (2, source.size))
    mapped = LevelMap(source, GRID).apply(values)
    at = [int(np.flatnonzero(source == g)[0]) for g in GRID]
    np.testing.assert_array_equal(mapped, values[:, at])


def test_linear_in_ln_p_is_reproduced():
    """Analytic: x = 3 ln p + 7 is linear in ln p, so interpolation reproduces it anywhere
    inside the source levels; outside, the value is the nearest end level's (the rule)."""
    source = demo_pressure_grid(17, 900.0, 2.0)
    target = np.array([1000.0, 900.0, 555.5, 123.4, 2.0, 1.0])
    m = LevelMap(source, target)
    mapped = m.apply(3.0 * np.log(source) + 7.0)[0]
    np.testing.assert_allclose(mapped[1:5], 3.0 * np.log(target[1:5]) + 7.0, rtol=1e-14)
    assert mapped[0] == 3.0 * np.log(900.0) + 7.0 and mapped[5] == 3.0 * np.log(2.0) + 7.0


def test_regrid_profiles_sets_the_surface_and_keeps_the_rest(model_profiles):
    out = regrid_profiles(model_profiles, GRID)
    assert out.sizes["level"] == GRID.size
    np.testing.assert_array_equal(out["air_pressure"].values, GRID)
    np.testing.assert_array_equal(out["surface_air_pressure"].values, model_profiles["air_pressure"].values[:, 0])
    for name in ("surface_temperature", "surface_emissivity", "sensor_zenith_angle"):
        xr.testing.assert_identical(out[name], model_profiles[name])
    # A given surface_air_pressure is kept; pressure in Pa reads as hPa * 100.
    ps = model_profiles["air_pressure"].values[:, 3]
    pa = model_profiles.assign(air_pressure=model_profiles["air_pressure"] * 100.0,
                               surface_air_pressure=("profile", ps))
    pa["air_pressure"].attrs["units"] = "Pa"
    moved = regrid_profiles(pa, GRID)
    np.testing.assert_array_equal(moved["surface_air_pressure"].values, ps)
    np.testing.assert_allclose(moved["air_temperature"].values, out["air_temperature"].values, rtol=1e-13)


def test_regrid_tangent_linear_and_adjoint_are_transposes(model_profiles):
    rng = np.random.default_rng(4)
    n, nlev = model_profiles.sizes["profile"], model_profiles.sizes["level"]
    dx = xr.Dataset({"air_temperature": (("profile", "level"), rng.normal(size=(n, nlev)))})
    dy = xr.Dataset({"air_temperature": (("profile", "level"), rng.normal(size=(n, GRID.size)))})
    lhs = np.sum(regrid_tangent_linear(model_profiles, GRID, dx)["air_temperature"].values * dy["air_temperature"].values)
    rhs = np.sum(dx["air_temperature"].values * regrid_adjoint(model_profiles, GRID, dy)["air_temperature"].values)
    assert abs(lhs - rhs) <= 1e-12 * abs(lhs)


def test_operator_is_the_composition_of_the_public_functions(demo_instrument, model_profiles):
    """PhysicalOperator(grid_hpa=GRID) on model levels = physics on regrid_profiles, with
    the Jacobians taken back by regrid_adjoint."""
    op = PhysicalOperator(demo_instrument, grid_hpa=GRID, errors="raise")
    out = op.simulate(model_profiles, jacobian=True)
    on_grid = regrid_profiles(model_profiles, GRID)
    reference = physics.simulate(demo_instrument, on_grid, jacobian=True)
    np.testing.assert_array_equal(out["brightness_temperature"].values, reference["brightness_temperature"].values)
    back = regrid_adjoint(model_profiles, GRID, reference[["jacobian_air_temperature", "jacobian_specific_humidity"]])
    for name in ("jacobian_air_temperature", "jacobian_specific_humidity"):
        assert out[name].dims == ("profile", "channel", "level")
        assert out[name].shape[2] == model_profiles.sizes["level"]
        np.testing.assert_allclose(out[name].values, back[name].transpose(*out[name].dims).values,
                                   rtol=1e-12, atol=0)
    # Terrain is in play: the model surfaces lie 10-450 hPa above the grid's bottom.
    assert (on_grid["surface_air_pressure"].values < GRID[0] - 5.0).all()


def test_jacobians_on_model_levels_against_finite_differences(demo_instrument, model_profiles):
    """Per model level, central differences of the composed operator (grid map + ground cut
    + transfer): the two lowest model levels, a few in the troposphere and the top."""
    op = PhysicalOperator(demo_instrument, grid_hpa=GRID, errors="raise")
    jac = op.simulate(model_profiles, jacobian=True)
    nlev = model_profiles.sizes["level"]
    for name, h in (("air_temperature", 1e-3), ("specific_humidity", 1e-7)):
        j = jac[f"jacobian_{name}"].values
        for level in (0, 1, 2, 8, 15, nlev - 1):
            moved = []
            for sign in (1, -1):
                ds = model_profiles.copy(deep=True)
                ds[name].values[:, level] += sign * h
                moved.append(op.simulate(ds)["brightness_temperature"].values)
            fd = (moved[0] - moved[1]) / (2 * h)
            scale = np.abs(j).max(axis=(1, 2))[:, None]
            assert (np.abs(j[:, :, level] - fd) <= 2e-6 * scale).all(), (name, level)
    assert np.abs(jac["jacobian_air_temperature"].values[:, :, 0]).max() > 0


def test_profiles_already_on_the_grid_are_unchanged(demo_instrument, small_profiles):
    """Carried onto their own grid (given in either order), profiles compute bit for bit as
    without the option; a lowest level 1e-4 hPa off the grid's bottom (within the tolerance)
    counts as the bottom."""
    ds = small_profiles(n=3, nlev=45, seed=12)
    grid = ds["air_pressure"].values
    plain = physics.simulate(demo_instrument, ds, jacobian=True)
    nudged = ds.copy(deep=True)
    nudged["air_pressure"].values[0] += 1e-4
    for op_grid in (grid, grid[::-1]):
        out = PhysicalOperator(demo_instrument, grid_hpa=op_grid, errors="raise").simulate(ds, jacobian=True)
        for name in ("brightness_temperature", "jacobian_air_temperature", "jacobian_specific_humidity"):
            np.testing.assert_array_equal(out[name].values, plain[name].values)
    assert (regrid_profiles(nudged, grid)["surface_air_pressure"].values == grid[0]).all()


def test_surface_below_the_grid_is_invalid(demo_instrument, model_profiles):
    deep = model_profiles.copy(deep=True)
    deep["air_pressure"].values[2] *= 1.2  # profile 2 now reaches 720-1250 hPa: under the grid
    with pytest.raises(ValueError, match=r"^surface_air_pressure: .* outside the operator's grid .*"
                                         r"first offending profile index 2"):
        PhysicalOperator(demo_instrument, grid_hpa=GRID, errors="raise").simulate(deep)
    masked = PhysicalOperator(demo_instrument, grid_hpa=GRID).simulate(deep, jacobian=True)
    assert np.isnan(masked["brightness_temperature"].values[2]).all()
    assert np.isnan(masked["jacobian_air_temperature"].values[2]).all()
    assert "outside the operator's grid" in masked.attrs["invalid_input_summary"]
    good = PhysicalOperator(demo_instrument, grid_hpa=GRID).simulate(model_profiles, jacobian=True)
    for name in ("brightness_temperature", "jacobian_air_temperature"):
        np.testing.assert_array_equal(masked[name].values[[0, 1, 3]], good[name].values[[0, 1, 3]])


def test_emulator_grid_error_explains_regrid_and_regrid_carries_terrain(tiny_bundle, model_profiles):
    """Off-grid profiles are refused with a hint to regrid; with regrid=True the source's
    surface becomes the ground (format 7 learns terrain, so the emulator takes it) and the
    outputs are the emulator's on the explicitly regridded profiles, Jacobians carried back
    by the adjoint of the regridding (rtemu.levels.regrid_adjoint)."""
    from rtemu.runtime import EmulatedOperator

    with pytest.raises(ValueError, match=r"^air_pressure: 37 levels.*regrid=True.*rtemu simulate --regrid"):
        EmulatedOperator.load(tiny_bundle).simulate(model_profiles)
    op = EmulatedOperator.load(tiny_bundle)
    out = EmulatedOperator.load(tiny_bundle, regrid=True).simulate(model_profiles, jacobian=True)
    regridded = regrid_profiles(model_profiles, op.pressure_hpa)
    bottoms = model_profiles["air_pressure"].values.max(axis=1)
    np.testing.assert_array_equal(regridded["surface_air_pressure"].values, bottoms)
    assert (bottoms < op.pressure_hpa.max() - 1.0).all()  # the ground is inside the grid: terrain
    direct = op.simulate(regridded, jacobian=True)
    for name in ("brightness_temperature", "brightness_temperature_uncertainty", "quality_flag"):
        np.testing.assert_array_equal(out[name].values, direct[name].values)
    assert np.isfinite(out["brightness_temperature"].values).all()
    back = regrid_adjoint(model_profiles, op.pressure_hpa, direct[["jacobian_air_temperature"]])
    assert out["jacobian_air_temperature"].sizes["level"] == model_profiles.sizes["level"]
    np.testing.assert_allclose(out["jacobian_air_temperature"].transpose(*back["jacobian_air_temperature"].dims).values,
                               back["jacobian_air_temperature"].values, rtol=1e-12, atol=0)


def test_cli_regrid_and_info_grid(tmp_path, tiny_bundle, demo_instrument, model_profiles, capsys):
    from rtemu._io import open_dataset
    from rtemu.bundle import read_bundle
    from rtemu.cli import main

    model_profiles.to_netcdf(tmp_path / "model.nc")
    (tmp_path / "grid.txt").write_text("# operator grid [hPa]\n" + "\n".join(repr(float(x)) for x in GRID) + "\n")
    assert main(["simulate", "--instrument", "demo-sounder", "--regrid", str(tmp_path / "grid.txt"),
                 "--input", str(tmp_path / "model.nc"), "--output", str(tmp_path / "out.nc"),
                 "--jacobian", "--quiet"]) == 0
    direct = PhysicalOperator(demo_instrument, grid_hpa=GRID).simulate(model_profiles, jacobian=True)
    with open_dataset(tmp_path / "out.nc") as out:
        assert out.sizes["level"] == model_profiles.sizes["level"]
        for name in ("brightness_temperature", "jacobian_air_temperature"):
            np.testing.assert_allclose(out[name].values, direct[name].values, rtol=1e-12, atol=0)
    capsys.readouterr()
    assert main(["simulate", "--instrument", "demo-sounder", "--regrid", "--input", str(tmp_path / "model.nc"),
                 "--output", str(tmp_path / "x.nc"), "--quiet"]) == 2
    assert "rtemu: error: regrid: the physical model needs a grid" in capsys.readouterr().err
    assert main(["simulate", "--model", str(tiny_bundle), "--input", str(tmp_path / "model.nc"),
                 "--output", str(tmp_path / "y.nc"), "--quiet"]) == 2
    assert "regrid" in capsys.readouterr().err
    assert not (tmp_path / "x.nc").exists() and not (tmp_path / "y.nc").exists()
    # format 7 learns terrain: --regrid with an emulator carries the model's surface as the ground
    assert main(["simulate", "--model", str(tiny_bundle), "--regrid", "--input", str(tmp_path / "model.nc"),
                 "--output", str(tmp_path / "y.nc"), "--quiet"]) == 0
    from rtemu.runtime import EmulatedOperator

    emulated = EmulatedOperator.load(tiny_bundle, regrid=True).simulate(model_profiles)
    with open_dataset(tmp_path / "y.nc") as out:
        np.testing.assert_array_equal(out["brightness_temperature"].values, emulated["brightness_temperature"].values)
    assert main(["info", str(tiny_bundle)]) == 0
    text = capsys.readouterr().out
    grid = read_bundle(tiny_bundle).pressure_hpa
    printed = [float(v) for line in text.splitlines() if line.startswith("    ") and _numbers(line)
               for v in line.split()]
    np.testing.assert_allclose(printed, grid, rtol=1e-6)


def _numbers(line):
    try:
        [float(v) for v in line.split()]
    except ValueError:
        return False
    return True


def test_readme_model_levels_snippet():
    """The README's "Model levels and terrain" snippet runs verbatim and does what it says:
    Jacobians and adjoint on the model's levels, the plateau column cut at 700 hPa."""
    import re
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    section = text.split("## Model levels and terrain", 1)[1]
    snippet = re.search(r"```python\n(.*?)```", section, re.S).group(1)
    scope = {}
    exec(compile(snippet, "README.md", "exec"), scope)
    ds, out, grad, on_grid = scope["ds"], scope["out"], scope["grad"], scope["on_grid"]
    assert out["jacobian_air_temperature"].sizes["level"] == 40 == grad["air_temperature"].sizes["level"]
    assert (out["quality_flag"].values == 0).all()
    np.testing.assert_allclose(on_grid["surface_air_pressure"].values, [1012.0, 700.0], rtol=1e-12)
    # The adjoint of dy = 1 is the Jacobian summed over channels, on the model's levels.
    np.testing.assert_allclose(grad["air_temperature"].values,
                               out["jacobian_air_temperature"].sum("channel").values, rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("which, value, rule", [
    ("source", np.nan, "non-finite or non-positive"), ("source", -5.0, "non-finite or non-positive"),
    ("source", "repeat", "not strictly monotonic"), ("target", 0.0, "non-finite or non-positive")])
def test_bad_levels_are_refused(which, value, rule):
    source, _ = _hybrid_levels(3, 10, seed=1)
    target = np.tile(GRID, (3, 1))
    arr = source if which == "source" else target
    arr[1, 4] = arr[1, 3] if value == "repeat" else value
    with pytest.raises(ValueError, match=rf"^{which} levels: {rule} .*first offending profile index 1$"):
        LevelMap(source, target)


def test_docstring_examples():
    import doctest

    import rtemu.levels

    result = doctest.testmod(rtemu.levels)
    assert result.attempted >= 3 and result.failed == 0
