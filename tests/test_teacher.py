"""Any model as the teacher: the protocol, its checks, sampling, and the CLI end to end.

The teacher here is ``tests/analytic_teacher.py``: an invented analytic model, not rtemu's
physics, so a chain that silently fell back to the physics would be caught (its emulator
is far from the physics, close to the analytic model).
"""

from __future__ import annotations

import json
import re
import shutil
import sys
from pathlib import Path

import numpy as np
import pytest

import rtemu
from analytic_teacher import AnalyticTeacher
from rtemu import flags, sampling
from rtemu._io import open_dataset
from rtemu._warnings import RtemuWarning
from rtemu.cli import main
from rtemu.teacher import ImportedTeacher, checked_simulate, load_teacher, teacher_identity

ROOT = Path(__file__).resolve().parents[1]
HERE = Path(__file__).resolve().parent


@pytest.fixture(autouse=True)
def _own_sys_path(monkeypatch):
    """load_teacher puts a directory on sys.path: keep that inside each test."""
    monkeypatch.setattr(sys, "path", list(sys.path))


@pytest.fixture(scope="module")
def analytic():
    return AnalyticTeacher()


@pytest.fixture()
def profiles(small_profiles, analytic):
    return small_profiles(n=4, nlev=30, seed=3, instrument=analytic.instrument)


# -- the test teacher itself -----------------------------------------------------------------
def test_analytic_teacher_jacobians_are_its_derivatives(analytic, profiles):
    """Central differences (error O(h^2): Press et al., Numerical Recipes, 3rd ed., sec. 5.7)."""
    out = analytic.simulate(profiles, jacobian=True)
    for name, var, relative in (("jacobian_air_temperature", "air_temperature", 1e-5),
                                ("jacobian_specific_humidity", "specific_humidity", 1e-4)):
        k = out[name].transpose("profile", "channel", "level").values
        for level in (0, 7, 20):
            h = relative * profiles[var].values[:, level]  # [N]: a step relative to the value
            plus, minus = profiles.copy(deep=True), profiles.copy(deep=True)
            plus[var][:, level] += h
            minus[var][:, level] -= h
            fd = (analytic.simulate(plus)["brightness_temperature"]
                  - analytic.simulate(minus)["brightness_temperature"]).values / (2 * h[:, None])
            np.testing.assert_allclose(fd, k[:, :, level], rtol=1e-5, atol=1e-6 * np.abs(k).max())
    assert isinstance(analytic, rtemu.Teacher)


# -- importing a teacher by name -------------------------------------------------------------
@pytest.mark.parametrize("name", ["teacher", "make_teacher", "AnalyticTeacher"])
def test_load_teacher_takes_an_object_or_a_callable(name, monkeypatch):
    monkeypatch.chdir(HERE)
    loaded = load_teacher(f"analytic_teacher:{name}")
    assert isinstance(loaded, ImportedTeacher) and isinstance(loaded, rtemu.Teacher)
    assert loaded.channels == ("toy-t", "toy-q", "toy-w")
    assert teacher_identity(loaded) == ("analytic-toy", "1.2")


def test_identity_without_name_and_version_is_class_and_package_version(analytic):
    class Bare:
        instrument = analytic.instrument
        channels = analytic.channels

        def simulate(self, dataset, jacobian=False):
            return analytic.simulate(dataset, jacobian)

    name, version = teacher_identity(Bare())
    assert name.endswith("test_identity_without_name_and_version_is_class_and_package_version.<locals>.Bare")
    assert version == "unknown"  # this test module's package has no __version__
    assert teacher_identity(rtemu.PhysicalOperator(analytic.instrument)) == ("rtemu.physics", rtemu.__version__)


