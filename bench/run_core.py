"""Core benchmark: deposit/evaluate costs, hill-count independence and scaling with grid size.

Run:  python bench/run_core.py [--quick] [--plot bench/figures/core_scale.png]
Prints markdown tables (paste into bench/README.md). Every figure is a ratio against a baseline measured
in the same process, plus the absolute median on this machine for orientation.
"""

import argparse
import os
import sys

import numpy as np

sys.path.insert(0, os.path.dirname(__file__))
from _timing import markdown_table, per_call_seconds  # noqa: E402

import gridbias as gb  # noqa: E402
from gridbias import _kernels  # noqa: E402


def make_bias(ndim, nodes_per_axis, sigma_spacings=4.0, bias_factor=10.0, periodic=True):
    lower = [-np.pi] * ndim
    upper = [np.pi] * ndim
    bins = [nodes_per_axis if periodic else nodes_per_axis - 1] * ndim
    grid = gb.Grid(lower, upper, bins, [periodic] * ndim)
    return gb.GridBias(grid, sigma=sigma_spacings * grid.spacing, height=1.0, temperature=300.0,
                       bias_factor=bias_factor)


def random_points(rng, n, ndim):
    return rng.uniform(-np.pi, np.pi, (n, ndim))


def bench_targets(rng, quick):
    """The core issue's targets: 2-D 129^2 grid, sigma = 4 spacings."""
    bias = make_bias(2, 129, periodic=False)
    pts = random_points(rng, 4000, 2) * 0.9
    it = iter(np.tile(pts, (50, 1)))
    t_deposit = per_call_seconds(lambda: bias.deposit(next(it)), calls=300)
    coef, ndim, lower3, spacing3, bins3, periodic3 = bias._kernel_args()
    centre = np.array([0.3, -0.2])
    t_kernel = per_call_seconds(lambda: _kernels.deposit_hill(coef, ndim, lower3, spacing3, bins3, periodic3,
                                                              centre, bias.sigma, 1e-9, bias.cutoff), calls=300)
    probe = np.array([0.1, 0.2])

    def deposit_then_evaluate():
        bias.deposit(next(it))
        bias.evaluate(probe)

    t_dep_eval = per_call_seconds(deposit_then_evaluate, calls=300)
    t_single = per_call_seconds(lambda: bias.evaluate(probe), calls=2000)
    batch = random_points(rng, 200_000 if quick else 1_000_000, 2)
    t_batch = per_call_seconds(lambda: bias.evaluate(batch), calls=1, repeats=5)
    rate = batch.shape[0] / t_batch
    rows = [
        ["deposit() one 2-D hill, WT", f"{t_deposit * 1e6:.1f} us", "<= 20 us",
         f"{t_deposit / t_kernel:.2f}x the bare deposit kernel (<= 3x)"],
        ["bare deposit kernel (values + 3 derivative arrays)", f"{t_kernel * 1e6:.1f} us", "", "baseline"],
        ["deposit() + evaluate() (no lazy refresh exists)", f"{t_dep_eval * 1e6:.1f} us", "<= 300 us", ""],
        ["evaluate() one point", f"{t_single * 1e6:.2f} us", "<= 5 us", ""],
        ["evaluate() batched", f"{rate / 1e6:.2f} M points/s", ">= 2 M/s", "one core"],
    ]
    return markdown_table(["operation (129^2, sigma = 4 spacings)", "median", "target", "ratio"], rows)


