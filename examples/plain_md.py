"""
A plain OpenMM script (no bias)
===============================

A plain OpenMM script: the blocked alanine dipeptide in vacuum, Langevin dynamics at 300 K.

examples/plain_md_with_bias.py is this same script plus the few lines that add a well-tempered bias on
the backbone torsions phi and psi (compare them with `diff`).

Run:  python examples/plain_md.py [--steps 100000]
"""

import argparse
import sys

import openmm as mm
from openmm import app, unit

from gridbias.demo.dipeptide import build_dipeptide

parser = argparse.ArgumentParser()
parser.add_argument("--steps", type=int, default=100_000)
args = parser.parse_args()

topology, positions, system = build_dipeptide()
integrator = mm.LangevinMiddleIntegrator(300 * unit.kelvin, 1 / unit.picosecond, 0.002 * unit.picoseconds)
platform = mm.Platform.getPlatformByName("Reference")  # the fastest for 22 atoms on a CPU (measured)
simulation = app.Simulation(topology, system, integrator, platform)
simulation.context.setPositions(positions)
simulation.minimizeEnergy()
simulation.reporters.append(app.StateDataReporter(sys.stdout, 10_000, step=True, potentialEnergy=True,
                                                  temperature=True, speed=True))
simulation.step(args.steps)
