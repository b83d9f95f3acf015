"""Every Python block of the README's "Analysing a run" section runs as written, on both kinds of checkpoint:
a run checkpoint written by the OpenMM reporter, and a bias checkpoint written by ``GridBias.save``."""

import re
from pathlib import Path

import numpy as np
import pytest

import gridbias as gb
from gridbias import testsystems
from gridbias.cvlog import CVLogWriter
from gridbias.runs import load_run, read_log, run_frames

pytest.importorskip("matplotlib")
README = Path(__file__).resolve().parents[2] / "README.md"


def _analysis_blocks():
    text = README.read_text()
    start = text.index("## Analysing a run")
    end = text.index("\n## ", start + 1)
    subsection = text.find("\n### ", start, end)  # its own blocks run in test_readme_reweighting_routes.py
    section = text[start:end if subsection == -1 else subsection]
    blocks = re.findall(r"```python\n(.*?)```", section, re.S)
    assert blocks, "the README's analysis section has no Python block"
    return blocks


def _run_section(namespace):
    for k, block in enumerate(_analysis_blocks()):
        exec(compile(block, f"README.md (analysis block {k})", "exec"), namespace)
    return namespace


def test_readme_analysis_on_a_bias_checkpoint(tmp_path, monkeypatch):
    potential = testsystems.MuellerBrown.for_barrier(10.0, 300.0)
    grid = gb.Grid([-2.0, -0.7], [1.4, 2.3], [102, 90])
    bias = gb.GridBias(grid, sigma=[0.1, 0.1], height=1.5, temperature=300.0, bias_factor=6.0)
    traj = testsystems.run_metadynamics(potential, bias, [-0.55, 1.44], n_deposits=600, stride=100, dt=0.002,
                                        friction=5.0, rng=np.random.default_rng(3), mass=10.0)
    monkeypatch.chdir(tmp_path)
    bias.save("run.gbz")
    with CVLogWriter("run.gbl", ["step", "time", "cv0", "cv1", "bias"], ["", "ps", "nm", "nm", "kJ/mol"]) as log:
        steps = np.arange(1, traj.times.size + 1) * 100
        log.write(np.column_stack([steps, traj.times, traj.positions, traj.bias_energies]))
    namespace = _run_section({"my_observable": traj.positions[:, 1], "edges": np.linspace(-0.5, 2.0, 26)})
    assert namespace["run"].source == "bias checkpoint"
    assert Path("surface.png").stat().st_size > 0
    assert namespace["surface"].free_energy.shape == grid.shape
    verdict = namespace["verdict"]
    assert len(verdict.criteria) == 4  # drift, transitions, height decay (well-tempered), cross-check
    # 600 hills of a short run: the height criterion cannot hold yet, so the verdict must not say converged.
    assert not verdict.converged


@pytest.mark.openmm
def test_readme_analysis_on_a_reporter_checkpoint(tmp_path, monkeypatch):
    """The checkpoint and CV log the reporter writes (a short dipeptide run) open with the documented call."""
    pytest.importorskip("openmm")
    from gridbias import openmm as gbo
    from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide, make_simulation

    topology, positions, system = build_dipeptide()
    phi, psi = backbone_dihedral_atoms(topology)
    cvs = [gbo.dihedral(*phi, name="phi"), gbo.dihedral(*psi, name="psi")]
    bias = gbo.make_bias(cvs, lower=[-np.pi] * 2, upper=[np.pi] * 2, bins=[48, 48], sigma=[0.35, 0.35],
                         height=1.5, temperature=300.0, bias_factor=6.0)
    link = gbo.attach(system, cvs, bias, route="cvforce")
    simulation = make_simulation(topology, system, positions, temperature=300.0, platform="Reference", seed=5)
    monkeypatch.chdir(tmp_path)
    reporter = link.reporter(50, checkpoint="run.gbz", checkpoint_every=3000, log="run.gbl")
    simulation.reporters.append(reporter)
    simulation.step(3000)
    reporter.close()
    frames = run_frames(load_run("run.gbz"), read_log("run.gbl"))
    namespace = _run_section({"my_observable": frames.cvs[:, 1], "edges": np.linspace(-np.pi, np.pi, 13)})
    run = namespace["run"]
    assert run.source == "OpenMM run checkpoint" and run.names == ("phi", "psi") and run.step == 3000
    assert run.bias.n_hills == 60 and namespace["times"].size == 60
    assert namespace["surface"].free_energy.shape == run.bias.grid.shape
    assert Path("surface.png").stat().st_size > 0
    assert not namespace["verdict"].converged  # 6 ps of sampling cannot pass the criteria
    with pytest.raises(gb.CheckpointError, match=r"run checkpoint .*gridbias\.runs\.load_run"):
        gb.GridBias.load("run.gbz")  # the bias-only reader points to the documented call