@pytest.mark.parametrize("spec, expected", [
    ("analytic_teacher", "expected MODULE:NAME"),
    ("no_such_module_xyz:teacher", "cannot import module 'no_such_module_xyz'"),
    ("analytic_teacher:nothing", "has no attribute 'nothing'"),
    ("analytic_teacher:TOY_INSTRUMENT", "str object has no channels, instrument, simulate"),
    ("broken_teacher:make", "calling make() failed (RuntimeError: licence server down)"),
])
def test_bad_teacher_names_give_one_line_errors(spec, expected, tmp_path, monkeypatch, capsys):
    shutil.copy(HERE / "analytic_teacher.py", tmp_path)
    (tmp_path / "broken_teacher.py").write_text("def make():\n    raise RuntimeError('licence server down')\n")
    monkeypatch.chdir(tmp_path)
    code = main(["sample", "--teacher", spec, "--count", "5", "--seed", "1", "--output", "x.nc", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and err.startswith("rtemu: error: teacher ") and expected in err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert not (tmp_path / "x.nc").exists()


@pytest.mark.parametrize("argv", [[], ["--instrument", "demo-sounder"]])
def test_sample_needs_exactly_one_of_teacher_and_instrument(argv, capsys):
    args = ["sample", "--count", "5", "--seed", "1", "--output", "x.nc"] + argv
    if argv:
        args += ["--teacher", "analytic_teacher:teacher"]
    with pytest.raises(SystemExit) as exit_info:
        main(args)
    assert exit_info.value.code == 2
    err = capsys.readouterr().err
    assert ("one of the arguments --instrument --teacher is required" in err if not argv
            else "not allowed with argument" in err)


# -- checking what a teacher returns ---------------------------------------------------------
class _Altered:
    """The analytic teacher with its output changed by ``change(dataset) -> result``."""

    def __init__(self, base, change):
        self.base, self.change = base, change
        self.instrument, self.channels = base.instrument, base.channels
        self.name, self.version = base.name, base.version

    def simulate(self, dataset, jacobian=False):
        return self.change(self.base.simulate(dataset, jacobian))


def _raise(out):
    raise ZeroDivisionError("bad state")


@pytest.mark.parametrize("change, expected", [
    (lambda out: out["brightness_temperature"], "returned a DataArray (rule: an xarray.Dataset)"),
    (lambda out: out.drop_vars("brightness_temperature"), "returned no brightness_temperature"),
    (lambda out: out.drop_vars("jacobian_surface_emissivity"), "returned no jacobian_surface_emissivity"),
    (lambda out: out.rename({"channel": "chan"}), "brightness_temperature has dims ('profile', 'chan')"),
    (lambda out: out.assign_coords(channel=["a", "b", "c"]), "channel coordinate ['a', 'b', 'c'] differs"),
    (lambda out: out.isel(profile=slice(1, None)), "has 3 entries along 'profile' (rule: 4"),
    (lambda out: out.isel(level=slice(1, None)), "jacobian_air_temperature has 29 entries along 'level'"),
    (lambda out: out.assign(brightness_temperature=-out["brightness_temperature"]), "(rule: > 0 K)"),
    (lambda out: out.assign(quality_flag=out["brightness_temperature"]), "quality_flag is float64"),
    (_raise, "simulate failed (ZeroDivisionError: bad state)"),
])
def test_a_malformed_result_is_an_error_naming_teacher_and_rule(analytic, profiles, change, expected):
    with pytest.raises(ValueError) as info:
        checked_simulate(_Altered(analytic, change), profiles, jacobian=True)
    assert str(info.value).startswith("teacher analytic-toy 1.2: ")
    assert expected in str(info.value)


def test_checked_output_is_the_teachers_in_the_physics_schema(analytic, profiles):
    own = analytic.simulate(profiles, jacobian=True)
    checked = checked_simulate(analytic, profiles.transpose("level", "profile", "channel"), jacobian=True)
    schema = rtemu.physics.simulate(analytic.instrument, profiles, jacobian=True)
    assert set(checked.data_vars) == set(schema.data_vars)
    for name in schema.data_vars:
        assert checked[name].dims == schema[name].dims
    for name in own.data_vars:
        np.testing.assert_array_equal(checked[name].values, own[name].transpose(*checked[name].dims).values)
    assert (checked["quality_flag"].values == 0).all() and checked.attrs["teacher_refused"] == 0
    # The teacher always sees canonical units and its own channel order (Pa -> hPa: 1 hPa =
    # 100 Pa; degC -> K: +273.15, SI brochure), whatever the caller used.
    other = profiles.assign(
        air_pressure=(profiles["air_pressure"] * 100.0).assign_attrs(units="Pa"),
        air_temperature=(profiles["air_temperature"] - 273.15).assign_attrs(units="degC"),
    ).isel(channel=[2, 0, 1])
    converted = checked_simulate(analytic, other, jacobian=True)
    for name in own.data_vars:
        np.testing.assert_allclose(converted[name].values, checked[name].values, rtol=1e-12)


def test_refused_and_invalid_profiles_are_nan_and_flagged(analytic, profiles):
    seen = []

    def refuse_second(out):
        seen.append(out.sizes["profile"])
        bt = out["brightness_temperature"].values.copy()
        bt[1, 2] = np.nan
        return out.assign(brightness_temperature=(("profile", "channel"), bt))

    bad = profiles.copy(deep=True)
    bad["air_temperature"][3, 5] = -10.0  # breaks rtemu's input rules: never reaches the teacher
    out = checked_simulate(_Altered(analytic, refuse_second), bad, jacobian=True)
    assert seen == [3]
    flag = out["quality_flag"].values
    assert flag[1, 2] == flags.INVALID_INPUT and (flag[3] == flags.INVALID_INPUT).all()
    assert flag[[0, 2]].sum() == 0 and flag[1, :2].sum() == 0
    assert np.isnan(out["brightness_temperature"].values[1, 2])
    assert np.isnan(out["jacobian_air_temperature"].values[1, 2]).all()  # a refused entry is refused whole
    assert np.isnan(out["brightness_temperature"].values[3]).all()
    assert out.attrs["teacher_refused"] == 1 and "air_temperature" in out.attrs["invalid_input_summary"]


# -- sampling --------------------------------------------------------------------------------
def test_sampling_runs_the_teacher_and_records_it(analytic, tmp_path):
    path = sampling.sample_to_netcdf(analytic, tmp_path / "t.nc", count=30, seed=4, jacobian=True,
                                     chunk_size=16, progress=False)
    with open_dataset(path) as ds:
        assert ds.attrs["rtemu_teacher"] == "analytic-toy" and ds.attrs["rtemu_teacher_version"] == "1.2"
        inputs = ds[["air_pressure", "air_temperature", "specific_humidity", "surface_temperature",
                     "surface_emissivity", "sensor_zenith_angle"]].load()
        again = analytic.simulate(inputs, jacobian=True)
        for name in again.data_vars:
            np.testing.assert_allclose(ds[name].values, again[name].transpose(*ds[name].dims).values,
                                       rtol=1e-12)
        physics = rtemu.physics.simulate(analytic.instrument, inputs)
        assert np.abs(physics["brightness_temperature"] - ds["brightness_temperature"]).max() > 1.0
    physics_file = sampling.sample_to_netcdf(analytic.instrument, tmp_path / "p.nc", count=5, seed=4,
                                             progress=False)
    with open_dataset(physics_file) as ds:
        assert (ds.attrs["rtemu_teacher"], ds.attrs["rtemu_teacher_version"]) == ("rtemu.physics", rtemu.__version__)


def test_sampling_warns_and_records_refused_entries(analytic, tmp_path):
    def refuse_cold(out):  # the colder half of each call: some entries whatever the generator draws
        bt = out["brightness_temperature"]
        return out.assign(brightness_temperature=bt.where(bt > float(bt.median())))

    with pytest.warns(RtemuWarning, match=r"teacher analytic-toy: no finite output for (\d+) of 120"):
        path = sampling.sample_to_netcdf(_Altered(analytic, refuse_cold), tmp_path / "t.nc", count=40,
                                         seed=4, progress=False)
    with open_dataset(path) as ds:
        bt = ds["brightness_temperature"].values
        refused = np.isnan(bt)
        assert 0 < refused.sum() == int(ds.attrs["rtemu_teacher_refused"])
        assert ((ds["quality_flag"].values == flags.INVALID_INPUT) == refused).all()


def test_worker_processes_import_the_teacher_by_name(tmp_path, monkeypatch):
    # A module name nothing else imports, in a directory only this test knows.
    (tmp_path / "teacher_only_here.py").write_text((HERE / "analytic_teacher.py").read_text())
    monkeypatch.chdir(tmp_path)
    teacher = load_teacher("teacher_only_here:make_teacher")
    monkeypatch.chdir(ROOT)  # the workers find the module by the directory recorded at import
    two = sampling.sample_to_netcdf(teacher, tmp_path / "two.nc", count=40, seed=2, chunk_size=20,
                                    workers=2, progress=False)
    one = sampling.sample_to_netcdf(teacher, tmp_path / "one.nc", count=40, seed=2, chunk_size=20,
                                    progress=False)
    assert two.read_bytes() == one.read_bytes()
    with pytest.raises(ValueError, match="an object runs in this process only"):
        sampling.sample_to_netcdf(teacher.teacher, tmp_path / "x.nc", count=40, seed=2, workers=2, progress=False)


# -- the command line end to end -------------------------------------------------------------
@pytest.fixture(scope="module")
def own_model(tmp_path_factory):
    """The user's module in the current directory, as the README describes; sampled and
    trained through the command line. Returns the directory."""
    d = tmp_path_factory.mktemp("own_model")
    shutil.copy(HERE / "analytic_teacher.py", d / "toy_model.py")
    # These tests are about whom the audit compares with, not accuracy: the demo recipe with
    # a large_uncertainty threshold that leaves unflagged entries (its sigma on this toy from
    # 1,500 profiles, 0.6-0.8 K, is above half the toy noise, so every entry was flagged).
    demo = (Path(rtemu.__file__).parent / "recipes" / "demo.toml").read_text()
    assert "flag_noise_fraction = 0.5" in demo
    (d / "loose.toml").write_text(demo.replace("flag_noise_fraction = 0.5", "flag_noise_fraction = 100.0"))
    with pytest.MonkeyPatch.context() as mp:
        mp.chdir(d)
        mp.setattr(sys, "path", list(sys.path))
        for argv in (["sample", "--teacher", "toy_model:make_teacher", "--count", "1500", "--seed", "1",
                      "--output", "train.nc"],
                     ["sample", "--teacher", "toy_model:teacher", "--count", "60", "--seed", "2", "--jacobian",
                      "--output", "test.nc"],
                     ["sample", "--teacher", "toy_model:teacher", "--count", "60", "--seed", "3",
                      "--output", "test_bt_only.nc"],
                     ["train", "--data", "train.nc", "--recipe", "loose.toml", "--output", "model.onnx"]):
            assert main(argv + ["--quiet"]) == 0
    return d


def test_own_model_audited_by_teacher_by_stored_data_and_not_by_the_physics(own_model, monkeypatch):
    monkeypatch.chdir(own_model)
    common = ["--model", "model.onnx", "--quiet"]
    assert main(["audit", *common, "--teacher", "toy_model:teacher", "--count", "60", "--seed", "2",
                 "--output", "by_teacher"]) == 0
    assert main(["audit", *common, "--data", "test.nc", "--output", "by_data"]) == 0
    physics = rtemu.PhysicalOperator(AnalyticTeacher().instrument)  # only when asked for by name
    rtemu.run_audit("model.onnx", "by_physics", count=60, seed=2, reference=physics, progress=False)

    by_teacher, by_data, by_physics = (json.loads((own_model / d / "summary.json").read_text())
                                       for d in ("by_teacher", "by_data", "by_physics"))
    assert by_teacher["reference"] == {"kind": "teacher", "teacher": "analytic-toy", "version": "1.2",
                                       "spec": "toy_model:teacher"}
    assert by_data["reference"]["kind"] == "stored" and by_data["reference"]["teacher"] == "analytic-toy"
    assert by_data["reference"]["jacobians"] is True
    assert by_physics["reference"]["kind"] == "physics"
    # The same seed draws the same 60 states, so the stored and the recomputed references agree.
    for cid in ("toy-t", "toy-q", "toy-w"):
        t, d, p = (s["channels"][cid] for s in (by_teacher, by_data, by_physics))
        assert t["count"] > 0 and t["rmse_k"] == pytest.approx(d["rmse_k"], rel=1e-9)
        assert t["jacobian_t_error_median"] == pytest.approx(d["jacobian_t_error_median"], rel=1e-9)
        # The emulator learned the analytic model, not rtemu's physics.
        assert t["rmse_k"] < 1.0 and 5.0 * t["rmse_k"] < p["rmse_k"]
    report = (own_model / "by_data" / "report.md").read_text()
    assert "Reference: the values stored in the test set, computed by teacher `analytic-toy` version 1.2" in report


def test_the_bundle_knows_its_teacher_and_refuses_physics_in_its_place(own_model, monkeypatch, capsys):
    monkeypatch.chdir(own_model)
    from rtemu.bundle import read_bundle

    assert read_bundle("model.onnx").teacher == ("analytic-toy", "1.2")
    assert read_bundle("model.onnx").channel_stats["toy-q"]["teacher_version"] == "1.2"
    capsys.readouterr()
    assert main(["info", "model.onnx"]) == 0
    assert "teacher            analytic-toy 1.2" in capsys.readouterr().out
    # No teacher and no stored values: the audit does not fall back to rtemu's physics.
    assert main(["audit", "--model", "model.onnx", "--count", "20", "--seed", "2", "--output", "none",
                 "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "the emulator learned teacher 'analytic-toy' (version 1.2), not rtemu's physics" in err
    assert not (own_model / "none").exists()
    with pytest.raises(ValueError, match="emulates teacher 'analytic-toy', not rtemu's physics"):
        rtemu.EmulatedOperator.load("model.onnx", fallback="physics")
    # Stored values of rtemu's physics are not this emulator's reference either.
    sampling.sample_to_netcdf(AnalyticTeacher().instrument, own_model / "physics.nc", count=20, seed=5,
                              progress=False)
    assert main(["audit", "--model", "model.onnx", "--data", "physics.nc", "--output", "none", "--quiet"]) == 2
    assert "come from teacher 'rtemu.physics', the emulator learned 'analytic-toy'" in capsys.readouterr().err


def test_audit_data_without_jacobians_leaves_jacobian_errors_empty(own_model, tmp_path):
    summary = rtemu.run_audit(own_model / "model.onnx", tmp_path / "a", data=own_model / "test_bt_only.nc",
                              progress=False)
    assert summary["reference"]["kind"] == "stored" and summary["reference"]["jacobians"] is False
    for s in summary["channels"].values():
        assert s["rmse_k"] is not None and s["jacobian_t_error_median"] is None
    assert "no Jacobians stored" in (tmp_path / "a" / "report.md").read_text()


def test_stored_values_of_other_channels_are_refused(tmp_path, tiny_bundle):
    test = sampling.sample_to_netcdf("demo-sounder", tmp_path / "test.nc", count=10, seed=9, progress=False)
    with open_dataset(test) as ds:
        toml = ds.attrs["rtemu_instrument_toml"]
        changed = ds.load().assign_attrs(rtemu_instrument_toml=re.sub(r"frequency_ghz = 52\.37",
                                                                      "frequency_ghz = 52.5", toml))
    with pytest.raises(ValueError, match="another definition of channel 'mw-t1'"):
        rtemu.run_audit(tiny_bundle, tmp_path / "a", data=changed, progress=False)


def test_readme_teacher_example_runs(tmp_path, monkeypatch):
    text = (ROOT / "README.md").read_text()
    section = text.split("## Emulating your own model\n", 1)[1].split("\n## ", 1)[0]
    code = re.search(r"```python\n(.*?)```", section, re.S).group(1)
    assert len(code.strip().splitlines()) <= 20
    (tmp_path / "my_model.py").write_text(code)
    monkeypatch.chdir(tmp_path)
    commands = re.search(r"```\n(rtemu sample --teacher.*?)```", section, re.S).group(1).splitlines()
    assert commands[0].startswith("rtemu sample --teacher my_model:MyModel ")
    assert main(["sample", "--teacher", "my_model:MyModel", "--count", "30", "--seed", "1", "--jacobian",
                 "--output", "train.nc", "--quiet"]) == 0
    with open_dataset(tmp_path / "train.nc") as ds:
        assert (ds.attrs["rtemu_teacher"], ds.attrs["rtemu_teacher_version"]) == ("my-model", "0.1")
        assert list(ds["channel"].values) == ["mw-t2", "mw-t4"]
        # The README's toy, written out again: Gaussian weights exp(-((p - p_c) / 150 hPa)^2).
        p = ds["air_pressure"].values
        t = ds["air_temperature"].transpose("profile", "level").values
        for c, centre in enumerate((500.0, 250.0)):
            w = np.exp(-(((p - centre) / 150.0) ** 2))
            np.testing.assert_allclose(ds["brightness_temperature"].values[:, c], t @ (w / w.sum()), rtol=1e-12)
            np.testing.assert_allclose(ds["jacobian_air_temperature"].values[:, c],
                                       np.broadcast_to(w / w.sum(), t.shape), rtol=1e-12)
