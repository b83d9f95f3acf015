"""Scale of the OpenMM adapter: table push cost versus table size and dimension, MD overhead versus stride.

Run:  python bench/bench_scale.py [--quick] [--section push md water] [--plots bench/figures]

Sections (each figure measured against a baseline in the same process; a shared 2-core machine, so the
fastest of interleaved repeats counts: other processes only ever add time):

push   The push (``updateParametersInContext`` after a table change, + the next step, - a plain step) of
       the demo dipeptide's bias over 1, 2 and 3 backbone dihedrals, for 1-D tables of 101-10,001 nodes,
       2-D of 65^2-513^2 and 3-D of 17^3-65^3, on both routes (Reference platform). Beside it the cost
       per deposit at stride 500 of the whole-table push (``pending_hills=0``) and of the shipped fast
       path (4 pending exact-Gaussian hills, one push per 5 deposits), from the same components as
       bench_engine.py, and a least-squares line push = fixed + per-node x nodes for each dimension.
md     MD throughput ratio (with bias / without) of the vacuum dipeptide (Reference, 129^2, default
       settings) at deposit strides 50, 100, 500 and 2000, both routes, all runs interleaved; a fit of the
       time per step to a + b / stride splits the bias into a per-step part (its forces) and a per-deposit
       part.
water  The villin headpiece in water (OpenMM's test.pdb, 8,867 atoms, PME, CPU platform, 2 threads), 2-D
       tables of 129^2-2049^2: push, Python side and pending-hill updates per deposit, and the bias
       forces' cost per step (measured on the same particles with the force field removed, where the
       difference is not lost in the noise of a 20-40 ms step); the MD ratio per stride follows from
       these and the measured step time, checked end to end at stride 50 (129^2). It also answers: the
       largest 2-D table that keeps the overhead under 3 % at stride 500 on this machine.
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
from bench_engine import (  # noqa: E402
    Run,
    backbone_torsions,
    deposit_components,
    dipeptide_bias,
    fastest,
    interleaved,
    platform,
    villin_in_water,
)

import gridbias as gb  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402
from gridbias.demo.dipeptide import build_dipeptide  # noqa: E402

PENDING = 4  # the compound route's pending hills for a 129^2 table (gridbias.openmm.routes.pending_for)
STRIDE = 500
STRIDES = (50, 100, 500, 2000)
SIZES = {1: (100, 1000, 10_000), 2: (64, 128, 256, 512), 3: (16, 32, 48, 64)}  # bins per axis
QUICK_SIZES = {1: (100, 10_000), 2: (64, 128, 256), 3: (16, 32)}
WATER_BINS = (128, 256, 512, 1024, 2048)
QUICK_WATER_BINS = (128, 512)
OVERHEAD_LIMIT = 0.03


def dipeptide_dihedrals(topology):
    """phi, psi and omega (ALA CA - C - NME N - C) atom quadruples of the demo dipeptide."""
    atoms = {(a.residue.name, a.name): a.index for a in topology.atoms()}
    ace_c, n, ca, c = atoms["ACE", "C"], atoms["ALA", "N"], atoms["ALA", "CA"], atoms["ALA", "C"]
    nme_n, nme_c = atoms["NME", "N"], atoms["NME", "C"]
    return [(ace_c, n, ca, c), (n, ca, c, nme_n), (ca, c, nme_n, nme_c)]


def periodic_bias(cvs, bins):
    """Well-tempered bias on a periodic grid of ``bins`` intervals per dihedral (sigma 0.35 rad)."""
    d = len(cvs)
    return gbo.make_bias(cvs, lower=[-math.pi] * d, upper=[math.pi] * d, bins=[bins] * d, sigma=[0.35] * d,
                         height=1.2, temperature=300.0, bias_factor=10.0)


def table_nodes(d, bins):
    """Nodes of the engine's table: a periodic axis of ``bins`` intervals is closed with one more node."""
    return (bins + 1) ** d


def cost_per_deposit(push, python, slot, per_step_slots, k, stride):
    """Engine + Python cost of one deposit (s) with k pending hills: one push per k + 1 deposits."""
    return python + (k * slot + push) / (k + 1) + per_step_slots * stride


def linear_fit(nodes, seconds):
    """Line push = fixed + per_node * nodes fitted to relative errors (every size counts alike); returns
    (fixed s, per-node s, largest relative deviation)."""
    t = np.asarray(seconds, dtype=float)
    a = np.vstack([np.ones(len(nodes)), nodes]).T
    (fixed, per_node), *_ = np.linalg.lstsq(a / t[:, None], np.ones(len(t)), rcond=None)
    return fixed, per_node, float(np.max(np.abs(a @ [fixed, per_node] - t) / t))


