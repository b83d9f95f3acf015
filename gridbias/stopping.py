"""Stop rules: when a run has done its job (converged, precise enough, reached a basin, out of time or steps).

Rules combine with ``|`` (stop when either holds) and ``&`` (stop when both hold)::

    from gridbias import stopping
    rules = stopping.Converged() | stopping.MaxSteps(50_000_000) | stopping.TimeBudget(23.5 * 3600)

A runner asks the rules after each stretch of steps: ``link.run_until`` in the OpenMM adapter,
:class:`StoppingRun` in any Python MD loop. The decision (which rule, why, at which step) is written into
the final checkpoint, so running the same script again continues a run that has not stopped and does
nothing more for one that has.

A rule that holds is evidence, not proof: a converged verdict can still hide a slow motion the CVs miss.
"""

from __future__ import annotations

import math
import time as _time
from dataclasses import dataclass

import numpy as np

from .errors import ParameterError

__all__ = ["StopRule", "MaxSteps", "TimeBudget", "Converged", "ErrorBelow", "EntersBasin", "AnyRule",
           "AllRules", "StopDecision", "Progress", "Referee", "DEFAULT_MAX_COST_FRACTION", "DEFAULT_MARGIN_S",
           "DEFAULT_MIN_HILLS"]

#: Largest share of the run's wall-clock time that the costly rules (Converged, ErrorBelow) may spend on
#: their checks (counted from the runner's start; a check is made only when it fits in the share).
DEFAULT_MAX_COST_FRACTION = 0.01
#: Wall-clock seconds kept in hand before a time budget ends, for the final checkpoint and for leaving
#: cleanly (common practice for batch queues, no source).
DEFAULT_MARGIN_S = 600.0
#: Hills before the convergence verdict is first asked for (there is no surface to judge before).
DEFAULT_MIN_HILLS = 100


def _in_unit(name, value, unit_name, allowed):
    """A float > 0 from a number or an ``openmm.unit`` quantity (converted to ``unit_name``)."""
    from .openmm._units import in_md_units

    if isinstance(value, bool):
        raise ParameterError(f"{name} must be {allowed}, got {value!r}")
    x = in_md_units(value, name=name, unit=unit_name)
    if not (math.isfinite(x) and x > 0):
        raise ParameterError(f"{name} must be {allowed}, got {value!r}")
    return x


def _count(name, value, minimum):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise ParameterError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


@dataclass(frozen=True)
class StopDecision:
    """Which rule stopped a run, why, and where.

    Attributes
    ----------
    rule : str
        The rule that held (its description).
    reason : str
        One sentence: what was measured.
    step : int
    time : float, ps
    """

    rule: str
    reason: str
    step: int
    time: float

    def to_dict(self) -> dict:
        """JSON-safe form (stored in checkpoints)."""
        return {"rule": self.rule, "reason": self.reason, "step": int(self.step),
                "time": float(self.time) if math.isfinite(self.time) else None}

    @classmethod
    def from_dict(cls, data) -> "StopDecision":
        """Read :meth:`to_dict` output back (CheckpointError-free: callers check the type)."""
        time = data.get("time")
        return cls(str(data["rule"]), str(data["reason"]), int(data["step"]),
                   float("nan") if time is None else float(time))

    def __str__(self):
        return f"stopped at step {self.step:,} ({self.time:g} ps) by {self.rule}: {self.reason}"


class Progress:
    """What the rules look at after a stretch of steps; made by the runner.

    Attributes
    ----------
    step : int
        Steps done in the whole run (restarts included).
    time : float, ps
    bias : GridBias
    elapsed : float, s
        Wall-clock seconds since this job's runner started.
    seconds_per_step : float
        Measured wall-clock cost of one step (NaN until known).
    frame_times, frame_cvs, frame_bias : arrays or None
        Every frame of the run so far: (n,) ps, (n, d) CV units, (n,) kJ/mol (the bias applied at each,
        None when not logged), read only when a rule asks. Without frames the rules use the hill centres.
    """

    def __init__(self, step, time, bias, elapsed, seconds_per_step=float("nan"), frames=None):
        self.step, self.time, self.bias = int(step), float(time), bias
        self.elapsed, self.seconds_per_step = float(elapsed), float(seconds_per_step)
        self._frames = frames  # None, a (times, cvs, bias) tuple, or a callable returning one
        self._loaded = None

    def _load(self):
        if self._loaded is None:
            frames = self._frames() if callable(self._frames) else self._frames
            self._loaded = (None, None, None) if frames is None else frames
        return self._loaded

    frame_times = property(lambda self: self._load()[0])
    frame_cvs = property(lambda self: self._load()[1])
    frame_bias = property(lambda self: self._load()[2])

    def points(self):
        """(times (n,), cvs (n, d)): the frames if there are any, else the hill centres and times."""
        if self.frame_cvs is not None and len(self.frame_cvs):
            return np.asarray(self.frame_times), np.asarray(self.frame_cvs)
        history = self.bias.history
        return np.asarray(history.times), np.asarray(history.centers)


