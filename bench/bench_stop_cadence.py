"""What the convergence stop rule costs a run: its checks, against the same run without them.

Command: ``python bench/bench_stop_cadence.py [--ns 1.0] [--fraction 0.01]``. The demo's system (alanine
dipeptide in vacuum, phi/psi, well-tempered, stride 250, CV log every deposit, Reference platform) runs the
same number of steps twice, side by side: ``simulation.step`` alone (baseline), then
``link.run_until(Converged(...) | MaxSteps(n))`` with thresholds no run this short meets, so every check is
paid and none stops it. Prints the wall times, the checks made, their total cost and the overhead.
"""

import argparse
import math
import os
import tempfile
import time

from gridbias import openmm as gbo
from gridbias import stopping
from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide, make_simulation, minimize


def setup(folder, tag):
    topology, positions, system = build_dipeptide()
    positions, _ = minimize(system, positions)
    phi, psi = backbone_dihedral_atoms(topology)
    cvs = [gbo.dihedral(*phi, name="phi"), gbo.dihedral(*psi, name="psi")]
    bias = gbo.make_bias(cvs, lower=[-math.pi] * 2, upper=[math.pi] * 2, bins=[96, 96], sigma=[0.35] * 2,
                         height=1.5, temperature=300.0, bias_factor=6.0)
    link = gbo.attach(system, cvs, bias, route="cvforce")
    simulation = make_simulation(topology, system, positions, platform="Reference", seed=2024)
    reporter = link.reporter(250, checkpoint=os.path.join(folder, f"{tag}.gbz"), checkpoint_every=50_000,
                             log=os.path.join(folder, f"{tag}.gbl"))
    simulation.reporters.append(reporter)
    return link, simulation, reporter


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ns", type=float, default=1.0)
    parser.add_argument("--fraction", type=float, default=stopping.DEFAULT_MAX_COST_FRACTION)
    args = parser.parse_args()
    n_steps = int(round(args.ns * 1000 / 0.002))
    with tempfile.TemporaryDirectory() as folder:
        link, simulation, reporter = setup(folder, "baseline")
        simulation.step(2_500)  # warm up (compilation, first table push)
        started = time.perf_counter()
        simulation.step(n_steps)
        baseline = time.perf_counter() - started
        reporter.close()

        link, simulation, reporter = setup(folder, "checked")
        simulation.step(2_500)
        # load numba's compiled kernels of the analysis once (about a second, once per process), as any
        # long run has long done by its second check
        from gridbias import analysis

        analysis.assess_convergence(link.bias, analysis.find_basins(link.bias.grid, link.bias.free_energy(),
                                                                    link.bias.kT))
        rule = stopping.Converged(min_transitions=10**9, max_cost_fraction=args.fraction)
        started = time.perf_counter()
        link.run_until(simulation, rule | stopping.MaxSteps(n_steps + 2_500))
        checked = time.perf_counter() - started
        reporter.close()
    print(f"{args.ns:g} ns ({n_steps:,} steps, {link.bias.n_hills:,} hills, 96 x 96 grid), Reference platform")
    print(f"baseline (simulation.step alone): {baseline:8.2f} s")
    print(f"run_until with Converged:         {checked:8.2f} s  ({rule.n_checks} checks costing "
          f"{rule.cost_seconds:.2f} s = {100 * rule.cost_seconds / checked:.2f}% of the run)")
    print(f"overhead against the baseline:    {100 * (checked / baseline - 1):+.2f}% "
          f"(target: checks under {100 * args.fraction:g}% of the run)")


if __name__ == "__main__":
    main()
