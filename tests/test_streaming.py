"""`rtemu simulate` on files: in-process, on a two-worker LocalCluster, and through the CLI."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from rtemu._io import open_dataset, to_netcdf_atomic
from rtemu.cli import main
from rtemu.runtime import PhysicalOperator
from rtemu.streaming import simulate_file


@pytest.fixture
def profile_file(tmp_path, small_profiles):
    ds = small_profiles(n=40, nlev=30, seed=2)
    path = tmp_path / "profiles.nc"
    to_netcdf_atomic(ds, path)
    return path, ds


def test_streamed_file_equals_in_memory(profile_file, tmp_path):
    path, ds = profile_file
    out = tmp_path / "out.nc"
    simulate_file(path, out, instrument="demo-sounder", jacobian=True, chunk_size=7, progress=False)
    expected = PhysicalOperator("demo-sounder").simulate(ds, jacobian=True)
    with open_dataset(out) as got:
        for name in ("brightness_temperature", "jacobian_air_temperature", "quality_flag"):
            np.testing.assert_array_equal(got[name].values, expected[name].values)
    assert not (tmp_path / "out.nc.chunks").exists()
    assert not list(tmp_path.glob(".out.nc.*"))


def test_local_cluster_two_workers_equals_in_process(profile_file, tmp_path):
    from distributed import LocalCluster

    path, _ = profile_file
    single = tmp_path / "single.nc"
    simulate_file(path, single, instrument="demo-sounder", jacobian=True, chunk_size=10, progress=False)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        distributed = tmp_path / "cluster.nc"
        simulate_file(path, distributed, instrument="demo-sounder", jacobian=True, chunk_size=10,
                      scheduler=cluster.scheduler_address, progress=False)
    assert single.read_bytes() == distributed.read_bytes()


def test_cli_simulate(profile_file, tmp_path, capsys):
    path, ds = profile_file
    out = tmp_path / "cli.nc"
    code = main(["simulate", "--instrument", "demo-sounder", "--input", str(path),
                 "--output", str(out), "--quiet"])
    assert code == 0
    with open_dataset(out) as got:
        assert got["brightness_temperature"].shape == (40, 16)


def test_cli_simulate_bad_input_clear_error(tmp_path, small_profiles, capsys):
    ds = small_profiles(n=3, nlev=20)
    ds = ds.drop_vars("sensor_zenith_angle")
    path = tmp_path / "bad.nc"
    to_netcdf_atomic(ds, path)
    out = tmp_path / "never.nc"
    code = main(["simulate", "--instrument", "demo-sounder", "--input", str(path),
                 "--output", str(out), "--quiet"])
    assert code == 2
    assert "sensor_zenith_angle" in capsys.readouterr().err
    assert not out.exists()


def test_cli_instruments_lists_channels(capsys):
    assert main(["instruments"]) == 0
    text = capsys.readouterr().out
    assert "demo-sounder" in text and "mw-t1" in text and "ir-win" in text
