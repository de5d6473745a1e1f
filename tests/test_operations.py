"""Operations a user can act on: nothing lost, nothing silent (the rtemu command, run as a user would).

Every CLI case runs ``python -m rtemu.cli`` in a subprocess: a failure must be one line
``rtemu: error: ...`` with exit status 2 (3: no valid profile), never a traceback or a crash,
and must leave the user's files as they were.
"""

from __future__ import annotations

import os
import resource
import shutil
import signal
import subprocess
import sys
import textwrap

import numpy as np
import onnx
import pytest
import scipy.constants
import xarray as xr

from rtemu import bundle as rb
from rtemu import flags
from rtemu._io import OutputBusyError, exclusive_output, lock_path, open_dataset, to_netcdf_atomic


def run_cli(*args, cwd=None, preexec_fn=None, wrap=None, timeout=300):
    cmd = [sys.executable, "-m", "rtemu.cli", *map(str, args)]
    if wrap:
        cmd = [*wrap, *cmd]
    return subprocess.run(cmd, capture_output=True, text=True, cwd=cwd, preexec_fn=preexec_fn,
                          timeout=timeout)


def one_line_error(done, code=2):
    """The run failed with ``code`` and one ``rtemu: error:`` line, no traceback, no crash."""
    assert done.returncode == code, (done.returncode, done.stderr)
    lines = [line for line in done.stderr.splitlines() if line.startswith("rtemu: error:")]
    assert len(lines) == 1, done.stderr
    assert "Traceback" not in done.stderr, done.stderr
    return lines[0]


def partials(directory):
    return sorted(p.name for p in directory.rglob("*.partial"))


@pytest.fixture()
def profiles(small_profiles, tmp_path):
    path = tmp_path / "in.nc"
    to_netcdf_atomic(small_profiles(n=12, nlev=20, seed=4), path)
    return path


# ---- output safety ------------------------------------------------------------------------
@pytest.mark.parametrize("how", ["same path", "hard link", "symbolic link"])
def test_simulate_refuses_its_input_as_output(profiles, tmp_path, how):
    before = profiles.read_bytes()
    target = {"same path": profiles, "hard link": tmp_path / "hard.nc", "symbolic link": tmp_path / "soft.nc"}[how]
    if how == "hard link":
        os.link(profiles, target)
    elif how == "symbolic link":
        target.symlink_to(profiles)
    done = run_cli("simulate", "--instrument", "demo-sounder", "--input", profiles, "--output", target, "--quiet")
    assert "would destroy the input" in one_line_error(done)
    assert profiles.read_bytes() == before


def test_train_and_sample_refuse_their_input_as_output(profiles, tmp_path):
    before = profiles.read_bytes()
    done = run_cli("train", "--data", profiles, "--recipe", "demo", "--output", profiles, "--quiet")
    assert "would destroy the input" in one_line_error(done)
    levels = tmp_path / "levels.txt"
    levels.write_text("1000\n500\n100\n10\n1\n")
    done = run_cli("sample", "--instrument", "demo-sounder", "--count", "5", "--seed", "1",
                   "--levels", levels, "--output", levels, "--quiet")
    assert "would destroy the input" in one_line_error(done)
    assert profiles.read_bytes() == before and levels.read_text().startswith("1000")


HOLD = textwrap.dedent("""
    import sys
    from rtemu._io import exclusive_output
    with exclusive_output(sys.argv[1]):
        print("held", flush=True)
        sys.stdin.read()  # until the test closes our stdin
""")


