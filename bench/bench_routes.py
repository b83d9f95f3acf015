"""Engine routes against the static floor: MD throughput, push cost, exactness, per platform.

Run:  python bench/bench_routes.py [--quick] [--section md push water exactness] [--platforms Reference CPU]
      python bench/bench_routes.py --platforms CUDA OpenCL      # on a GPU machine: the same tables there

Timing: process CPU time (``time.process_time``) of interleaved runs, fastest of the repeats. The machine
these figures come from is shared (up to six other jobs on two cores): CPU time is what a run itself
spends, wall time also holds other processes' turns. Multi-threaded platforms (CPU with 2 threads, PME)
add their threads' time, so ratios there are ratios of total CPU work. On a GPU (CUDA/OpenCL) the host's
CPU time does not see device work: there ``--wall`` times wall-clock instead (run it on an idle machine).

Sections:

md         The demo dipeptide (22 atoms, vacuum, 2 fs, 2 backbone dihedrals, WT, 129^2 grid, stride 500):
           steps/s of bare MD, of the static floor (the same CVs and a 129^2 table, no deposits: the
           cheapest of a continuous table in a CustomCompoundBondForce, a continuous table in a
           CustomCVForce and the cvforce route's discrete tables, all measured) and of the default
           settings (``route="auto"`` for the platform) and each explicit route, side by side.
push       The cost of one table push (``updateParametersInContext`` + the next step - a plain step) per
           route and table size: 2-D 129^2, 257^2; 3-D 33^3, 65^3 (dipeptide dihedrals).
water      Villin headpiece in water (OpenMM's test.pdb, 8,867 atoms, PME, CPU platform): the amortised
           engine cost per deposit of a 3-D 65^3 bias (phi, psi of residue 10 and phi of residue 11) with
           the default settings and alternatives, from components (push, Python side, pending-hill update
           and the bias forces' per-step cost), and the 2-D 129^2 default's overhead at stride 500.
exactness  max |engine - core| / (max |bias| + |core|) after every deposit of a running dipeptide, for
           each route and platform/precision (the cvforce route pushes every deposit).
"""

import argparse
import gc
import math
import os
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(__file__))
import openmm as mm  # noqa: E402
from _timing import markdown_table  # noqa: E402
from bench_engine import backbone_torsions, copy_system, villin_in_water  # noqa: E402
from openmm import app, unit  # noqa: E402

import gridbias as gb  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402
from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide  # noqa: E402

STRIDE = 500
CLOCK = time.process_time


def platform_of(name):
    """(Platform, properties): CPU with one thread; GPUs in mixed precision (their usual production mode)."""
    props = {"CPU": {"Threads": "1"}, "CUDA": {"Precision": "mixed"}, "OpenCL": {"Precision": "mixed"},
             "HIP": {"Precision": "mixed"}}.get(name, {})
    return mm.Platform.getPlatformByName(name), props


