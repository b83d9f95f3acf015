"""MPI worker for tests/walkers/test_walkers_mpi.py: pure-core walkers on the Müller-Brown surface.

Run as ``mpiexec -n 2 python tests/walkers/mpi/walkers_langevin.py SCENARIO OUT_DIR [options]``; every rank writes
its results under OUT_DIR and pytest checks them. Scenarios:

exchange   walkers deposit for many exchanges on a grid they partly leave; each rank saves its full bias
           state and its own (CV, height) per exchange; then two mis-matched collective calls.
converge   well-tempered runs of one walker and of two walkers (fixed seeds); walker 0 records the RMSE of
           the free energy against the exact surface every ``--every`` deposits per walker.
reference  an uninterrupted two-walker run; then the same run with checkpoints, in which walker 1 is
           killed (SIGKILL) inside the checkpoint window, after its own file and before the shared bias.
continue   restarts that run from its last complete checkpoint set and finishes it.
abort      walker 1 raises an uncaught exception after share(); the job must stop, not hang.
"""

import argparse
import json
import os
import signal
import sys
import warnings

import numpy as np

import gridbias as gb
from gridbias.checkpoint import read_checkpoint, write_checkpoint
from gridbias.testsystems import MuellerBrown, run_metadynamics
from gridbias.walkers import SharedBias, WalkerSyncError, share

T = 300.0
KT = gb.KB * T
# The Müller-Brown test of the core (tests/core/test_metadynamics_limits.py): Müller & Brown, Theor. Chim. Acta 53, 75
# (1979), scaled so the M_A -> S1 barrier is 12 kT; gamma = 6, sigma = 0.05 nm, w0 = 0.5 kT every 100 steps.
SURFACE = MuellerBrown.for_barrier(12.0, T)
M_A = np.array([-0.558, 1.442])
DYNAMICS = dict(stride=100, dt=0.004, friction=10.0)


def core_test_bias():
    grid = gb.Grid([-2.4, -1.0], [1.6, 2.8], [240, 228])
    return gb.GridBias(grid, sigma=[0.05, 0.05], height=0.5 * KT, temperature=T, bias_factor=6.0)


def small_grid_bias():
    """A grid the walkers leave now and then (no walls), to exercise out-of-grid deposits."""
    grid = gb.Grid([-1.0, -0.1], [0.9, 1.7], [114, 108])
    return gb.GridBias(grid, sigma=[0.05, 0.05], height=0.5 * KT, temperature=T, bias_factor=6.0)


def rmse_kt(bias, exact_g, mask):
    """RMSE (kT) of the well-tempered estimate against the exact F over ``mask``, after the best constant
    shift; F = -(gamma/(gamma-1)) V + C (Barducci, Bussi & Parrinello, PRL 100, 020603, 2008)."""
    difference = (bias.free_energy() - exact_g)[mask]
    return float(np.sqrt(np.mean((difference - difference.mean()) ** 2)) / KT)


def compared_region(grid):
    """Exact F on the nodes and the nodes with F - F_min < 8 kT at least 2 sigma from the grid edges
    (the convention of tests/core/test_metadynamics_limits.py)."""
    exact_g = SURFACE.free_energy(grid.nodes().reshape(-1, 2), temperature=T).reshape(grid.shape)
    mask = exact_g - exact_g.min() < 8.0 * KT
    for axis, nodes in enumerate(grid.axes):
        keep = (nodes >= grid.lower[axis] + 0.1) & (nodes <= grid.upper[axis] - 0.1)
        shape = [1, 1]
        shape[axis] = -1
        mask &= keep.reshape(shape)
    return exact_g, mask


class Walker:
    """Langevin state of one walker: position, velocity and random generator, advanced in chunks."""

    def __init__(self, seed, x0=M_A):
        self.rng = np.random.default_rng(seed)
        self.x = np.array(x0, dtype=float)
        self.v = np.zeros(2)
        self.exchanges = 0

    def run(self, bias, n_deposits):
        traj = run_metadynamics(SURFACE, bias, self.x, n_deposits=n_deposits, v0=self.v, rng=self.rng,
                                **DYNAMICS)
        self.x, self.v = traj.positions[-1].copy(), traj.velocities[-1].copy()
        self.exchanges += n_deposits

    def save(self, path):
        """Atomic write; the previous file is kept as ``path + '.prev'`` (see ``checkpoint_set``)."""
        if os.path.exists(path):
            os.replace(path, path + ".prev")
        meta = {"exchanges": self.exchanges, "rng": self.rng.bit_generator.state}
        write_checkpoint(path, meta, {"x": self.x, "v": self.v}, kind="gridbias-test.walker")

    @classmethod
    def load(cls, path, exchanges):
        """The walker state saved at ``exchanges`` (from ``path`` or its previous version)."""
        for candidate in (path, path + ".prev"):
            if os.path.exists(candidate):
                meta, arrays = read_checkpoint(candidate, kind="gridbias-test.walker")
                if meta["exchanges"] == exchanges:
                    walker = cls(0)
                    walker.rng.bit_generator.state = meta["rng"]
                    walker.x, walker.v, walker.exchanges = arrays["x"], arrays["v"], exchanges
                    return walker
        raise RuntimeError(f"no walker state at exchange {exchanges} in {path}(.prev)")


def checkpoint_set(bias, walker, folder, kill_before_commit=False):
    """Every walker writes its own state, then the shared bias is written (the commit): a set of files whose
    exchange counts all equal the shared bias's always exists on disk."""
    walker.save(os.path.join(folder, f"walker{bias.walker}.gbz"))
    if kill_before_commit:
        os.kill(os.getpid(), signal.SIGKILL)
    bias.save(os.path.join(folder, "shared.gbz"))