# ----------------------------------------------------------------------------------------------------- push
def section_push(quick, plat_name):
    top, pos, system = build_dipeptide()
    quads = dipeptide_dihedrals(top)
    plat = platform(plat_name, 1 if plat_name == "CPU" else None)
    rows, records = [], []
    for d, sizes in (QUICK_SIZES if quick else SIZES).items():
        cvs = [gbo.dihedral(*q) for q in quads[:d]]
        for route in ("compound",):  # the cvforce route (no pending hills): bench_routes.py --section push
            measured = {}
            for bins in sizes:
                runs = {k: Run(top, pos, system, plat, cvs=cvs, bias=periodic_bias(cvs, bins), deposit=False,
                               route=route, pending_hills=k) for k in (0, PENDING)}
                comp = deposit_components(runs, 3 if quick else 7, block=1000)
                # the same table and bias in both runs: two samples of the push and Python-side costs
                measured[bins] = (min(comp[0][1], comp[PENDING][1]), min(comp[0][2], comp[PENDING][2]),
                                  comp[PENDING][3], comp[PENDING][0] - comp[0][0])
                del runs
                gc.collect()
            # The pending-hill force's cost per step does not depend on the table: one value (the median
            # over the table sizes) is less noisy than each size's own step-time difference.
            per_step_slots = max(float(np.median([m[3] for m in measured.values()])), 0.0)
            c = per_step_slots / PENDING  # per slot and step (model: every slot costs the same)
            for bins, (push, python, slot, _) in measured.items():
                whole = cost_per_deposit(push, python, 0.0, 0.0, 0, STRIDE)
                fast = cost_per_deposit(push, python, slot, per_step_slots, PENDING, STRIDE)
                costs = [cost_per_deposit(push, python, slot, c * k, k, STRIDE) for k in range(65)]
                k_best = int(np.argmin(costs))
                n = table_nodes(d, bins)
                records.append((d, route, n, push, fast, whole))
                rows.append([f"{d}-D", f"{bins + 1}" + (f"^{d}" if d > 1 else ""), f"{n:,}", route,
                             f"{push * 1e3:.2f}", f"{push / n * 1e6:.2f}", f"{python * 1e3:.2f}",
                             f"{per_step_slots * 1e6:.1f}", f"{whole * 1e3:.2f}", f"{fast * 1e3:.2f}",
                             f"{whole / fast:.2f}", f"{k_best} ({costs[k_best] * 1e3:.2f} ms)"])
    print(f"\n### Push cost versus table size ({plat_name} platform, dipeptide dihedrals, stride {STRIDE})\n")
    print(markdown_table(["dim", "table", "nodes", "route", "push (ms)", "push per node (us)",
                          "Python side (ms)", f"{PENDING} pending hills' force per step (us)",
                          "whole-table push per deposit (ms)", f"{PENDING} pending hills per deposit (ms)",
                          "speed-up", "best pending_hills (model: cost)"], rows))
    fits = []
    for d in (1, 2, 3):
        for route in ("compound", "cvforce"):
            sel = [r for r in records if r[0] == d and r[1] == route]
            if len(sel) < 2:
                continue
            nodes = np.array([r[2] for r in sel], dtype=float)
            fixed, per_node, residual = linear_fit(nodes, [r[3] for r in sel])
            fits.append([f"{d}-D", route, f"{nodes.min():,.0f}-{nodes.max():,.0f}", f"{fixed * 1e3:.2f}",
                         f"{per_node * 1e6:.3f}", f"{residual * 100:.0f} %"])
    print("\nLine push = fixed + per node x nodes (fitted to relative errors):\n")
    print(markdown_table(["dim", "route", "nodes", "fixed (ms)", "per node (us)", "largest deviation"], fits))
    return records


