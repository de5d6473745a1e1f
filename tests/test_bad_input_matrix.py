"""The bad-input matrix (DEVELOPERS.md, "Bad input"), run against every operator and the CLI.

Each case is either *refused* (ValueError naming the variable and the rule; the CLI exits 2
with that message and writes nothing) or *flagged* (the named profile gets NaN outputs and
its flag bit, every other profile is bit-for-bit what it is alone).
"""

from __future__ import annotations

import dataclasses
from typing import Callable

import numpy as np
import pytest
import xarray as xr

from rtemu import flags
from rtemu._io import open_dataset, to_netcdf_atomic
from rtemu.cli import main
from rtemu.runtime import PhysicalOperator

BAD = 1  # the profile index every flagged case spoils


def _set(name, value, level=None):
    def mutate(ds):
        ds = ds.copy(deep=True)
        if ds[name].ndim == 1:
            ds[name][BAD] = value
        else:
            ds[name][BAD, 0 if level is None else level] = value
        return ds
    return mutate


def _scale_var(name, factor=None, offset=None, units=None):
    def mutate(ds):
        ds = ds.copy(deep=True)
        da = ds[name]
        if factor is not None:
            da = da * factor
        if offset is not None:
            da = da + offset
        ds[name] = da.assign_attrs(ds[name].attrs | ({"units": units} if units else {}))
        return ds
    return mutate


def _profile_level_pressure(transform):
    def mutate(ds):
        ds = ds.copy(deep=True)
        p = np.broadcast_to(ds["air_pressure"].values, (ds.sizes["profile"], ds.sizes["level"])).copy()
        p[BAD] = transform(p[BAD])
        return ds.assign(air_pressure=(("profile", "level"), p, {"units": "hPa"}))
    return mutate


def _supersaturate(ds):
    ds = ds.copy(deep=True)
    ds["specific_humidity"][BAD, :5] = 0.05  # far above saturation near the surface (< 0.1)
    return ds


@dataclasses.dataclass
class Case:
    name: str
    mutate: Callable
    outcome: str  # "flag" (BAD profile, bit), "refuse" (message parts), "ok"
    words: tuple = ()
    bit: int = flags.INVALID_INPUT


def _repeat_level(p):
    p = p.copy()
    p[3] = p[2]
    return p


def _swap_levels(p):
    p = p.copy()
    p[[3, 4]] = p[[4, 3]]
    return p