def scenario_exchange(comm, out, n_exchanges):
    rank = comm.Get_rank()
    bias = share(small_grid_bias(), comm)
    walker = Walker([7, rank])
    own = []  # this walker's (s0, s1, height returned) per exchange
    deposit = bias.deposit

    def recording_deposit(s, *, time=None):
        h = deposit(s, time=time)
        own.append((*s, h))
        return h

    bias.deposit = recording_deposit  # run_metadynamics calls bias.deposit once per exchange
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        walker.run(bias, n_exchanges)
    bias.deposit = deposit
    bias.check_identical()
    meta, arrays = bias.to_state()
    messages = []
    try:  # walker 0 saves while walker 1 deposits: both are told
        bias.save(os.path.join(out, "never.gbz")) if rank == 0 else bias.deposit([0.0, 0.5])
    except WalkerSyncError as exc:
        messages.append(str(exc))
    np.savez(os.path.join(out, f"exchange{rank}.npz"), own=np.array(own), **arrays)
    with open(os.path.join(out, f"exchange{rank}.json"), "w") as f:
        json.dump({"meta": meta, "messages": messages, "exchanges": bias.exchanges}, f)


def scenario_converge(comm, out, n_seeds, n_deposits, every):
    """Steps to reach an RMSE <= 0.5 kT for one walker (seeds spread over the ranks) and for two walkers."""
    rank, size = comm.Get_rank(), comm.Get_size()
    exact_g, mask = compared_region(core_test_bias().grid)
    one = []
    for seed in range(rank, n_seeds, size):  # one-walker runs, n_deposits each
        bias, walker, curve = core_test_bias(), Walker([seed, 0]), []
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for _ in range(n_deposits // every):
                walker.run(bias, every)
                curve.append(rmse_kt(bias, exact_g, mask))
        one.append((seed, curve))
    two = []
    for seed in range(n_seeds):  # two-walker runs, n_deposits / 2 per walker (same total hills)
        bias, walker, curve = share(core_test_bias(), comm), Walker([seed, rank]), []
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for _ in range(n_deposits // size // every):
                walker.run(bias, every)
                if rank == 0:
                    curve.append(rmse_kt(bias, exact_g, mask))
        bias.check_identical()
        two.append(curve)
    one = comm.gather(one, root=0)
    if rank == 0:
        one = [curve for _, curve in sorted(c for part in one for c in part)]
        with open(os.path.join(out, "converge.json"), "w") as f:
            json.dump({"one": one, "two": two, "walkers": size, "every": every,
                       "stride": DYNAMICS["stride"]}, f)


def scenario_reference(comm, out, n_exchanges, every):
    rank = comm.Get_rank()
    bias, walker = share(core_test_bias(), comm), Walker([11, rank])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _ in range(n_exchanges // every):
            walker.run(bias, every)
    if rank == 0:
        np.save(os.path.join(out, "reference_values.npy"), bias.values)
    np.save(os.path.join(out, f"reference_walker{rank}.npy"), np.concatenate([walker.x, walker.v]))
    comm.Barrier()
    # The same run with a checkpoint set every `every` exchanges; walker 1 dies inside the third checkpoint.
    folder = os.path.join(out, "run")
    if rank == 0:
        os.makedirs(folder)
    comm.Barrier()
    bias, walker = share(core_test_bias(), comm), Walker([11, rank])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for k in range(n_exchanges // every):
            walker.run(bias, every)
            checkpoint_set(bias, walker, folder, kill_before_commit=(k == 2 and rank == 1))


def scenario_continue(comm, out, n_exchanges, every):
    rank = comm.Get_rank()
    folder = os.path.join(out, "run")
    bias = SharedBias.load(os.path.join(folder, "shared.gbz"), comm)
    walker = Walker.load(os.path.join(folder, f"walker{rank}.gbz"), bias.exchanges)
    restarted_at = bias.exchanges
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        while walker.exchanges < n_exchanges:
            walker.run(bias, every)
            checkpoint_set(bias, walker, folder)
    if rank == 0:
        np.save(os.path.join(out, "continued_values.npy"), bias.values)
        with open(os.path.join(out, "continued.json"), "w") as f:
            json.dump({"restarted_at": restarted_at}, f)
    np.save(os.path.join(out, f"continued_walker{rank}.npy"), np.concatenate([walker.x, walker.v]))


def scenario_abort(comm, out):
    bias = share(core_test_bias(), comm)
    if comm.Get_rank() == 1:
        raise RuntimeError("walker 1 failed on purpose")
    bias.deposit(M_A)  # walker 0 would wait here for ever without the abort
    with open(os.path.join(out, "not-aborted"), "w") as f:
        f.write("walker 0 got past the exchange")


def main(argv=None):
    parser = argparse.ArgumentParser()
    parser.add_argument("scenario", choices=["exchange", "converge", "reference", "continue", "abort"])
    parser.add_argument("out")
    parser.add_argument("--exchanges", type=int, default=400)
    parser.add_argument("--seeds", type=int, default=4)
    parser.add_argument("--deposits", type=int, default=6000)
    parser.add_argument("--every", type=int, default=100)
    args = parser.parse_args(argv)
    from mpi4py import MPI

    comm = MPI.COMM_WORLD
    if args.scenario == "exchange":
        scenario_exchange(comm, args.out, args.exchanges)
    elif args.scenario == "converge":
        scenario_converge(comm, args.out, args.seeds, args.deposits, args.every)
    elif args.scenario == "reference":
        scenario_reference(comm, args.out, args.exchanges, args.every)
    elif args.scenario == "continue":
        scenario_continue(comm, args.out, args.exchanges, args.every)
    else:
        scenario_abort(comm, args.out)


if __name__ == "__main__":
    sys.exit(main())