# ------------------------------------------------------------------------------------------------------- md
def section_md(quick):
    top, pos, system = build_dipeptide()
    quads = dipeptide_dihedrals(top)
    cvs = [gbo.dihedral(*q) for q in quads[:2]]
    plat = platform("Reference")
    runs = {"none": Run(top, pos, system, plat)}
    for route in ("compound", "cvforce"):
        for stride in STRIDES:
            r = Run(top, pos, system, plat, cvs=cvs, bias=dipeptide_bias(cvs), deposit=False, route=route)
            r.sim.reporters.append(r.link.reporter(stride=stride))
            runs[route, stride] = r
    steps = 10_000 if quick else 40_000
    t = interleaved(runs, steps, 3 if quick else 5)
    rows, ratios = [], {}
    for route in ("compound", "cvforce"):
        per_step = np.array([t[route, s] / steps for s in STRIDES])
        a = np.vstack([np.ones(len(STRIDES)), 1.0 / np.array(STRIDES)]).T
        (base, per_deposit), *_ = np.linalg.lstsq(a, per_step, rcond=None)
        force = base - t["none"] / steps
        for s in STRIDES:
            ratio = t["none"] / t[route, s]
            ratios[route, s] = ratio
            rows.append(["dipeptide, vacuum (22 atoms)", "Reference", route, s, f"{steps / t['none']:.0f}",
                         f"{steps / t[route, s]:.0f}", f"{ratio:.3f}", f"{force * 1e6:.1f}",
                         f"{per_deposit * 1e3:.2f}"])
    print(f"\n### MD throughput ratio versus deposit stride (129^2 table, {PENDING} pending hills)\n")
    print(markdown_table(["system", "platform", "route", "stride", "steps/s without bias",
                          "steps/s with bias", "ratio", "fit: bias per step (us)",
                          "fit: cost per deposit (ms)"], rows))
    return ratios


# ---------------------------------------------------------------------------------------------------- water
def bias_force_per_step(top, pos, system, plat, cvs, rounds, block=100):
    """Seconds per step that the bias forces (table + pending-hill force) add on this System's particles:
    the median and the interquartile range of paired differences.

    Measured with the force field removed (same particles, masses and constraints), where a step costs
    ~1 ms instead of 20-40 ms. Even so the difference is near this shared machine's noise, so each round
    times both runs back to back (in alternating order) and the median of the per-round differences
    counts. Without force-field forces the System has no periodic box, so the bias forces run without one
    here."""
    from bench_engine import copy_system

    bare = copy_system(system)
    while bare.getNumForces():
        bare.removeForce(0)
    runs = [Run(top, pos, bare, plat), Run(top, pos, bare, plat, cvs=cvs, bias=dipeptide_bias(cvs, 128),
                                          deposit=False)]
    for r in runs:
        r.sim.step(200)
    diffs = []
    for i in range(rounds):
        t = {}
        for j in ((0, 1) if i % 2 == 0 else (1, 0)):
            t[j] = runs[j].timed(block) / block
        diffs.append(t[1] - t[0])
    q1, median, q3 = np.percentile(diffs, [25, 50, 75])
    return median, (q1, q3)