class StopRule:
    """A condition that ends a run. Subclasses implement :meth:`_holds` (and :meth:`steps_left`)."""

    name = "rule"

    def evaluate(self, progress: Progress) -> str | None:
        """The reason the rule holds now (one sentence), or None."""
        return self._holds(progress)

    def _holds(self, progress):  # pragma: no cover - every subclass overrides it
        raise NotImplementedError

    def steps_left(self, progress: Progress) -> int | None:
        """Steps until the rule wants its next look (None: no preference)."""
        return None

    def describe(self) -> str:
        """The rule as a short text, as recorded in a checkpoint."""
        return self.name

    def __or__(self, other) -> "AnyRule":
        return AnyRule(self, other)

    def __and__(self, other) -> "AllRules":
        return AllRules(self, other)

    def __repr__(self):
        return self.describe()


def _rules(args):
    if not args or not all(isinstance(r, StopRule) for r in args):
        raise ParameterError(f"rules must be StopRule objects (MaxSteps, TimeBudget, Converged, ...), "
                             f"got {args!r}")
    return tuple(args)


class AnyRule(StopRule):
    """Holds when any of its rules holds (``rule_a | rule_b``); the first that holds gives the reason."""

    def __init__(self, *rules):
        self.rules = _rules(rules)

    def evaluate(self, progress):
        self.held = None
        for rule in self.rules:
            reason = rule.evaluate(progress)
            if reason is not None:
                self.held = rule
                return reason
        return None

    def steps_left(self, progress):
        left = [n for n in (r.steps_left(progress) for r in self.rules) if n is not None]
        return min(left) if left else None

    def describe(self):
        return " | ".join(r.describe() for r in self.rules)


class AllRules(StopRule):
    """Holds when every one of its rules holds (``rule_a & rule_b``); the reasons are joined."""

    def __init__(self, *rules):
        self.rules = _rules(rules)

    def evaluate(self, progress):
        reasons = [r.evaluate(progress) for r in self.rules]
        return None if any(r is None for r in reasons) else "; ".join(reasons)

    def steps_left(self, progress):
        # a rule that already holds waits for the others
        left = [n for n in (r.steps_left(progress) for r in self.rules) if n]
        return min(left) if left else None

    def describe(self):
        return "(" + " & ".join(r.describe() for r in self.rules) + ")"


class MaxSteps(StopRule):
    """Holds once the run has done ``n_steps`` steps (restarts included)."""

    name = "MaxSteps"

    def __init__(self, n_steps: int):
        self.n_steps = _count("n_steps", n_steps, 1)

    def _holds(self, progress):
        if progress.step >= self.n_steps:
            return f"reached {progress.step:,} steps (limit {self.n_steps:,})"
        return None

    def steps_left(self, progress):
        return max(self.n_steps - progress.step, 0)

    def describe(self):
        return f"MaxSteps({self.n_steps})"


