"""MPI worker for tests/walkers/test_walkers_mpi.py: OpenMM walkers (the demo dipeptide, Reference platform).

Run as ``mpiexec -n 2 python tests/walkers/mpi/walkers_openmm.py SCENARIO OUT_DIR STEPS``. Each rank runs its own
Simulation (own starting conformation, velocities and integrator seed) with the same few adapter lines as
one walker, plus ``walkers.share``. Scenarios:

agree   run STEPS steps; after every deposit compare the bias energy the engine applies with the core's
        ``bias.evaluate`` at the same CVs; save each rank's bias state.
first   an uninterrupted run of 2 x STEPS steps; then a run of STEPS steps that writes each walker's run
        checkpoint (``walker<rank>.gbz``) at its end.
second  restore every walker from its checkpoint and run STEPS more steps.
"""

import math
import os
import sys
import warnings

import numpy as np
import openmm as mm
from mpi4py import MPI
from openmm import app

from gridbias import openmm as gbo
from gridbias import walkers
from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide

STRIDE = 50
STARTS = [(-80.0, 70.0), (-70.0, -40.0)]  # (phi, psi) degrees of walker 0 and 1: C7eq and alpha_R


def make_walker(comm, pending_hills=4):
    rank = comm.Get_rank()
    phi0, psi0 = STARTS[rank % len(STARTS)]
    top, pos, system = build_dipeptide(math.radians(phi0), math.radians(psi0))
    phi, psi = backbone_dihedral_atoms(top)
    cvs = [gbo.dihedral(*phi), gbo.dihedral(*psi)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bias = gbo.make_bias(cvs, lower=[-math.pi] * 2, upper=[math.pi] * 2, bins=[64, 64],
                             sigma=[0.35, 0.35], height=1.2, temperature=300.0, bias_factor=10.0)
    bias = walkers.share(bias, comm)  # the one extra line
    link = gbo.attach(system, cvs, bias, pending_hills=pending_hills)
    integrator = mm.LangevinMiddleIntegrator(300, 1, 0.002)
    integrator.setRandomNumberSeed(2024 + rank)
    sim = app.Simulation(top, system, integrator, mm.Platform.getPlatformByName("Reference"))
    sim.context.setPositions(pos)
    sim.context.setVelocitiesToTemperature(300, 7 + rank)
    return link, sim


class EngineCheck:
    """A reporter that, right after each deposit, compares the engine's bias energy with the core's."""

    def __init__(self, link):
        self.link, self.differences = link, []

    def describeNextReport(self, simulation):
        return {"steps": STRIDE - simulation.currentStep % STRIDE, "periodic": None, "include": []}

    def report(self, simulation, state):
        s = self.link.cv_values(simulation)
        core, _ = self.link.bias.evaluate(s)
        self.differences.append(self.link.bias_energy(simulation) - core)


def save_result(path, link, sim):
    state = sim.context.getState(getPositions=True, getVelocities=True)
    _, arrays = link.bias.to_state()
    np.savez(path, positions=state.getPositions(asNumpy=True)._value,
             velocities=state.getVelocities(asNumpy=True)._value,
             shared=isinstance(link.bias, walkers.SharedBias), step=sim.currentStep, **arrays)


def main(scenario, out, steps):
    comm = MPI.COMM_WORLD
    rank = comm.Get_rank()
    if scenario == "agree":
        link, sim = make_walker(comm)
        check = EngineCheck(link)
        sim.reporters.append(link.reporter(stride=STRIDE))
        sim.reporters.append(check)  # after the bias reporter: sees the engine right after each deposit
        sim.step(steps)
        link.bias.check_identical()
        save_result(os.path.join(out, f"agree{rank}.npz"), link, sim)
        np.save(os.path.join(out, f"engine_minus_core{rank}.npy"), np.array(check.differences))
    elif scenario == "first":
        link, sim = make_walker(comm)
        sim.reporters.append(link.reporter(stride=STRIDE))
        sim.step(2 * steps)
        save_result(os.path.join(out, f"full{rank}.npz"), link, sim)
        link, sim = make_walker(comm)
        reporter = link.reporter(stride=STRIDE, checkpoint=os.path.join(out, f"walker{rank}.gbz"),
                                 checkpoint_every=steps)
        sim.reporters.append(reporter)
        sim.step(steps)
        reporter.close()
    elif scenario == "second":
        link, sim = make_walker(comm)
        sim.reporters.append(link.reporter(stride=STRIDE))
        link.restore(sim, os.path.join(out, f"walker{rank}.gbz"))
        sim.step(steps)
        save_result(os.path.join(out, f"second{rank}.npz"), link, sim)
    else:
        raise SystemExit(f"unknown scenario {scenario!r}")


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2], int(sys.argv[3]))