def section_water(quick):
    top, pos, system = villin_in_water()
    phi, psi = backbone_torsions(top, 10)
    cvs = [gbo.dihedral(*phi), gbo.dihedral(*psi)]
    plat = platform("CPU")
    none = Run(top, pos, system, plat)
    none.sim.step(5)
    block = 10
    t_md = min(none.timed(block) for _ in range(3 if quick else 6)) / block
    force, (q1, q3) = bias_force_per_step(top, pos, system, plat, cvs, 10 if quick else 30)
    force = max(force, 0.0)
    rows, comp = [], {}
    for bins in (QUICK_WATER_BINS if quick else WATER_BINS):
        r = Run(top, pos, system, plat, cvs=cvs, bias=dipeptide_bias(cvs, bins), deposit=False)
        r.sim.step(2)
        link, context = r.link, r.sim.context
        push = fastest(lambda link=link, context=context: link._engine.push_table(context, link.bias.values,
                                                                                   link.bias._coef), 3)
        probe = link.bias.copy()
        python = fastest(lambda link=link, probe=probe, sim=r.sim: probe.deposit(link.cv_values(sim)), 3)
        slot = fastest(lambda link=link, context=context: link._engine.set_slot(context, 0, [0.0, 0.0], 0.0), 5)
        deposit = cost_per_deposit(push, python, slot, 0.0, PENDING, STRIDE)
        overhead = (force * STRIDE + deposit) / (t_md * STRIDE)
        n = table_nodes(2, bins)
        comp[bins] = (n, push, python, slot)
        rows.append([f"{bins + 1}^2", f"{n:,}", f"{push * 1e3:.1f}", f"{python * 1e3:.2f}",
                     f"{slot * 1e6:.0f}", f"{deposit * 1e3:.1f}", f"{overhead * 100:.2f} %"])
        del r, probe
        gc.collect()
    print(f"\n### Protein in water: components (CPU platform, 2 threads; MD step {t_md * 1e3:.1f} ms, bias "
          f"forces {force * 1e6:.0f} us per step, quartiles {q1 * 1e6:.0f} to {q3 * 1e6:.0f} us)\n")
    print(markdown_table(["table", "nodes", "push (ms)", "Python side (ms)", "pending-hill update (us)",
                          f"cost per deposit, {PENDING} pending (ms)", f"overhead at stride {STRIDE}"], rows))
    # ratio per stride for the 129^2 table, and an end-to-end check at stride 50
    n, push, python, slot = comp[128]
    deposit = cost_per_deposit(push, python, slot, 0.0, PENDING, STRIDE)
    model = {s: t_md / (t_md + force + deposit / s) for s in STRIDES}
    check = Run(top, pos, system, plat, cvs=cvs, bias=dipeptide_bias(cvs, 128), deposit=False)
    check.sim.reporters.append(check.link.reporter(stride=50))
    steps = 50 * (PENDING + 1)  # one push, PENDING pending-hill deposits
    t = interleaved({"none": none, "bias": check}, steps, 1 if quick else 3)
    measured = t["none"] / t["bias"]
    rows = [[s, f"{model[s]:.4f}", f"{measured:.3f} ({steps} steps, fastest of {1 if quick else 3})"
             if s == 50 else ""] for s in STRIDES]
    print(f"\nMD throughput ratio, villin in water, 129^2 table (model from the components; MD step "
          f"{t_md * 1e3:.1f} ms):\n")
    print(markdown_table(["stride", "ratio (components)", "ratio measured end to end"], rows))
    # largest 2-D table under the overhead limit at stride 500
    def overhead(c):
        return (force * STRIDE + cost_per_deposit(c[1], c[2], c[3], 0.0, PENDING, STRIDE)) / (t_md * STRIDE)

    under = [bins for bins, c in comp.items() if overhead(c) < OVERHEAD_LIMIT]
    over = [bins for bins, c in comp.items() if overhead(c) >= OVERHEAD_LIMIT]
    nodes = np.array([c[0] for c in comp.values()], dtype=float)
    fixed, per_node, residual = linear_fit(nodes, [c[1] for c in comp.values()])
    print(f"\nPush = {fixed * 1e3:.1f} ms + {per_node * 1e6:.3f} us x nodes (fitted to relative errors, "
          f"largest deviation {residual * 100:.0f} %).")
    if under and over and max(under) < min(over):
        lo, hi = comp[max(under)], comp[min(over)]  # the overhead is linear in the nodes between them
        n_limit = lo[0] + (OVERHEAD_LIMIT - overhead(lo)) / (overhead(hi) - overhead(lo)) * (hi[0] - lo[0])
        where = f"between them, ~{n_limit:,.0f} nodes (~{math.sqrt(n_limit):,.0f}^2)"
    else:
        where = "not bracketed by the measured sizes"
    below = f"{max(under) + 1}^2" if under else "none"
    above = f"{min(over) + 1}^2" if over else "none"
    print(f"Largest measured 2-D table under {OVERHEAD_LIMIT:.0%} overhead at stride {STRIDE}: {below}; "
          f"first above: {above}; the limit ({PENDING} pending hills): {where}.")
    return model, measured, comp, t_md


