"""The command line end to end on small data: sample, train (--channels, --update), info, audit, demo."""

from __future__ import annotations

import json

import numpy as np
import pytest

from conftest import TINY_RECIPE
from rtemu._io import open_dataset
from rtemu.cli import main


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    (d / "tiny.toml").write_text(TINY_RECIPE)
    assert main(["sample", "--instrument", "demo-sounder", "--count", "700", "--seed", "3",
                 "--output", str(d / "train.nc"), "--quiet"]) == 0
    return d


def test_sample_writes_the_schema(workdir):
    with open_dataset(workdir / "train.nc") as ds:
        assert ds.sizes["profile"] == 700 and ds.sizes["channel"] == 16
        for name in ("air_temperature", "specific_humidity", "brightness_temperature"):
            assert name in ds
        assert "rtemu_envelope" in ds.attrs


def test_train_channels_then_info(workdir, capsys):
    both = workdir / "three.onnx"
    assert main(["train", "--data", str(workdir / "train.nc"), "--recipe", str(workdir / "tiny.toml"),
                 "--output", str(both), "--channels", "mw-t2,ir-win,mw-h2", "--quiet"]) == 0
    capsys.readouterr()
    assert main(["info", str(both)]) == 0
    text = capsys.readouterr().out
    for cid in ("mw-t2", "ir-win", "mw-h2"):
        assert cid in text
    from rtemu.bundle import read_bundle

    assert set(read_bundle(both).channel_ids) == {"mw-t2", "ir-win", "mw-h2"}


def test_info_refuses_a_foreign_file(workdir, capsys):
    bogus = workdir / "bogus.onnx"
    bogus.write_bytes(b"not an onnx file at all")
    assert main(["info", str(bogus)]) == 2
    assert "rtemu: error:" in capsys.readouterr().err


def test_audit_and_emulated_simulate(workdir, tiny_bundle, capsys):
    out = workdir / "audit"
    assert main(["audit", "--model", str(tiny_bundle), "--count", "40", "--seed", "8",
                 "--output", str(out), "--quiet"]) == 0
    summary = json.loads((out / "summary.json").read_text())
    from rtemu import load_instrument

    assert list(summary["channels"]) == list(load_instrument("demo-sounder").channel_ids)
    target = workdir / "emulated.nc"
    assert main(["simulate", "--model", str(tiny_bundle), "--input", str(workdir / "train.nc"),
                 "--output", str(target), "--jacobian", "--quiet"]) == 0
    with open_dataset(target) as ds:
        assert ds["jacobian_air_temperature"].shape == (700, 16, 64)
        assert np.isfinite(ds["brightness_temperature"].values).all()


def test_demo_small(tmp_path, capsys):
    from rtemu.demo import run_demo

    recipe = tmp_path / "tiny.toml"
    recipe.write_text(TINY_RECIPE)
    summary = run_demo(tmp_path / "demo", progress=False, train_count=1500, test_count=100,
                       columns=12, members=16, recipe=str(recipe))
    for key in ("emulator_rmse_k", "var1d_t_rmse_emulator_k", "var1d_t_rmse_physics_k",
                "var1d_t_diff_rms_k", "enkf_t_rmse_emulator_k", "enkf_t_rmse_physics_k",
                "enkf_t_diff_rms_k", "var1d_speedup"):
        assert key in summary
    assert len(summary["emulator_rmse_k"]) == 16
    # The physics analysis must beat the background (the OSSE is meaningful).
    assert summary["var1d_t_rmse_physics_k"] < summary["background_t_rmse_k"]
    written = json.loads((tmp_path / "demo" / "summary.json").read_text())
    assert written["var1d_speedup"] == pytest.approx(summary["var1d_speedup"])
    for name in ("retrieved_profile.png", "departures.png", "emulator.onnx"):
        assert (tmp_path / "demo" / name).stat().st_size > 1000
    assert (tmp_path / "demo" / "audit" / "report.md").is_file()
