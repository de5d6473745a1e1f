"""Interrupted runs: a killed `rtemu simulate` resumes from its finished chunks and gives
the same bytes as an uninterrupted run."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest

from rtemu._io import to_netcdf_atomic


def _wait_for_chunks(side, count, process, timeout=60.0):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if side.exists() and len(list(side.glob("chunk-*.nc"))) >= count:
            return True
        if process.poll() is not None:
            return False
        time.sleep(0.01)
    return False


def test_killed_simulate_resumes_to_identical_bytes(tmp_path, small_profiles):
    ds = small_profiles(n=1600, nlev=60, seed=4)
    source = tmp_path / "profiles.nc"
    to_netcdf_atomic(ds, source)
    args = ["simulate", "--instrument", "demo-sounder", "--input", str(source), "--jacobian",
            "--chunk-size", "100", "--quiet"]
    reference = tmp_path / "reference.nc"
    subprocess.run([sys.executable, "-m", "rtemu.cli", *args, "--output", str(reference)],
                   check=True, capture_output=True)

    target = tmp_path / "resumed.nc"
    side = tmp_path / "resumed.nc.chunks"
    process = subprocess.Popen([sys.executable, "-m", "rtemu.cli", *args, "--output", str(target)],
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    reached = _wait_for_chunks(side, 3, process)
    process.send_signal(signal.SIGKILL)
    process.wait()
    assert reached, "the run finished before it could be interrupted; enlarge the input"
    assert not target.exists(), "an interrupted run must not leave an output file"
    finished = len(list(side.glob("chunk-*.nc")))
    assert 3 <= finished < 16

    done = subprocess.run([sys.executable, "-m", "rtemu.cli", *args, "--output", str(target)],
                          check=True, capture_output=True, text=True)
    assert "wrote" in done.stdout
    assert target.read_bytes() == reference.read_bytes()
    assert not side.exists()


def test_changed_arguments_start_over(tmp_path, small_profiles, capsys):
    from rtemu.streaming import simulate_file

    ds = small_profiles(n=20, nlev=20, seed=1)
    source = tmp_path / "p.nc"
    to_netcdf_atomic(ds, source)
    side = tmp_path / "o.nc.chunks"
    side.mkdir()
    (side / "manifest.json").write_text('{"fingerprint": "another job"}')
    (side / "chunk-000000.nc").write_bytes(b"stale")
    simulate_file(source, tmp_path / "o.nc", instrument="demo-sounder", chunk_size=8, progress=False)
    assert "other arguments" in capsys.readouterr().err
    assert (tmp_path / "o.nc").exists() and not side.exists()
