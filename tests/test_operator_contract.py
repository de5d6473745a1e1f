"""One contract for every observation operator (physical and emulated).

Each test runs over all operators of the ``operator_case`` fixture: output schema, Jacobian
against finite differences, tangent-linear Taylor test, adjoint dot-product test,
level-order invariance, bad-input behaviour, lazy (dask) evaluation.

Tolerances differ by operator only where the arithmetic does: the physical model runs in
float64, the emulator in float32 (unit roundoff 6e-8, i.e. ~2e-5 K at 300 K).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import xarray as xr

import physics_instruments
from rtemu import flags
from rtemu.runtime import PhysicalOperator

JACOBIANS = (
    "jacobian_air_temperature",
    "jacobian_specific_humidity",
    "jacobian_surface_temperature",
    "jacobian_surface_emissivity",
)


@dataclasses.dataclass
class Case:
    operator: object
    profiles: xr.Dataset  # valid, in-envelope inputs
    fd_rel_tol: float  # directional derivative vs finite difference
    taylor_min_ratio: float  # error ratio when the step halves (2nd order -> 4)
    adjoint_rel_tol: float


def _physical_case(small_profiles, instrument="demo-sounder"):
    ds = small_profiles(n=6, nlev=40, seed=3, instrument=instrument)
    return Case(PhysicalOperator(instrument), ds, 1e-6, 3.5, 1e-10)


def _with_terrain(ds, seed):
    """``ds`` with a ground between levels (one profile exactly on a level, one at the bottom)."""
    rng = np.random.default_rng(seed)
    p = ds["air_pressure"].values
    bottom = p.max(axis=-1) * np.ones(ds.sizes["profile"])
    ps = np.minimum(rng.uniform(550.0, 1000.0, ds.sizes["profile"]), bottom)
    ps[0] = bottom[0]
    ps[1] = (p[1] if p.ndim == 2 else p)[7]  # exactly a level's pressure
    return ds.assign(surface_air_pressure=(("profile",), ps, {"units": "hPa"}))


def _physical_terrain_case(small_profiles):
    ds = _with_terrain(small_profiles(n=6, nlev=40, seed=3, per_profile_pressure=True), seed=4)
    return Case(PhysicalOperator("demo-sounder"), ds, 1e-6, 3.5, 1e-10)


def _model_levels(ds, seed, nlev=33):
    """``ds`` carried onto invented per-profile hybrid-like levels: p_k = a_k + b_k ps with a
    surface pressure ps drawn over terrain (600-1010 hPa), top 0.8 hPa (T, q interpolated
    linearly in ln p with numpy.interp, an independent route)."""
    rng = np.random.default_rng(seed)
    n = ds.sizes["profile"]
    eta = np.linspace(0.0, 1.0, nlev) ** 1.4  # 0 at the surface, 1 at the top
    b = (1.0 - eta) ** 3
    grid = ds["air_pressure"].values
    out_p = np.empty((n, nlev))
    t, q = np.empty((n, nlev)), np.empty((n, nlev))
    for i in range(n):
        ps = rng.uniform(600.0, 1010.0)
        a = 0.8 ** eta * ps ** (1 - eta) - b * ps  # hybrid: a_k + b_k ps spans ps .. 0.8 hPa
        out_p[i] = a + b * ps
        src = grid if grid.ndim == 1 else grid[i]
        for name, dest in (("air_temperature", t), ("specific_humidity", q)):
            dest[i] = np.interp(np.log(out_p[i]), np.log(src[::-1]), ds[name].values[i][::-1])
    return ds.drop_vars(["air_pressure", "air_temperature", "specific_humidity", "level"], errors="ignore").assign(
        air_pressure=(("profile", "level"), out_p, {"units": "hPa"}),
        air_temperature=(("profile", "level"), t, {"units": "K"}),
        specific_humidity=(("profile", "level"), q, {"units": "kg kg-1"}))


def _physical_model_levels_case(small_profiles):
    from conftest import demo_pressure_grid

    ds = _model_levels(small_profiles(n=6, nlev=60, seed=3), seed=5)
    op = PhysicalOperator("demo-sounder", grid_hpa=demo_pressure_grid(45, 1050.0, 0.5))
    return Case(op, ds, 1e-6, 3.5, 1e-10)


#: The physics over small INVENTED instruments of each kind of sub-band (tests/physics_instruments.py):
#: per-band power laws; (ln p, T) tables from a file written by the test; sidebands over
#: default-law, per-band-law and table bands in one channel.
_BAND_INSTRUMENTS = {
    "physical-per-band-laws": physics_instruments.law_instrument,
    "physical-tables": physics_instruments.table_instrument,
    "physical-sidebands": physics_instruments.sideband_instrument,
}


@pytest.fixture(scope="module")
def band_instruments(tmp_path_factory):
    folder = tmp_path_factory.mktemp("band-instruments")
    return {name: build(folder) for name, build in _BAND_INSTRUMENTS.items()}


@pytest.fixture(params=["physical", "physical-terrain", "physical-model-levels", "emulated",
                        "emulated-model-levels", *_BAND_INSTRUMENTS])
def operator_case(request, small_profiles):
    if request.param == "physical":
        return _physical_case(small_profiles)
    if request.param == "physical-terrain":
        return _physical_terrain_case(small_profiles)
    if request.param == "physical-model-levels":
        return _physical_model_levels_case(small_profiles)
    if request.param in _BAND_INSTRUMENTS:
        return _physical_case(small_profiles, request.getfixturevalue("band_instruments")[request.param])
    return request.getfixturevalue(request.param.replace("-", "_") + "_case")


def _direction(ds, seed, scale=1.0):
    rng = np.random.default_rng(seed)
    n, nlev = ds.sizes["profile"], ds.sizes["level"]
    smooth = np.cumsum(rng.normal(size=(n, nlev)), axis=1) / np.sqrt(nlev)
    q = ds["specific_humidity"].values
    return xr.Dataset(
        {
            "air_temperature": (("profile", "level"), scale * smooth),
            "specific_humidity": (("profile", "level"), scale * 0.05 * q * rng.normal(size=(n, nlev))),
            "surface_temperature": (("profile",), scale * rng.normal(size=n)),
            "surface_emissivity": (ds["surface_emissivity"].dims,
                                   scale * 0.01 * rng.normal(size=ds["surface_emissivity"].shape)),
        }
    )


def _shift(ds, dx, a):
    out = ds.copy()
    for name, da in dx.items():
        out[name] = ds[name] + a * da.values
    return out


def test_output_schema(operator_case):
    op, ds = operator_case.operator, operator_case.profiles
    out = op.simulate(ds, jacobian=True)
    n, nlev, nchan = ds.sizes["profile"], ds.sizes["level"], len(op.channels)
    assert out["brightness_temperature"].dims == ("profile", "channel")
    assert out["brightness_temperature"].shape == (n, nchan)
    assert out["brightness_temperature"].dtype == np.float64
    assert out["brightness_temperature"].attrs["units"] == "K"
    for name in ("jacobian_air_temperature", "jacobian_specific_humidity"):
        assert out[name].dims == ("profile", "channel", "level")
        assert out[name].shape == (n, nchan, nlev)
    for name in ("jacobian_surface_temperature", "jacobian_surface_emissivity"):
        assert out[name].dims == ("profile", "channel")
    assert list(out["channel"].values) == list(op.channels)
    qf = out["quality_flag"]
    assert qf.dtype == np.int32
    assert list(qf.attrs["flag_masks"]) == list(flags.FLAG_MASKS)
    assert qf.attrs["flag_meanings"].split() == flags.FLAG_MEANINGS.split()
    assert (qf.values & flags.INVALID_INPUT).sum() == 0
    assert np.isfinite(out["brightness_temperature"].values).all()
    plain = op.simulate(ds)
    # the emulator adds its own uncertainty (one sigma [K]); the physics has none
    extra = {"brightness_temperature_uncertainty"} if hasattr(op, "bundle") else set()
    assert set(plain.data_vars) == {"brightness_temperature", "quality_flag"} | extra
    if extra:
        sigma = plain["brightness_temperature_uncertainty"]
        assert sigma.dims == ("profile", "channel") and sigma.attrs["units"] == "K" and (sigma.values > 0).all()
    np.testing.assert_array_equal(plain["brightness_temperature"].values,
                                  out["brightness_temperature"].values)


def test_jacobian_against_finite_differences(operator_case):
    op, ds = operator_case.operator, operator_case.profiles
    out = op.simulate(ds, jacobian=True)
    for name in ("air_temperature", "specific_humidity", "surface_temperature", "surface_emissivity"):
        dx = _direction(ds, seed=11)[[name]]
        jdx = op.tangent_linear(ds, dx)["brightness_temperature"].values
        h = 1e-3 if operator_case.fd_rel_tol < 1e-4 else 0.2
        plus = op.simulate(_shift(ds, dx, h))["brightness_temperature"].values
        minus = op.simulate(_shift(ds, dx, -h))["brightness_temperature"].values
        fd = (plus - minus) / (2 * h)
        scale = np.abs(jdx).max()
        assert np.abs(fd - jdx).max() <= operator_case.fd_rel_tol * scale + 1e-12, name
    assert out is not None


def test_tangent_linear_taylor(operator_case):
    op, ds = operator_case.operator, operator_case.profiles
    dx = _direction(ds, seed=5)
    base = op.simulate(ds)["brightness_temperature"].values
    jdx = op.tangent_linear(ds, dx)["brightness_temperature"].values
    errors = []
    for a in (0.4, 0.2, 0.1):
        moved = op.simulate(_shift(ds, dx, a))["brightness_temperature"].values
        errors.append(np.linalg.norm(moved - base - a * jdx))
    ratios = [errors[0] / errors[1], errors[1] / errors[2]]
    # Second-order remainder: halving the step divides the error by ~4 (Taylor's theorem).
    assert min(ratios) > operator_case.taylor_min_ratio, (errors, ratios)


def test_adjoint_dot_product(operator_case):
    op, ds = operator_case.operator, operator_case.profiles
    dx = _direction(ds, seed=7)
    rng = np.random.default_rng(8)
    dy = xr.DataArray(rng.normal(size=(ds.sizes["profile"], len(op.channels))),
                      dims=("profile", "channel"), coords={"channel": list(op.channels)})
    jdx = op.tangent_linear(ds, dx)["brightness_temperature"].values
    grads = op.adjoint(ds, dy)
    lhs = np.sum(jdx * dy.values)
    rhs = sum(np.sum(grads[name].values * dx[name].values) for name in dx.data_vars)
    assert abs(lhs - rhs) <= operator_case.adjoint_rel_tol * max(abs(lhs), abs(rhs))


def test_level_order_invariance(operator_case):
    op, ds = operator_case.operator, operator_case.profiles
    forward = op.simulate(ds, jacobian=True)
    flipped = op.simulate(ds.isel(level=slice(None, None, -1)), jacobian=True)
    np.testing.assert_allclose(flipped["brightness_temperature"].values,
                               forward["brightness_temperature"].values, rtol=0, atol=1e-9)
    np.testing.assert_allclose(flipped["jacobian_air_temperature"].values[..., ::-1],
                               forward["jacobian_air_temperature"].values, rtol=1e-9, atol=1e-12)


def test_bad_profile_masked_rest_exact(operator_case):
    op, ds = operator_case.operator, operator_case.profiles
    clean = op.simulate(ds, jacobian=True)
    bad = ds.copy(deep=True)
    bad["air_temperature"][1, 3] = np.nan
    bad["specific_humidity"][2, 0] = -1e-3
    out = op.simulate(bad, jacobian=True)
    for i in (1, 2):
        assert np.isnan(out["brightness_temperature"].values[i]).all()
        assert np.isnan(out["jacobian_air_temperature"].values[i]).all()
        assert (out["quality_flag"].values[i] & flags.INVALID_INPUT).all()
    keep = [0, 3, 4, 5][: ds.sizes["profile"] - 2]
    for name in ("brightness_temperature",) + JACOBIANS:
        np.testing.assert_array_equal(out[name].values[keep], clean[name].values[keep])
    assert "specific_humidity" in out.attrs["invalid_input_summary"]


def test_lazy_equals_eager(operator_case):
    op, ds = operator_case.operator, operator_case.profiles
    eager = op.simulate(ds, jacobian=True)
    lazy = op.simulate(ds.chunk({"profile": 2}), jacobian=True)
    assert lazy["brightness_temperature"].chunks is not None
    computed = lazy.compute()
    # The physics is float64 numpy, row by row the same arithmetic: exact. The emulator runs
    # float32 onnxruntime kernels whose blocking depends on the batch length, so a chunk of
    # 2 and a batch of 6 may differ in the last bit of float32 (2**-23 relative, IEEE 754):
    # allow float32 rounding: 1e-5 relative (the Jacobian chain is a dozen float32 operations,
    # ~2**-23 each) plus a few ulp of the largest value of each output (the Jacobians are sums
    # with cancellation, so small elements carry the rounding of the large ones).
    exact = isinstance(op, PhysicalOperator)
    ulps, rtol = (0.0, 0.0) if exact else (4.0 * np.finfo(np.float32).eps, 1e-5)
    for name in ("brightness_temperature",) + JACOBIANS:
        want = eager[name].values
        np.testing.assert_allclose(computed[name].values, want, rtol=rtol,
                                   atol=ulps * np.abs(want).max())


@pytest.fixture
def emulated_model_levels_case(emulated_case):
    """The emulator fed profiles on other levels with the same bottom (terrain is covered
    by the physical model-levels case and tests/test_levels.py): the bundle's grid thinned
    and shifted between its levels."""
    from rtemu.runtime import EmulatedOperator

    ds = emulated_case.profiles
    grid = emulated_case.operator.pressure_hpa
    surface_first = grid if grid[0] > grid[-1] else grid[::-1]
    ln = np.log(surface_first)
    src = np.exp(np.concatenate([[ln[0]], 0.5 * (ln[1:-2:2] + ln[2:-1:2]), [ln[-1]]]))
    t = np.stack([np.interp(-np.log(src), -ln, row) for row in _surface_first(ds, "air_temperature", grid)])
    q = np.stack([np.interp(-np.log(src), -ln, row) for row in _surface_first(ds, "specific_humidity", grid)])
    moved = ds.drop_vars(["air_pressure", "air_temperature", "specific_humidity"]).assign(
        air_pressure=(("level",), src, {"units": "hPa"}),
        air_temperature=(("profile", "level"), t, {"units": "K"}),
        specific_humidity=(("profile", "level"), q, {"units": "kg kg-1"}))
    op = EmulatedOperator.load(emulated_case.operator.path, regrid=True)
    return dataclasses.replace(emulated_case, operator=op, profiles=moved)


def _surface_first(ds, name, grid):
    values = ds[name].values
    return values if grid[0] > grid[-1] else values[:, ::-1]


@pytest.fixture
def emulated_case(tiny_bundle, demo_instrument):
    from rtemu.runtime import EmulatedOperator
    from rtemu.sampling import draw_states

    op = EmulatedOperator.load(tiny_bundle)
    # In-envelope profiles drawn like the training set (another seed), on the bundle's grid.
    ds = draw_states(6, seed=11, pressure_hpa=op.pressure_hpa, channels=demo_instrument)
    ds = ds[["air_pressure", "air_temperature", "specific_humidity", "surface_temperature",
             "surface_emissivity", "sensor_zenith_angle"]]
    # Room for the +-0.2 x 0.01 emissivity steps of the finite differences (drawn IR values reach 1).
    ds["surface_emissivity"] = ds["surface_emissivity"].clip(max=0.99)
    # float32 arithmetic: ~2e-5 K round-off in BT limits the finite-difference checks.
    return Case(op, ds, fd_rel_tol=2e-2, taylor_min_ratio=3.0, adjoint_rel_tol=1e-10)


def _with_coordinates(ds):
    """``ds`` with coordinates of every kind the outputs carry (or drop), channels shuffled."""
    n, nlev = ds.sizes["profile"], ds.sizes["level"]
    out = ds.assign_coords(
        profile=np.arange(n) * 10 + 3,
        latitude=("profile", np.linspace(-30.0, 30.0, n)),
        level=np.arange(nlev),
        level_name=("level", [f"L{i}" for i in range(nlev)]),
        scan_time=np.datetime64("2001-02-03T04:05"),  # scalar coordinate
        patch=(("profile", "level"), np.zeros((n, nlev))),  # neither profile nor level alone
    )
    if "channel" in out["surface_emissivity"].dims:
        out = out.isel(channel=np.arange(out.sizes["channel"])[::-1])
    return out


def _labelled_through_dataarrays(out, ds, channels):
    """``out`` relabelled the way xarray builds a Dataset from the DataArrays
    ``ds.coords["profile"]`` and ``ds.coords["level"]`` (the coordinates they carry, default
    indexes), independent of rtemu's labelling code."""
    coords = {d: ds.coords[d] for d in ("profile", "level") if d in ds.coords}
    coords["channel"] = ("channel", np.array(list(channels), dtype=object))
    return xr.Dataset({k: (v.dims, v.values, v.attrs) for k, v in out.data_vars.items()},
                      coords=coords, attrs=out.attrs)


