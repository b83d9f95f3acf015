"""The adapter's examples run, and the biased script is the plain one plus a few lines.

Reference for the restart example: its own guarantee, checked through the checkpoint it leaves (step
count and hill count continue where the first run stopped).
"""

import difflib
import os
import subprocess
import sys
from pathlib import Path

import pytest

pytest.importorskip("openmm")

from gridbias.checkpoint import read_checkpoint  # noqa: E402

pytestmark = pytest.mark.openmm
EXAMPLES = Path(__file__).resolve().parents[2] / "examples"


def run(script, *args, cwd):
    res = subprocess.run([sys.executable, str(EXAMPLES / script), *args], cwd=cwd, capture_output=True, text=True,
                         timeout=300)
    assert res.returncode == 0, res.stderr[-3000:]
    return res.stdout


def code_lines(path):
    text = path.read_text()
    body = text[text.index('"""', 3) + 3:]  # after the module docstring
    return [line for line in body.splitlines() if line.strip()]


def test_biased_script_is_plain_script_plus_few_lines():
    plain, biased = code_lines(EXAMPLES / "plain_md.py"), code_lines(EXAMPLES / "plain_md_with_bias.py")
    diff = [d for d in difflib.ndiff(plain, biased) if d[:2] in ("- ", "+ ")]
    assert all(d.startswith("+ ") for d in diff), f"lines of the plain script were changed: {diff}"
    assert len(diff) <= 11, f"{len(diff)} added lines"


def test_plain_md_with_bias_runs(tmp_path):
    run("plain_md_with_bias.py", "--steps", "2000", cwd=tmp_path)
    meta, _ = read_checkpoint(tmp_path / "dipeptide.gbz")
    assert meta["step"] == 2000 and meta["bias"]["n_hills"] == 4
    assert (tmp_path / "dipeptide.gbl").exists()


def test_restart_example_continues(tmp_path):
    run("restart.py", "--steps", "1500", "--folder", "out", cwd=tmp_path)
    out = run("restart.py", "--steps", "2500", "--folder", "out", cwd=tmp_path)
    assert "continuing from step 1500 (3 hills)" in out
    meta, _ = read_checkpoint(tmp_path / "out" / "run.gbz")
    assert meta["step"] == 2500 and meta["bias"]["n_hills"] == 5
    assert os.path.exists(tmp_path / "out" / "run.gbl")