def make_bias(cvs, bins):
    d = len(cvs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return gbo.make_bias(cvs, lower=[-math.pi] * d, upper=[math.pi] * d, bins=[bins] * d,
                             sigma=[0.35] * d, height=1.2, temperature=300.0, bias_factor=10.0)


def continuous_cvforce_floor(system, quads, bins):
    """The static table in a CustomCVForce with a Continuous2DFunction (a floor candidate; no longer a
    route: its push refits the spline, which the cvforce route's discrete tables avoid)."""
    force = mm.CustomCVForce("table(cv0,cv1)")
    for i, q in enumerate(quads):
        torsion = mm.CustomTorsionForce("theta")
        torsion.addTorsion(*q, [])
        force.addCollectiveVariable(f"cv{i}", torsion)
    n = bins + 1
    force.addTabulatedFunction("table", mm.Continuous2DFunction(n, n, np.zeros(n * n), -math.pi, math.pi,
                                                                -math.pi, math.pi, True))
    force.setForceGroup(31)
    system.addForce(force)


class Run:
    """One Simulation: bare, a static floor candidate, or a bias with a depositing reporter."""

    def __init__(self, top, pos, system, plat, *, kind, quads=None, bins=128, stride=STRIDE, **attach_kw):
        system = copy_system(system)
        self.link = None
        cvs = [gbo.dihedral(*q) for q in quads] if quads else None
        if kind == "floor-cvforce-continuous":
            continuous_cvforce_floor(system, quads, bins)
        elif kind != "bare":
            self.link = gbo.attach(system, cvs, make_bias(cvs, bins), **attach_kw)
        integrator = mm.LangevinMiddleIntegrator(300 * unit.kelvin, 1 / unit.picosecond,
                                                 0.002 * unit.picoseconds)
        integrator.setRandomNumberSeed(1)
        self.sim = app.Simulation(top, system, integrator, plat[0], plat[1])
        self.sim.context.setPositions(pos)
        self.sim.context.setVelocitiesToTemperature(300 * unit.kelvin, 1)
        if kind == "bias":
            self.sim.reporters.append(self.link.reporter(stride=stride))
        elif self.link is not None:
            self.link.deposit(self.sim)  # bind: the table holds one hill, as a real static bias would

    def timed(self, steps, clock):
        t0 = clock()
        self.sim.step(steps)
        return clock() - t0


def interleaved(runs, steps, repeats, clock):
    """Fastest time per run over repeats, runs interleaved (a load drift hits all of them alike)."""
    for r in runs.values():
        r.timed(STRIDE, clock)
    times = {k: [] for k in runs}
    for _ in range(repeats):
        for k, r in runs.items():
            times[k].append(r.timed(steps, clock))
    return {k: min(v) for k, v in times.items()}


# -------------------------------------------------------------------------------------------------------- md
def section_md(platform_names, quick, clock):
    top, pos, system = build_dipeptide()
    quads = list(backbone_dihedral_atoms(top))
    rows = []
    for pname in platform_names:
        plat = platform_of(pname)
        runs = {
            "bare": Run(top, pos, system, plat, kind="bare"),
            "floor: compound table": Run(top, pos, system, plat, kind="floor", quads=quads, route="compound",
                                         pending_hills=0),
            "floor: CustomCVForce continuous table": Run(top, pos, system, plat, quads=quads,
                                                         kind="floor-cvforce-continuous"),
            "floor: cvforce discrete tables": Run(top, pos, system, plat, kind="floor", quads=quads,
                                                  route="cvforce"),
            "default": Run(top, pos, system, plat, kind="bias", quads=quads, platform=pname),
            "cvforce": Run(top, pos, system, plat, kind="bias", quads=quads, route="cvforce"),
            "compound": Run(top, pos, system, plat, kind="bias", quads=quads, route="compound"),
        }
        default_route = runs["default"].link.route
        steps = STRIDE * (10 if quick else 40)
        t = interleaved(runs, steps, 3 if quick else 7, clock)
        floors = {k: v for k, v in t.items() if k.startswith("floor")}
        floor_key = min(floors, key=floors.get)
        for k in runs:
            label = f"default (route {default_route})" if k == "default" else k
            if k in ("cvforce", "compound"):
                pending = runs[k].link.pending_hills
                detail = f"{pending} pending hills" if k == "compound" else "every deposit pushed"
                label = f"route {k}, {detail}"
            floor_mark = " (floor)" if k == floor_key else ""
            rows.append([pname + (" (1 thread)" if pname == "CPU" else ""), label, f"{steps / t[k]:,.0f}",
                         f"{t['bare'] / t[k]:.3f}", f"{t[floor_key] / t[k]:.3f}{floor_mark}"])
    print(f"\n### Dipeptide (22 atoms, vacuum), 129^2 table, stride {STRIDE}: steps per CPU-second\n")
    header = ["platform", "run", "steps per CPU-s", "ratio to bare MD", "ratio to the static floor"]
    print(markdown_table(header, rows))


# ------------------------------------------------------------------------------------------------------ push
def push_seconds(link, context, integrator, repeats):
    """Fastest (push + next step) - (a plain step), process time."""
    bias = link.bias
    step = push = math.inf
    for _ in range(repeats):
        t0 = CLOCK()
        integrator.step(1)
        step = min(step, CLOCK() - t0)
        t0 = CLOCK()
        link._engine.push_table(context, bias.values, bias._coef)
        integrator.step(1)
        push = min(push, CLOCK() - t0)
    return push - step


def section_push(platform_names, quick):
    top, pos, system = build_dipeptide()
    atoms = {(a.residue.name, a.name): a.index for a in top.atoms()}
    quads = list(backbone_dihedral_atoms(top)) + [
        (atoms["ALA", "CA"], atoms["ALA", "C"], atoms["NME", "N"], atoms["NME", "C"])]
    rows = []
    sizes = [(2, 128), (3, 32)] if quick else [(2, 128), (2, 256), (3, 32), (3, 64)]
    for pname in platform_names:
        plat = platform_of(pname)
        for d, bins in sizes:
            for route in ("compound", "cvforce"):
                run = Run(top, pos, system, plat, kind="floor", quads=quads[:d], bins=bins, route=route,
                          pending_hills=0)
                p = push_seconds(run.link, run.sim.context, run.sim.integrator, 3 if quick else 7)
                rows.append([pname, f"{d}-D", f"{bins + 1}^{d}", route, f"{p * 1e3:.2f}"])
                del run
                gc.collect()
    print("\n### One table push (updateParametersInContext + next step - plain step), process CPU time\n")
    print(markdown_table(["platform", "dim", "table", "route", "push (ms)"], rows))


# ----------------------------------------------------------------------------------------------------- water
def bias_force_per_step(top, pos, system, plat, quads, bins, rounds, **attach_kw):
    """CPU seconds per step the bias forces add, measured on the same particles with the force field
    removed (a ~1 ms step instead of ~30 ms, where the difference is not lost in the noise): median of
    paired differences."""
    bare = copy_system(system)
    while bare.getNumForces():
        bare.removeForce(0)
    runs = [Run(top, pos, bare, plat, kind="bare"), Run(top, pos, bare, plat, kind="floor", quads=quads,
                                                        bins=bins, **attach_kw)]
    for r in runs:
        r.sim.step(50)
    diffs = []
    for i in range(rounds):
        t = {}
        for j in ((0, 1) if i % 2 == 0 else (1, 0)):
            t[j] = runs[j].timed(100, CLOCK) / 100
        diffs.append(t[1] - t[0])
    return float(np.median(diffs))


def section_water(quick):
    top, pos, system = villin_in_water()
    phi, psi = backbone_torsions(top, 10)
    phi2, _ = backbone_torsions(top, 11)
    plat = (mm.Platform.getPlatformByName("CPU"), {})
    bare = Run(top, pos, system, plat, kind="bare")
    bare.sim.step(5)
    t_md = min(bare.timed(10, CLOCK) for _ in range(3 if quick else 5)) / 10
    rows = []
    configs = [(3, 64, "default", {}),
               (3, 64, "compound, 4 pending", {"route": "compound", "pending_hills": 4}),
               (3, 64, "compound, 16 pending", {"route": "compound", "pending_hills": 16}),
               (3, 64, "cvforce", {"route": "cvforce"}), (2, 128, "default", {})]
    for d, bins, label, kw in configs:
        quads = [phi, psi, phi2][:d]
        kw = dict(kw) or {"platform": "CPU"}
        run = Run(top, pos, system, plat, kind="floor", quads=quads, bins=bins, **kw)
        link, context, integrator = run.link, run.sim.context, run.sim.integrator
        k = link.pending_hills
        push = push_seconds(link, context, integrator, 2 if quick else 3)
        python, slot = python_and_slot_seconds(link, context)
        rounds = 6 if quick else 16
        force = bias_force_per_step(top, pos, system, plat, quads, bins, rounds, **kw)
        static = bias_force_per_step(top, pos, system, plat, quads, bins, rounds, route="compound",
                                     pending_hills=0) if k else force
        per_deposit = python + (k * slot + push) / (k + 1) + max(force - static, 0.0) * STRIDE
        overhead = (force * STRIDE + per_deposit) / (t_md * STRIDE)
        rows.append([f"{d}-D {bins + 1}^{d}", f"{label} ({link.route}, {k} pending)", f"{push * 1e3:.1f}",
                     f"{python * 1e3:.2f}", f"{force * 1e6:.0f}", f"{per_deposit * 1e3:.1f}",
                     f"{1 / (1 + overhead):.4f}"])
        del run
        gc.collect()
    print(f"\n### Villin in water (8,867 atoms, PME, CPU platform; MD step {t_md * 1e3:.1f} CPU-ms), stride "
          f"{STRIDE}: components per deposit\n")
    print(markdown_table(["table", "settings", "push (ms)", "Python side (ms)", "bias forces per step (us)",
                          "amortised engine cost per deposit (ms)", "throughput / bare MD at stride 500"],
                         rows))


def python_and_slot_seconds(link, context):
    """Fastest Python side of a deposit (CVs + core deposit, on a copy of the bias) and slot update."""
    probe = link.bias.copy()
    python = slot = math.inf
    for _ in range(5):
        t0 = CLOCK()
        probe.deposit(link.cv_values(context))
        python = min(python, CLOCK() - t0)
    if link.pending_hills:
        s = link.cv_values(context)
        for _ in range(20):
            t0 = CLOCK()
            link._engine.set_slot(context, 0, s, 0.0)
            slot = min(slot, CLOCK() - t0)
    return python, (slot if link.pending_hills else 0.0)


# ------------------------------------------------------------------------------------------------- exactness
def section_exactness(platform_names, quick):
    top, pos, system = build_dipeptide()
    quads = list(backbone_dihedral_atoms(top))
    rows = []
    keys = []
    for pname in platform_names:
        precisions = ["single", "mixed", "double"] if pname in ("OpenCL", "CUDA", "HIP") else [None]
        keys += [(pname, p) for p in precisions]
    for pname, precision in keys:
        props = platform_of(pname)[1]
        if precision:
            props = {**props, "Precision": precision}
        for route in ("cvforce", "compound"):
            cvs = [gbo.dihedral(*q) for q in quads]
            sys_copy = copy_system(system)
            bias = make_bias(cvs, 128)
            link = gbo.attach(sys_copy, cvs, bias, route=route)
            integrator = mm.LangevinMiddleIntegrator(300, 1, 0.004)
            sim = app.Simulation(top, sys_copy, integrator, mm.Platform.getPlatformByName(pname), props)
            sim.context.setPositions(pos)
            worst = 0.0
            for _ in range(20 if quick else 60):
                sim.step(50)
                link.deposit(sim)
                s = link.cv_values(sim)
                core = bias.evaluate(s)[0]
                scale = np.abs(bias.values).max() + abs(core)
                worst = max(worst, abs(link.bias_energy(sim) - core) / scale)
            rows.append([pname, precision or "double", route, link.pending_hills, f"{worst:.1e}"])
    print("\n### Engine vs core after every deposit (dipeptide, 129^2, WT): max relative difference\n")
    print(markdown_table(["platform", "precision", "route", "pending hills", "max abs(engine - core) / "
                          "(max abs(bias) + abs(core))"], rows))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer repeats (noisier)")
    ap.add_argument("--section", nargs="+", default=["md", "push", "water", "exactness"],
                    choices=["md", "push", "water", "exactness"])
    ap.add_argument("--platforms", nargs="+", default=["Reference", "CPU"])
    ap.add_argument("--wall", action="store_true", help="time wall-clock instead of process CPU time (GPUs)")
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore", UserWarning)
    global CLOCK
    CLOCK = time.perf_counter if args.wall else time.process_time
    print(f"OpenMM {mm.__version__}, gridbias {gb.__version__}, {os.cpu_count()} CPUs, load average "
          f"{os.getloadavg()[0]:.1f}, clock: {'wall' if args.wall else 'process CPU time'}")
    t0 = time.perf_counter()
    if "md" in args.section:
        section_md(args.platforms, args.quick, CLOCK)
    if "push" in args.section:
        section_push(args.platforms, args.quick)
    if "water" in args.section:
        section_water(args.quick)
    if "exactness" in args.section:
        section_exactness(args.platforms, args.quick)
    print(f"\n({time.perf_counter() - t0:.0f} s; load average at the end {os.getloadavg()[0]:.1f})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