def _assert_labelled_like_physics(op, out, ds, jacobian):
    """``out`` is labelled as rtemu.physics.simulate labels the same inputs (identical for
    the physical operator; for the emulator with its own values put in)."""
    from rtemu import physics

    reference = physics.simulate(op.instrument, ds, jacobian=jacobian, errors="mask") \
        if not _regrids(op) else op.simulate(ds, jacobian=jacobian)
    if isinstance(op, PhysicalOperator):
        xr.testing.assert_identical(out, reference)
        return
    # the emulator's own output, checked elsewhere (and in the reference of a regridding
    # emulator, which is that emulator's own output)
    out = out.drop_vars("brightness_temperature_uncertainty")
    reference = reference.drop_vars("brightness_temperature_uncertainty", errors="ignore")
    assert {k: v.dtype for k, v in out.variables.items()} == {k: v.dtype for k, v in reference.variables.items()}
    xr.testing.assert_identical(out, reference.copy(data={k: out[k].values for k in reference.data_vars}))


def _regrids(op) -> bool:
    return getattr(op, "grid_hpa", None) is not None or getattr(op, "regrid", False)


def test_outputs_labelled_like_the_physics_function(operator_case):
    """Both operators label their outputs with rtemu.physics.label_outputs (Variables, no
    DataArray, for speed): the result must be what rtemu.physics.simulate returns for the
    same inputs, and carry the coordinates xarray's own DataArray route gives."""
    op, ds = operator_case.operator, _with_coordinates(operator_case.profiles)
    for jacobian in (False, True):
        out = op.simulate(ds, jacobian=jacobian)
        _assert_labelled_like_physics(op, out, ds, jacobian)
        xr.testing.assert_identical(out, _labelled_through_dataarrays(out, ds, op.channels))
        assert set(out.coords) == {"profile", "latitude", "level", "level_name", "scan_time", "channel"}
    # The channel coordinate is cached: editing one output must not leak into the next.
    first = op.simulate(ds)
    first["channel"].attrs["edited"] = 1
    assert "edited" not in op.simulate(ds)["channel"].attrs
    # Nor into the caller's coordinates, which the outputs carry.
    for name in ("profile", "latitude", "level", "level_name", "scan_time"):
        first[name].attrs["edited"] = 1
        assert "edited" not in ds[name].attrs, name


