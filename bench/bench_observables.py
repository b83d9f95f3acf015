"""Cost of logging observables beside the biased CVs (BiasReporter(observables=...)).

Run:  python bench/bench_observables.py [--quick]

The villin headpiece in water (OpenMM's test.pdb, 8,867 atoms, PME, CPU platform, 2 threads) with the
2-dihedral well-tempered bias of bench_engine.py (129^2 table, stride 500) and a CV log every 500 steps,
run side by side without and with two geometric observables (a CA-CA distance and a backbone dihedral);
target: the observables cost under 0.5 % of the run. Two measurements:

components  the seconds one log record spends on the observables (from the State the reporter already
            holds), against 500 MD steps; also for a ``from_force`` observable (an RMSDForce over the CA
            atoms, evaluated in its own Context at records only).
end to end  the two runs interleaved in rounds of 1,000 steps (fastest round of each), as a throughput ratio.
            The machine's noise (~1 %) is larger than the effect, so this only bounds it.
"""

import argparse
import os
import sys
import tempfile
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(__file__))
import openmm as mm  # noqa: E402
from _timing import markdown_table  # noqa: E402
from bench_engine import backbone_torsions, copy_system, dipeptide_bias, platform, villin_in_water  # noqa: E402
from openmm import app, unit  # noqa: E402

import gridbias as gb  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402

STRIDE = 500


def observables_of(top, positions):
    ca = [a.index for a in top.atoms() if a.name == "CA"]
    phi, psi = backbone_torsions(top, 20)
    geometric = [gbo.distance(ca[2], ca[30], name="ca_3_31"), gbo.dihedral(*psi, name="psi_20")]
    rmsd = mm.RMSDForce(positions, ca)
    return geometric, [gbo.from_force(rmsd, name="rmsd_ca")]


class Run:
    def __init__(self, top, pos, system, folder, name, observables):
        system = copy_system(system)
        phi, psi = backbone_torsions(top, 10)
        cvs = [gbo.dihedral(*phi), gbo.dihedral(*psi)]
        self.link = gbo.attach(system, cvs, dipeptide_bias(cvs))
        integrator = mm.LangevinMiddleIntegrator(300 * unit.kelvin, 1 / unit.picosecond, 0.002 * unit.picoseconds)
        integrator.setRandomNumberSeed(1)
        self.sim = app.Simulation(top, system, integrator, *platform("CPU"))
        self.sim.context.setPositions(pos)
        self.sim.context.setVelocitiesToTemperature(300 * unit.kelvin, 1)
        self.reporter = self.link.reporter(STRIDE, log=os.path.join(folder, f"{name}.gbl"), observables=observables)
        self.sim.reporters.append(self.reporter)

    def timed(self, steps):
        t0 = time.perf_counter()
        self.sim.step(steps)
        return time.perf_counter() - t0


def per_record(run, repeats):
    """Fastest seconds of the observables' share of one log record (the State is the reporter's own)."""
    state = run.sim.context.getState(getPositions=True)
    step = run.sim.currentStep
    run.reporter._observable_values(run.sim, state, step)  # first call: a from_force Context is made here
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        run.reporter._observable_values(run.sim, state, step)
        best = min(best, time.perf_counter() - t0)
    return best


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer rounds (noisier)")
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore", UserWarning)
    print(f"OpenMM {mm.__version__}, gridbias {gb.__version__}, {os.cpu_count()} CPUs")
    top, pos, system = villin_in_water()
    geometric, by_force = observables_of(top, pos)
    with tempfile.TemporaryDirectory() as folder:
        runs = {"none": Run(top, pos, system, folder, "none", []),
                "two geometric": Run(top, pos, system, folder, "geometric", geometric),
                "from_force (CA RMSD)": Run(top, pos, system, folder, "force", by_force)}
        for r in runs.values():
            r.timed(STRIDE)  # warm-up: kernels, first deposit and record
        block = 200
        t_step = min(runs["none"].timed(block) for _ in range(2)) / block
        rows = []
        for name in ("two geometric", "from_force (CA RMSD)"):
            cost = per_record(runs[name], 20 if args.quick else 100)
            rows.append([name, f"{cost * 1e6:.0f}", f"{t_step * 1e3:.1f}", f"{100 * cost / (STRIDE * t_step):.4f}",
                         "< 0.5"])
        print(f"\n### Observables: cost per log record (every {STRIDE} steps) against {STRIDE} MD steps\n")
        print(markdown_table(["observables", "per record (us)", "MD step (ms)", "share of the run (%)", "target (%)"],
                             rows))
        steps = 1000
        rounds = 2 if args.quick else 4
        times = {k: [] for k in ("none", "two geometric")}
        for _ in range(rounds):
            for k in times:
                times[k].append(runs[k].timed(steps))
        best = {k: min(v) for k, v in times.items()}
        print(f"\n### End to end: {steps} steps per round, {rounds} interleaved rounds, fastest round\n")
        print(markdown_table(["run", "steps/s", "ratio to no observables"],
                             [[k, f"{steps / t:.1f}", f"{best['none'] / t:.4f}"] for k, t in best.items()]))
        for r in runs.values():
            r.reporter.close()


if __name__ == "__main__":
    main()
