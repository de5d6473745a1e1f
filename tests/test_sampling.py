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

def test_surface_air_temperature_covers_range(states):
    t0 = states.air_temperature.values[:, 0]  # the default grid is surface-first
    assert t0.min() >= 220.0 and t0.max() <= 320.0
    assert t0.min() < 222.0 and t0.max() > 318.0


def test_column_water_covers_range_and_matches_trapezoid(states):
    w = states.total_column_water_vapour.values
    assert w.max() <= 75.0 + 1e-9
    assert w.max() > 70.0
    assert np.quantile(w, 0.02) < 0.2  # reaches near 0.1 with more than a handful of profiles
    # Independent recomputation, hydrostatic column mass dp/g with the trapezoid rule
    # (the physics model's rule, see rtemu.physics docstring eq. 2).
    p = states.air_pressure.values
    q = states.specific_humidity.values
    expected = np.zeros(len(w))
    for j in range(p.size - 1):
        expected += 0.5 * (q[:, j] + q[:, j + 1]) * (p[j] - p[j + 1]) * 100.0 / STANDARD_GRAVITY
    np.testing.assert_allclose(w, expected, rtol=1e-12)


def test_below_nominal_column_only_for_saturated_cold_columns(states):
    w = states.total_column_water_vapour.values
    low = w < 0.1
    if low.any():
        rh = atm.relative_humidity(states.specific_humidity.values, states.air_temperature.values,
                                   states.air_pressure.values)
        assert np.all(rh[low, 0] > 0.99)
        assert np.all(states.air_temperature.values[low, 0] < 235.0)


def test_humidity_limits(states):
    p = states.air_pressure.values
    t = states.air_temperature.values
    q = states.specific_humidity.values
    rh = atm.relative_humidity(q, t, p)
    assert np.all(rh <= 1.0)
    assert rh.max() > 0.99 and rh.min() < 1e-3
    assert np.all(q >= 1e-7) and np.all(q < 0.1)
    # relative humidity below 1 % and above 90 % both occur near the surface
    assert (rh[:, 0] < 0.05).any() and (rh[:, 0] > 0.9).any()


def test_temperature_validity_and_skin_offset(states):
    t = states.air_temperature.values
    assert t.min() >= 100.0 and t.max() <= 400.0
    offset = states.surface_temperature.values - t[:, 0]
    assert np.all(np.abs(offset) <= 12.0)
    assert offset.min() < -11.0 and offset.max() > 11.0


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


def test_tropopause_and_lapse_rates(states):
    p = states.air_pressure.values
    t = states.air_temperature.values
    pt = states.tropopause_pressure.values
    assert pt.min() >= 80.0 and pt.max() <= 300.0
    assert pt.min() < 85.0 and pt.max() > 290.0
    # Mean lapse rate between 500 hPa (above every inversion) and the tropopause level,
    # from T and ln p with the hypsometric relation dz = R T / g dln p (Wallace & Hobbs
    # 2006 eq. 3.29): gamma = (g / R) ln(T500 / Tt) / ln(500 / pt).
    i500 = int(np.argmin(np.abs(p - 500.0)))
    it = np.argmin(np.abs(p[None, :] - pt[:, None]), axis=1)
    rows = np.arange(len(pt))
    gamma = STANDARD_GRAVITY / R_DRY * np.log(t[:, i500] / t[rows, it]) / np.log(p[i500] / p[it]) * 1e3
    # [K km-1]; dry adiabat 9.8 (textbook). The drawn rate is >= 2; the perturbations (1-3 K
    # std) over the thinnest 500-hPa-to-tropopause layers (~3 km) move it by about 1.
    assert np.all(gamma > 0.0) and np.all(gamma < 11.0)
    # the stratosphere warms: 2 hPa warmer than the tropopause in nearly all profiles
    i2 = int(np.argmin(np.abs(p - 2.0)))
    assert np.mean(t[:, i2] > t[rows, it]) > 0.95
    # the drawn lapse rate stays within the nominal range
    lapse = states.tropospheric_lapse_rate.values
    assert lapse.min() >= 2.0 - 1e-9 and lapse.max() <= 9.5 + 1e-9


