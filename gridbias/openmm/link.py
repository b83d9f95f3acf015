"""The OpenMM adapter at run time: BiasLink (CVs, deposits, engine in step, save/restore) and BiasReporter.

Both are made by ``gridbias.openmm.attach`` and ``BiasLink.reporter``; the layout of the run checkpoint
they write and read is :mod:`gridbias.runs`'s."""

from __future__ import annotations

import logging
import math
import os
import time as _time
import warnings
import weakref

import numpy as np

from .._consistency import FULL_REPLAY_BUDGET, replay_cost
from ..bias import GridBias
from ..errors import BlownUpError, CheckpointError, ParameterError, WriteError
from ..runs import RunCheckpoint, read_run_checkpoint, write_run_checkpoint
from ._units import in_md_units
from .forces import require_openmm, same_object
from .observables import Observables

__all__ = ["BiasLink", "BiasReporter", "DEFAULT_MAX_WRITE_FAILURES", "MAX_COORDINATE", "MAX_SPEED"]


#: Writes in a row of one file (checkpoint or CV log) that may fail (disk full, I/O error) before the
#: reporter stops the run. One or two failures are survived (a transient network file system error, space
#: freed in time), while a disk that stays full stops the run after three intervals of work that exist
#: only in memory. A judgement call, not a measured optimum: set ``max_write_failures=`` to taste.
DEFAULT_MAX_WRITE_FAILURES = 3

_log = logging.getLogger("gridbias.openmm")