def test_second_job_is_refused_naming_the_holder_and_its_chunks_survive(profiles, tmp_path):
    out = tmp_path / "out.nc"
    side = tmp_path / "out.nc.chunks"
    side.mkdir()
    (side / "manifest.json").write_text('{"fingerprint": "another job"}')
    (side / "chunk-000000.nc").write_bytes(b"the holder's chunk")
    holder = subprocess.Popen([sys.executable, "-c", HOLD, str(out)], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        for command in (["simulate", "--instrument", "demo-sounder", "--input", profiles],
                        ["sample", "--instrument", "demo-sounder", "--count", "5", "--seed", "1"]):
            line = one_line_error(run_cli(*command, "--output", out, "--quiet"))
            assert f"pid {holder.pid}" in line and "another rtemu job" in line
        assert (side / "chunk-000000.nc").read_bytes() == b"the holder's chunk"  # not deleted
        assert not out.exists()
    finally:
        holder.stdin.close()
        holder.wait(timeout=30)
    assert not lock_path(out).exists()  # released by its holder


def test_lock_is_exclusive_within_a_process_too(tmp_path):
    with exclusive_output(tmp_path / "x.nc"):
        with pytest.raises(OutputBusyError, match=f"pid {os.getpid()}"):
            with exclusive_output(tmp_path / "x.nc"):
                pass
    with exclusive_output(tmp_path / "x.nc"):  # released: free again
        pass


DIE = textwrap.dedent("""
    import os, signal, sys
    from rtemu._io import atomic_path, exclusive_output
    with exclusive_output(sys.argv[1]):
        with atomic_path(sys.argv[1], suffix=".nc.partial") as tmp:
            tmp.write_bytes(b"half a file" * 1000)
            os.kill(os.getpid(), signal.SIGKILL)  # killed during assembly
""")


def test_stale_lock_of_a_dead_job_is_taken_over_and_its_partial_file_removed(profiles, tmp_path):
    out = tmp_path / "out.nc"
    dead = subprocess.run([sys.executable, "-c", DIE, str(out)], capture_output=True, text=True)
    assert dead.returncode == -signal.SIGKILL
    assert lock_path(out).exists() and len(partials(tmp_path)) == 1  # what a kill leaves
    done = run_cli("simulate", "--instrument", "demo-sounder", "--input", profiles, "--output", out, "--quiet")
    assert done.returncode == 0, done.stderr
    assert "taking over the lock" in done.stderr and "removed 1 temporary file" in done.stderr
    assert partials(tmp_path) == [] and not lock_path(out).exists()
    with open_dataset(out) as ds:
        assert ds.sizes["profile"] == 12


# ---- clear failures -------------------------------------------------------------------------
def _file_size_limit(limit):
    def apply():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # the write fails with EFBIG instead
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))
    return apply


@pytest.mark.parametrize("limit, stage", [(20_000, "chunk"), (60_000, "assembly")])
def test_full_disk_is_one_line_and_resumable(profiles, tmp_path, limit, stage):
    """A file size limit stands for a full disk (the HDF5 library crashed the process once)."""
    out = tmp_path / "out.nc"
    args = ("simulate", "--instrument", "demo-sounder", "--input", profiles, "--output", out,
            "--jacobian", "--chunk-size", "4", "--quiet")
    line = one_line_error(run_cli(*args, preexec_fn=_file_size_limit(limit)))
    assert ("file too large" in line or "file size limit" in line), line
    assert not out.exists() and partials(tmp_path) == [] and not lock_path(out).exists()
    if stage == "assembly":  # every chunk finished: kept for the rerun
        assert len(list((tmp_path / "out.nc.chunks").glob("chunk-*.nc"))) == 3
    done = run_cli(*args)
    assert done.returncode == 0, done.stderr
    with open_dataset(out) as ds:
        assert np.isfinite(ds["jacobian_air_temperature"].values).all()


def _namespace_with_tmpfs(options):
    """A command prefix running in a private mount namespace with a tmpfs at $RTEMU_MNT."""
    if shutil.which("unshare") is None:
        pytest.skip("no unshare(1)")
    probe = subprocess.run(["unshare", "-r", "-m", "true"], capture_output=True)
    if probe.returncode != 0:
        pytest.skip("user and mount namespaces not available")
    return lambda mnt: ["unshare", "-r", "-m", "sh", "-c",
                        f'mount -t tmpfs -o {options} tmpfs "{mnt}" && exec "$@"', "sh"]


