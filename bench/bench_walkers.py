"""Multiple-walker benchmark: exchange cost per deposit and weak scaling of Müller-Brown walkers.

Run:  mpiexec -n 2 python bench/bench_walkers.py [--quick]
Prints markdown tables (paste into bench/README.md). Ratios are against baselines measured in the same run.

1. Exchange cost per deposit, measured: SharedBias.deposit against GridBias.deposit on the same grid
   (baseline), for one walker (MPI_COMM_SELF: the exchange machinery alone) and two; and the bare
   MPI_Allgather of one 64-byte row per walker.
2. 8 and 32 walkers simulated on 2 ranks: one walker's deposit + the Allgather of an 8- or 32-row table
   (each rank sends N/2 rows) + N - 1 more hills added with GridBias.add_hills. Network latency for N
   real ranks is in the model of bench/README.md, not in this measurement.
3. Weak scaling on this machine: the Müller-Brown walkers of the tests (100 Langevin steps per deposit).
   Baseline: one walker (walker 0 alone, on MPI_COMM_SELF, while walker 1 waits); then both walkers.
   Efficiency = time per exchange of one walker / time per exchange of two (1.0 = ideal).
"""

import argparse
import os
import sys
import time
import warnings

import numpy as np
from mpi4py import MPI

sys.path.insert(0, os.path.dirname(__file__))
from _timing import markdown_table  # noqa: E402

import gridbias as gb  # noqa: E402
from gridbias.testsystems import MuellerBrown, run_metadynamics  # noqa: E402
from gridbias.walkers import EXCHANGE_WIDTH, share  # noqa: E402

T = 300.0
KT = gb.KB * T
SURFACE = MuellerBrown.for_barrier(12.0, T)


def core_test_bias():
    """The Müller-Brown grid of the tests: 241 x 229 nodes, sigma 0.05 nm (spacing sigma/3)."""
    grid = gb.Grid([-2.4, -1.0], [1.6, 2.8], [240, 228])
    return gb.GridBias(grid, sigma=[0.05, 0.05], height=0.5 * KT, temperature=T, bias_factor=6.0)


def median_seconds_per_call(comm, func, calls, repeats):
    """Median over repeats (all ranks in step) of the mean seconds per call of func(i)."""
    batches = []
    for r in range(repeats):
        comm.Barrier()
        t0 = time.perf_counter()
        for i in range(calls):
            func(r * calls + i)
        batches.append((time.perf_counter() - t0) / calls)
    return float(np.median(batches))