def test_tropopause_temperature_follows_tropopause_pressure(states):
    # The band's centre passes through the US 1976 tropopause: 216.65 K at 226.32 hPa
    # (U.S. Standard Atmosphere 1976, 11 km' geopotential; also rtemu.atmosphere's table).
    lo, hi = sampling.tropopause_temperature_band([226.32])
    assert 0.5 * (lo[0] + hi[0]) == pytest.approx(216.65, abs=1e-9)
    assert float(atm.us_standard_atmosphere_1976(226.32)) == pytest.approx(216.65, abs=0.01)
    # A tropical tropopause near 100 hPa sits at about 190-195 K (textbook value, from
    # memory): the band there must contain that and exclude a 30-K warmer one.
    lo, hi = sampling.tropopause_temperature_band([100.0])
    assert lo[0] < 190.0 and hi[0] > 195.0 and hi[0] < 190.0 + 30.0
    # The drawn tropopause temperature keeps to the band unless the lapse-rate range
    # cannot reach it; then it sits on a lapse-rate limit.
    pt = states.tropopause_pressure.values
    tt = states.tropopause_temperature.values
    lo, hi = sampling.tropopause_temperature_band(pt)
    inside = (tt >= lo - 1e-9) & (tt <= hi + 1e-9)
    assert inside.mean() > 0.95
    lapse = states.tropospheric_lapse_rate.values[~inside]
    assert np.all(np.isclose(lapse, 2.0, atol=1e-6) | np.isclose(lapse, 9.5, atol=1e-6))
    # and the band is used across its width at every height (not collapsed to its centre)
    for p_lo, p_hi in ((80.0, 120.0), (120.0, 200.0), (200.0, 300.0)):
        sel = inside & (pt >= p_lo) & (pt < p_hi)
        offset = (tt - 0.5 * (lo + hi))[sel]
        assert offset.min() < -6.0 and offset.max() > 6.0, (p_lo, p_hi)


def test_relative_humidity_decay_is_what_the_profiles_show(states):
    """The drawn decay a of logit(RH) (RH = logistic(-a s + noise + c), s the height fraction
    to the tropopause) is within its range and is what a straight-line fit to the profiles
    finds, well below the tropopause where the stratospheric blend has no weight."""
    a = states.relative_humidity_decay.values
    assert a.min() >= -1.0 and a.max() <= 4.0 and a.min() < -0.9 and a.max() > 3.9
    p = states.air_pressure.values
    pt = states.tropopause_pressure.values
    rh = atm.relative_humidity(states.specific_humidity.values, states.air_temperature.values, p[None, :])
    rh = np.clip(rh, 1e-12, 1.0 - 1e-9)
    y = np.log(rh / (1.0 - rh))
    s = (p[0] - p[None, :]) / (p[0] - pt[:, None])
    use = (np.log(p[None, :] / pt[:, None]) > 0.3) & (s <= 1.0)
    fitted = np.array([-np.polyfit(s[i, use[i]], y[i, use[i]], 1)[0] for i in range(len(a))])
    # the correlated perturbation (0.7 in logit, L = 0.25 in ln p; only a few independent
    # values per troposphere) blurs each fit by about 1.3 (std, measured), and the RH cap and
    # humidity floor clip some; the fits must still follow the drawn values without bias
    # (correlation measured 0.74; a mislabelled parameter would give about 0)
    assert np.corrcoef(a, fitted)[0, 1] > 0.6
    assert abs(np.median(fitted - a)) < 0.2


def test_inversions_present(states):
    t = states.air_temperature.values
    p = states.air_pressure.values
    above = np.argmin(np.abs(p - 900.0))
    inverted = t[:, above] > t[:, 0] + 2.0
    assert 0.1 < inverted.mean() < 0.9