def test_dimension_coordinates_get_default_indexes(operator_case):
    """An unindexed ``profile`` coordinate or a non-pandas index on ``level`` comes out with
    xarray's default pandas index, as through xarray's DataArray route, for every operator."""
    from xarray.indexes import PandasIndex

    op, ds = operator_case.operator, operator_case.profiles
    n, nlev = ds.sizes["profile"], ds.sizes["level"]
    ds = ds.assign_coords(profile=np.arange(n) + 7).drop_indexes("profile")
    ds = ds.assign_coords(xr.Coordinates.from_xindex(
        xr.indexes.RangeIndex.arange(0.0, float(nlev), 1.0, dim="level")))
    assert "profile" not in ds.xindexes and not isinstance(ds.xindexes["level"], PandasIndex)
    for jacobian in (False, True):
        out = op.simulate(ds, jacobian=jacobian)
        assert isinstance(out.xindexes["profile"], PandasIndex)
        assert isinstance(out.xindexes["level"], PandasIndex)
        _assert_labelled_like_physics(op, out, ds, jacobian)
        xr.testing.assert_identical(out, _labelled_through_dataarrays(out, ds, op.channels))


def test_repeated_emissivity_channel_refused(operator_case):
    op, ds = operator_case.operator, operator_case.profiles
    if "channel" not in ds["surface_emissivity"].dims:
        pytest.skip("scalar emissivity")
    ids = list(op.channels)
    twice = ds.isel(channel=[0] + list(range(len(ids))))
    with pytest.raises(ValueError, match=r"surface_emissivity: channel\(s\) \['%s'\] repeated" % ids[0]):
        op.simulate(twice)