def exchange_costs(comm, quick):
    """Markdown table of the cost of one deposit with its exchange, for 1 and 2 walkers (measured) and 8
    and 32 walkers (simulated: one walker's exchange + the Allgather of an N-row table + N - 1 more hills)."""
    rank, size = comm.Get_rank(), comm.Get_size()
    calls, repeats = (200, 3) if quick else (1000, 7)
    rng = np.random.default_rng(5 + rank)
    points = rng.uniform([-1.5, -0.5], [1.0, 2.0], (calls * repeats, 2))  # inside the grid
    plain = core_test_bias()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t_plain = median_seconds_per_call(comm, lambda i: plain.deposit(points[i]), calls, repeats)
    alone = share(core_test_bias(), MPI.COMM_SELF)  # the exchange machinery without a partner to wait for
    t_alone = median_seconds_per_call(comm, lambda i: alone.deposit(points[i]), calls, repeats)
    shared = share(core_test_bias(), comm)
    t_shared = median_seconds_per_call(comm, lambda i: shared.deposit(points[i]), calls, repeats)
    send = np.zeros(EXCHANGE_WIDTH)
    table = np.empty((size, EXCHANGE_WIDTH))
    t_gather = median_seconds_per_call(comm, lambda i: comm.Allgather(send, table), calls, repeats)
    rows = [[1, "measured (MPI_COMM_SELF)", "-", f"{1e6 * t_alone:.1f}", f"{t_alone / t_plain:.2f}"],
            [size, "measured", f"{1e6 * t_gather:.1f}", f"{1e6 * t_shared:.1f}", f"{t_shared / t_plain:.2f}"]]
    t_hill = None
    for n in (8, 32):
        send_n = np.zeros((n // size, EXCHANGE_WIDTH))
        table_n = np.empty((n, EXCHANGE_WIDTH))
        t_gather_n = median_seconds_per_call(comm, lambda i: comm.Allgather(send_n, table_n), calls, repeats)
        hills = core_test_bias()
        centres = rng.uniform([-1.5, -0.5], [1.0, 2.0], (calls * repeats, n, 2))
        heights = np.full(n, 0.5 * KT)
        t_apply = median_seconds_per_call(comm, lambda i: hills.add_hills(centres[i], heights), calls // 4,
                                          repeats)
        t_hill = t_apply / n
        t_total = t_alone + t_gather_n + (n - 1) * t_hill
        rows.append([n, "simulated on 2 ranks", f"{1e6 * t_gather_n:.1f}", f"{1e6 * t_total:.1f}",
                     f"{t_total / t_plain:.2f}"])
    header = ["walkers", "how", "Allgather (us)", "deposit with exchange (us)", "ratio to GridBias.deposit"]
    return markdown_table(header, rows), t_plain, t_hill


def weak_scaling(comm, quick):
    """Seconds per exchange for one walker alone and for all walkers together (100 steps per deposit),
    medians over alternating repeats (this machine is shared, so single runs are noisy)."""
    rank = comm.Get_rank()
    n_exchanges, repeats = (300, 1) if quick else (1000, 5)
    kwargs = dict(n_deposits=n_exchanges, stride=100, dt=0.004, friction=10.0)
    warm = share(core_test_bias(), MPI.COMM_SELF)  # compile and warm up outside the timings
    run_metadynamics(SURFACE, warm, [-0.558, 1.442], rng=np.random.default_rng(0),
                     **{**kwargs, "n_deposits": 5})
    one, together = [], []
    for repeat in range(repeats):
        comm.Barrier()
        if rank == 0:  # baseline: one walker, same code path, on a communicator of its own
            alone = share(core_test_bias(), MPI.COMM_SELF)
            t0 = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                run_metadynamics(SURFACE, alone, [-0.558, 1.442], rng=np.random.default_rng(repeat), **kwargs)
            one.append((time.perf_counter() - t0) / n_exchanges)
        comm.Barrier()
        shared = share(core_test_bias(), comm)
        comm.Barrier()
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            run_metadynamics(SURFACE, shared, [-0.558, 1.442], rng=np.random.default_rng([repeat, rank]),
                             **kwargs)
        together.append(comm.allreduce((time.perf_counter() - t0) / n_exchanges, op=MPI.MAX))
    t_one = float(np.median(one)) if rank == 0 else None
    return t_one, float(np.median(together)), n_exchanges


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repeats (a smoke run)")
    args = parser.parse_args(argv)
    comm = MPI.COMM_WORLD
    if comm.Get_size() != 2:
        if comm.Get_rank() == 0:
            print("run with exactly 2 ranks: mpiexec -n 2 python bench/bench_walkers.py", file=sys.stderr)
        return 2
    table, t_plain, t_hill = exchange_costs(comm, args.quick)
    t_one, t_all, n_exchanges = weak_scaling(comm, args.quick)
    if comm.Get_rank() == 0:
        load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
        print(f"MPI library: {MPI.Get_library_version().splitlines()[0]}; load average {load:.2f} "
              f"on {os.cpu_count()} cores")
        print(f"\nGridBias.deposit alone (baseline): {1e6 * t_plain:.1f} us; one more hill in an exchange "
              f"(add_hills, per hill): {1e6 * t_hill:.1f} us\n")
        print(table)
        print(f"\nWeak scaling, Müller-Brown walkers, {n_exchanges} exchanges of 100 steps per walker "
              "(median of alternating repeats):")
        print(markdown_table(["walkers", "ms per exchange", "efficiency"],
                             [[1, f"{1e3 * t_one:.3f}", "1.00 (baseline)"],
                              [2, f"{1e3 * t_all:.3f}", f"{t_one / t_all:.2f}"]]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