class TimeBudget(StopRule):
    """Holds when the job's wall-clock budget is nearly spent: stop with ``margin`` seconds in hand.

    Parameters
    ----------
    seconds : float, s (or an openmm.unit time)
        The job's wall-clock limit (a batch queue's time limit).
    margin : float, s, keyword-only, default 600
        Kept in hand for the final checkpoint and a clean exit.
    started : float, keyword-only, optional
        ``time.time()`` when the job started; default when this rule was made.

    Notes
    -----
    The runner shortens its last stretch of steps so that it ends before ``seconds - margin``, using the
    measured cost per step.
    """

    name = "TimeBudget"

    def __init__(self, seconds, *, margin=DEFAULT_MARGIN_S, started: float | None = None):
        self.seconds = _in_unit("seconds", seconds, "second", "a wall-clock time > 0 (s)")
        self.margin = 0.0 if margin == 0 else _in_unit("margin", margin, "second", "a time >= 0 (s)")
        if self.margin >= self.seconds:
            raise ParameterError(f"margin ({self.margin:g} s) must be shorter than the budget "
                                 f"({self.seconds:g} s)")
        self.started = _time.time() if started is None else float(started)

    def _remaining(self):
        return self.seconds - self.margin - (_time.time() - self.started)

    def _holds(self, progress):
        left = self._remaining()
        if left <= 0 or (math.isfinite(progress.seconds_per_step) and left < progress.seconds_per_step):
            used = _time.time() - self.started
            return (f"{used / 3600:.2f} h of the {self.seconds / 3600:.2f} h budget used; stopping "
                    f"{self.margin:g} s before its end")
        return None

    def steps_left(self, progress):
        if not math.isfinite(progress.seconds_per_step) or progress.seconds_per_step <= 0:
            return None
        return max(int(self._remaining() / progress.seconds_per_step), 1)

    def describe(self):
        return f"TimeBudget({self.seconds:g} s, margin {self.margin:g} s)"


class _Costly(StopRule):
    """A rule whose check costs time: asked only while all its checks stay within a share of the run.

    A check is made when the time spent on checks so far plus the cost of the last one fits in
    ``max_cost_fraction`` of the wall-clock time since the runner started; otherwise the rule waits (it
    never shortens the runner's stretches, which would cost more than the checks). Only a check far
    dearer than the one before it (the first full verdict) can push the total above the share.
    """

    def __init__(self, max_cost_fraction):
        frac = max_cost_fraction
        if isinstance(frac, bool) or not isinstance(frac, (int, float)) or not 0 < frac <= 1:
            raise ParameterError(f"max_cost_fraction must be in (0, 1], got {max_cost_fraction!r}")
        self.max_cost_fraction = float(frac)
        self.cost_seconds = 0.0
        self.n_checks = 0
        self._last_cost = 0.0

    def evaluate(self, progress):
        if self.cost_seconds + self._last_cost > self.max_cost_fraction * progress.elapsed:
            return None
        started = _time.perf_counter()
        reason = self._holds(progress)
        self._last_cost = _time.perf_counter() - started
        self.cost_seconds += self._last_cost
        self.n_checks += 1
        return reason


class Converged(_Costly):
    """Holds when the convergence verdict does (``analysis.assess_convergence``).

    Parameters
    ----------
    basins : Basins, keyword-only, optional
        Default: found on the current surface at each check (``analysis.find_basins``).
    min_depth_kT : float, keyword-only, default 2
        For found basins.
    min_hills : int, keyword-only, default 100
        No verdict is asked for before this many hills.
    max_cost_fraction : float, keyword-only, default 0.01
    **thresholds
        ``window_fraction``, ``tolerance_kT``, ``min_transitions``, ``max_height_fraction``,
        ``agreement_z``, ``agreement_kT``: passed to ``assess_convergence``.

    Attributes
    ----------
    last_verdict : ConvergenceVerdict or None
        The verdict of the latest check.
    cost_seconds, n_checks
        Wall-clock time spent checking, and the number of checks.
    """

    name = "Converged"
    _THRESHOLDS = ("window_fraction", "tolerance_kT", "min_transitions", "max_height_fraction",
                   "agreement_z", "agreement_kT")

    def __init__(self, *, basins=None, min_depth_kT: float = 2.0, min_hills: int = DEFAULT_MIN_HILLS,
                 max_cost_fraction: float = DEFAULT_MAX_COST_FRACTION, **thresholds):
        super().__init__(max_cost_fraction)
        from .analysis import Basins
        from .analysis._checks import as_count, as_fraction, as_positive

        unknown = sorted(set(thresholds) - set(self._THRESHOLDS))
        if unknown:
            raise ParameterError(f"unknown threshold(s) {unknown}; allowed: {list(self._THRESHOLDS)}")
        checks = {"window_fraction": lambda n, v: as_fraction(n, v, allow_zero=False, allow_one=True),
                  "max_height_fraction": lambda n, v: as_fraction(n, v, allow_zero=False),
                  "min_transitions": lambda n, v: as_count(n, v, 1)}
        for name, value in thresholds.items():  # refused now, not at the first check hours later
            checks.get(name, as_positive)(name, value)
        if basins is not None and not isinstance(basins, Basins):
            raise ParameterError(f"basins must be Basins or None (found on the surface), got {basins!r}")
        self.basins = basins
        self.min_depth_kT = as_positive("min_depth_kT", min_depth_kT, "kBT")
        self.min_hills = _count("min_hills", min_hills, 1)
        self.thresholds = thresholds
        self.last_verdict = None

    def _holds(self, progress):
        from . import analysis

        bias = progress.bias
        if bias.n_hills < self.min_hills:
            return None
        basins = self.basins
        if basins is None:
            basins = analysis.find_basins(bias.grid, analysis.surface_at(bias).free_energy, bias.kT,
                                          min_depth_kT=self.min_depth_kT)
        if basins.n_basins < 2:
            return None
        times, cvs = progress.points()
        frame_bias = progress.frame_bias if progress.frame_cvs is not None else None
        verdict = analysis.assess_convergence(bias, basins, frame_times=times, frame_cvs=cvs,
                                              frame_bias=frame_bias, **self.thresholds)
        self.last_verdict = verdict
        if verdict.converged:
            return f"the convergence verdict holds (all {len(verdict.criteria)} criteria)"
        return None

    def describe(self):
        return "Converged()"


