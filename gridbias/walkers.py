"""Several walkers, one bias: multiple-walker metadynamics over MPI.

Each walker is one MPI rank running its own simulation (its own starting structure and random seed). All of
them deposit into one shared bias (Raiteri, Laio, Gervasio, Micheletti & Parrinello, J. Phys. Chem. B 110,
3533, 2006)::

    from gridbias import walkers
    bias = walkers.share(bias)      # the one extra line: still a GridBias, now shared by all ranks
    link = gbo.attach(system, cvs, bias)   # everything else as for one walker (OpenMM or a core loop)

and launch with ``mpiexec -n 4 python run.py``. Share the bias before handing it to anything else (the
OpenMM link keeps the object it was given). mpi4py is imported only when a bias is shared; without it
``share`` raises ImportError naming ``pip install 'gridbias[mpi]'``.

How the bias stays shared
-------------------------
Every call of ``deposit(s)`` is one exchange, made by all walkers together:

1. each walker computes the height of its own hill from the shared bias at its own centre ``s`` (the
   well-tempered rule applied to the total bias of all walkers; see Notes of :class:`SharedBias`);
2. one ``MPI_Allgather`` exchanges (centre, height, time) of every walker: 64 bytes per walker;
3. every walker adds all hills with ``GridBias.add_hills`` in walker (rank) order.

So every walker holds a bit-for-bit identical grid after every exchange. A walker whose CV is outside the grid
adds no hill, exactly as a single walker would, but still takes part in the exchange; ``n_outside`` counts the
refused deposits of all walkers.

Rules for the run
-----------------
- All walkers call ``deposit`` at the same cadence (same stride, same number of deposits): each call waits for
  the other walkers' calls. Walkers whose times advance by different amounts between exchanges get a
  warning; walkers restored from checkpoints of different moments, or calling ``save`` while others call
  ``deposit``, raise :class:`WalkerSyncError` on every walker. A walker that makes fewer deposits (for
  example a run limited by wall-clock time rather than by a step count) leaves the others waiting for it at
  their last exchange: give every walker the same number of steps.
- If a walker dies (an exception, a crash, a killed node), the whole MPI job is aborted: MPI stops every rank
  of a job when one is killed, and :func:`share` installs a hook that turns an uncaught Python exception
  into ``MPI_Abort`` (otherwise the other walkers would wait in the next exchange forever). The last
  checkpoints are complete files (written atomically) and the set of walkers restarts from them.

Checkpoints
-----------
- OpenMM: give each walker its own run checkpoint (``link.reporter(..., checkpoint=f"walker{rank}.gbz")``);
  it holds the shared bias and that walker's MD state, written by every walker after the same exchange.
  ``link.restore`` is then called by every walker together: it refuses files written by another number of
  walkers, and files of different moments (a job killed in the few milliseconds between two walkers'
  writes), saying so. ``bias.save(path)`` writes the shared bias alone (walker 0 writes), for analysis.
- Core loop: ``bias.save(path)`` and ``SharedBias.load(path)`` (both collective; the file records the
  number of walkers and exchanges) plus each walker's own dynamics state. Write the walkers' states first,
  keeping each one's previous file, then ``bias.save`` as the commit: a set of files of one exchange then
  always exists, even after a kill in between (tests/walkers/mpi/walkers_langevin.py does this).
"""

from __future__ import annotations

import hashlib
import json
import math
import sys
import warnings

import numpy as np

from .bias import GridBias
from .errors import CheckpointError, GridBiasError, ParameterError

__all__ = ["share", "SharedBias", "WalkerSyncError", "EXCHANGE_WIDTH"]

#: float64 words each walker sends per exchange: operation, exchange count, centre (d <= 3, padded), height,
#: time. 64 bytes per walker per exchange.
EXCHANGE_WIDTH = 8

# Collective operations; every walker must be in the same one at the same time.
_DEPOSIT, _SAVE, _CHECK, _JOIN = 1.0, 2.0, 3.0, 4.0
_OP_NAMES = {_DEPOSIT: "deposit()", _SAVE: "save()", _CHECK: "check_identical()",
             _JOIN: "share()/load()/restored()"}
_FINGERPRINT_WORDS = 5  # 40 bytes of SHA-256 fit in the 6 words after (operation, exchange count)


class WalkerSyncError(GridBiasError, RuntimeError):
    """The walkers are out of step (in different collective calls, or restored from different moments) or
    hold different biases. Raised on every walker at once."""