def test_full_tmpfs_is_one_line(profiles, tmp_path):
    wrap = _namespace_with_tmpfs("size=256k")
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    done = run_cli("simulate", "--instrument", "demo-sounder", "--input", profiles, "--output", mnt / "o.nc",
                   "--jacobian", "--chunk-size", "4", "--quiet", wrap=wrap(mnt))
    assert "no space left on the device" in one_line_error(done)


def test_read_only_file_system_is_one_line(profiles, tmp_path):
    wrap = _namespace_with_tmpfs("ro,size=64k")
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    done = run_cli("simulate", "--instrument", "demo-sounder", "--input", profiles, "--output", mnt / "o.nc",
                   "--quiet", wrap=wrap(mnt))
    assert "read-only file system" in one_line_error(done)


def test_directory_as_output_and_debug_traceback(profiles, tmp_path):
    args = ("simulate", "--instrument", "demo-sounder", "--input", profiles, "--output", tmp_path, "--quiet")
    assert "is a directory" in one_line_error(run_cli(*args))
    debug = run_cli("--debug", *args)
    assert debug.returncode == 2 and "Traceback (most recent call last)" in debug.stderr
    assert debug.stderr.rstrip().splitlines()[-1].startswith("rtemu: error:")


@pytest.mark.parametrize("kind", ["netCDF-3", "text", "directory"])
def test_unreadable_input_format(profiles, tmp_path, kind):
    source = tmp_path / f"source-{kind}"
    if kind == "netCDF-3":
        with open_dataset(profiles) as ds:
            ds.load().to_netcdf(source, format="NETCDF3_64BIT", engine="scipy")
        expected = "a netCDF-3 file"
    elif kind == "text":
        source.write_text("air_temperature 250 251 252\n")
        expected = "not a netCDF-4/HDF5 file"
    else:
        source.mkdir()
        expected = "no such file"
    done = run_cli("simulate", "--instrument", "demo-sounder", "--input", source, "--output", tmp_path / "o.nc",
                   "--quiet")
    assert expected in one_line_error(done)


def _edited_bundle(tiny_bundle, path, edit):
    """A copy of the bundle edited by ``edit(model)`` with every SHA-256 recomputed by rtemu's own
    functions: what anyone can do to an unkeyed digest."""
    model = onnx.load(str(tiny_bundle))
    edit(model)
    props = {p.key: p.value for p in model.metadata_props}
    props["rtemu.weights_sha256"] = rb.weights_sha256(model)
    props["rtemu.content_sha256"] = rb.content_sha256(model)
    props["rtemu.metadata_sha256"] = rb.metadata_sha256(props)
    del model.metadata_props[:]
    onnx.helper.set_model_props(model, props)
    path.write_bytes(model.SerializeToString())
    return path


def test_onnxruntime_failure_is_one_line(tiny_bundle, profiles, tmp_path):
    def float_into_not(model):  # Not takes booleans only: onnxruntime refuses the graph
        node = next(n for n in model.graph.node if n.op_type == "Tanh")
        node.op_type = "Not"

    broken = _edited_bundle(tiny_bundle, tmp_path / "broken.onnx", float_into_not)
    rb.read_bundle(broken)  # the digests match: only onnxruntime finds the problem
    from rtemu.sampling import draw_states
    from rtemu.runtime import EmulatedOperator

    grid = EmulatedOperator.load(tiny_bundle).pressure_hpa
    states = tmp_path / "states.nc"
    to_netcdf_atomic(draw_states(3, seed=5, pressure_hpa=grid, channels=rb.read_bundle(tiny_bundle).instrument)[
        ["air_pressure", "air_temperature", "specific_humidity", "surface_temperature", "surface_emissivity",
         "sensor_zenith_angle"]], states)
    done = run_cli("simulate", "--model", broken, "--input", states, "--output", tmp_path / "o.nc", "--quiet")
    assert "onnxruntime failed" in one_line_error(done)


