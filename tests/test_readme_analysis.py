"""The README's analysis snippet runs as written on a short well-tempered run of an analytic system."""

import re
from pathlib import Path

import numpy as np
import pytest

import gridbias as gb
from gridbias import testsystems
from gridbias.cvlog import CVLogWriter

pytest.importorskip("matplotlib")
README = Path(__file__).resolve().parent.parent / "README.md"


def _analysis_snippet():
    text = README.read_text()
    section = text[text.index("## Analysing a run"):]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


def test_readme_analysis_snippet(tmp_path, monkeypatch):
    potential = testsystems.MuellerBrown.for_barrier(10.0, 300.0)
    grid = gb.Grid([-2.0, -0.7], [1.4, 2.3], [102, 90])
    bias = gb.GridBias(grid, sigma=[0.1, 0.1], height=1.5, temperature=300.0, bias_factor=6.0)
    traj = testsystems.run_metadynamics(potential, bias, [-0.55, 1.44], n_deposits=600, stride=100, dt=0.002,
                                        friction=5.0, rng=np.random.default_rng(3), mass=10.0)
    monkeypatch.chdir(tmp_path)
    bias.save("bias.gbz")
    with CVLogWriter("run.gbl", ["step", "time", "x", "y", "bias"], ["", "ps", "nm", "nm", "kJ/mol"]) as log:
        steps = np.arange(1, traj.times.size + 1) * 100
        log.write(np.column_stack([steps, traj.times, traj.positions, traj.bias_energies]))
    namespace = {"my_observable": traj.positions[:, 1], "edges": np.linspace(-0.5, 2.0, 26)}
    exec(compile(_analysis_snippet(), "README.md", "exec"), namespace)
    assert Path("surface.png").stat().st_size > 0
    assert namespace["surface"].free_energy.shape == grid.shape
    verdict = namespace["verdict"]
    assert len(verdict.criteria) == 3  # drift, transitions, height decay (well-tempered)
    # 600 hills of a short run: the height criterion cannot hold yet, so the verdict must not say converged.
    assert not verdict.converged
