"""Every Python block of the README runs as written (in a fresh process, on a small bundle)."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest

README = Path(__file__).resolve().parents[1] / "README.md"
BLOCKS = re.findall(r"```python\n(.*?)```", README.read_text(), re.S)


def test_the_readme_has_python_blocks():
    assert len(BLOCKS) >= 2


@pytest.mark.parametrize("index", range(len(BLOCKS)))
def test_readme_python_block_runs(index, tiny_bundle, tmp_path):
    # The blocks name the demo's bundle, rtemu-demo/emulator.onnx: here it is the test bundle.
    (tmp_path / "rtemu-demo").mkdir()
    (tmp_path / "rtemu-demo" / "emulator.onnx").symlink_to(tiny_bundle)
    done = subprocess.run([sys.executable, "-c", BLOCKS[index]], capture_output=True, text=True,
                          cwd=tmp_path)
    assert done.returncode == 0, f"README block {index}:\n{BLOCKS[index]}\n{done.stderr}"