class ErrorBelow(_Costly):
    """Holds when a named free-energy difference is known to within ``target`` (one standard error).

    Parameters
    ----------
    basins : Basins
        Named basins (e.g. ``analysis.basins_from_boxes``).
    basin, reference : str
        The difference ``F(basin) - F(reference)``.
    target : float, kJ/mol (or an openmm.unit energy per mole)
    max_cost_fraction : float, keyword-only, default 0.01

    Notes
    -----
    The error is the block-analysis standard error of the frames reweighted with c(t), so the frames
    and their logged bias are needed (a CV log). An error read without a blocking plateau is only a lower
    bound and never counts.
    """

    name = "ErrorBelow"

    def __init__(self, basins, basin: str, reference: str, target, *,
                 max_cost_fraction: float = DEFAULT_MAX_COST_FRACTION):
        from .analysis import Basins

        super().__init__(max_cost_fraction)
        if not isinstance(basins, Basins):
            raise ParameterError(f"basins must be Basins (analysis.basins_from_boxes), got "
                                 f"{type(basins).__name__}")
        for label, value in (("basin", basin), ("reference", reference)):
            if value not in basins.names:
                raise ParameterError(f"{label} {value!r} is not a basin name; names are {basins.names}")
        if basin == reference:
            raise ParameterError(f"basin and reference must differ, got {basin!r} twice")
        self.basins, self.basin, self.reference = basins, basin, reference
        self.target = _in_unit("target", target, "kilojoule_per_mole", "a standard error > 0 (kJ/mol)")
        self.last_error = float("nan")

    def _holds(self, progress):
        from . import analysis

        if progress.frame_cvs is None or progress.frame_bias is None or len(progress.frame_cvs) < 4:
            return None
        weights = analysis.offset_weights(progress.bias, progress.frame_times, frame_bias=progress.frame_bias)
        table = analysis.basin_differences_from_frames(weights, progress.frame_times, progress.frame_cvs,
                                                       self.basins, times=[progress.frame_times[-1]],
                                                       reference=self.reference)
        b = self.basins.names.index(self.basin)
        value, error = table.differences[-1, b], table.errors[-1, b]
        self.last_error = float(error)
        if np.isfinite(error) and table.plateau_found[-1, b] and error <= self.target:
            return (f"{self.basin} - {self.reference} = {value:.3f} +/- {error:.3f} kJ/mol, error within "
                    f"the target {self.target:g} kJ/mol")
        return None

    def describe(self):
        return f"ErrorBelow({self.basin} - {self.reference} <= {self.target:g} kJ/mol)"


