"""Walkers stop together on a collective decision (``mpiexec -n 2`` runs of mpi/walkers_stopping.py)."""

import json
import sys
from pathlib import Path

import numba
import pytest

sys.path.insert(0, str(Path(__file__).parent))
from test_walkers_mpi import HAVE_MPI4PY, MPIEXEC, mpirun  # noqa: E402

SCRIPT = Path(__file__).parent / "mpi" / "walkers_stopping.py"

pytestmark = [
    pytest.mark.mpi,
    pytest.mark.skipif(not HAVE_MPI4PY, reason="needs mpi4py (pip install 'gridbias[mpi]')"),
    pytest.mark.skipif(MPIEXEC is None, reason="needs an mpiexec launcher (pip install 'gridbias[mpi]')"),
    pytest.mark.skipif(numba.config.DISABLE_JIT, reason="needs compiled dynamics"),
]


def test_one_walkers_rule_stops_all_walkers_at_the_same_step_and_a_rerun_does_nothing(tmp_path):
    mpirun([tmp_path], script=SCRIPT, timeout=240)
    first = [json.loads((tmp_path / f"stop{r}.json").read_text()) for r in range(2)]
    for walker in first:
        assert walker["step"] == 2_000 and walker["loops"] == 40
        assert walker["decision"]["rule"] == "MaxSteps(2000)"
        assert "(walker 1; all walkers stop)" in walker["decision"]["reason"]
        assert walker["hills"] == 2 * 40  # one hill per walker per exchange
    mpirun([tmp_path], script=SCRIPT, timeout=240)
    again = [json.loads((tmp_path / f"stop{r}.json").read_text()) for r in range(2)]
    assert [w["loops"] for w in again] == [0, 0] and [w["step"] for w in again] == [2_000, 2_000]