def _mpi():
    """The mpi4py.MPI module, or ImportError saying how to install it."""
    try:
        from mpi4py import MPI
    except ImportError as exc:
        raise ImportError(
            "multiple walkers need mpi4py and an MPI library: pip install 'gridbias[mpi]' "
            "(installs mpi4py and the mpich wheel)") from exc
    return MPI


def _check_comm(comm):
    needed = ("Get_rank", "Get_size", "Allgather", "bcast", "Abort")
    missing = [name for name in needed if not hasattr(comm, name)]
    if missing:
        raise ParameterError(f"comm must be an MPI intracommunicator (mpi4py.MPI.Comm), got "
                             f"{type(comm).__name__} without {', '.join(missing)}")
    return comm


def _install_abort_hook(comm):
    """Make an uncaught exception on this walker abort the whole job instead of leaving the others waiting."""
    previous = sys.excepthook
    if getattr(previous, "_gridbias_walkers", False):
        return

    def abort_job(exc_type, exc, tb):
        previous(exc_type, exc, tb)
        sys.stdout.flush()
        sys.stderr.flush()
        comm.Abort(1)

    abort_job._gridbias_walkers = True
    sys.excepthook = abort_job


def share(bias, comm=None, *, abort_on_error=True) -> "SharedBias":
    """Share ``bias`` among the walkers (ranks) of ``comm``. Collective: every walker calls it.

    Parameters
    ----------
    bias : GridBias
        The same bias on every walker (same parameters and state, typically freshly made with the same
        arguments); checked, and a difference raises WalkerSyncError naming it.
    comm : mpi4py.MPI.Intracomm, optional
        The walkers; default ``MPI.COMM_WORLD``.
    abort_on_error : bool, keyword-only
        Install a ``sys.excepthook`` that calls ``comm.Abort(1)`` after printing an uncaught exception, so a
        walker that fails stops the whole job (default True; only with more than one walker).

    Returns
    -------
    SharedBias
        A new object holding a copy of ``bias``'s state; use it in place of ``bias`` everywhere (the
        original is left as it was and is not shared).

    Raises
    ------
    ImportError
        ``comm`` not given and mpi4py missing (``pip install 'gridbias[mpi]'``).
    WalkerSyncError
        The walkers passed different biases.

    Examples
    --------
    Run with ``mpiexec -n 2 python script.py``:

    >>> import gridbias as gb
    >>> from gridbias import walkers
    >>> grid = gb.Grid([-1.0], [1.0], [60])
    >>> bias = walkers.share(gb.GridBias(grid, sigma=[0.1], height=1.0, temperature=300.0))  # doctest: +SKIP
    >>> bias.deposit([0.1 * bias.walker]), bias.n_hills  # doctest: +SKIP
    (1.0, 2)
    """
    if not isinstance(bias, GridBias):
        raise ParameterError(f"bias must be a gridbias.GridBias, got {type(bias).__name__}")
    if isinstance(bias, SharedBias):
        raise ParameterError("bias is already a SharedBias (shared by "
                             f"{bias.n_walkers} walkers); share() a plain GridBias")
    comm = _check_comm(_mpi().COMM_WORLD if comm is None else comm)
    meta, arrays = bias.to_state()
    shared = SharedBias._from_state_on(comm, meta, arrays, exchanges=0, abort_on_error=abort_on_error)
    return shared


