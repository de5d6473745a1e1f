"""Every script in examples/ runs (small settings) and does what it says."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import xarray as xr

from rtemu._io import open_dataset

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "examples"


def _run(*args, cwd=None, block_rtemu=False):
    cmd = [sys.executable]
    if block_rtemu:
        script = Path(args[0]).read_text()
        cmd += ["-c", "import sys; sys.modules['rtemu'] = None\nsys.argv = " + repr(list(args)) + "\n" + script]
    else:
        cmd += list(args)
    done = subprocess.run(cmd, capture_output=True, text=True, cwd=cwd or ROOT)
    assert done.returncode == 0, done.stdout + done.stderr
    return done.stdout


def test_shipped_example_profiles_are_what_the_script_makes(tmp_path):
    target = tmp_path / "profiles.nc"
    _run(str(EXAMPLES / "make_example_profiles.py"), str(target))
    with open_dataset(target) as made, open_dataset(EXAMPLES / "data" / "example_profiles.nc") as shipped:
        xr.testing.assert_identical(made.load(), shipped.load())
        assert "INVENTED" in shipped.attrs["title"]


def test_plain_onnxruntime_example_without_rtemu(tiny_bundle):
    out = _run(str(EXAMPLES / "plain_onnxruntime.py"), str(tiny_bundle), block_rtemu=True)
    assert "brightness_temperature (2, 16)" in out


def test_train_new_instrument_example(tmp_path):
    recipe = tmp_path / "tiny.toml"
    from conftest import TINY_RECIPE

    recipe.write_text(TINY_RECIPE)
    out = _run(str(EXAMPLES / "train_new_instrument.py"), "--count", "600", "--recipe", str(recipe),
               "--audit-count", "60", "--output-dir", str(tmp_path))
    assert "tern-7x" in out and "trained 5 channels" in out
    assert (tmp_path / "tern-7x.onnx").is_file() and (tmp_path / "audit" / "report.md").is_file()


def test_var1d_example_with_both_operators(tmp_path, tiny_bundle):
    out = _run(str(EXAMPLES / "var1d_over_file.py"), "--output-dir", str(tmp_path / "phys"))
    assert "converged" in out
    with open_dataset(tmp_path / "phys" / "analysis.nc") as analysis:
        assert np.isfinite(analysis["air_temperature"].values).all()
    out = _run(str(EXAMPLES / "var1d_over_file.py"), "--model", str(tiny_bundle),
               "--output-dir", str(tmp_path / "emu"))
    assert "EmulatedOperator" in out
    rejected = int(re.search(r"operator_flag (\d+)", out).group(1))
    assert rejected > 0  # the tiny bundle's envelope leaves out some backgrounds ...
    # ... which the physics fallback computes instead, so none is rejected
    out = _run(str(EXAMPLES / "var1d_over_file.py"), "--model", str(tiny_bundle), "--fallback",
               "--output-dir", str(tmp_path / "fallback"))
    assert "operator_flag 0," in out
    with open_dataset(tmp_path / "fallback" / "diagnostics.nc") as d:
        assert int(d["qc_count"].sel(qc_category="operator_flag")) == 0


def test_dask_cluster_example(tmp_path, tiny_bundle):
    out = _run(str(EXAMPLES / "dask_cluster_simulation.py"), "--model", str(tiny_bundle),
               "--output-dir", str(tmp_path))
    assert "identical bytes: True" in out


def test_example_profiles_script_parses_its_arguments(tmp_path):
    done = subprocess.run([sys.executable, str(EXAMPLES / "make_example_profiles.py"), "--help"],
                          capture_output=True, text=True, cwd=tmp_path)
    assert done.returncode == 0 and "usage:" in done.stdout
    assert list(tmp_path.iterdir()) == []  # --help writes nothing (it once wrote a file named --help)
    bad = subprocess.run([sys.executable, str(EXAMPLES / "make_example_profiles.py"), "a.nc", "b.nc"],
                         capture_output=True, text=True, cwd=tmp_path)
    assert bad.returncode == 2 and "unrecognized arguments" in bad.stderr
    assert list(tmp_path.iterdir()) == []
