"""Several walkers, one bias: the dipeptide's (phi, psi) surface from walkers that share their hills over MPI.

Every walker is one MPI process running its own OpenMM Simulation, from its own starting conformation and
with its own random seed; all of them deposit into one well-tempered bias. Compared with
examples/plain_md_with_bias.py the script adds one line, ``bias = walkers.share(bias)``, and gives each
walker its own starting structure, seed and checkpoint file. Interrupt it at any moment (or lose a node):
MPI stops every walker, and the same command continues all of them from their last checkpoints.

Run:  mpiexec -n 4 python examples/walkers_openmm.py [--steps 200000] [--folder walkers_run]
      (on a cluster, e.g. with Slurm: srun -n 32 python examples/walkers_openmm.py --steps 2000000)

Writes, in the folder: walker<N>.gbz (each walker's run checkpoint: the shared bias and its MD state),
shared.gbz (the shared bias alone, for analysis: ``gridbias.GridBias.load``), free_energy.png.
"""

import argparse
import math
import os
import sys

import openmm as mm
from mpi4py import MPI
from openmm import app, unit

from gridbias import openmm as gbo
from gridbias import walkers
from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide

# Starting (phi, psi) of the walkers, degrees: C7eq, alpha_R, C5, alpha_L, then round again.
STARTS = [(-80.0, 70.0), (-70.0, -40.0), (-150.0, 160.0), (60.0, 40.0)]

parser = argparse.ArgumentParser()
parser.add_argument("--steps", type=int, default=200_000, help="steps per walker, in total")
parser.add_argument("--folder", default="walkers_run")
parser.add_argument("--stride", type=int, default=500, help="steps between deposits")
parser.add_argument("--checkpoint-every", type=int, default=50_000, help="steps between checkpoints")
args = parser.parse_args()

comm = MPI.COMM_WORLD
rank = comm.Get_rank()
if rank == 0:
    os.makedirs(args.folder, exist_ok=True)
comm.Barrier()
checkpoint = os.path.join(args.folder, f"walker{rank}.gbz")

phi0, psi0 = STARTS[rank % len(STARTS)]
topology, positions, system = build_dipeptide(math.radians(phi0), math.radians(psi0))
phi, psi = backbone_dihedral_atoms(topology)
cvs = [gbo.dihedral(*phi, name="phi"), gbo.dihedral(*psi, name="psi")]
bias = gbo.make_bias(cvs, lower=[-math.pi] * 2, upper=[math.pi] * 2, bins=[64, 64], sigma=[0.35, 0.35],
                     height=1.2, temperature=300.0, bias_factor=10.0)
bias = walkers.share(bias)  # the one extra line: every walker now deposits into the same bias
link = gbo.attach(system, cvs, bias)
integrator = mm.LangevinMiddleIntegrator(300 * unit.kelvin, 1 / unit.picosecond, 0.002 * unit.picoseconds)
integrator.setRandomNumberSeed(1000 + rank)  # each walker its own noise
simulation = app.Simulation(topology, system, integrator, mm.Platform.getPlatformByName("Reference"))
simulation.context.setPositions(positions)
simulation.reporters.append(link.reporter(stride=args.stride, checkpoint=checkpoint,
                                          checkpoint_every=args.checkpoint_every))

# Continue only if every walker has its checkpoint (restore is collective: all walkers restore together).
found = comm.allgather(os.path.exists(checkpoint))
if all(found):
    meta = link.restore(simulation, checkpoint)
    if rank == 0:
        print(f"continuing from step {meta.step} ({link.bias.n_hills} hills, "
              f"{link.bias.n_walkers} walkers)")
elif any(found):
    missing = [r for r, ok in enumerate(found) if not ok]
    sys.exit(f"walker {rank}: checkpoints of walkers {missing} are missing in {args.folder!r}; run with the "
             "number of walkers that wrote them, or use a new folder")
else:
    simulation.minimizeEnergy()
    simulation.context.setVelocitiesToTemperature(300 * unit.kelvin, 7 + rank)

if rank == 0:  # progress from one walker; they all advance together
    simulation.reporters.append(app.StateDataReporter(sys.stdout, max(args.steps // 10, 1), step=True,
                                                      speed=True, remainingTime=True, totalSteps=args.steps))
simulation.step(max(0, args.steps - simulation.currentStep))
link.save(simulation, checkpoint)  # this walker's run checkpoint at the end
shared = os.path.join(args.folder, "shared.gbz")
link.bias.save(shared)  # collective: walker 0 writes the shared bias once all walkers agree on it

if rank == 0:
    print(f"done: step {simulation.currentStep} per walker, {link.bias.n_hills} hills from "
          f"{link.bias.n_walkers} walkers; shared bias in {shared}")
    try:
        from gridbias import analysis, plots

        surface = analysis.surface_at(link.bias)
        figure = plots.plot_free_energy(surface, names=["phi", "psi"], angle_unit="deg")
        print("free-energy surface:", plots.save_figure(figure, os.path.join(args.folder, "free_energy.png")))
    except ImportError:
        print("install matplotlib to get the free-energy plot (pip install 'gridbias[plot]')")