class SharedBias(GridBias):
    """A GridBias shared by the walkers of an MPI communicator; made by :func:`share`.

    It is a GridBias everywhere (evaluate, free_energy, the OpenMM adapter, analysis); only these differ:

    - ``deposit`` is collective: one exchange per call, adding up to ``n_walkers`` hills (returns this
      walker's own height);
    - ``save`` is collective: it checks that all walkers hold the same bias, then walker 0 writes the file
      atomically; the file records the number of walkers;
    - ``SharedBias.load`` (collective) refuses a file written by a run with another number of walkers.

    ``copy()`` and ``rebuilt()`` return plain, local GridBias objects. ``add_hills`` acts on this walker only:
    call it on every walker with the same hills or not at all (``check_identical`` and ``save`` detect a
    difference).

    Guarantees: after every exchange all walkers hold bit-for-bit identical grids and histories, equal to a
    GridBias built by one process with ``add_hills`` from the union of the hills in the same order (walker
    order within each exchange).

    Notes
    -----
    Well-tempered heights: each walker scales its hill by ``exp(-V(s) / (kB (gamma - 1) T))`` with V the total
    shared bias at its own centre, as it stood before the exchange. This is the well-tempered rule applied to
    the one bias all walkers feel; the 2006 multiple-walker paper predates well-tempered metadynamics and the
    2008 paper does not say which bias is meant, so this is our documented choice. With it the shared bias
    converges to ``-(1 - 1/gamma) F`` as for one walker, reached after about ``1/n_walkers`` as many steps
    per walker (measured: tests/walkers/test_walkers_mpi.py, bench/README.md).

    Hill times are each walker's own simulation time; with the same time step and stride they agree.
    """

    def __init__(self, *args, **kwargs):
        """Same arguments as GridBias; the result is not attached to walkers (use :func:`share`)."""
        super().__init__(*args, **kwargs)
        self._comm = None
        self._rank = 0
        self._size = 1
        self._exchanges = 0
        self._warned_own_outside = False
        self._last_times = None  # (n_walkers,) times of the previous exchange, to spot different cadences
        self._warned_cadence = False

    # -- construction -------------------------------------------------------------------------------
    @classmethod
    def _from_state_on(cls, comm, meta, arrays, *, exchanges, abort_on_error):
        shared = cls.from_state(meta, {name: np.array(a, copy=True) for name, a in arrays.items()})
        shared._comm = comm
        shared._rank = int(comm.Get_rank())
        shared._size = int(comm.Get_size())
        shared._exchanges = int(exchanges)
        shared._join()
        if abort_on_error and shared._size > 1:
            _install_abort_hook(comm)
        return shared

    def _join(self):
        """Collective: every walker must hold the same bias (state and exchange count)."""
        self._compare_states(_JOIN)

    def _compare_states(self, op, consequence=""):
        """Collective: raise WalkerSyncError on every walker unless all hold the same state (SHA-256)."""
        table = self._collective(op, self._fingerprint_words())
        fingerprints = table[:, 2:2 + _FINGERPRINT_WORDS].view(np.uint64)
        if (fingerprints != fingerprints[0]).any():
            summaries = self._comm.allgather(self._summary())
            raise WalkerSyncError(_describe_difference(summaries) + consequence)

    @classmethod
    def load(cls, path, comm=None, *, abort_on_error=True) -> "SharedBias":
        """Read a shared-bias checkpoint written by :meth:`save`. Collective.

        Walker 0 reads and verifies the file and sends it to the others. Refuses a file written by a run
        with another number of walkers, or a single-walker bias, saying so.

        Raises
        ------
        CheckpointError
            The file is missing or damaged (on every walker, with walker 0's message), or its walker count
            differs from ``comm``'s size.
        """
        from .checkpoint import read_checkpoint

        comm = _check_comm(_mpi().COMM_WORLD if comm is None else comm)
        outcome = None
        if comm.Get_rank() == 0:
            try:
                outcome = ("ok",) + read_checkpoint(path)
            except CheckpointError as exc:
                outcome = ("error", str(exc))
        outcome = comm.bcast(outcome, root=0)
        if outcome[0] == "error":
            raise CheckpointError(f"walker 0 could not read the shared bias: {outcome[1]}")
        _, meta, arrays = outcome
        return cls._restore_on(comm, meta, arrays, str(path), abort_on_error)

    def restored(self, meta, arrays) -> "SharedBias":
        """A SharedBias on this bias's communicator holding the state ``(meta, arrays)`` of ``to_state()``.

        Collective. For code that keeps the bias inside a larger checkpoint (the OpenMM adapter's run
        checkpoint, one per walker): every walker passes the state from its own file. Refuses a state written
        by a run with another number of walkers, and raises WalkerSyncError when the walkers' files hold
        different biases (checkpoints from different moments).
        """
        return self._restore_on(self._comm, meta, arrays, "the restored state", False)

    @classmethod
    def _restore_on(cls, comm, meta, arrays, source, abort_on_error):
        walkers = meta.get("walkers") if isinstance(meta, dict) else None
        exchanges = walkers.get("exchanges", 0) if isinstance(walkers, dict) else 0
        shared = cls._from_state_on(comm, meta, arrays, exchanges=exchanges, abort_on_error=abort_on_error)
        # Every walker holds the same meta now (checked), so all of them raise together below.
        size = shared._size
        if not isinstance(walkers, dict) or "count" not in walkers:
            raise CheckpointError(
                f"{source} holds a single-walker bias (no walker count). To start {size} walkers from it on "
                "purpose, load it as a GridBias and call gridbias.walkers.share() on it")
        if int(walkers["count"]) != size:
            raise CheckpointError(
                f"{source} was written by a run of {walkers['count']} walkers; this run has {size}. Restart "
                f"with {walkers['count']} walkers (mpiexec -n {walkers['count']}), each from its own "
                "checkpoint; to start a new run of another size from this bias on purpose, load it as a "
                "GridBias and call gridbias.walkers.share() on it")
        return shared

    def _adopt(self, other):
        """Take over the hills of ``other`` in place, with its exchange count when it is shared too."""
        super()._adopt(other)
        if isinstance(other, SharedBias):
            self._exchanges = other._exchanges

    # -- properties -----------------------------------------------------------------------------------
    comm = property(lambda self: self._comm, doc="The MPI communicator of the walkers.")
    walker = property(lambda self: self._rank, doc="This walker's index (its rank in comm), 0-based.")
    n_walkers = property(lambda self: self._size, doc="Number of walkers sharing the bias.")
    exchanges = property(lambda self: self._exchanges, doc="Exchanges (collective deposits) so far.")

    # -- the exchange ---------------------------------------------------------------------------------
    def _collective(self, op, payload):
        """Allgather one row per walker, (op, exchange count, payload...); check op and count agree."""
        if self._comm is None:
            raise ParameterError("this SharedBias is not attached to walkers: make it with "
                                 "gridbias.walkers.share(bias) or SharedBias.load(path)")
        row = np.zeros(EXCHANGE_WIDTH)
        row[0] = op
        row[1] = self._exchanges
        row[2:2 + len(payload)] = payload
        table = np.empty((self._size, EXCHANGE_WIDTH))
        self._comm.Allgather(row, table)
        ops, counts = table[:, 0], table[:, 1]
        if (ops != op).any():
            calls = ", ".join(f"walker {r}: {_OP_NAMES.get(o, f'operation {o:g}')}"
                              for r, o in enumerate(ops))
            raise WalkerSyncError(f"the walkers are in different collective calls ({calls}); every walker "
                                  "must call deposit(), save() and check_identical() in the same order")
        if (counts != counts[0]).any():
            where = ", ".join(f"walker {r}: {c:.0f}" for r, c in enumerate(counts))
            if op == _JOIN:
                raise WalkerSyncError(
                    f"the walkers' biases come from different moments (exchanges so far: {where}); restore "
                    "every walker from checkpoints written at the same step")
            raise WalkerSyncError(
                f"the walkers are out of step at {_OP_NAMES[op]} (exchanges so far: {where}): every walker "
                "must call deposit() at the same cadence (same stride and number of steps)")
        return table

    def deposit(self, s, *, time=None) -> float:
        """Deposit this walker's hill at ``s`` and receive every other walker's. Collective.

        Parameters
        ----------
        s : (d,) float, CV units
            This walker's CV values.
        time : float, ps, optional
            This walker's simulation time, recorded in the history (NaN if not given).

        Returns
        -------
        float
            The height of this walker's own hill, kJ/mol (0.0 if ``s`` is outside the grid). The exchange
            adds up to ``n_walkers`` hills: code that mirrors the grid elsewhere reads them from
            ``history`` (the hills after ``n_hills`` as it was before the call).
        """
        s_d = self._point(s)
        t = math.nan if time is None else float(time)
        h = self.hill_height(s_d)
        d = self.ndim
        payload = np.zeros(EXCHANGE_WIDTH - 2)
        payload[:d] = s_d
        payload[3] = h
        payload[4] = t
        table = self._collective(_DEPOSIT, payload)
        self._exchanges += 1
        centers_kd = np.ascontiguousarray(table[:, 2:2 + d])
        inside_k = self.grid.contains(centers_kd)
        super().add_hills(centers_kd[inside_k], table[inside_k, 5], table[inside_k, 6])
        self._n_outside += int(np.count_nonzero(~inside_k))  # refused deposits of all walkers
        self._check_cadence(table[:, 6])
        if not inside_k[self._rank] and not self._warned_own_outside:
            self._warned_own_outside = True
            warnings.warn(
                f"walker {self._rank}: CV {s_d.tolist()} is outside the grid ({self.grid.lower.tolist()} .. "
                f"{self.grid.upper.tolist()}): no hill from this walker this time (counted in n_outside, "
                "which counts all walkers; warned once). Put walls about 3 sigma inside the grid edges.",
                stacklevel=2)
        return h

    def _check_cadence(self, times_n):
        """Warn once when the walkers' times advance by different amounts between two exchanges."""
        last, self._last_times = self._last_times, times_n.copy()
        if last is None or self._warned_cadence or not np.isfinite(np.concatenate([last, times_n])).all():
            return
        advance_n = times_n - last
        if advance_n.max() - advance_n.min() > 1e-9 * np.abs(advance_n).max() + 1e-12:
            self._warned_cadence = True
            per_walker = ", ".join(f"walker {r}: {a:g} ps" for r, a in enumerate(advance_n))
            warnings.warn(
                f"the walkers' times advanced by different amounts since the last exchange ({per_walker}). "
                "If they deposit at different strides, the run ends with some walkers waiting for the "
                "others' missing deposits: give every walker the same stride, time step and number of "
                "steps (warned once)", stacklevel=3)

    # -- checks and checkpoints -----------------------------------------------------------------------
    def check_identical(self) -> None:
        """Raise WalkerSyncError unless every walker holds the same bias. Collective; costs one SHA-256 of
        the state (a few ms per MB of grid and history) and one small exchange."""
        self._compare_states(_CHECK)

    def save(self, path) -> None:
        """Write the shared bias to ``path`` (walker 0 writes, atomically). Collective.

        First checks that every walker holds the same bias; returns on every walker once the file is
        complete, or raises CheckpointError on every walker with walker 0's message. The file is a normal
        bias checkpoint (``GridBias.load`` reads it for analysis) that also records the number of walkers
        and exchanges.
        """
        from .checkpoint import write_checkpoint

        self._compare_states(_SAVE, "; nothing was written")
        outcome = None
        if self._rank == 0:
            meta, arrays = self.to_state()
            try:
                write_checkpoint(path, meta, arrays, kind=meta["kind"])
                outcome = "ok"
            except CheckpointError as exc:
                outcome = str(exc)
        outcome = self._comm.bcast(outcome, root=0)
        if outcome != "ok":
            raise CheckpointError(f"walker 0 could not write the shared bias: {outcome}")

    def to_state(self):
        """As ``GridBias.to_state``; ``meta["walkers"]`` adds ``{"count": n_walkers, "exchanges": ...}``."""
        meta, arrays = super().to_state()
        meta["walkers"] = {"count": self._size, "exchanges": self._exchanges}
        return meta, arrays

    def _fingerprint_words(self) -> np.ndarray:
        """40 bytes of the SHA-256 of the whole state, as 5 float64 words (compared bit for bit)."""
        meta, arrays = self.to_state()
        digest = hashlib.sha256(json.dumps(meta, sort_keys=True).encode("utf-8"))
        for name in sorted(arrays):
            a = np.ascontiguousarray(arrays[name])
            digest.update(f"{name}{a.dtype.str}{a.shape}".encode("ascii"))
            digest.update(a.data)
        return np.frombuffer(digest.digest()[:8 * _FINGERPRINT_WORDS], dtype=np.float64).copy()

    def _summary(self) -> dict:
        meta, _ = self.to_state()
        counters = ("n_hills", "n_outside", "walkers")
        parameters = {k: v for k, v in meta.items() if k not in counters}
        return {"walker": self._rank, "n_hills": self.n_hills, "exchanges": self._exchanges,
                "parameters": parameters, "n_outside": self.n_outside}

    def __repr__(self):
        base = super().__repr__()  # "GridBias(...)"
        return f"SharedBias({base[9:-1]}, walker {self._rank} of {self._size}, exchanges={self._exchanges})"


def _describe_difference(summaries) -> str:
    """One sentence saying how the walkers' biases differ (summaries gathered from every walker)."""
    first = summaries[0]
    for other in summaries[1:]:
        w = other["walker"]
        if other["parameters"] != first["parameters"]:
            keys = [k for k in first["parameters"] if first["parameters"][k] != other["parameters"].get(k)]
            k = keys[0] if keys else "parameters"
            return (f"walker {w}'s bias differs from walker 0's in {k}: {other['parameters'].get(k)!r} vs "
                    f"{first['parameters'].get(k)!r}; every walker must make the same bias")
        for k in ("exchanges", "n_hills", "n_outside"):
            if other[k] != first[k]:
                return (f"walker {w}'s bias differs from walker 0's: {k} {other[k]} vs {first[k]}; every "
                        "walker must start from the same bias (restore all walkers from checkpoints of the "
                        "same step)")
    return ("the walkers' biases have the same parameters and hill counts but different grid values or "
            "hills: add_hills() was called on some walkers only, or they started from different biases")
