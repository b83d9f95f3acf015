"""
A run that survives crashes and queue limits
============================================

A run that survives crashes: start it, kill it at any moment, start it again, and it continues.

The bias checkpoint holds everything needed to continue (the bias, the engine's own checkpoint, a
portable copy of positions, velocities, box, step and time), and is replaced atomically, so a kill never
leaves a damaged file. On the same platform the continuation is bit-for-bit the run that was never
interrupted (Reference; CPU with one thread and no PME); on another platform it continues from the
portable state. The CV log is cut back to the checkpoint's step, so it never holds a record twice.

Run:  python examples/restart.py [--steps 200000] [--folder restart_run]
      (press Ctrl-C or kill it, then run the same command again)
"""

import argparse
import math
import os
import sys

import openmm as mm
from openmm import app, unit

from gridbias import openmm as gbo
from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide

parser = argparse.ArgumentParser()
parser.add_argument("--steps", type=int, default=200_000, help="total length of the run")
parser.add_argument("--folder", default="restart_run", help="where the checkpoint and the CV log go")
args = parser.parse_args()
os.makedirs(args.folder, exist_ok=True)
checkpoint = os.path.join(args.folder, "run.gbz")

# The same script every time: build the System, the bias and the Simulation ...
topology, positions, system = build_dipeptide()
phi, psi = backbone_dihedral_atoms(topology)
cvs = [gbo.dihedral(*phi, name="phi"), gbo.dihedral(*psi, name="psi")]
bias = gbo.make_bias(cvs, lower=[-math.pi] * 2, upper=[math.pi] * 2, bins=[64, 64], sigma=[0.35, 0.35],
                     height=1.2, temperature=300.0, bias_factor=10.0)
link = gbo.attach(system, cvs, bias)
integrator = mm.LangevinMiddleIntegrator(300 * unit.kelvin, 1 / unit.picosecond, 0.002 * unit.picoseconds)
simulation = app.Simulation(topology, system, integrator, mm.Platform.getPlatformByName("Reference"))
simulation.context.setPositions(positions)
simulation.reporters.append(link.reporter(stride=500, checkpoint=checkpoint, checkpoint_every=10_000,
                                          log=os.path.join(args.folder, "run.gbl")))

# ... then continue from the checkpoint if there is one (and below, step only to the total length).
if os.path.exists(checkpoint):
    meta = link.restore(simulation, checkpoint)
    print(f"continuing from step {meta.step} ({link.bias.n_hills} hills)")
else:
    simulation.minimizeEnergy()
    simulation.context.setVelocitiesToTemperature(300 * unit.kelvin)

simulation.reporters.append(app.StateDataReporter(sys.stdout, 20_000, step=True, speed=True))
simulation.step(max(0, args.steps - simulation.currentStep))
link.save(simulation, checkpoint)
print(f"done: step {simulation.currentStep}, {link.bias.n_hills} hills; checkpoint {checkpoint}")
