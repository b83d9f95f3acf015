"""The documentation site builds with every warning treated as an error (the gallery's examples run too)."""

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

pytest.importorskip("sphinx")
pytest.importorskip("pydata_sphinx_theme")
pytest.importorskip("numpydoc")
pytest.importorskip("sphinx_gallery")
pytest.importorskip("myst_parser")
pytest.importorskip("openmm")
pytest.importorskip("matplotlib")


def test_site_builds_without_warnings(tmp_path):
    out = tmp_path / "html"
    run = subprocess.run([sys.executable, "-m", "sphinx", "-W", "--keep-going", "-q", "-b", "html",
                          str(ROOT / "docs"), str(out)], capture_output=True, text=True, timeout=900)
    assert run.returncode == 0, run.stdout[-3000:] + run.stderr[-3000:]
    assert (out / "index.html").exists()
    assert (out / "api" / "index.html").exists()
    assert (out / "gallery" / "index.html").exists()