# ------------------------------------------------------------------------------------------------- link
class BiasLink:
    """A GridBias applied to one OpenMM System: reads CVs, deposits, pushes, saves and restores.

    Made by :func:`attach`. ``link.bias`` is the bias given to ``attach``; ``restore`` loads the
    checkpoint's hills into that same object, so every reference to it stays live.

    Guarantees: after ``restore`` the engine applies exactly the bias it applied when the checkpoint was
    written (table and pending hills), so a continuation on the same platform is bit-for-bit the
    uninterrupted run where the platform itself is deterministic (Reference; CPU with one thread and
    no PME). Writing a checkpoint never changes the trajectory.
    """

    def __init__(self, system, cvs, bias, engine, force_group, name):
        self.system = system
        self.cvs = tuple(cvs)
        self.force_group = force_group
        self.name = name
        self._bias = bias
        self._engine = engine
        self._context = None  # the Context the engine state below belongs to
        self._folded_values = self._folded_copy(bias.values)
        self._n_folded = bias.n_hills
        self._n_pending = 0
        self._engine_cvs = [i for i, cv in enumerate(self.cvs) if not cv.geometric]
        self._periodic_box = engine.periodic_box
        self._reporters = weakref.WeakSet()
        self._plan = (None, False)  # (platform the route was chosen for, chosen automatically); set by attach
        self._blown_up_at = None  # step at which the run was declared blown up (cleared by restore)
        self.restored_stop = None  # the stop decision of the last checkpoint restored (dict), if any

    # -- properties -------------------------------------------------------------------------------
    bias = property(lambda self: self._bias, doc="The GridBias being applied (restore loads into it).")
    forces = property(lambda self: tuple(self._engine.forces), doc="The forces added to the System.")
    pending_hills = property(lambda self: self._engine.pending, doc="Hills held as Gaussians between pushes.")
    route = property(lambda self: self._engine.route, doc="'compound' or 'cvforce'.")

    def labels(self) -> list:
        """CV names (the ``name=`` given to a builder, else cv0, cv1, ...)."""
        return [cv.label(i) for i, cv in enumerate(self.cvs)]

    def describe_cvs(self) -> list:
        """JSON-safe CV definitions (what a checkpoint compares on restore)."""
        return [cv.describe() for cv in self.cvs]

    # -- CVs --------------------------------------------------------------------------------------
    def cv_values(self, simulation, state=None) -> np.ndarray:
        """The CV values (d,) in nm/rad for the Context's current positions (or a given State)."""
        context = _context_of(simulation)
        pos_n3 = box = None
        if any(cv.geometric for cv in self.cvs):
            if state is None:
                state = context.getState(getPositions=True)
            pos_n3 = np.asarray(in_md_units(state.getPositions(asNumpy=True)))
            if self._periodic_box:
                box = np.asarray(in_md_units(state.getPeriodicBoxVectors(asNumpy=True)))
        s = np.empty(len(self.cvs))
        for i, cv in enumerate(self.cvs):
            if cv.geometric:
                s[i] = cv.value(pos_n3, box)
        if self._engine_cvs:
            values = self._engine.table_force.getCollectiveVariableValues(context)
            for i in self._engine_cvs:
                s[i] = values[i]
        return s

    def bias_energy(self, simulation) -> float:
        """The bias energy the engine applies now, kJ/mol (its force group's energy)."""
        state = _context_of(simulation).getState(getEnergy=True, groups={self.force_group})
        return float(in_md_units(state.getPotentialEnergy()))

    # -- engine state -----------------------------------------------------------------------------
    def _folded_copy(self, values):
        """The table's node values to remember, or None when the engine holds no pending hills (then the
        table is the bias itself at every step and nothing needs copying)."""
        return None if self._engine.pending == 0 else np.array(values, copy=True)

    def _bind(self, context):
        """Make sure the engine in ``context`` applies the current bias (first use, or a new Context)."""
        if self._context is context and self._n_folded + self._n_pending == self._bias.n_hills:
            return
        if not same_object(context.getSystem(), self.system):
            raise ParameterError("this simulation's System is not the one the bias was attached to; "
                                 "call gbo.attach on the System you pass to the Simulation")
        self._check_plan(context.getPlatform().getName())
        self._fold(context)

    def _check_plan(self, platform):
        """Log a notice when the route was chosen automatically for another platform than this one and
        would differ here."""
        from .routes import choose

        planned, auto = self._plan
        self._plan = (planned, False)  # one notice per link
        if auto and planned != platform and choose(platform, not self._engine_cvs) != self.route:
            _log.warning("the bias route %r was chosen for the %s platform, but this Context runs on %s, "
                         "where route %r is cheaper: pass platform=%r to gbo.attach", self.route, planned, platform,
                         choose(platform, not self._engine_cvs), platform)

    def _fold(self, context):
        try:
            self._engine.push_table(context, self._bias.values, self._bias._coef)
        except Exception as exc:
            if "not present in the Context" in str(exc):
                raise ParameterError(
                    "the bias forces are not in this Context: call gbo.attach(system, ...) before creating "
                    "the Simulation or Context (or call context.reinitialize(preserveState=True) after "
                    "attaching)") from exc
            raise
        self._engine.clear_slots(context, self._engine.pending if self._context is not context else self._n_pending)
        self._context = context
        self._folded_values = self._folded_copy(self._bias.values)
        self._n_folded = self._bias.n_hills
        self._n_pending = 0

    def deposit(self, simulation, s=None, *, time=None) -> float:
        """Deposit one hill at the current CVs (or at ``s``) and update the engine. Returns the height.

        Every hill the bias's ``deposit`` adds is mirrored (a shared bias of several walkers adds one per
        walker): as a pending exact Gaussian while slots are free, else by folding all into the table.
        """
        context = _context_of(simulation)
        self._bind(context)
        if s is None:
            s = self.cv_values(context)
        if time is None:
            time = float(in_md_units(context.getState().getTime()))
        n_before = self._bias.n_hills
        h = self._bias.deposit(s, time=time)
        # Mirror every hill the call added: one normally, up to one per walker for a shared bias.
        n_new = self._bias.n_hills - n_before
        if n_new and self._n_pending + n_new <= self._engine.pending:
            history = self._bias.history
            for j in range(n_before, n_before + n_new):
                self._engine.set_slot(context, self._n_pending, history.centers[j], history.heights[j])
                self._n_pending += 1
        elif n_new:
            self._fold(context)
        return h

    # -- checkpoints ------------------------------------------------------------------------------
    def reporter(self, stride, *, checkpoint=None, checkpoint_every=None, log=None, log_every=None,
                 observables=(), max_write_failures=DEFAULT_MAX_WRITE_FAILURES):
        """A reporter that deposits every ``stride`` steps; see :class:`BiasReporter`."""
        rep = BiasReporter(self, stride, checkpoint=checkpoint, checkpoint_every=checkpoint_every, log=log,
                           log_every=log_every, observables=observables, max_write_failures=max_write_failures)
        self._reporters.add(rep)
        return rep

    def save(self, simulation, path, *, stop: dict | None = None) -> None:
        """Write one checkpoint with the bias, the engine's own checkpoint and a portable MD state.

        The file (a run checkpoint, layout in :mod:`gridbias.runs`) is replaced atomically. Nothing is
        written (BlownUpError, the last good file stays) when positions or velocities are not finite or
        beyond ``MAX_COORDINATE`` / ``MAX_SPEED``, nor after the run was declared blown up (until a good
        checkpoint is restored). ``stop`` records a stop decision (``StopDecision.to_dict()``; see
        :meth:`run_until`).
        """
        openmm = require_openmm()
        context = _context_of(simulation)
        self._bind(context)
        state = context.getState(getPositions=True, getVelocities=True)
        positions = np.asarray(in_md_units(state.getPositions(asNumpy=True)), dtype=float)
        velocities = np.asarray(in_md_units(state.getVelocities(asNumpy=True)), dtype=float)
        step = int(context.getStepCount())
        if self._blown_up_at is not None:
            raise BlownUpError(f"the run was declared blown up at step {self._blown_up_at}; nothing is written "
                               f"({os.fspath(path)!r} was not touched): restore a good checkpoint first")
        reason = blow_up_reason(positions, velocities)
        if reason:
            self._blown_up_at = step
            raise BlownUpError(f"{reason} at step {step}: the simulation has blown up; {os.fspath(path)!r} was "
                               "not written")
        bias_state, bias_arrays = self._bias.to_state()
        write_run_checkpoint(path, RunCheckpoint(
            path=os.fspath(path), step=step, time=float(in_md_units(state.getTime())),
            platform=context.getPlatform().getName(), labels=tuple(self.labels()), cvs=tuple(self.describe_cvs()),
            n_particles=self.system.getNumParticles(), bias_state=bias_state, bias_arrays=bias_arrays,
            engine={"route": self.route, "pending_hills": self.pending_hills, "n_folded": self._n_folded,
                    "n_pending": self._n_pending, "name": self.name},
            folded_values=self._bias.values if self._folded_values is None else self._folded_values,
            md_checkpoint=context.createCheckpoint(),
            positions=positions, velocities=velocities,
            box=np.asarray(in_md_units(state.getPeriodicBoxVectors(asNumpy=True)), dtype=float),
            openmm_version=openmm.__version__, written=_time.strftime("%Y-%m-%dT%H:%M:%S%z"), stop=stop))

    def run_until(self, simulation, rules, *, stretch: int | None = None):
        """Run until a stop rule holds, write a final checkpoint with the decision, and return it.

        Needs this link's reporter (with ``checkpoint=``, and ``log=`` for rules that read frames) in
        ``simulation.reporters``. If the checkpoint exists and the run has not been restored yet, it is
        restored first; when it records a decision that still holds under ``rules`` (see
        ``gridbias.stopping.Referee.confirms``), nothing more is run. With walkers (a shared bias), every
        walker calls it and all stop together. See :func:`gridbias.openmm.until.run_until`.

        Returns
        -------
        gridbias.stopping.StopDecision
        """
        from .until import run_until

        return run_until(self, simulation, rules, stretch=stretch)

    def restore(self, simulation, path) -> RunCheckpoint:
        """Continue from a checkpoint: restores the bias, the MD state and the engine's bias exactly.

        The engine's own checkpoint bytes are used when the platform matches; otherwise the portable
        state (positions, velocities, box, step, time) with a logged notice (the run then continues
        correctly but not bit-for-bit: the integrator's random state is not portable). Refuses a file
        written for another System (CVs, particle count) or another bias (grid, widths, walls...),
        saying which. CV logs of this link's reporters are cut back to the checkpoint's step.

        Returns
        -------
        gridbias.runs.RunCheckpoint
            What the checkpoint held (``step``, ``time`` in ps, ``platform``, ...).
        """
        context = _context_of(simulation)
        checkpoint = read_run_checkpoint(path)
        self._check_compatible(checkpoint, path)
        try:
            # A bias that restores itself (a SharedBias of walkers: collective, stays shared) does so.
            restored = getattr(self._bias, "restored", None)
            bias = (restored(checkpoint.bias_state, checkpoint.bias_arrays) if callable(restored)
                    else GridBias.from_state(checkpoint.bias_state, checkpoint.bias_arrays))
        except CheckpointError as exc:
            raise CheckpointError(f"run checkpoint {os.fspath(path)!r}: {exc}") from exc
        folded, n_folded = checkpoint.folded_values, checkpoint.engine["n_folded"]
        self.restored_stop = checkpoint.stop
        diff = self._bias.describe_difference(bias)
        if diff:
            raise CheckpointError(f"{path}: the bias {diff} (this run vs checkpoint)")
        if folded.shape != tuple(bias.grid.shape) or not 0 <= n_folded <= bias.n_hills:
            raise CheckpointError(f"{path}: engine table of shape {folded.shape} / n_folded={n_folded} does not "
                                  f"fit the bias (grid shape {bias.grid.shape}, {bias.n_hills} hills)")
        if replay_cost(bias) * n_folded <= FULL_REPLAY_BUDGET * max(bias.n_hills, 1):
            worst = float(np.max(np.abs(bias.rebuilt(n_folded).values - folded), initial=0.0))
            if worst > 1e-9 * max(1.0, float(np.sum(bias.history.heights[:n_folded]))):
                raise CheckpointError(f"{path}: the engine table differs by {worst:.3g} kJ/mol from the replay of "
                                      f"its {n_folded} folded hills: the file contradicts itself")
        platform = context.getPlatform().getName()
        if checkpoint.platform == platform:
            try:
                context.loadCheckpoint(checkpoint.md_checkpoint)
                exact = True
            except Exception as exc:  # another OpenMM build or CPU: fall back to the portable state
                _log.warning("%s: the engine could not load its own checkpoint (%s); continuing from the "
                             "portable state (not bit-for-bit)", path, exc)
                exact = False
        else:
            _log.warning("%s was written on the %s platform and is restored on %s: continuing from the portable "
                         "state (positions, velocities, box, step, time), not bit-for-bit", path,
                         checkpoint.platform, platform)
            exact = False
        if not exact:
            self._load_portable(context, checkpoint)
        self._bias._adopt(bias)
        self._install(context, folded, n_folded)
        self._blown_up_at = None
        for rep in list(self._reporters):
            rep._restored(checkpoint.step)
        return checkpoint

    def _install(self, context, folded, n_folded):
        """Put exactly the engine state of the checkpoint into ``context``: table + pending hills."""
        pending = self._bias.n_hills - n_folded
        if pending > self._engine.pending:  # the checkpoint came from a link with more slots: fold all
            _log.info("restoring %d pending hills into a link with %d slots: folding them into the table",
                      pending, self._engine.pending)
            self._context = context
            self._fold(context)
            return
        self._engine.push_table(context, folded, self._bias._coef)
        self._engine.clear_slots(context, self._engine.pending)
        centers, heights = self._bias.history.centers, self._bias.history.heights
        for j in range(pending):
            self._engine.set_slot(context, j, centers[n_folded + j], heights[n_folded + j])
        self._context = context
        self._folded_values = self._folded_copy(folded)
        self._n_folded = n_folded
        self._n_pending = pending

    def _check_compatible(self, checkpoint, path):
        n = self.system.getNumParticles()
        if checkpoint.n_particles != n:
            raise CheckpointError(f"{path} was written for a System of {checkpoint.n_particles} particles; this "
                                  f"System has {n}")
        mine = self.describe_cvs()
        theirs = checkpoint.cvs
        if len(theirs) != len(mine):
            raise CheckpointError(f"{path} holds {len(theirs)} CVs; this link has {len(mine)}")
        for i, (a, b) in enumerate(zip(mine, theirs, strict=True)):
            if a != b:
                raise CheckpointError(f"{path}: CV {i} differs: checkpoint {b}, this link {a}")

    @staticmethod
    def _load_portable(context, checkpoint):
        context.setPeriodicBoxVectors(*[tuple(float(x) for x in row) for row in checkpoint.box])
        context.setPositions(checkpoint.positions)
        context.setVelocities(checkpoint.velocities)
        context.setTime(checkpoint.time)
        context.setStepCount(checkpoint.step)