def test_envelope_description_and_covered_envelope(states, inst):
    nominal = json.loads(states.attrs["rtemu_envelope"])
    assert nominal == json.loads(json.dumps(sampling.envelope_description()))
    ranges = nominal["ranges"]
    covered = json.loads(states.attrs["rtemu_covered_envelope"])
    for key, covered_key in [("sensor_zenith_angle", "sensor_zenith_angle"),
                             ("surface_emissivity_microwave", "surface_emissivity_microwave"),
                             ("surface_emissivity_infrared", "surface_emissivity_infrared"),
                             ("skin_minus_air_temperature", "skin_minus_air_temperature"),
                             ("tropopause_pressure", "tropopause_pressure")]:
        assert covered[covered_key]["min"] >= ranges[key]["min"]
        assert covered[covered_key]["max"] <= ranges[key]["max"]
    assert covered["relative_humidity"]["max"] <= 1.0
    assert covered["specific_humidity"]["min"] >= ranges["specific_humidity_floor"]["min"]


def test_column_solver_reaches_its_targets():
    # The shift solver must hit any target between the dry and the saturated column.
    p = atm.default_pressure_grid()
    rng = np.random.default_rng(0)
    n = 200
    t = atm.us_standard_atmosphere_1976(p)[None, :] + rng.uniform(-20, 25, (n, 1))
    weight = sampling._sigmoid((np.log(p)[None, :] - np.log(200.0)) / 0.1) * np.ones((n, 1))
    shape = -2.0 * np.clip((p[0] - p) / (p[0] - 200.0), 0, 1.2)[None, :] * np.ones((n, 1))
    humidity = sampling._Humidity(p, t, weight, shape, np.full((n, p.size), np.log(3e-6)))
    dry, wet = humidity.column(np.full(n, -40.0)), humidity.column(np.full(n, 40.0))
    target = dry * (wet / dry) ** rng.uniform(0, 1, n)
    shift = sampling._solve_shift(humidity, target, -40.0, 40.0, dry, wet)
    np.testing.assert_allclose(humidity.column(shift), target, rtol=1e-10)


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
        assert dict(ds.sizes) == {"profile": 300, "level": 60, "channel": 16}
        assert list(ds.channel.values) == list(inst.channel_ids)
        expect_dims = {
            "air_pressure": ("level",), "air_temperature": ("profile", "level"),
            "specific_humidity": ("profile", "level"), "surface_temperature": ("profile",),
            "surface_emissivity": ("profile", "channel"), "sensor_zenith_angle": ("profile",),
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


def test_column_fraction_inverts_the_documented_mixture():
    # The inverse CDF against the documented mixture P(f < x) = w x + (1 - w) x**(1/power)
    # evaluated directly; and the envelope text states the constants the code uses.
    u = np.linspace(0.0, 1.0, 101)
    f = sampling._column_fraction(u)
    w, power = sampling._COLUMN_WATER_LOG_UNIFORM_WEIGHT, sampling._COLUMN_WATER_POWER
    np.testing.assert_allclose(w * f + (1 - w) * f ** (1 / power), u, atol=1e-12)
    assert np.all(np.diff(f) > 0)
    meaning = sampling.envelope_description()["ranges"]["total_column_water_vapour"]["meaning"]
    assert f"{w:g} x + {1 - w:g} x**{1 / power:g}" in meaning
    assert f"{sampling._COLUMN_FRACTION_LOW:g}*saturated" in meaning


def test_warm_columns_reach_very_dry(states):
    # Generator v3 covers warm, very dry columns (column relative humidity down to the
    # design floor of 0.3 % at any temperature), not only cold ones.
    p = states.air_pressure.values
    t = states.air_temperature.values
    w = states.total_column_water_vapour.values
    with np.errstate(invalid="ignore", divide="ignore"):
        q_sat = atm.saturation_specific_humidity(t, p[None, :])
    q_sat = np.where(np.isfinite(q_sat) & (q_sat > 0), np.minimum(q_sat, 0.099), 0.099)
    w_sat = atm.total_column_water_vapour(p, q_sat)
    warm = t[:, 0] > 290.0
    ratio = w[warm] / w_sat[warm]
    # the generator's saturated column blends in the stratosphere, so allow a little slack
    assert ratio.min() > 0.002
    assert (ratio < 0.02).mean() > 0.05
