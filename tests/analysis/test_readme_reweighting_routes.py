"""The README's "Quantities that were not biased" blocks run as written, through a short OpenMM run of the
dipeptide biased on phi: the reporter logs an observable, OpenMM's DCDReporter writes the frames, and both
routes give a profile."""

import re
from pathlib import Path

import numpy as np
import pytest

openmm = pytest.importorskip("openmm")
pytest.importorskip("mdtraj")
from openmm import app  # noqa: E402

from gridbias import openmm as gbo  # noqa: E402
from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide, make_simulation, write_pdb  # noqa: E402

pytestmark = pytest.mark.openmm
README = Path(__file__).resolve().parents[2] / "README.md"


def _route_blocks():
    text = README.read_text()
    start = text.index("### Quantities that were not biased")
    section = text[start:text.index("\n## ", start)]
    blocks = re.findall(r"```python\n(.*?)```", section, re.S)
    assert len(blocks) == 2, "expected a 'during the run' block and an 'afterwards' block"
    return blocks


def test_readme_reweighting_routes_run_as_written(tmp_path, monkeypatch):
    during, afterwards = _route_blocks()
    topology, positions, system = build_dipeptide()
    phi, _ = backbone_dihedral_atoms(topology)
    cvs = [gbo.dihedral(*phi, name="phi")]
    bias = gbo.make_bias(cvs, lower=[-np.pi], upper=[np.pi], bins=[48], sigma=[0.35], height=1.5,
                         temperature=300.0, bias_factor=6.0)
    link = gbo.attach(system, cvs, bias, route="cvforce")
    simulation = make_simulation(topology, system, positions, temperature=300.0, platform="Reference", seed=3)
    monkeypatch.chdir(tmp_path)
    write_pdb("start.pdb", topology, positions)
    namespace = {"gbo": gbo, "app": app, "link": link, "simulation": simulation}
    exec(compile(during, "README.md (during the run)", "exec"), namespace)
    simulation.step(20_000)
    link.save(simulation, "run.gbz")
    simulation.reporters[0].close()
    exec(compile(afterwards, "README.md (afterwards)", "exec"), namespace)
    assert namespace["log"].columns == ("step", "time", "phi", "bias", "hbond")
    assert namespace["profile"].free_energy.shape == (20,)
    frames = namespace["frames"]
    assert frames.checked == ("phi", "hbond") and frames.steps.tolist() == list(range(1000, 20_001, 1000))
    assert namespace["frame_weights"].n_frames == 20 and namespace["rg_profile"].free_energy.shape == (20,)