# ---- invalid profiles -----------------------------------------------------------------------
def test_invalid_profiles_are_summarised_on_stderr_and_in_the_output(small_profiles, tmp_path):
    ds = small_profiles(n=12, nlev=20, seed=4)
    ds["air_temperature"][[3, 8], 5] = np.nan
    ds["sensor_zenith_angle"][10] = 90.0
    source, out = tmp_path / "in.nc", tmp_path / "out.nc"
    to_netcdf_atomic(ds, source)
    done = run_cli("simulate", "--instrument", "demo-sounder", "--input", source, "--output", out,
                   "--chunk-size", "5", "--quiet")
    assert done.returncode == 0, done.stderr
    warning = [line for line in done.stderr.splitlines() if line.startswith("rtemu: warning:")]
    assert len(warning) == 1
    assert "3 of 12 profile(s) invalid" in warning[0]
    # per rule: its count and its first profile, in file order across chunks (5 per chunk)
    assert "air_temperature: non-finite value" in warning[0] and "(2 profile(s), first index 3)" in warning[0]
    assert "sensor_zenith_angle" in warning[0] and "(1 profile(s), first index 10)" in warning[0]
    with open_dataset(out) as got:
        assert got.attrs["invalid_input_count"] == 3 and got.attrs["profile_count"] == 12
        assert got.attrs["invalid_input_summary"] in warning[0]
        invalid = (got["quality_flag"].values & flags.INVALID_INPUT).any(axis=1)
        assert np.flatnonzero(invalid).tolist() == [3, 8, 10]


def test_no_valid_profile_exits_3(small_profiles, tmp_path):
    ds = small_profiles(n=4, nlev=20, seed=4)
    ds["air_pressure"] = ds["air_pressure"] * 100.0  # Pa, labelled as nothing (hPa assumed)
    ds["air_pressure"].attrs = {}
    source = tmp_path / "in.nc"
    to_netcdf_atomic(ds, source)
    done = run_cli("simulate", "--instrument", "demo-sounder", "--input", source, "--output", tmp_path / "o.nc",
                   "--quiet")
    line = one_line_error(done, code=3)
    assert "no valid profile" in line
    assert "4 of 4 profile(s) invalid" in done.stderr and "Pa labelled hPa?" in done.stderr


@pytest.mark.parametrize("variable, change, words", [
    ("air_pressure", lambda da: da / 10.0, "kPa labelled hPa"),  # 101 "hPa" at the surface
    ("air_temperature", lambda da: da - 273.15, "Celsius labelled K"),
])
def test_implausible_units_are_refused(small_profiles, tmp_path, variable, change, words):
    ds = small_profiles(n=4, nlev=20, seed=4)
    ds[variable] = change(ds[variable]).assign_attrs(ds[variable].attrs)
    source = tmp_path / "in.nc"
    to_netcdf_atomic(ds, source)
    done = run_cli("simulate", "--instrument", "demo-sounder", "--input", source, "--output", tmp_path / "o.nc",
                   "--quiet")
    line = one_line_error(done)
    assert line.startswith(f"rtemu: error: {variable}:") and "units?" in line and words in line


# ---- units and names -----------------------------------------------------------------------
@pytest.mark.parametrize("variable, units, to_canonical", [
    # scipy.constants: zero_Celsius = 273.15 K, hecto = 100, kilo = 1000
    ("air_temperature", "degree_Celsius", lambda v: v + scipy.constants.zero_Celsius),
    ("air_temperature", "degrees_Celsius", lambda v: v + scipy.constants.zero_Celsius),
    ("surface_temperature", "degC", lambda v: v + scipy.constants.zero_Celsius),
    ("air_pressure", "hectopascal", lambda v: v),
    ("air_pressure", "Pa", lambda v: v / scipy.constants.hecto),
    ("air_pressure", "kPa", lambda v: v * scipy.constants.kilo / scipy.constants.hecto),
    ("air_pressure", "millibar", lambda v: v),
    ("specific_humidity", "g kg-1", lambda v: v / scipy.constants.kilo),
])
def test_udunits_spellings_give_the_canonical_result(small_profiles, variable, units, to_canonical):
    from rtemu.runtime import PhysicalOperator

    ds = small_profiles(n=3, nlev=20, seed=2)
    reference = PhysicalOperator("demo-sounder").simulate(ds)
    values = ds[variable].values
    # the inverse of to_canonical, for a linear conversion a * v + b
    b = to_canonical(0.0)
    a = to_canonical(1.0) - b
    relabelled = ds.assign({variable: ds[variable].copy(data=(values - b) / a).assign_attrs(units=units)})
    got = PhysicalOperator("demo-sounder").simulate(relabelled)
    np.testing.assert_allclose(got["brightness_temperature"], reference["brightness_temperature"], rtol=0,
                               atol=1e-9)