class EntersBasin(StopRule):
    """Holds once the CVs first enter a named basin, or any basin other than the one the run started in.

    Parameters
    ----------
    basins : Basins
    name : str, optional
        The basin to reach; default any basin other than the start's (the basin of the first hill, or of
        the first frame).

    Notes
    -----
    For runs that need only the nearest saddle: stop as soon as the system has crossed it. The rule looks
    at every frame (or every hill centre) since its last look, so the stop comes at most one stretch of
    steps after the entry.
    """

    name = "EntersBasin"

    def __init__(self, basins, name: str | None = None):
        from .analysis import Basins

        if not isinstance(basins, Basins):
            raise ParameterError(f"basins must be Basins, got {type(basins).__name__}")
        if name is not None and name not in basins.names:
            raise ParameterError(f"name {name!r} is not a basin name; names are {basins.names}")
        self.basins, self.target = basins, name

    def _holds(self, progress):
        times, cvs = progress.points()
        if len(cvs) == 0:
            return None
        labels = self.basins.assign(cvs)
        start = int(labels[0])
        if self.target is not None:
            wanted = labels == self.basins.names.index(self.target)
        else:
            wanted = (labels >= 0) & (labels != start) if start >= 0 else np.zeros(labels.size, dtype=bool)
        hits = np.flatnonzero(wanted)
        if hits.size == 0:
            return None
        first = int(hits[0])
        where = self.basins.names[int(labels[first])]
        origin = "" if start < 0 else f" (started in {self.basins.names[start]})"
        return f"the CVs entered basin {where} at {times[first]:g} ps{origin}"

    def describe(self):
        return f"EntersBasin({self.target or 'any other'})"


class Referee:
    """Asks the rules after each stretch of steps; with walkers, all decide together.

    Used by the runners (``BiasLink.run_until``, :class:`gridbias.core_run.StoppingRun`, the demo). With a
    bias shared by walkers (``gridbias.walkers.share``) every call is collective: the stretch is the
    shortest any walker asks for, and when the rules hold on any walker, all stop at the same step with
    that walker's decision (the lowest such walker's).

    Parameters
    ----------
    rules : StopRule
    bias : GridBias
    """

    def __init__(self, rules, bias):
        if not isinstance(rules, StopRule):
            raise ParameterError(f"rules must be a StopRule (e.g. Converged() | MaxSteps(n)), got {rules!r}")
        self.rules, self.bias = rules, bias
        self.started = _time.perf_counter()
        self._mark = None  # (perf_counter, step) at the start of the current stretch

    def confirms(self, decision) -> bool:
        """Does a decision read from a checkpoint end the run under these rules?

        Yes when the rule that made it is one of these rules, unless it was a time budget: a job that ran
        out of time continues in the next one. A rule changed since (e.g. a larger MaxSteps) continues.
        With walkers it is collective: the decision stands for all when it stands for any walker.
        """
        mine = False
        if decision is not None and not decision.rule.startswith(TimeBudget.name):
            found, stack = set(), [self.rules]
            while stack:
                rule = stack.pop()
                found.add(rule.describe())
                stack.extend(getattr(rule, "rules", ()))
            mine = decision.rule in found
        comm = self._comm()
        return any(comm.allgather(mine)) if comm is not None else mine

    def _comm(self):
        comm = getattr(self.bias, "comm", None)
        return comm if comm is not None and comm.Get_size() > 1 else None

    def elapsed(self) -> float:
        """Wall-clock seconds since this referee was made."""
        return _time.perf_counter() - self.started

    def stretch(self, progress: Progress, default: int) -> int:
        """Steps to run before the next look (>= 1; the same on every walker)."""
        n = _count("default", default, 1)
        left = self.rules.steps_left(progress)
        if left is not None:
            n = min(n, max(int(left), 1))
        comm = self._comm()
        if comm is not None:
            from mpi4py import MPI

            n = int(comm.allreduce(n, op=MPI.MIN))
        self.restart_clock(progress.step)
        return n

    def restart_clock(self, step) -> None:
        """Measure the cost per step from now (call after the rules' own work, which is not MD time)."""
        self._mark = (_time.perf_counter(), int(step))

    def seconds_per_step(self, step) -> float:
        """Measured wall-clock seconds per step over the last stretch (NaN before one)."""
        if self._mark is None or step <= self._mark[1]:
            return float("nan")
        return (_time.perf_counter() - self._mark[0]) / (step - self._mark[1])

    def decide(self, progress: Progress) -> StopDecision | None:
        """The decision after a stretch, or None to go on (collective with walkers)."""
        reason = self.rules.evaluate(progress)
        held = getattr(self.rules, "held", None) or self.rules
        mine = None if reason is None else StopDecision(held.describe(), reason, progress.step, progress.time)
        comm = self._comm()
        if comm is None:
            return mine
        every = comm.allgather(None if mine is None else mine.to_dict())
        for walker, decision in enumerate(every):
            if decision is not None:
                found = StopDecision.from_dict(decision)
                return StopDecision(found.rule, f"{found.reason} (walker {walker}; all walkers stop)",
                                    found.step, found.time)
        return None
