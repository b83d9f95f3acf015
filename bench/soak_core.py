"""Soak: one million deposits into a 2-D well-tempered core bias.

Checks that memory stays bounded (grid fixed, history 32 B per hill), deposit time does not drift (median of
the first vs the last 10% of deposits), and the final grid equals a fresh rebuild from the history.

Run:  python bench/soak_core.py [--deposits 1000000]
"""

import argparse
import resource
import time

import numpy as np

import gridbias as gb


def rss_mib():
    """Peak resident set size of this process, MiB (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--deposits", type=int, default=1_000_000)
    args = parser.parse_args(argv)
    n = args.deposits
    grid = gb.Grid([-np.pi, -np.pi], [np.pi, np.pi], [128, 128], [True, True])
    bias = gb.GridBias(grid, sigma=4 * grid.spacing, height=1.2, temperature=300.0, bias_factor=10.0)
    rng = np.random.default_rng(11)
    # A walker that diffuses over the periodic square (a random walk of 0.05 rad per deposit).
    path = np.cumsum(rng.normal(0.0, 0.05, (n, 2)), axis=0)
    bias.deposit(path[0])
    times = np.empty(n)
    rss_start = rss_mib()
    clock = time.perf_counter
    report = max(n // 10, 1)
    for i in range(n):
        t0 = clock()
        bias.deposit(path[i], time=float(i))
        times[i] = clock() - t0
        if (i + 1) % report == 0:
            print(f"  {i + 1:>9,} deposits  median {np.median(times[i + 1 - report:i + 1]) * 1e6:6.1f} us  "
                  f"peak RSS {rss_mib():7.1f} MiB", flush=True)
    tenth = n // 10
    first, last = np.median(times[:tenth]), np.median(times[-tenth:])
    t0 = clock()
    again = bias.rebuilt()
    t_rebuild = clock() - t0
    identical = np.array_equal(again.values, bias.values) and np.array_equal(again._coef, bias._coef)
    print()
    print("| deposits | first 10% median | last 10% median | ratio last/first | history | peak RSS growth "
          "| rebuild from history | rebuilt grid identical |")
    print("|---|---|---|---|---|---|---|---|")
    print(f"| {n:,} | {first * 1e6:.1f} us | {last * 1e6:.1f} us | {last / first:.3f} | "
          f"{bias.history.nbytes / 2**20:.1f} MiB | {rss_mib() - rss_start:.1f} MiB | {t_rebuild:.1f} s | "
          f"{identical} |")


if __name__ == "__main__":
    main()
