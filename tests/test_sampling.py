"""Tests of the state generator and the training-set writer (rtemu.sampling)."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from rtemu import atmosphere as atm
from rtemu import physics
from rtemu import sampling
from rtemu._warnings import RtemuWarning
from rtemu.constants import STANDARD_GRAVITY
from rtemu.instrument import Instrument, load_instrument

REPO = Path(__file__).resolve().parents[1]
R_DRY = 287.05  # [J kg-1 K-1], dry-air gas constant (common practice value)


@pytest.fixture(scope="module")
def inst():
    return load_instrument("demo-sounder")


@pytest.fixture(scope="module")
def states(inst):
    return sampling.draw_states(4096, seed=11, channels=inst)


# --- envelope coverage ------------------------------------------------------------------------

def _ranges():
    return sampling.envelope_description()["ranges"]


def test_regime_weights_are_the_shares_drawn(states):
    regimes = sampling.envelope_description()["regimes"]
    weights = np.array([r["weight"] for r in regimes.values()])
    assert weights.sum() == pytest.approx(1.0)
    share = np.bincount(states.climate_regime.values, minlength=weights.size) / states.sizes["profile"]
    # one Sobol' coordinate picks the regime: the shares are stratified, within 1 %
    np.testing.assert_allclose(share, weights, atol=0.01)
    assert list(states.climate_regime.attrs["flag_meanings"].split()) == list(regimes)


def test_surface_air_temperature_and_pressure_cover_ranges(states):
    ranges = _ranges()
    t0 = states.surface_air_temperature.values
    # high ground: the range is for air reduced to 1013.25 hPa at 6.5 K/km (hydrostatic:
    # T_s = T (ps / 1013.25) ** (0.0065 R_d / g)), so 240 K at 500 hPa is 209.8 K
    coldest = 240.0 * (500.0 / 1013.25) ** (0.0065 * R_DRY / STANDARD_GRAVITY)
    assert t0.min() >= coldest - 1e-9 and t0.max() <= ranges["surface_air_temperature"]["max"]
    assert t0.max() > 317.0 and t0.min() < 222.0
    ps = states.surface_air_pressure.values
    assert ps.min() >= 500.0 and ps.max() <= 1060.0
    assert ps.min() < 510.0 and ps.max() > 1055.0
    # every surface lies inside the default grid (bottom 1100 hPa)
    assert np.all(ps <= states.air_pressure.values[0])
    # below the ground the levels hold the surface air temperature, so the air interpolated
    # to the ground (linear in ln p) lies between it and the first level above the ground
    p = states.air_pressure.values
    t = states.air_temperature.values
    t_at = atm.value_at_pressure(p, t, ps)
    above = np.argmax(p[None, :] < ps[:, None], axis=1)
    t_above = t[np.arange(t.shape[0]), above]
    assert np.all((t_at - np.minimum(t0, t_above) >= -1e-9) & (t_at - np.maximum(t0, t_above) <= 1e-9))
    below = p[None, :] >= ps[:, None]
    assert np.all(np.where(below, t == t0[:, None], True))


def test_column_water_matches_trapezoid_above_the_ground(states):
    w = states.total_column_water_vapour.values
    # Independent recomputation: hydrostatic column mass dp/g with the trapezoid rule (the
    # physics model's rule, rtemu.physics docstring eq. 2) over the levels above the ground,
    # plus the layer from the ground (q interpolated linearly in ln p there) to the first level.
    p = states.air_pressure.values
    q = states.specific_humidity.values
    ps = states.surface_air_pressure.values
    expected = np.zeros(len(w))
    for i in range(len(w)):
        k = int(np.argmax(p < ps[i]))  # first level above the ground
        x = (np.log(ps[i]) - np.log(p[k - 1])) / (np.log(p[k]) - np.log(p[k - 1]))
        q_s = q[i, k - 1] + x * (q[i, k] - q[i, k - 1])
        expected[i] = 0.5 * (q_s + q[i, k]) * (ps[i] - p[k])
        expected[i] += np.sum(0.5 * (q[i, k:-1] + q[i, k + 1:]) * (p[k:-1] - p[k + 1:]))
    np.testing.assert_allclose(w, expected * 100.0 / STANDARD_GRAVITY, rtol=1e-10)
    assert w.max() < 90.0 and w.min() > 0.0


def test_humidity_limits(states):
    p = states.air_pressure.values
    t = states.air_temperature.values
    q = states.specific_humidity.values
    rh = atm.relative_humidity(q, t, p)
    assert np.all(rh <= 1.0)
    assert rh.max() > 0.99 and rh.min() < 1e-3
    assert np.all(q >= 1e-7) and np.all(q < 0.1)


def test_temperature_validity_and_skin_offset(states):
    t = states.air_temperature.values
    assert t.min() >= 150.0 and t.max() <= 390.0
    offset = states.surface_temperature.values - states.surface_air_temperature.values
    lo, hi = _ranges()["skin_minus_air_temperature"]["min"], _ranges()["skin_minus_air_temperature"]["max"]
    assert np.all((offset >= lo) & (offset <= hi))
    assert offset.min() < lo + 0.5 and offset.max() > hi - 0.5


def test_emissivity_by_channel_kind(states, inst):
    em = states.surface_emissivity.values
    assert em.shape == (4096, len(inst.channels))
    mw = inst.is_microwave
    assert em[:, mw].min() >= 0.4 and em[:, mw].max() <= 1.0
    assert em[:, ~mw].min() >= 0.9 and em[:, ~mw].max() <= 1.0
    assert em[:, mw].min() < 0.42 and em[:, ~mw].min() < 0.905
    # per-channel variation exists within a profile
    assert np.median(np.ptp(em[:, mw], axis=1)) > 0.01


def test_zenith_range(states):
    z = states.sensor_zenith_angle.values
    assert z.min() >= 0.0 and z.max() <= 65.0
    assert z.min() < 1.0 and z.max() > 64.0


def test_tropopause_band_by_regime(states):
    # The band's line passes through the US 1976 tropopause: 216.65 K at 226.32 hPa
    # (U.S. Standard Atmosphere 1976, 11 km' geopotential); the mid-latitude band holds it.
    lo, hi = sampling.tropopause_temperature_band([226.32])
    assert lo[0] < 216.65 < hi[0]
    # A tropical tropopause near 100 hPa sits at about 190-195 K (textbook value, from
    # memory): the band there must contain that and exclude a 30-K warmer one.
    lo, hi = sampling.tropopause_temperature_band([100.0])
    assert lo[0] < 190.0 and hi[0] > 195.0 and hi[0] < 190.0 + 30.0
    # A polar-night tropopause near 300 hPa is at about 210-220 K (from memory).
    lo, hi = sampling.tropopause_temperature_band([300.0])
    assert lo[0] < 210.0 and hi[0] > 220.0
    # no regime draws a tropopause at 50 or 500 hPa
    assert np.isnan(sampling.tropopause_temperature_band([50.0, 500.0])).all()
    # The drawn tropopause temperature keeps to the band unless the lapse-rate range
    # cannot reach it; then it sits on a lapse-rate limit.
    pt = states.tropopause_pressure.values
    tt = states.tropopause_temperature.values
    assert pt.min() >= 80.0 and pt.max() <= 400.0
    lo, hi = sampling.tropopause_temperature_band(pt)
    inside = (tt >= lo - 1e-9) & (tt <= hi + 1e-9)
    assert inside.mean() > 0.95
    regimes = sampling.envelope_description()["regimes"]
    limits = np.array([r["ranges"]["tropospheric_lapse_rate"] for r in regimes.values()])[
        states.climate_regime.values]
    lapse = states.tropospheric_lapse_rate.values
    edge = np.isclose(lapse, limits[:, 0], atol=1e-6) | np.isclose(lapse, limits[:, 1], atol=1e-6)
    assert np.all(edge[~inside])
    assert np.all((lapse >= limits[:, 0] - 1e-6) & (lapse <= limits[:, 1] + 1e-6))


# --- the regimes measured against climatological facts -------------------------------------------

def _climatology():
    import importlib.util

    spec = importlib.util.spec_from_file_location("generator_climatology",
                                                  REPO / "benchmarks" / "generator_climatology.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def facts(inst):
    states = sampling.draw_states(2000, seed=17, channels=inst)
    names = list(sampling.envelope_description()["regimes"])
    d = _climatology().diagnostics(states)
    return {name: {k: v[d["regime"] == i] for k, v in d.items()} for i, name in enumerate(names)} | {"all": d}


def test_column_water_close_to_climatology(facts):
    # Global total column water vapour: mean about 25 kg m-2, median about 20 (from memory;
    # e.g. Trenberth, Fasullo and Smith 2005, Clim. Dyn. 24, 741, give a global mean of
    # about 24.5 kg m-2); the moist tropics reach about 70 kg m-2, polar winter stays below 5.
    w = facts["all"]["tcwv"]
    assert 15.0 < np.median(w) < 25.0
    assert 20.0 < np.mean(w) < 30.0
    tropics = facts["tropical_moist"]["tcwv"]
    assert 35.0 < np.median(tropics) < 55.0 and 65.0 < tropics.max() < 85.0
    assert np.percentile(facts["polar_winter"]["tcwv"], 95) < 6.0
    # subsiding air is dry aloft: 500 hPa RH median below 30 % (subtropics), above 40 %
    # in the tropics (common knowledge of the Hadley circulation)
    assert np.median(facts["subtropical_subsidence"]["rh500"]) < 0.3
    assert np.median(facts["tropical_moist"]["rh500"]) > 0.4


def test_tropics_follow_the_pseudo_adiabat(facts):
    # Tropical columns are close to the pseudo-adiabat of their surface air (Holton 2004
    # ch. 11, from memory): 850-500 hPa lapse rates of 4-6 K/km, and most columns within 3 K
    # of the parcel at 500 hPa (the construction cools them 0-3 K below it, plus 1 K noise).
    tropics = facts["tropical_moist"]
    departure = tropics["moist_adiabat_departure_500"]
    assert np.mean(np.abs(departure) <= 3.0) > 0.75
    assert 4.0 < np.median(tropics["lapse_850_500"]) < 6.0
    # mid-latitude and desert columns lapse faster (6-8 K/km, dry-adiabatic mixed layers)
    assert np.median(facts["hot_desert"]["lapse_850_500"]) > 6.5


def test_tropopause_heights_by_regime(facts):
    # Lapse-rate tropopauses (rtemu.atmosphere.lapse_rate_tropopause) near 100 hPa and
    # 185-200 K in the tropics, 250-400 hPa and below 225 K in polar winter (from memory).
    tropics, polar = facts["tropical_moist"], facts["polar_winter"]
    assert 85.0 < np.nanmedian(tropics["tropopause_pressure"]) < 125.0
    assert 185.0 < np.nanmedian(tropics["tropopause_temperature"]) < 200.0
    assert 250.0 < np.nanmedian(polar["tropopause_pressure"]) < 400.0
    assert np.nanmedian(polar["tropopause_temperature"]) < 225.0
    all_p = facts["all"]["tropopause_pressure"]
    assert np.nanmin(all_p) < 90.0 and np.nanmax(all_p) > 350.0


def test_stratopause_lowered_in_warmings(facts):
    # A sudden stratospheric warming brings the stratopause down to 5-10 hPa; otherwise it
    # is near 1 hPa (US 1976: 1.1 hPa).
    warm = facts["stratospheric_warming"]["stratopause_pressure"]
    assert np.mean((warm >= 4.0) & (warm <= 11.0)) > 0.8
    others = facts["all"]["stratopause_pressure"][facts["all"]["regime"] != list(
        sampling.envelope_description()["regimes"]).index("stratospheric_warming")]
    assert np.median(others) < 2.5


def test_polar_inversions_and_desert_skin(facts):
    # Polar-night surface inversions up to about 25 K (from memory); hot-desert ground up to
    # about 25 K above the air by day.
    inv = facts["polar_winter"]["surface_inversion"]
    assert 20.0 < inv.max() < 28.0 and np.median(inv) > 5.0
    skin = facts["hot_desert"]["skin_minus_air"]
    assert 20.0 < skin.max() < 26.0
    # high terrain: surface pressures 500-850 hPa
    ps = facts["high_terrain"]["surface_pressure"]
    assert ps.min() >= 500.0 and ps.max() <= 850.0


def test_envelope_description_and_covered_envelope(states, inst):
    nominal = json.loads(states.attrs["rtemu_envelope"])
    assert nominal == json.loads(json.dumps(sampling.envelope_description()))
    ranges = nominal["ranges"]
    covered = json.loads(states.attrs["rtemu_covered_envelope"])
    for key in ("sensor_zenith_angle", "surface_emissivity_microwave", "surface_emissivity_infrared",
                "surface_air_pressure"):
        assert covered[key]["min"] >= ranges[key]["min"]
        assert covered[key]["max"] <= ranges[key]["max"]
    assert covered["tropopause_pressure"]["min"] >= 80.0 and covered["tropopause_pressure"]["max"] <= 400.0
    # skin minus the air at the surface pressure (interpolated in ln p, between the drawn
    # surface air and the level above the ground) stays within 4 K of the range (measured:
    # the interpolated air departs from the drawn one by at most 3.4 K on 4,096 draws, in
    # thin strong inversions)
    assert covered["skin_minus_air_temperature"]["min"] >= ranges["skin_minus_air_temperature"]["min"] - 4.0
    assert covered["skin_minus_air_temperature"]["max"] <= ranges["skin_minus_air_temperature"]["max"] + 4.0
    assert covered["relative_humidity"]["max"] <= 1.0
    assert covered["specific_humidity"]["min"] >= ranges["specific_humidity_floor"]["min"]


def test_stratospheric_humidity_has_vertical_structure(inst):
    # Generator version 2: stratospheric ln q is not one value per profile but varies with
    # height (drawn gradient + correlated perturbation), so a background with some vertical
    # structure there stays inside the emulator's training span.
    ds = sampling.draw_states(2000, seed=3, channels=inst)
    p = ds.air_pressure.values
    lnq = np.log(ds.specific_humidity.transpose("profile", "level").values)
    i50, i10, i2 = (int(np.argmin(abs(p - v))) for v in (50.0, 10.0, 2.0))
    assert np.std(lnq[:, i10] - lnq[:, i50]) > 0.1
    # the second difference is not zero either (not a straight line in every profile)
    curvature = lnq[:, i2] - 2 * lnq[:, i10] + lnq[:, i50]
    assert np.std(curvature) > 0.05
    # and the values stay plausible: 1-20 mg/kg (0.5 % / 99.5 % quantiles; common practice:
    # stratospheric water vapour is a few ppmv)
    q10 = ds.specific_humidity.transpose("profile", "level").values[:, i10]
    assert 1e-6 < np.quantile(q10, 0.005) and np.quantile(q10, 0.995) < 2e-5


# --- determinism ------------------------------------------------------------------------------

def test_same_seed_same_numbers_other_seed_other_numbers(inst):
    a = sampling.draw_states(300, seed=5, channels=inst)
    sampling._cached_block.cache_clear()
    b = sampling.draw_states(300, seed=5, channels=inst)
    xr.testing.assert_identical(a, b)
    c = sampling.draw_states(300, seed=6, channels=inst)
    assert not np.array_equal(a.air_temperature.values, c.air_temperature.values)


def test_profiles_independent_of_slicing(inst):
    whole = sampling.draw_states(2600, seed=3, channels=inst)
    sampling._cached_block.cache_clear()
    part = sampling.draw_states(700, seed=3, start=1500, channels=inst)  # spans block 1 and 2
    xr.testing.assert_identical(part.drop_attrs(), whole.isel(profile=slice(1500, 2200)).drop_attrs())


def test_level_order_and_channel_list(inst):
    grid = atm.default_pressure_grid()
    bottom_up = sampling.draw_states(50, seed=9, channels=inst)
    top_down = sampling.draw_states(50, seed=9, pressure_hpa=grid[::-1], channels=inst)
    np.testing.assert_array_equal(top_down.air_temperature.values, bottom_up.air_temperature.values[:, ::-1])
    np.testing.assert_array_equal(top_down.specific_humidity.values, bottom_up.specific_humidity.values[:, ::-1])
    # the channel kinds alone give the same numbers; no ids -> no channel coordinate
    kinds = sampling.draw_states(50, seed=9, channels=list(inst.is_microwave))
    np.testing.assert_array_equal(kinds.surface_emissivity.values, bottom_up.surface_emissivity.values)
    assert "channel" not in kinds.coords
    # temperature and humidity do not depend on the channels at all
    one = sampling.draw_states(50, seed=9, channels=[True])
    np.testing.assert_array_equal(one.air_temperature.values, bottom_up.air_temperature.values)


def test_custom_grid_keeps_rules():
    grid = np.geomspace(850.0, 10.0, 25)
    ds = sampling.draw_states(500, seed=1, pressure_hpa=grid, channels=[True, False])
    rh = atm.relative_humidity(ds.specific_humidity.values, ds.air_temperature.values, grid)
    assert np.all(rh <= 1.0) and np.all(ds.specific_humidity.values >= 1e-7)
    np.testing.assert_array_equal(ds.air_pressure.values, grid)


# --- bad input --------------------------------------------------------------------------------

@pytest.mark.parametrize("count", [0, -3, 1.5, True, "10"])
def test_bad_count(count):
    with pytest.raises(ValueError, match="count"):
        sampling.draw_states(count, seed=1, channels=[True])


@pytest.mark.parametrize("seed", [-1, 2**63, 1.0, None, "7", False])
def test_bad_seed(seed):
    with pytest.raises(ValueError, match="seed"):
        sampling.draw_states(10, seed=seed, channels=[True])


@pytest.mark.parametrize("grid, message", [
    ([1000.0, 500.0, 700.0, 100.0], r"not monotonic at level 2"),
    ([1000.0, 500.0, -1.0], r"level 2 is -1.0"),
    ([1000.0, 500.0, 500.0, 100.0], r"repeats 500.0"),
    ([[1000.0, 500.0]], r"one-dimensional"),
    ([300.0, 100.0, 10.0], r"between 400 and 1100"),
    ([1000.0], r"at least 2 levels"),
    ([1000.0, np.nan], r"level 1 is nan"),
])
def test_bad_grid(grid, message):
    with pytest.raises(ValueError, match=message):
        sampling.draw_states(10, seed=1, pressure_hpa=grid, channels=[True])


def test_bad_start_and_channels():
    with pytest.raises(ValueError, match="start"):
        sampling.draw_states(10, seed=1, start=-1, channels=[True])
    with pytest.raises(ValueError, match="channels"):
        sampling.draw_states(10, seed=1, channels=[])


# --- the writer -------------------------------------------------------------------------------

def _write(tmp_path, name, inst, **kwargs):
    kwargs.setdefault("count", 300)
    kwargs.setdefault("seed", 4)
    kwargs.setdefault("chunk_size", 128)
    kwargs.setdefault("progress", False)
    return sampling.sample_to_netcdf(inst, tmp_path / name, **kwargs)


def test_file_schema_and_values(tmp_path, inst):
    path = _write(tmp_path, "train.nc", inst, jacobian=True)
    assert path == tmp_path / "train.nc"
    assert not (tmp_path / "train.nc.chunks").exists()
    assert sorted(os.listdir(tmp_path)) == ["train.nc"]
    with xr.open_dataset(path, engine="h5netcdf") as ds:
        assert dict(ds.sizes) == {"profile": 300, "level": 64, "channel": 16}
        assert list(ds.channel.values) == list(inst.channel_ids)
        expect_dims = {
            "air_pressure": ("level",), "air_temperature": ("profile", "level"),
            "specific_humidity": ("profile", "level"), "surface_temperature": ("profile",),
            "surface_emissivity": ("profile", "channel"), "sensor_zenith_angle": ("profile",),
            "surface_air_pressure": ("profile",),
            "total_column_water_vapour": ("profile",), "brightness_temperature": ("profile", "channel"),
            "quality_flag": ("profile", "channel"),
            "jacobian_air_temperature": ("profile", "channel", "level"),
            "jacobian_specific_humidity": ("profile", "channel", "level"),
            "jacobian_surface_temperature": ("profile", "channel"),
            "jacobian_surface_emissivity": ("profile", "channel"),
        }
        for name, dims in expect_dims.items():
            assert ds[name].dims == dims, name
        # CF standard names (CF standard name table) and units
        for name, std, units in [("air_pressure", "air_pressure", "hPa"),
                                 ("air_temperature", "air_temperature", "K"),
                                 ("specific_humidity", "specific_humidity", "kg kg-1"),
                                 ("surface_temperature", "surface_temperature", "K"),
                                 ("sensor_zenith_angle", "sensor_zenith_angle", "degree"),
                                 ("surface_air_pressure", "surface_air_pressure", "hPa"),
                                 ("total_column_water_vapour", "atmosphere_mass_content_of_water_vapor",
                                  "kg m-2"),
                                 ("brightness_temperature", "toa_brightness_temperature", "K")]:
            assert ds[name].attrs["standard_name"] == std
            assert ds[name].attrs["units"] == units
            assert ds[name].attrs["long_name"]
        assert Instrument.from_toml(ds.attrs["rtemu_instrument_toml"]) == inst
        assert int(ds.attrs["rtemu_seed"]) == 4 and int(ds.attrs["rtemu_count"]) == 300
        assert json.loads(ds.attrs["rtemu_envelope"]) == json.loads(json.dumps(sampling.envelope_description()))
        covered = json.loads(ds.attrs["rtemu_covered_envelope"])
        assert covered["total_column_water_vapour"]["max"] == pytest.approx(
            float(ds.total_column_water_vapour.max()))
        assert ds.attrs["rtemu_generator_version"] == sampling.GENERATOR_VERSION
        assert not any("date" in k or "time" in k for k in ds.attrs)
        # the values are the generator's states and the model's outputs on them
        states = sampling.draw_states(300, seed=4, channels=inst)
        np.testing.assert_array_equal(ds.air_temperature.values, states.air_temperature.values)
        np.testing.assert_array_equal(ds.surface_emissivity.values, states.surface_emissivity.values)
        np.testing.assert_array_equal(ds.surface_air_pressure.values, states.surface_air_pressure.values)
        direct = physics.simulate(inst, states, jacobian=True)
        np.testing.assert_allclose(ds.brightness_temperature.values, direct.brightness_temperature.values,
                                   rtol=1e-13)
        np.testing.assert_allclose(ds.jacobian_specific_humidity.values,
                                   direct.jacobian_specific_humidity.values, rtol=1e-12)
        assert np.all(ds.quality_flag.values == 0)


def test_bytes_reproducible_and_chunking_does_not_change_values(tmp_path, inst):
    a = _write(tmp_path / "a", "t.nc", inst)
    time.sleep(1.1)  # a creation timestamp, if any were written, would now differ
    b = _write(tmp_path / "b", "t.nc", inst)
    assert a.read_bytes() == b.read_bytes()
    c = _write(tmp_path / "c", "t.nc", inst, chunk_size=77)
    with xr.open_dataset(a, engine="h5netcdf") as da, xr.open_dataset(c, engine="h5netcdf") as dc:
        xr.testing.assert_identical(da, dc)


def test_one_and_two_workers_give_the_same_bytes(tmp_path, inst):
    one = _write(tmp_path / "one", "t.nc", inst, count=200, chunk_size=50, workers=1)
    two = _write(tmp_path / "two", "t.nc", inst, count=200, chunk_size=50, workers=2)
    assert one.read_bytes() == two.read_bytes()


def test_scheduler_address_gives_the_same_bytes(tmp_path, inst):
    distributed = pytest.importorskip("distributed")
    one = _write(tmp_path / "one", "t.nc", inst, count=200, chunk_size=50)
    # An in-process cluster starts fast; results travel back to the caller, which writes.
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=":0") as cluster:
        remote = _write(tmp_path / "remote", "t.nc", inst, count=200, chunk_size=50,
                        scheduler=cluster.scheduler_address)
    assert one.read_bytes() == remote.read_bytes()


def test_failure_leaves_no_output_and_rerun_completes(tmp_path, inst, monkeypatch):
    real = physics.simulate
    calls = []

    def failing(*args, **kwargs):
        calls.append(1)
        if len(calls) == 2:
            raise RuntimeError("simulated crash")
        return real(*args, **kwargs)

    monkeypatch.setattr(physics, "simulate", failing)
    with pytest.raises(RuntimeError, match="simulated crash"):
        _write(tmp_path, "t.nc", inst)
    assert sorted(os.listdir(tmp_path)) == ["t.nc.chunks"]  # no output, no partial file
    assert sorted(os.listdir(tmp_path / "t.nc.chunks")) == ["chunk-000000.h5", "manifest.json"]
    monkeypatch.setattr(physics, "simulate", real)
    _write(tmp_path, "t.nc", inst)
    assert sorted(os.listdir(tmp_path)) == ["t.nc"]


def test_failure_during_assembly_leaves_no_output(tmp_path, inst, monkeypatch):
    def broken_envelope(*args, **kwargs):
        raise RuntimeError("assembly crash")

    monkeypatch.setattr(sampling, "_envelope_of", broken_envelope)
    with pytest.raises(RuntimeError, match="assembly crash"):
        _write(tmp_path, "t.nc", inst)
    assert sorted(os.listdir(tmp_path)) == ["t.nc.chunks"]


def test_other_arguments_start_over_with_warning(tmp_path, inst, monkeypatch):
    real = physics.simulate
    calls = []

    def failing(*args, **kwargs):
        calls.append(1)
        if len(calls) == 2:
            raise RuntimeError("stop")
        return real(*args, **kwargs)

    monkeypatch.setattr(physics, "simulate", failing)
    with pytest.raises(RuntimeError):
        _write(tmp_path, "t.nc", inst, seed=1)
    monkeypatch.setattr(physics, "simulate", real)
    with pytest.warns(RtemuWarning, match="differing: seed"):
        _write(tmp_path, "t.nc", inst, seed=2)
    reference = _write(tmp_path / "ref", "t.nc", inst, seed=2)
    assert (tmp_path / "t.nc").read_bytes() == reference.read_bytes()


def test_foreign_side_directory_is_refused(tmp_path, inst):
    (tmp_path / "t.nc.chunks").mkdir()
    (tmp_path / "t.nc.chunks" / "notes.txt").write_text("mine")
    with pytest.raises(ValueError, match="not an rtemu chunk directory"):
        _write(tmp_path, "t.nc", inst)
    assert (tmp_path / "t.nc.chunks" / "notes.txt").read_text() == "mine"


def test_writer_argument_errors(tmp_path, inst):
    with pytest.raises(ValueError, match="count"):
        _write(tmp_path, "t.nc", inst, count=0)
    with pytest.raises(ValueError, match="seed"):
        _write(tmp_path, "t.nc", inst, seed=-2)
    with pytest.raises(ValueError, match="chunk_size"):
        _write(tmp_path, "t.nc", inst, chunk_size=0)
    with pytest.raises(ValueError, match="not monotonic"):
        _write(tmp_path, "t.nc", inst, pressure_hpa=[1000.0, 500.0, 800.0])
    with pytest.raises(ValueError, match="workers"):
        _write(tmp_path, "t.nc", inst, workers=0)
    with pytest.raises(ValueError, match="not both"):
        _write(tmp_path, "t.nc", inst, workers=2, scheduler="tcp://127.0.0.1:1")
    assert os.listdir(tmp_path) == []


def test_progress_bar(tmp_path, inst, capsys):
    _write(tmp_path / "quiet", "t.nc", inst, count=100, chunk_size=50, progress=False)
    assert "chunk" not in capsys.readouterr().err
    _write(tmp_path / "loud", "t.nc", inst, count=100, chunk_size=50, progress=True)
    assert "2/2" in capsys.readouterr().err


_SLOW_RUN = """
import sys, time
import rtemu.physics as physics
real = physics.simulate
def slow(*args, **kwargs):
    time.sleep(0.05)  # make the run long enough to interrupt
    return real(*args, **kwargs)