CASES = [
    *[Case(f"nan in {v}", _set(v, np.nan), "flag", (v, "non-finite"))
      for v in ("air_temperature", "specific_humidity", "surface_temperature",
                "surface_emissivity", "sensor_zenith_angle")],
    *[Case(f"inf in {v}", _set(v, np.inf), "flag", (v, "non-finite"))
      for v in ("air_temperature", "specific_humidity", "surface_temperature")],
    Case("nan in per-profile air_pressure", _profile_level_pressure(lambda p: np.where(np.arange(p.size) == 2, np.nan, p)),
         "flag", ("air_pressure", "non-finite")),
    Case("negative humidity", _set("specific_humidity", -1e-4, 2), "flag", ("specific_humidity", "0 <= q")),
    Case("supersaturated humidity", _supersaturate, "flag", (), flags.SUPERSATURATED),
    Case("humidity >= 0.1", _set("specific_humidity", 0.2, 0), "flag", ("specific_humidity",)),
    Case("celsius labelled K", _scale_var("air_temperature", offset=-273.15), "refuse",
         ("air_temperature", "units?", "Celsius labelled K")),
    Case("kPa labelled hPa", _scale_var("air_pressure", factor=0.1), "refuse",
         ("air_pressure", "units?", "kPa labelled hPa")),
    Case("celsius in UDUNITS spelling", _scale_var("air_temperature", offset=-273.15, units="degree_Celsius"),
         "ok"),
    Case("hectopascal, a UDUNITS spelling", _scale_var("air_pressure", units="hectopascal"), "ok"),
    Case("variable found by standard_name", lambda ds: ds.rename_vars(air_temperature="ta").assign(
        ta=lambda d: d["ta"].assign_attrs(standard_name="air_temperature")),
        "ok"),
    Case("pressure in Pa labelled hPa", _scale_var("air_pressure", factor=100.0), "flag_all",
         ("air_pressure", "Pa labelled hPa")),
    Case("reversed levels", lambda ds: ds.isel(level=slice(None, None, -1)), "ok"),
    Case("non-monotonic levels", _profile_level_pressure(_swap_levels), "flag",
         ("air_pressure", "strictly monotonic")),
    Case("repeated level", _profile_level_pressure(_repeat_level), "flag", ("air_pressure", "repeated")),
    Case("zenith 90", _set("sensor_zenith_angle", 90.0), "flag", ("sensor_zenith_angle", "85")),
    Case("zenith 120", _set("sensor_zenith_angle", 120.0), "flag", ("sensor_zenith_angle", "85")),
    Case("emissivity above 1", _set("surface_emissivity", 1.2), "flag", ("surface_emissivity", "[0, 1]")),
    Case("wrong dims", lambda ds: ds.assign(air_temperature=ds["air_temperature"].transpose("level", "profile")
                                              .rename(level="lev")), "refuse", ("air_temperature", "dims")),
    Case("missing variable", lambda ds: ds.drop_vars("surface_temperature"), "refuse",
         ("surface_temperature", "missing")),
    Case("unknown units", _scale_var("specific_humidity", units="ppmv"), "refuse",
         ("specific_humidity", "unknown units")),
    Case("extra unknown channel", lambda ds: xr.concat(
        [ds["surface_emissivity"], ds["surface_emissivity"].isel(channel=[0]).assign_coords(channel=["zz-extra"])],
        dim="channel").to_dataset().merge(ds.drop_vars(["surface_emissivity", "channel"]), compat="override"),
        "refuse", ("surface_emissivity", "zz-extra")),
    Case("empty dataset", lambda ds: ds.isel(profile=slice(0, 0)), "refuse", ("empty",)),
    Case("single profile", lambda ds: ds.isel(profile=slice(1, 2)), "ok"),
]


def _check_outcome(case, run, ds):
    mutated = case.mutate(ds)
    if case.outcome == "refuse":
        with pytest.raises(ValueError) as info:
            run(mutated)
        for word in case.words:
            assert word in str(info.value), (case.name, str(info.value))
        return
    out = run(mutated)
    bt = out["brightness_temperature"].values
    qf = out["quality_flag"].values
    if case.outcome == "ok":
        clean = run(ds)
        sel = mutated["profile"].values if "profile" in mutated.coords else slice(None)
        # rtol 4 float32 epsilons: the emulator's float32 graph may round differently for
        # another batch size (measured: 3.05e-5 K, 2 ulp at 259 K, one channel of one profile)
        np.testing.assert_allclose(bt, clean["brightness_temperature"].sel(profile=sel).values,
                                   rtol=4 * np.finfo(np.float32).eps, atol=1e-9)
        assert (qf == 0).all()
        return
    rows = list(range(bt.shape[0])) if case.outcome == "flag_all" else [BAD]
    for i in rows:
        assert (qf[i] & case.bit).all(), (case.name, qf[i])
    if case.bit == flags.INVALID_INPUT:
        assert np.isnan(bt[rows]).all()
        summary = out.attrs.get("invalid_input_summary", "")
        for word in case.words:
            assert word in summary, (case.name, summary)
        assert f"profile index {rows[0]}" in summary
    if case.outcome == "flag":
        clean = run(ds)
        others = [i for i in range(bt.shape[0]) if i != BAD]
        np.testing.assert_array_equal(bt[others], clean["brightness_temperature"].values[others])
        assert (qf[others] == clean["quality_flag"].values[others]).all()


@pytest.fixture(scope="module")
def matrix_profiles(small_profiles):
    return small_profiles(n=4, nlev=30, seed=9)


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.name)
def test_physical_operator(case, matrix_profiles):
    op = PhysicalOperator("demo-sounder")
    _check_outcome(case, lambda ds: op.simulate(ds, jacobian=True), matrix_profiles)


@pytest.mark.parametrize("case", [c for c in CASES if c.outcome != "ok" or c.name == "single profile"],
                         ids=lambda c: c.name)