def test_variables_found_by_standard_name(small_profiles, tmp_path):
    ds = small_profiles(n=3, nlev=20, seed=2)
    renamed = ds.rename_vars(air_temperature="ta", specific_humidity="hus")
    renamed["ta"].attrs["standard_name"] = "air_temperature"
    renamed["hus"].attrs["standard_name"] = "specific_humidity"
    source, out = tmp_path / "in.nc", tmp_path / "out.nc"
    to_netcdf_atomic(renamed, source)
    done = run_cli("simulate", "--instrument", "demo-sounder", "--input", source, "--output", out, "--quiet")
    assert done.returncode == 0, done.stderr
    from rtemu.runtime import PhysicalOperator

    with open_dataset(out) as got:
        np.testing.assert_array_equal(got["brightness_temperature"].values,
                                      PhysicalOperator("demo-sounder").simulate(ds)["brightness_temperature"].values)
    twice = renamed.assign(ta2=renamed["ta"])
    with pytest.raises(ValueError, match="all have standard_name 'air_temperature'"):
        PhysicalOperator("demo-sounder").simulate(twice)


# ---- simulate options -------------------------------------------------------------------------
def test_simulate_channels_and_physics_fallback(tiny_bundle, tmp_path):
    from rtemu.runtime import EmulatedOperator, PhysicalOperator
    from rtemu.sampling import draw_states

    op = EmulatedOperator.load(tiny_bundle)
    ds = draw_states(6, seed=31, pressure_hpa=op.pressure_hpa, channels=op.instrument)[
        ["air_pressure", "air_temperature", "specific_humidity", "surface_temperature", "surface_emissivity",
         "sensor_zenith_angle"]].load()
    ds["air_temperature"] = ds["air_temperature"] + 30.0  # far outside the training envelope
    ds["surface_temperature"] = ds["surface_temperature"] + 30.0
    source, out = tmp_path / "warm.nc", tmp_path / "out.nc"
    to_netcdf_atomic(ds, source)
    done = run_cli("simulate", "--model", tiny_bundle, "--input", source, "--output", out,
                   "--channels", "mw-t2,ir-w1", "--fallback", "physics", "--quiet")
    assert done.returncode == 0, done.stderr
    physics = PhysicalOperator(op.instrument.select(["mw-t2", "ir-w1"])).simulate(
        ds.sel(channel=["mw-t2", "ir-w1"]))
    with open_dataset(out) as got:
        assert [str(c) for c in got["channel"].values] == ["mw-t2", "ir-w1"]
        fell_back = (got["quality_flag"].values & flags.PHYSICS_FALLBACK) != 0
        assert fell_back.all()
        np.testing.assert_allclose(got["brightness_temperature"].values, physics["brightness_temperature"].values,
                                   atol=1e-9)
    line = one_line_error(run_cli("simulate", "--instrument", "demo-sounder", "--input", source,
                                  "--output", tmp_path / "o2.nc", "--fallback", "physics", "--quiet"))
    assert "--fallback physics applies to an emulator" in line


# ---- bundle integrity -------------------------------------------------------------------------
@pytest.fixture()
def key_file(tmp_path):
    path = tmp_path / "signing.key"
    path.write_bytes(bytes(range(32)) * 2)
    return path


def _plus_one_kelvin(model):
    from onnx import numpy_helper

    for i, init in enumerate(model.graph.initializer):
        if init.name == "output_offset":  # format 7: y0_c, added to channel c's brightness temperature
            value = numpy_helper.to_array(init).copy()
            value[0] += 1.0  # channel 0
            model.graph.initializer[i].CopyFrom(numpy_helper.from_array(value, init.name))
            return
    raise AssertionError("no output_offset initializer")


