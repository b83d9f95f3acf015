"""gridbias.walkers without MPI: the exchange logic, checks and checkpoints, driven by walkers in threads.

``ThreadComm`` below stands in for an mpi4py communicator (the four calls gridbias.walkers makes: Get_rank,
Get_size, Allgather, bcast/allgather) with one thread per walker, so these tests run without mpi4py or
mpiexec. The real MPI runs are in test_walkers_mpi.py.

Reference for what a shared bias must be: the multiple-walker bias is the sum of the hills of all walkers,
V(s, t) = sum_a sum_k w_ak G(s - s_a(k tau)) (Raiteri, Laio, Gervasio, Micheletti & Parrinello, J. Phys.
Chem. B 110, 3533, 2006; REFERENCES.md §4), so it must equal the bias one process builds from the union of
the hills in the same order.
"""

import copy
import os
import subprocess
import sys
import threading
import warnings

import numpy as np
import pytest

import gridbias as gb
from gridbias.errors import CheckpointError, ParameterError
from gridbias.walkers import EXCHANGE_WIDTH, SharedBias, WalkerSyncError, share

T = 300.0
KT = gb.KB * T


# --------------------------------------------------------------------------------------- thread walkers
class _Hub:
    def __init__(self, n):
        self.n = n
        self.barrier = threading.Barrier(n, timeout=30)
        self.slots = [None] * n


class ThreadComm:
    """One walker's view of n threads acting as MPI ranks (blocking collectives through a barrier)."""

    def __init__(self, hub, rank):
        self.hub, self.rank, self.aborted = hub, rank, None

    def Get_rank(self):
        return self.rank

    def Get_size(self):
        return self.hub.n

    def _gather(self, item):
        self.hub.slots[self.rank] = item
        self.hub.barrier.wait()
        out = copy.deepcopy(self.hub.slots)
        self.hub.barrier.wait()
        return out

    def Allgather(self, sendbuf, recvbuf):
        recvbuf[...] = np.stack(self._gather(np.array(sendbuf, copy=True))).reshape(recvbuf.shape)

    def allgather(self, obj):
        return self._gather(obj)

    def bcast(self, obj, root=0):
        return self._gather(obj if self.rank == root else None)[root]

    def Abort(self, code):
        self.aborted = code


def run_walkers(n, walker):
    """Run walker(comm) in n threads; returns the list of (result, exception) per walker."""
    hub = _Hub(n)
    out = [(None, None)] * n

    def target(rank):
        try:
            out[rank] = (walker(ThreadComm(hub, rank)), None)
        except BaseException as exc:  # noqa: BLE001 - reported to the test
            out[rank] = (None, exc)

    threads = [threading.Thread(target=target, args=(r,)) for r in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    return out


def results(outcomes):
    for rank, (_, exc) in enumerate(outcomes):
        if exc is not None:
            raise AssertionError(f"walker {rank} raised {exc!r}") from exc
    return [r for r, _ in outcomes]


def make_bias(bias_factor=8.0, sigma=0.1):
    grid = gb.Grid([-1.0, -1.0], [1.0, 1.0], [40, 40])
    return gb.GridBias(grid, sigma=[sigma, sigma], height=1.0, temperature=T, bias_factor=bias_factor)


def walker_points(rank, n_exchanges):
    """Each walker's CV values: a seeded random walk, partly outside the grid ([-1, 1]^2)."""
    rng = np.random.default_rng(100 + rank)
    return np.clip(np.cumsum(rng.normal(0.0, 0.15, (n_exchanges, 2)), axis=0), -1.3, 1.3)


# --------------------------------------------------------------------------------------- import and errors
def test_import_gridbias_does_not_need_mpi4py():
    code = ("import sys; sys.modules['mpi4py'] = None\n"
            "import gridbias, gridbias.walkers\n"
            "print(sorted(m for m in sys.modules if m.startswith('mpi4py') and sys.modules[m] is not None))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_share_without_mpi4py_names_the_install_command(monkeypatch):
    monkeypatch.setitem(sys.modules, "mpi4py", None)
    with pytest.raises(ImportError, match=r"pip install 'gridbias\[mpi\]'"):
        share(make_bias())


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda comm: share("a bias", comm), "bias must be a gridbias.GridBias, got str"),
        (lambda comm: share(make_bias(), object()), "comm must be an MPI intracommunicator"),
    ],
)
def test_bad_arguments_are_refused(call, match):
    with pytest.raises(ParameterError, match=match):
        call(ThreadComm(_Hub(1), 0))