#: Largest |coordinate| (nm) and |velocity component| (nm/ps) of a state that is saved. Beyond them a run
#: has blown up even if the numbers are finite: 1e6 nm is a millimetre, and 1e4 nm/ps (10,000 km/s) is
#: four orders of magnitude above thermal speeds at any temperature MD is run at (a judgement call, no source).
MAX_COORDINATE = 1e6
MAX_SPEED = 1e4


def blow_up_reason(positions, velocities) -> str:
    """'' for a sane MD state, else what is wrong with it (non-finite or absurd positions or velocities)."""
    if not (np.isfinite(positions).all() and np.isfinite(velocities).all()):
        return "positions or velocities are not finite"
    if positions.size and np.abs(positions).max() > MAX_COORDINATE:
        return f"a coordinate is {np.abs(positions).max():.3g} nm, beyond {MAX_COORDINATE:g} nm"
    if velocities.size and np.abs(velocities).max() > MAX_SPEED:
        return f"a velocity is {np.abs(velocities).max():.3g} nm/ps, beyond {MAX_SPEED:g} nm/ps"
    return ""


def _context_of(simulation):
    return simulation.context if hasattr(simulation, "context") else simulation


# --------------------------------------------------------------------------------------------- reporter
class BiasReporter:
    """An OpenMM reporter that grows the bias during ``simulation.step``.

    Every ``stride`` steps it reads the CVs, deposits a hill and updates the engine; every
    ``checkpoint_every`` steps it writes the checkpoint (after that step's deposit); every ``log_every``
    steps (default ``stride``) it appends ``step, time, CVs, bias`` to the CV log, the bias being the one
    in effect during that step (before its deposit), followed by the ``observables``: any CVs of this
    module (``distance``, ``dihedral``, ``from_force`` of any Force, ...), each with ``name=`` (its column),
    logged and never biased. Geometric observables cost microseconds per record; ``from_force`` ones are
    evaluated in a Context of their own at the records only. It holds a CheckpointLock on the checkpoint
    path until ``close()`` (or until it is garbage-collected).

    NaN CV values stop the run with an error naming the step and the last checkpoint written.

    One policy for every file the run writes (checkpoint, CV log): a write that fails (disk full, quota,
    I/O error) does not stop the run at once. The file on disk keeps what it had (checkpoints are replaced
    atomically; a CV log keeps exactly its complete records), the bias in memory keeps every hill, CV-log
    rows that could not be written are kept and written with the next ones, an ERROR naming the file, the
    step and the cause is logged (logger ``gridbias.openmm``; Python prints it to stderr even when logging
    is not configured), and the write is tried again when next due. After ``max_write_failures`` failures
    in a row of one file, the run stops with WriteError: it names the last good checkpoint
    (``err.last_checkpoint``, ``err.last_checkpoint_step``) and carries the bias in memory (``err.bias``:
    ``err.bias.save(path)``; ``link.save(simulation, path)`` also keeps the MD state) to save on a disk
    with room. A successful write of a file resets its count. The lock file is written once, when the
    reporter is made: a failure there raises WriteError at once (nothing is in memory yet).

    Attributes
    ----------
    last_checkpoint_step : int or None
        Step of the last checkpoint this reporter wrote.
    write_failures : int
        Failed writes in a row of the file that has failed most since its last good write (0: all well).
    """

    def __init__(self, link, stride, *, checkpoint=None, checkpoint_every=None, log=None, log_every=None,
                 observables=(), max_write_failures=DEFAULT_MAX_WRITE_FAILURES):
        self._link = link
        self.stride = _steps("stride", stride)
        if checkpoint is None and checkpoint_every is not None:
            raise ParameterError("checkpoint_every needs checkpoint= (a file path)")
        if checkpoint is not None and checkpoint_every is None:
            raise ParameterError("checkpoint= needs checkpoint_every= (steps between checkpoints)")
        self.checkpoint = None if checkpoint is None else os.fspath(checkpoint)
        self.checkpoint_every = None if checkpoint_every is None else _steps("checkpoint_every", checkpoint_every)
        if log is None and log_every is not None:
            raise ParameterError("log_every needs log= (a file path)")
        self.log = None if log is None else os.fspath(log)
        self.log_every = None if log is None else _steps("log_every", self.stride if log_every is None else log_every)
        self._observables = Observables(link.system, observables, link.labels())
        if len(self._observables) and log is None:
            raise ParameterError("observables are written to the CV log: give log= (a file path)")
        limit = max_write_failures
        if isinstance(limit, bool) or not isinstance(limit, (int, np.integer)) or limit < 1:
            raise ParameterError("max_write_failures must be an integer >= 1 (1: stop at the first "
                                 f"failed write), got {limit!r}")
        self.max_write_failures = int(limit)
        self.last_checkpoint_step = None
        self._failed_steps = {}  # path -> steps of its failed writes in a row
        self._unwritten_rows = []  # CV-log rows whose write failed, written with the next ones
        self._restored_step = None
        self._started = False
        self._writer = None
        self._lock = None
        if self.checkpoint is not None:
            from ..checkpoint import CheckpointLock

            self._lock = CheckpointLock(self.checkpoint).acquire()
            self._finalizer = weakref.finalize(self, self._lock.release)

    def _due(self, step, every):
        return every is not None and step % every == 0

    def describeNextReport(self, simulation):
        step = simulation.currentStep
        if not self._started:
            self._start(simulation)
        steps = min(e - step % e for e in (self.stride, self.checkpoint_every, self.log_every) if e is not None)
        nxt = step + steps
        need_cvs = self._due(nxt, self.stride) or self._due(nxt, self.log_every)
        need_positions = any(cv.geometric for cv in self._link.cvs) or (
            self._observables.needs_positions and self._due(nxt, self.log_every))
        include = ["positions"] if need_cvs and need_positions else []
        return {"steps": steps, "periodic": False, "include": include}

    def _start(self, simulation):
        link = self._link
        link._bind(simulation.context)
        s = link.cv_values(simulation)
        grid = link.bias.grid
        if not np.isfinite(s).all():
            raise BlownUpError(f"the starting CV values are not finite: {s.tolist()}")
        if not grid.contains(s):
            warnings.warn(f"the starting CV values {s.tolist()} ({link.labels()}) are outside the grid "
                          f"({grid.lower.tolist()} .. {grid.upper.tolist()}): no hills are deposited there and "
                          "the grid part of the bias is zero; widen the grid or start elsewhere", stacklevel=4)
        integrator = simulation.integrator
        if hasattr(integrator, "getTemperature"):
            t = integrator.getTemperature()
            t = float(in_md_units(t))
            if not math.isclose(t, link.bias.temperature, rel_tol=1e-6):
                warnings.warn(f"the integrator runs at {t} K but the bias was made for {link.bias.temperature} K; "
                              "well-tempered heights and free energies use the bias temperature", stacklevel=4)
        if self.log is not None:
            from ..cvlog import CVLogWriter

            labels = link.labels()
            columns = ["step", "time"] + labels + ["bias"] + self._observables.names
            units = ["1", "ps"] + [cv.unit for cv in link.cvs] + ["kJ/mol"] + self._observables.units
            meta = {"cvs": link.describe_cvs(), "grid": grid.to_dict(), "temperature": link.bias.temperature,
                    "bias_factor": link.bias.bias_factor, "stride": self.stride, "run_id": link.bias.run_id}
            if len(self._observables):
                meta["observables"] = self._observables.describe()
            self._writer = CVLogWriter(self.log, columns, units, meta)
            if self._restored_step is not None:
                self._writer.truncate_after(self._restored_step)
            elif self._writer.n_records:
                from ..cvlog import read_cvlog

                last = float(read_cvlog(self.log, mmap=True).column("step")[-1])
                if last > simulation.currentStep:
                    self._writer.close()
                    self._writer = None
                    raise ParameterError(
                        f"CV log {self.log!r} already holds records up to step {last:.0f}, beyond the current "
                        f"step {simulation.currentStep}: restore the run first (link.restore) or use a new log")
        self._started = True

    def _restored(self, step):
        self._restored_step = step
        if self._writer is not None:
            self._writer.truncate_after(step)

    def report(self, simulation, state):
        link = self._link
        step = simulation.currentStep
        deposit_due = self._due(step, self.stride)
        log_due = self._due(step, self.log_every)
        if deposit_due or log_due:
            s = link.cv_values(simulation, state)
            if not np.isfinite(s).all():
                where = (f"the last checkpoint is {self.checkpoint!r} at step {self.last_checkpoint_step}"
                         if self.last_checkpoint_step is not None else "no checkpoint was written by this run")
                link._blown_up_at = step
                raise BlownUpError(f"CV values are not finite at step {step}: {s.tolist()} "
                                    f"({link.labels()}); the simulation has blown up. Stopping; {where}")
            t = float(in_md_units(state.getTime()))
            if log_due:
                energy, _ = link.bias.evaluate(s)
                extra = self._observable_values(simulation, state, step) if len(self._observables) else []
                self._unwritten_rows.append([float(step), t, *s.tolist(), energy, *extra])
                self._attempt(self.log, step, self._write_rows)
            if deposit_due:
                link.deposit(simulation, s, time=t)
        if self._due(step, self.checkpoint_every):
            self._write_checkpoint(simulation, step)

    @property
    def write_failures(self) -> int:
        """Failed writes in a row of the file that has failed most since its last good write."""
        return max((len(v) for v in self._failed_steps.values()), default=0)

    def _write_rows(self):
        self._writer.write(self._unwritten_rows)
        self._unwritten_rows.clear()

    def _observable_values(self, simulation, state, step) -> list:
        pos_n3 = np.asarray(in_md_units(state.getPositions(asNumpy=True)))
        box = (np.asarray(in_md_units(state.getPeriodicBoxVectors(asNumpy=True)))
               if self._link._periodic_box else None)
        return self._observables.values(simulation.context, pos_n3, box, step)

    def _write_checkpoint(self, simulation, step):
        """Flush the CV log, then write the checkpoint, each under the write-failure policy."""
        if self._writer is not None and not self._unwritten_rows:  # rows still held: the append counts
            self._attempt(self.log, step, self._writer.flush)
        if self._attempt(self.checkpoint, step, lambda: self._link.save(simulation, self.checkpoint)):
            self.last_checkpoint_step = step

    def _attempt(self, path, step, write) -> bool:
        """Run ``write()``; on WriteError log it and count it, stopping the run at the limit (class docstring)."""
        try:
            write()
        except WriteError as exc:
            failed = self._failed_steps.setdefault(path, [])
            failed.append(step)
            n = len(failed)
            if self.last_checkpoint_step is not None:
                on_disk = f"the last good checkpoint is {self.checkpoint!r} of step {self.last_checkpoint_step}"
            elif self.checkpoint is not None:
                on_disk = "this run has written no checkpoint yet (an older file there is untouched)"
            else:
                on_disk = "this run writes no checkpoint"
            in_memory = f"the bias in memory keeps all {self._link.bias.n_hills} hills"
            if n >= self.max_write_failures:
                steps = ", ".join(map(str, failed))
                plural = "s" if n > 1 else ""
                raise WriteError(
                    f"{path!r} could not be written {n} time{plural} in a row (step{plural} {steps}); last cause: "
                    f"{exc}. Stopping the run at step {step}: {on_disk}, and {in_memory}: catch "
                    "gridbias.WriteError and call err.bias.save(path) or link.save(simulation, path) with a "
                    "path that has room, to keep them", path=path, bias=self._link.bias,
                    last_checkpoint=self.checkpoint if self.last_checkpoint_step is not None else None,
                    last_checkpoint_step=self.last_checkpoint_step) from exc
            _log.error("could not write %r at step %d (failure %d of at most %d in a row): %s. The run continues "
                       "and tries again when the next write is due; %s, and %s", path, step, n,
                       self.max_write_failures, exc, on_disk, in_memory)
            return False
        self._failed_steps.pop(path, None)
        return True

    def close(self):
        """Write CV-log rows still held, close the CV log and release the checkpoint lock (always)."""
        try:
            if self._writer is not None:
                writer = self._writer
                try:
                    if self._unwritten_rows:
                        self._write_rows()
                finally:
                    self._writer = None
                    writer.close()
        finally:
            if self._lock is not None:
                self._finalizer()
                self._lock = None


def _steps(name, value):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ParameterError(f"{name} must be an integer number of steps >= 1, got {value!r}")
    return int(value)