physics.simulate = slow
from rtemu.sampling import sample_to_netcdf
sample_to_netcdf("demo-sounder", sys.argv[1], count=1200, seed=7, chunk_size=40, progress=False)
"""


def test_resume_after_kill_gives_identical_bytes(tmp_path, inst, monkeypatch):
    output = tmp_path / "run" / "t.nc"
    output.parent.mkdir()
    side = output.parent / "t.nc.chunks"
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")]))
    proc = subprocess.Popen([sys.executable, "-c", _SLOW_RUN, str(output)], env=env)
    try:
        deadline = time.monotonic() + 60.0
        while time.monotonic() < deadline and proc.poll() is None:
            if side.is_dir() and len(list(side.glob("chunk-*.h5"))) >= 4:
                break
            time.sleep(0.01)
        assert proc.poll() is None, "the run ended before it could be interrupted"
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert not output.exists()
    done = len(list(side.glob("chunk-*.h5")))
    assert 4 <= done < 30

    real = physics.simulate
    calls = []

    def counting(*args, **kwargs):
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(physics, "simulate", counting)
    sampling.sample_to_netcdf(inst, output, count=1200, seed=7, chunk_size=40, progress=False)
    assert len(calls) == 30 - done  # finished chunks were reused
    assert sorted(os.listdir(output.parent)) == ["t.nc"]
    monkeypatch.setattr(physics, "simulate", real)
    reference = sampling.sample_to_netcdf(inst, tmp_path / "ref" / "t.nc", count=1200, seed=7,
                                          chunk_size=40, progress=False)
    assert output.read_bytes() == reference.read_bytes()


# --- levels files -----------------------------------------------------------------------------

def test_read_levels_text(tmp_path):
    path = tmp_path / "levels.txt"
    path.write_text("# my grid [hPa]\n1000\n 850.5  # comment\n\n500\n100\n10\n")
    np.testing.assert_array_equal(sampling.read_levels_file(path), [1000.0, 850.5, 500.0, 100.0, 10.0])


def test_read_levels_netcdf_units(tmp_path):
    grid = atm.default_pressure_grid()
    pa = tmp_path / "pa.nc"
    xr.Dataset({"air_pressure": ("level", grid * 100.0, {"units": "Pa"})}).to_netcdf(pa, engine="h5netcdf")
    np.testing.assert_allclose(sampling.read_levels_file(pa), grid, rtol=1e-15)
    classic = tmp_path / "classic.nc"
    xr.Dataset({"air_pressure": ("level", grid[::-1], {"units": "hPa"})}).to_netcdf(classic, engine="scipy")
    np.testing.assert_array_equal(sampling.read_levels_file(classic), grid[::-1])


def test_read_levels_errors(tmp_path):
    bad_line = tmp_path / "bad.txt"
    bad_line.write_text("1000\n500 hPa\n")
    with pytest.raises(ValueError, match=r"bad.txt.*line 2"):
        sampling.read_levels_file(bad_line)
    not_monotonic = tmp_path / "nm.txt"
    not_monotonic.write_text("1000\n500\n700\n")
    with pytest.raises(ValueError, match=r"nm.txt.*not monotonic"):
        sampling.read_levels_file(not_monotonic)
    repeated = tmp_path / "rep.txt"
    repeated.write_text("1000\n500\n500\n")
    with pytest.raises(ValueError, match=r"rep.txt.*repeats"):
        sampling.read_levels_file(repeated)
    negative = tmp_path / "neg.txt"
    negative.write_text("1000\n-5\n")
    with pytest.raises(ValueError, match=r"neg.txt.*> 0"):
        sampling.read_levels_file(negative)
    no_units = tmp_path / "nounits.nc"
    xr.Dataset({"air_pressure": ("level", [1000.0, 500.0])}).to_netcdf(no_units, engine="h5netcdf")
    with pytest.raises(ValueError, match=r"nounits.nc.*no units"):
        sampling.read_levels_file(no_units)
    wrong_units = tmp_path / "k.nc"
    xr.Dataset({"air_pressure": ("level", [1000.0, 500.0], {"units": "K"})}).to_netcdf(wrong_units, engine="h5netcdf")
    with pytest.raises(ValueError, match=r"k.nc.*unknown units"):
        sampling.read_levels_file(wrong_units)
    other = tmp_path / "other.nc"
    xr.Dataset({"p": ("level", [1000.0, 500.0], {"units": "hPa"})}).to_netcdf(other, engine="h5netcdf")
    with pytest.raises(ValueError, match=r"other.nc.*no variable 'air_pressure'"):
        sampling.read_levels_file(other)
    with pytest.raises(ValueError, match="does not exist"):
        sampling.read_levels_file(tmp_path / "missing.txt")


# --- the physics on generated states -------------------------------------------------------------

def test_physics_accepts_generated_states(inst):
    states = sampling.draw_states(1024, seed=21, channels=inst)
    out = physics.simulate(inst, states)
    bt = out.brightness_temperature.values
    assert np.all(np.isfinite(bt)) and np.all(out.quality_flag.values == 0)
    # Brightness temperatures lie between the coldest emitter (cosmic background
    # reflected by low-emissivity surfaces) and the warmest temperature present.
    assert bt.min() > 2.7
    assert bt.max() <= max(states.air_temperature.max(), states.surface_temperature.max()) + 1e-6
