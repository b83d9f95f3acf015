"""The pure-core example runs end to end and reproduces the exact free energy."""

import importlib.util
from pathlib import Path

EXAMPLES = Path(__file__).resolve().parents[2] / "examples"


def _load(name):
    spec = importlib.util.spec_from_file_location(name, EXAMPLES / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_core_langevin_example_converges():
    # Exact reference: for a 1-D system the free energy is the potential itself; the well-tempered limit
    # F = -(gamma/(gamma-1)) V + C (Barducci, Bussi & Parrinello, PRL 100, 020603, 2008).
    rmse_kt = _load("core_langevin").main()
    assert rmse_kt <= 0.5
