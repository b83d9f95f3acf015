"""The README's "Adding the bias" section starts from the advice: its first block runs as written on a
dipeptide (the demo's builder), the lines it prints to paste run a biased simulation, and ``gridbias advise``
reads the log it wrote."""

import re
from pathlib import Path

import pytest

pytest.importorskip("openmm")

from gridbias import advice as adv  # noqa: E402
from gridbias.cli import main  # noqa: E402
from gridbias.demo.dipeptide import build_dipeptide, make_simulation, minimize  # noqa: E402

pytestmark = pytest.mark.openmm
README = Path(__file__).resolve().parents[2] / "README.md"


def _blocks():
    text = README.read_text()
    section = text[text.index("## Adding the bias to an existing OpenMM script"):]
    section = section[:section.index("\n## ", 1)]
    return re.findall(r"```python\n(.*?)```", section, re.S)


def test_readme_advice_block_runs_and_its_pasted_lines_run(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    blocks = _blocks()
    assert "advise_from_simulation" in blocks[0] and "make_bias" in blocks[1], "it must start from the advice"
    topology, positions, system = build_dipeptide()
    positions, _ = minimize(system, positions)
    namespace = {"simulation": make_simulation(topology, system, positions, seed=11)}
    exec(compile(blocks[0], "README.md (advice block)", "exec"), namespace)
    advice = namespace["advice"]
    out = capsys.readouterr().out
    assert "Paste into your OpenMM script" in out and "gbo.make_bias(cvs" in out
    assert all(s.period is not None for s in advice.statistics)  # dihedrals: periodic, whole-period grid
    assert advice.bias_factor == 8.0  # 40 kJ/mol = 16 kBT at 300 K -> 2 kBT under the bias
    pasted = advice.code().replace(
        adv.SIMULATION_LINE, "simulation = make_simulation(topology, system, positions, seed=12)")
    namespace.update(system=system, topology=topology, positions=positions, make_simulation=make_simulation)
    exec(compile(pasted, "pasted advice", "exec"), namespace)
    simulation, link = namespace["simulation"], namespace["link"]
    simulation.step(5 * advice.stride)
    assert link.bias.n_hills == 5
    for reporter in simulation.reporters:
        reporter.close()
    assert main(["advise", "short.gbl", "--barrier", "40"]) == 0
    assert "gbo.make_bias(cvs" in capsys.readouterr().out
