"""The README's plain-onnxruntime snippet runs, verbatim, in a process that cannot import rtemu."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

README = Path(__file__).resolve().parents[1] / "README.md"
BLOCK_RTEMU = "import sys; sys.modules['rtemu'] = None  # any 'import rtemu' now fails\n"


def readme_snippet() -> str:
    text = README.read_text()
    section = text.split("## Calling the ONNX file from plain onnxruntime", 1)[1]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


def test_readme_snippet_runs_without_rtemu(tiny_bundle):
    snippet = readme_snippet()
    assert "rtemu-demo/emulator.onnx" in snippet and "import rtemu" not in snippet
    code = BLOCK_RTEMU + snippet.replace("rtemu-demo/emulator.onnx", str(tiny_bundle)) + (
        "\nassert bt.shape == (n, C) and jt.shape == (n, C, L) and jq.shape == (n, C, L)"
        "\nassert jts.shape == (n, C) and jem.shape == (n, C) and flag.shape == (n, C)"
        "\nassert str(flag.dtype) == 'int32' and np.isfinite(bt).all()"
        "\nprint('ok', bt.shape)\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd="/")
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("ok (2, 16)")


def test_snippet_matches_the_example_file():
    example = (README.parent / "examples" / "plain_onnxruntime.py").read_text()
    body = example.split("# --- README snippet (with the file name as a variable) ---\n", 1)[1]
    body = body.split("# --- end of snippet ---", 1)[0]
    assert body.replace("MODEL", '"rtemu-demo/emulator.onnx"') == readme_snippet()
