"""
The same script with the bias added
===================================

examples/plain_md.py plus the few lines that add a well-tempered bias on the backbone torsions phi and psi.

`diff examples/plain_md.py examples/plain_md_with_bias.py` shows them: build the CVs and the bias, attach
it to the System before the Simulation is made, append the reporter (a hill every 500 steps, a checkpoint
every 50,000 steps, a CV log for analysis) and save at the end. Writes dipeptide.gbz and dipeptide.gbl in
the current folder; examples/restart.py shows how a run continues from the checkpoint.

Run:  python examples/plain_md_with_bias.py [--steps 100000]
"""

import argparse
import sys

import openmm as mm
from openmm import app, unit

from gridbias import openmm as gbo
from gridbias.demo.dipeptide import build_dipeptide

parser = argparse.ArgumentParser()
parser.add_argument("--steps", type=int, default=100_000)
args = parser.parse_args()

topology, positions, system = build_dipeptide()
cvs = [gbo.dihedral(1, 6, 7, 8, name="phi"), gbo.dihedral(6, 7, 8, 16, name="psi")]  # C-N-CA-C, N-CA-C-N
bias = gbo.make_bias(cvs, lower=[-180 * unit.degree] * 2, upper=[180 * unit.degree] * 2, bins=[64, 64],
                     sigma=[20 * unit.degree] * 2, height=1.2 * unit.kilojoule_per_mole,
                     temperature=300 * unit.kelvin, bias_factor=10)
link = gbo.attach(system, cvs, bias)
integrator = mm.LangevinMiddleIntegrator(300 * unit.kelvin, 1 / unit.picosecond, 0.002 * unit.picoseconds)
platform = mm.Platform.getPlatformByName("Reference")  # the fastest for 22 atoms on a CPU (measured)
simulation = app.Simulation(topology, system, integrator, platform)
simulation.context.setPositions(positions)
simulation.minimizeEnergy()
simulation.reporters.append(app.StateDataReporter(sys.stdout, 10_000, step=True, potentialEnergy=True,
                                                  temperature=True, speed=True))
simulation.reporters.append(link.reporter(stride=500, checkpoint="dipeptide.gbz", checkpoint_every=50_000,
                                          log="dipeptide.gbl"))
simulation.step(args.steps)
link.save(simulation, "dipeptide.gbz")