def bench_hill_independence(rng, quick):
    """Evaluate cost after many hills vs after few; a direct sum of Gaussians as the contrast."""
    n_many = 20_000 if quick else 100_000
    bias_few = make_bias(2, 129, periodic=False)
    bias_many = make_bias(2, 129, periodic=False)
    bias_few.add_hills(random_points(rng, 10, 2) * 0.8, np.full(10, 0.5))
    bias_many.add_hills(random_points(rng, n_many, 2) * 0.8, np.full(n_many, 0.5))
    probe = random_points(rng, 1000, 2) * 0.8
    t_few = per_call_seconds(lambda: bias_few.evaluate(probe), calls=50)
    t_many = per_call_seconds(lambda: bias_many.evaluate(probe), calls=50)

    def direct_sum(centers, sigma):
        def run():
            diff = (probe[:, None, :] - centers[None, :, :]) / sigma
            return (0.5 * np.exp(-0.5 * (diff**2).sum(-1))).sum(-1)
        return run

    sigma = bias_few.sigma
    small = random_points(rng, 10, 2)
    mid = random_points(rng, 1000, 2)
    t_direct_10 = per_call_seconds(direct_sum(small, sigma), calls=20)
    t_direct_1000 = per_call_seconds(direct_sum(mid, sigma), calls=3, repeats=3)
    rows = [
        ["grid evaluate, 1000 points", f"{t_few * 1e6:.0f} us (10 hills)",
         f"{t_many * 1e6:.0f} us ({n_many:,} hills)", f"{t_many / t_few:.2f} (<= 1.1)"],
        ["direct sum of Gaussians, 1000 points", f"{t_direct_10 * 1e6:.0f} us (10 hills)",
         f"{t_direct_1000 * 1e6:.0f} us (1,000 hills)", f"{t_direct_1000 / t_direct_10:.1f} (grows linearly)"],
    ]
    return markdown_table(["method", "few hills", "many hills", "ratio many / few"], rows)


SCALES = {
    1: [100, 1000, 10_000],
    2: [65, 129, 257, 513],
    3: [16, 32, 64, 96],
}


def bench_scaling(rng, quick):
    """Deposit and evaluate cost versus grid size and dimension (sigma = 4 spacings)."""
    rows, records = [], []
    for ndim, sizes in SCALES.items():
        for n in sizes:
            if quick and n in (10_000, 513, 96):
                continue
            bias = make_bias(ndim, n)
            pts = random_points(rng, 2000, ndim)
            it = iter(np.tile(pts, (20, 1)))
            calls = 20 if ndim == 3 and n >= 64 else 100
            t_dep = per_call_seconds(lambda: bias.deposit(next(it)), calls=calls, repeats=5)
            probe = random_points(rng, 10_000, ndim)
            t_eval = per_call_seconds(lambda: bias.evaluate(probe), calls=5, repeats=5) / probe.shape[0]
            nodes = bias.grid.size
            per_node = bias._coef.nbytes / nodes  # values + derivative arrays
            per_hill = 8 * (ndim + 2)
            rows.append([f"{ndim}-D", f"{n}^{ndim}" if ndim > 1 else f"{n}", f"{nodes:,}",
                         f"{t_dep * 1e6:.1f}", f"{t_eval * 1e9:.0f}", f"{per_node:.0f}", f"{per_hill}",
                         f"{bias._coef.nbytes / 2**20:.1f}"])
            records.append((ndim, nodes, t_dep, t_eval))
    table = markdown_table(["dim", "grid", "nodes", "deposit (us)", "evaluate (ns/point)", "bytes/node",
                            "bytes/hill", "grid MiB"], rows)
    return table, records


def plot_scaling(records, path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6, 4))
    markers = {1: "o", 2: "s", 3: "^"}
    for ndim in (1, 2, 3):
        sel = [r for r in records if r[0] == ndim]
        if sel:
            ax.loglog([r[1] for r in sel], [r[2] * 1e6 for r in sel], marker=markers[ndim], color="0.2",
                      linestyle="-" if ndim == 2 else "--", label=f"deposit, {ndim}-D")
    ax.set_xlabel("grid nodes")
    ax.set_ylabel("time per deposit (us)")
    ax.set_title("Deposit cost versus grid size (hill width = 4 spacings)")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend()
    fig.tight_layout()
    os.makedirs(os.path.dirname(path) or ".", exist_ok=True)
    fig.savefig(path, dpi=120)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    parser.add_argument("--plot", default=None, help="write the scaling plot (PNG) here")
    args = parser.parse_args(argv)
    rng = np.random.default_rng(7)
    print("## Core targets\n")
    print(bench_targets(rng, args.quick))
    print("\n## Cost independent of the number of hills\n")
    print(bench_hill_independence(rng, args.quick))
    print("\n## Scaling with grid size and dimension\n")
    table, records = bench_scaling(rng, args.quick)
    print(table)
    if args.plot:
        plot_scaling(records, args.plot)
        print(f"\n(plot written to {args.plot})")


if __name__ == "__main__":
    main()