def test_digests_detect_corruption_not_authorship_and_the_signature_does(tiny_bundle, tmp_path, key_file):
    signed = tmp_path / "signed.onnx"
    shutil.copyfile(tiny_bundle, signed)
    done = run_cli("sign", signed, "--key", key_file)
    assert done.returncode == 0 and "HMAC-SHA256" in done.stdout, done.stderr
    info = run_cli("info", signed, "--key", key_file)
    assert info.returncode == 0, info.stderr
    assert "verified with the given key" in info.stdout and "do not show who made the file" in info.stdout
    assert "not checked" in run_cli("info", signed).stdout

    # +1 K in the graph with every digest recomputed: the digests cannot tell, the signature can
    edited = _edited_bundle(signed, tmp_path / "edited.onnx", _plus_one_kelvin)
    rb.read_bundle(edited)
    from rtemu.runtime import EmulatedOperator
    from rtemu.sampling import draw_states

    op = EmulatedOperator.load(signed)
    profiles = draw_states(2, seed=31, pressure_hpa=op.pressure_hpa, channels=op.instrument)[
        ["air_pressure", "air_temperature", "specific_humidity", "surface_temperature", "surface_emissivity",
         "sensor_zenith_angle", "surface_air_pressure"]].load()
    shift = (EmulatedOperator.load(edited).simulate(profiles)["brightness_temperature"]
             - op.simulate(profiles)["brightness_temperature"]).values
    np.testing.assert_allclose(shift[:, 0], 1.0, atol=1e-3)  # the edit is real: +1 K on channel 0 ...
    np.testing.assert_allclose(shift[:, 1:], 0.0, atol=1e-9)  # ... and nothing else
    line = one_line_error(run_cli("info", edited, "--key", key_file))
    assert "signature does not verify" in line
    with pytest.raises(rb.BundleError, match="signature does not verify"):
        EmulatedOperator.load(edited, key=key_file)
    other_key = tmp_path / "other.key"
    other_key.write_bytes(b"k" * 40)
    with pytest.raises(rb.BundleError, match="signature does not verify"):
        rb.read_bundle(signed, key=other_key)
    with pytest.raises(rb.BundleError, match="not signed"):
        rb.read_bundle(tiny_bundle, key=key_file)
    short = tmp_path / "short.key"
    short.write_bytes(b"secret\n")
    assert "at least 32" in one_line_error(run_cli("sign", signed, "--key", short))
    EmulatedOperator.load(signed, key=key_file)  # the untouched signed bundle verifies


def test_bundle_with_external_data_is_refused(tiny_bundle, tmp_path):
    model = onnx.load(str(tiny_bundle))
    target = tmp_path / "split.onnx"
    onnx.save_model(model, str(target), save_as_external_data=True, all_tensors_to_one_file=True,
                    location="split.weights", size_threshold=0)
    with pytest.raises(rb.BundleError, match="external data files; an rtemu bundle is one self-contained file"):
        rb.read_bundle(target)


def test_metadata_of_unreasonable_size_is_refused_before_parsing(tiny_bundle, tmp_path, monkeypatch):
    model = onnx.load(str(tiny_bundle))
    for p in model.metadata_props:
        if p.key == "rtemu.envelope":
            p.value = "[" * (rb.MAX_METADATA_BYTES + 1)  # a parser bomb, far beyond any real bundle
    target = tmp_path / "big.onnx"
    target.write_bytes(model.SerializeToString())
    monkeypatch.setattr(rb.json, "loads", lambda *a, **k: pytest.fail("metadata parsed"))
    with pytest.raises(rb.BundleError, match="bytes of metadata.*refused before parsing"):
        rb.read_bundle(target)


def test_usage_errors_are_one_line_too(tmp_path):
    line = one_line_error(run_cli("simulate", "--instrument", "demo-sounder", "--input", tmp_path / "x.nc"))
    assert "--output" in line and "rtemu simulate --help" in line
    assert "invalid choice" in one_line_error(run_cli("simulate", "--fallback", "magic"))