def test_physical_operator_raise_mode(case, matrix_profiles):
    """With errors="raise" every flagged invalid input becomes a ValueError naming the profile."""
    op = PhysicalOperator("demo-sounder", errors="raise")
    mutated = case.mutate(matrix_profiles)
    if case.outcome in ("flag", "flag_all") and case.bit == flags.INVALID_INPUT or case.outcome == "refuse":
        with pytest.raises(ValueError) as info:
            op.simulate(mutated)
        for word in case.words:
            assert word in str(info.value)
        if case.outcome != "refuse":
            assert f"profile index {BAD if case.outcome == 'flag' else 0}" in str(info.value)
    else:
        op.simulate(mutated)


@pytest.mark.parametrize("case", [c for c in CASES if c.name in (
    "nan in air_temperature", "celsius labelled K", "missing variable", "unknown units", "empty dataset",
    "emissivity above 1")], ids=lambda c: c.name)
def test_cli(case, matrix_profiles, tmp_path, capsys):
    source = tmp_path / "in.nc"
    target = tmp_path / "out.nc"
    to_netcdf_atomic(case.mutate(matrix_profiles), source)
    code = main(["simulate", "--instrument", "demo-sounder", "--input", str(source),
                 "--output", str(target), "--quiet"])
    if case.outcome == "refuse":
        assert code == 2
        err = capsys.readouterr().err
        for word in case.words:
            assert word in err
        assert not target.exists()
        return
    assert code == 0
    with open_dataset(target) as out:
        rows = [BAD] if case.outcome == "flag" else list(range(out.sizes["profile"]))
        assert (out["quality_flag"].values[rows] & flags.INVALID_INPUT).all()
        assert np.isnan(out["brightness_temperature"].values[rows]).all()


def test_million_profile_lazy_dataset_stays_lazy():
    """A million profiles, dask-backed: simulate builds a lazy graph; a slice computes."""
    import dask.array as da

    from rtemu.atmosphere import default_pressure_grid, us_standard_atmosphere_1976

    n = 1_000_000
    p = default_pressure_grid()
    t0 = us_standard_atmosphere_1976(p)
    chunks = 5_000
    ds = xr.Dataset(
        {
            "air_pressure": (("level",), p),
            "air_temperature": (("profile", "level"), da.broadcast_to(t0, (n, p.size), chunks=(chunks, p.size))),
            "specific_humidity": (("profile", "level"), da.full((n, p.size), 3e-6, chunks=(chunks, p.size))),
            "surface_temperature": (("profile",), da.full(n, float(t0[0]), chunks=chunks)),
            "surface_emissivity": (("profile",), da.full(n, 0.9, chunks=chunks)),
            "sensor_zenith_angle": (("profile",), da.zeros(n, chunks=chunks)),
        }
    )
    out = PhysicalOperator("demo-sounder").simulate(ds)
    assert out["brightness_temperature"].shape == (n, 16)
    assert out["brightness_temperature"].chunks is not None
    part = out["brightness_temperature"].isel(profile=slice(0, 3)).compute()
    assert np.isfinite(part.values).all()


@pytest.fixture(scope="module")
def emulator_profiles(tiny_bundle, demo_instrument):
    from rtemu.runtime import EmulatedOperator
    from rtemu.sampling import draw_states

    op = EmulatedOperator.load(tiny_bundle)
    ds = draw_states(4, seed=21, pressure_hpa=op.pressure_hpa, channels=demo_instrument)
    return op, ds[["air_pressure", "surface_air_pressure", "air_temperature", "specific_humidity",
                   "surface_temperature", "surface_emissivity", "sensor_zenith_angle"]].load()


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.name)
def test_emulated_operator(case, emulator_profiles):
    op, ds = emulator_profiles
    _check_outcome(case, lambda d: op.simulate(d, jacobian=True), ds)


def test_emulated_operator_refuses_another_grid(emulator_profiles):
    op, ds = emulator_profiles
    other = ds.assign(air_pressure=ds["air_pressure"] * 0.98)
    with pytest.raises(ValueError, match="air_pressure.*emulator's grid"):
        op.simulate(other)