def test_sharing_a_shared_bias_is_refused():
    def walker(comm):
        shared = share(make_bias(), comm, abort_on_error=False)
        with pytest.raises(ParameterError, match="already a SharedBias"):
            share(shared, comm)

    results(run_walkers(2, walker))


def test_a_shared_bias_made_without_share_says_how_to_make_one():
    bias = SharedBias(gb.Grid([0.0], [1.0], [30]), sigma=[0.1], height=1.0, temperature=T)
    with pytest.raises(ParameterError, match=r"walkers.share\(bias\)"):
        bias.deposit([0.5])


# --------------------------------------------------------------------------------------- the exchange
def test_three_walkers_hold_identical_grids_equal_to_the_union_of_their_hills():
    n, n_exchanges = 3, 60

    def walker(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        points = walker_points(comm.Get_rank(), n_exchanges)
        heights = [bias.deposit(p, time=0.5 * (e + 1)) for e, p in enumerate(points)]
        return bias, points, np.array(heights)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the outside-grid warning is checked in a one-walker test below
        biases, points, heights = zip(*results(run_walkers(n, walker)), strict=True)
    state0 = biases[0].to_state()
    for b in biases[1:]:
        meta, arrays = b.to_state()
        assert meta == state0[0]
        for name in arrays:  # bit for bit: grid coefficients and the whole history
            assert arrays[name].tobytes() == state0[1][name].tobytes(), name

    # One process, the same hills in the same order (exchange by exchange, walker order within one), and the
    # well-tempered height of each hill from the bias as it stood before its exchange.
    reference = make_bias()
    for e in range(n_exchanges):
        expected = [reference.hill_height(points[r][e]) for r in range(n)]
        for r in range(n):
            assert heights[r][e] == expected[r]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            reference.add_hills(np.array([points[r][e] for r in range(n)]), expected, [0.5 * (e + 1)] * n)
    assert reference.values.tobytes() == biases[0].values.tobytes()
    np.testing.assert_array_equal(reference.history.centers, biases[0].history.centers)

    # Walkers outside the grid added nothing, as a single walker would, and were counted for all walkers.
    outside = sum(int((~reference.grid.contains(points[r])).sum()) for r in range(n))
    assert 0 < outside < n * n_exchanges
    assert all(b.n_outside == outside == reference.n_outside for b in biases)
    assert all(b.exchanges == n_exchanges for b in biases)
    for r in range(n):
        out_r = ~reference.grid.contains(points[r])
        assert (heights[r][out_r] == 0.0).all() and (heights[r][~out_r] > 0.0).all()


def test_a_walker_outside_the_grid_is_warned_once_about_its_own_cv():
    def walker(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            heights = [bias.deposit(p) for p in ([0.0, 0.0], [1.5, 0.0], [0.2, 0.0], [0.0, -2.0])]
        return heights, [str(w.message) for w in caught], bias.n_outside, bias.n_hills

    (heights, messages, n_outside, n_hills), = results(run_walkers(1, walker))
    assert heights[1] == heights[3] == 0.0 and heights[0] > 0 and heights[2] > 0
    assert (n_outside, n_hills) == (2, 2)
    assert len(messages) == 1
    assert messages[0].startswith("walker 0: CV [1.5, 0.0] is outside the grid")


def test_one_walker_is_the_plain_bias():
    points = walker_points(0, 80)[np.abs(walker_points(0, 80)).max(axis=1) < 1.0]

    def walker(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        return [bias.deposit(p, time=float(k)) for k, p in enumerate(points)], bias

    (heights, shared), = results(run_walkers(1, walker))
    replay = make_bias()  # the definition: height from hill_height, then add_hills
    for k, p in enumerate(points):
        replay.add_hills([p], [replay.hill_height(p)], [float(k)])
    assert shared.values.tobytes() == replay.values.tobytes()
    plain = make_bias()  # GridBias.deposit computes the same height in compiled code: equal up to rounding
    expected = [plain.deposit(p, time=float(k)) for k, p in enumerate(points)]
    np.testing.assert_allclose(heights, expected, rtol=1e-14, atol=0)
    np.testing.assert_allclose(shared.values, plain.values, rtol=1e-12, atol=1e-13)
    np.testing.assert_array_equal(shared.history.times, plain.history.times)


def test_exchange_payload_is_one_fixed_row_per_walker():
    # The bench's extrapolation model assumes 8 float64 (64 bytes) per walker per exchange.
    assert EXCHANGE_WIDTH == 8


# --------------------------------------------------------------------------------------- walkers out of step
def test_walkers_depositing_at_different_cadences_are_warned(monkeypatch):
    # Collective calls pair up in sequence, so a cadence difference shows in the times the walkers send.
    warned = []
    monkeypatch.setattr(warnings, "warn", lambda message, *a, **k: warned.append(str(message)))

    def walker(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        stride = 1 + comm.Get_rank()
        for step in range(stride, 4 * stride, stride):
            bias.deposit([0.1, 0.2], time=0.1 * step)

    results(run_walkers(2, walker))
    cadence = [m for m in warned if "advanced by different amounts" in m]
    assert len(cadence) == 2  # once per walker
    assert "(walker 0: 0.1 ps, walker 1: 0.2 ps)" in cadence[0]


def test_walkers_restored_from_different_moments_are_stopped():
    def walker(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        if comm.Get_rank() == 1:
            bias._exchanges = 7  # as if restored from a later checkpoint
        bias.deposit([0.1, 0.2])

    for _, exc in run_walkers(2, walker):
        assert isinstance(exc, WalkerSyncError)
        assert "out of step at deposit() (exchanges so far: walker 0: 0, walker 1: 7)" in str(exc)


def test_walkers_in_different_calls_are_told_which():
    def walker(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        if comm.Get_rank() == 0:
            bias.check_identical()
        else:
            bias.deposit([0.1, 0.2])

    for _, exc in run_walkers(2, walker):
        assert isinstance(exc, WalkerSyncError)
        assert "walker 0: check_identical(), walker 1: deposit()" in str(exc)


@pytest.mark.parametrize(
    "make, match",
    [
        (lambda r: make_bias(sigma=0.1 + 0.01 * r), r"walker 1's bias differs from walker 0's in sigma"),
        (lambda r: make_bias(bias_factor=8.0 + r), r"in bias_factor: 9.0 vs 8.0"),
    ],
)
def test_walkers_sharing_different_biases_are_refused(make, match):
    def walker(comm):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            share(make(comm.Get_rank()), comm, abort_on_error=False)

    for _, exc in run_walkers(2, walker):
        assert isinstance(exc, WalkerSyncError)
        assert exc.args[0].startswith("walker 1") and __import__("re").search(match, str(exc))


def test_walkers_starting_from_different_hills_are_refused():
    def walker(comm):
        bias = make_bias()
        if comm.Get_rank() == 1:
            bias.deposit([0.0, 0.0])
        share(bias, comm, abort_on_error=False)

    for _, exc in run_walkers(2, walker):
        assert "walker 1's bias differs from walker 0's: n_hills 1 vs 0" in str(exc)


def test_check_identical_finds_hills_added_on_one_walker_only():
    def walker(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        bias.deposit([0.1, 0.1])
        bias.check_identical()  # passes: one exchange, same grid
        if comm.Get_rank() == 1:
            bias.add_hills([[0.2, 0.2]], [0.5])
        bias.check_identical()

    for _, exc in run_walkers(2, walker):
        assert isinstance(exc, WalkerSyncError)
        assert "walker 1's bias differs from walker 0's: n_hills 3 vs 2" in str(exc)


# --------------------------------------------------------------------------------------- checkpoints
@pytest.mark.filterwarnings("ignore:walker [0-9]+. CV")
def test_save_and_load_continue_exactly_and_record_the_walker_count(tmp_path):
    path = tmp_path / "shared.gbz"
    n_exchanges = 30

    def uninterrupted(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        for p in walker_points(comm.Get_rank(), n_exchanges):
            bias.deposit(p)
        return bias.values.tobytes(), bias.n_hills

    def interrupted(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        points = walker_points(comm.Get_rank(), n_exchanges)
        for p in points[:12]:
            bias.deposit(p)
        bias.save(path)
        del bias  # as after a crash: everything comes from the file
        bias = SharedBias.load(path, comm, abort_on_error=False)
        assert bias.exchanges == 12
        for p in points[12:]:
            bias.deposit(p)
        return bias.values.tobytes(), bias.n_hills

    assert results(run_walkers(2, interrupted)) == results(run_walkers(2, uninterrupted))
    plain = gb.GridBias.load(path)  # a shared checkpoint is a normal bias file for analysis
    assert plain.n_hills > 0 and not isinstance(plain, SharedBias)


def test_loading_with_another_number_of_walkers_is_refused(tmp_path):
    path = tmp_path / "shared.gbz"

    def writer(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        bias.deposit([0.0, 0.1 * comm.Get_rank()])
        bias.save(path)

    results(run_walkers(2, writer))
    for _, exc in run_walkers(3, lambda comm: SharedBias.load(path, comm, abort_on_error=False)):
        assert isinstance(exc, CheckpointError)
        assert "was written by a run of 2 walkers; this run has 3" in str(exc)
        assert "mpiexec -n 2" in str(exc)


def test_loading_a_single_walker_bias_as_shared_is_refused(tmp_path):
    path = tmp_path / "single.gbz"
    make_bias().save(path)
    for _, exc in run_walkers(2, lambda comm: SharedBias.load(path, comm, abort_on_error=False)):
        assert isinstance(exc, CheckpointError) and "holds a single-walker bias" in str(exc)


def test_a_missing_file_fails_on_every_walker_with_walker_0s_message(tmp_path):
    path = tmp_path / "nowhere.gbz"
    for _, exc in run_walkers(2, lambda comm: SharedBias.load(path, comm, abort_on_error=False)):
        assert isinstance(exc, CheckpointError)
        assert "walker 0 could not read the shared bias" in str(exc) and "does not exist" in str(exc)


def test_a_failed_write_fails_on_every_walker(tmp_path):
    path = tmp_path / "no-such-folder" / "shared.gbz"

    def walker(comm):
        share(make_bias(), comm, abort_on_error=False).save(path)

    for _, exc in run_walkers(2, walker):
        assert isinstance(exc, CheckpointError) and "walker 0 could not write the shared bias" in str(exc)
    assert not path.parent.exists()


def test_restoring_walkers_from_states_of_different_moments_is_refused():
    def walker(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        bias.deposit([0.1, 0.1])
        state_then = bias.to_state()
        bias.deposit([0.2, 0.1])
        meta, arrays = state_then if comm.Get_rank() == 0 else bias.to_state()
        return bias.restored(meta, arrays)

    for _, exc in run_walkers(2, walker):
        assert isinstance(exc, WalkerSyncError)
        assert "come from different moments (exchanges so far: walker 0: 1, walker 1: 2)" in str(exc)


def test_restoring_a_run_of_another_size_is_refused():
    # The OpenMM adapter hands each walker's checkpointed state to SharedBias.restored.
    states = results(run_walkers(2, lambda comm: share(make_bias(), comm, abort_on_error=False).to_state()))

    def walker(comm):
        return share(make_bias(), comm, abort_on_error=False).restored(*states[0])

    for _, exc in run_walkers(3, walker):
        assert isinstance(exc, CheckpointError)
        assert "the restored state was written by a run of 2 walkers; this run has 3" in str(exc)


def test_restored_keeps_the_bias_shared():
    def walker(comm):
        bias = share(make_bias(), comm, abort_on_error=False)
        bias.deposit([0.1, 0.1 * comm.Get_rank()])
        again = bias.restored(*bias.to_state())
        again.deposit([0.3, 0.1])
        return again.n_hills, again.exchanges, again.values.tobytes()

    a, b = results(run_walkers(2, walker))
    assert a == b and a[:2] == (4, 2)


# --------------------------------------------------------------------------------------- faults
def test_an_uncaught_exception_on_a_walker_aborts_the_job(monkeypatch):
    # The hook share() installs: print the traceback as usual, then MPI_Abort so the others do not wait.
    # (One process per walker in real runs; here the walker threads share one hook.)
    seen = []
    monkeypatch.setattr(sys, "excepthook", lambda *exc_info: seen.append(exc_info[0]))
    comms = results(run_walkers(2, lambda comm: (share(make_bias(), comm), comm)[1]))
    assert getattr(sys.excepthook, "_gridbias_walkers", False)
    sys.excepthook(RuntimeError, RuntimeError("walker died"), None)
    assert seen == [RuntimeError]
    assert 1 in [c.aborted for c in comms]


def test_a_single_walker_leaves_the_exception_hook_alone(monkeypatch):
    def hook(*exc_info):
        pass

    monkeypatch.setattr(sys, "excepthook", hook)
    results(run_walkers(1, lambda comm: share(make_bias(), comm)))
    assert sys.excepthook is hook


def test_walker_checkpoint_refusal_message_keeps_the_file(tmp_path):
    # Refusing a file never alters it (the set can still restart with the right number of walkers).
    path = tmp_path / "shared.gbz"
    results(run_walkers(2, lambda comm: share(make_bias(), comm, abort_on_error=False).save(path)))
    before = path.read_bytes()
    run_walkers(1, lambda comm: SharedBias.load(path, comm, abort_on_error=False))
    assert path.read_bytes() == before
    assert os.listdir(tmp_path) == ["shared.gbz"]