# ---------------------------------------------------------------------------------------------------- plots
def plot_push(records, water, path):
    """Left: push cost versus table nodes. Right: cost per deposit at stride 500, compound route."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import matplotlib.ticker
    from matplotlib.lines import Line2D

    fig, (left, right) = plt.subplots(1, 2, figsize=(11, 4.2))
    colours = {1: "tab:purple", 2: "tab:blue", 3: "tab:red"}
    for d in (1, 2, 3):
        for route, style in (("compound", "-"), ("cvforce", "--")):
            sel = sorted(r[2:] for r in records if r[0] == d and r[1] == route)
            if not sel:
                continue
            n, push, fast, whole = (np.array(c) for c in zip(*sel, strict=True))
            left.loglog(n, push * 1e3, marker="o", linestyle=style, color=colours[d])
            if route == "compound":
                right.loglog(n, whole * 1e3, marker="o", linestyle="-", color=colours[d])
                right.loglog(n, fast * 1e3, marker="o", markerfacecolor="white", linestyle=":",
                             color=colours[d])
    if water:
        n, push = zip(*sorted((c[0], c[1]) for c in water.values()), strict=True)
        left.loglog(n, np.array(push) * 1e3, marker="s", color="black", linestyle="-")
    guide = np.logspace(3.5, 6.7, 10)
    left.loglog(guide, 0.4e-3 * guide, color="0.6", linewidth=0.8)
    dims = [Line2D([], [], color=colours[d], marker="o", label=f"{d}-D") for d in (1, 2, 3)]
    left.legend(handles=dims + [
        Line2D([], [], color="0.3", linestyle="-", label="compound route"),
        Line2D([], [], color="0.3", linestyle="--", label="cvforce route"),
        Line2D([], [], color="black", marker="s", label="2-D, protein in water (CPU)"),
        Line2D([], [], color="0.6", linewidth=0.8, label="0.4 us per node")], fontsize=7, frameon=False)
    left.set_title("Table push (dipeptide, Reference)", fontsize=10)
    right.legend(handles=dims + [
        Line2D([], [], color="0.3", linestyle="-", label="whole-table push at every deposit"),
        Line2D([], [], color="0.3", linestyle=":", marker="o", markerfacecolor="white",
               label=f"{PENDING} pending hills (default)")], fontsize=7, frameon=False)
    right.set_title(f"Cost per deposit at stride {STRIDE} (compound route)", fontsize=10)
    for ax in (left, right):
        ax.yaxis.set_major_formatter(matplotlib.ticker.FuncFormatter(lambda v, _: f"{v:g}"))
        ax.yaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
        ax.set_xlabel("table nodes")
        ax.set_ylabel("milliseconds")
        ax.grid(True, which="both", alpha=0.25)
    fig.tight_layout()
    fig.savefig(path, dpi=110)


def plot_md(ratios, water_model, water_measured, path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6.4, 4.0))
    for route, colour in (("compound", "tab:blue"), ("cvforce", "tab:orange")):
        if ratios:
            ax.semilogx(STRIDES, [ratios[route, s] for s in STRIDES], marker="o", color=colour,
                        label=f"dipeptide, vacuum, Reference, {route} (measured)")
    if water_model:
        ax.semilogx(STRIDES, [water_model[s] for s in STRIDES], marker="s", color="black",
                    label="villin in water, CPU, compound (components)")
        ax.plot([50], [water_measured], marker="x", color="black", linestyle="none", markersize=9,
                label="villin in water, measured end to end")
    ax.axhline(1 - OVERHEAD_LIMIT, color="0.5", linestyle=":", linewidth=1, label="3 % overhead")
    ax.set_xticks(STRIDES, [str(s) for s in STRIDES])
    ax.set_xlabel("deposit stride (steps)")
    ax.set_ylabel("steps/s with bias / without")
    ax.set_ylim(0, max(1.1, water_measured or 0) + 0.02)
    ax.set_title("MD throughput with a 129 x 129 bias, 4 pending hills", fontsize=10)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7, frameon=False, loc="lower right")
    fig.tight_layout()
    fig.savefig(path, dpi=110)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer sizes and repeats (noisier)")
    parser.add_argument("--section", nargs="+", default=["push", "md", "water"],
                        choices=["push", "md", "water"])
    parser.add_argument("--platform", default="Reference", choices=["Reference", "CPU"],
                        help="platform of the push section (default Reference)")
    parser.add_argument("--plots", default=None, help="folder for scale_push.png and scale_md.png")
    args = parser.parse_args(argv)
    warnings.simplefilter("ignore", UserWarning)
    print(f"OpenMM {mm.__version__}, gridbias {gb.__version__}, {os.cpu_count()} CPUs, "
          f"load average {os.getloadavg()[0]:.1f}")
    t0 = time.perf_counter()
    records = section_push(args.quick, args.platform) if "push" in args.section else []
    ratios = section_md(args.quick) if "md" in args.section else {}
    water = section_water(args.quick) if "water" in args.section else (None, None, {}, None)
    print(f"\n({time.perf_counter() - t0:.0f} s; load average at the end {os.getloadavg()[0]:.1f})")
    if args.plots:
        os.makedirs(args.plots, exist_ok=True)
        if records or water[2]:
            plot_push(records, water[2], os.path.join(args.plots, "scale_push.png"))
        if ratios or water[0]:
            plot_md(ratios, water[0], water[1], os.path.join(args.plots, "scale_md.png"))
        print(f"(figures written to {args.plots})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
