"""Running an OpenMM simulation until a stop rule holds (``BiasLink.run_until``)."""

from __future__ import annotations

import os

import numpy as np

from ..errors import ParameterError
from ..stopping import Progress, Referee, StopDecision
from ._units import in_md_units

__all__ = ["run_until", "DEFAULT_STRETCH_DEPOSITS"]

#: Deposits between two looks at the rules when no stretch is given: short enough that a basin entry or
#: the end of a time budget is seen soon, long enough that ``simulation.step`` calls cost nothing.
DEFAULT_STRETCH_DEPOSITS = 10


def _reporter_of(link, simulation):
    mine = [r for r in simulation.reporters if r in set(link._reporters) and r.checkpoint is not None]
    if len(mine) != 1:
        raise ParameterError("run_until needs exactly one reporter of this link with a checkpoint in "
                             "simulation.reporters: simulation.reporters.append(link.reporter(stride, "
                             f"checkpoint=..., checkpoint_every=..., log=...)); found {len(mine)}")
    return mine[0]


def _frames_loader(link, reporter):
    """A callable giving (times, cvs, frame bias) of the whole run from the reporter's CV log, or None."""
    if reporter.log is None:
        return None

    def load():
        from ..cvlog import read_cvlog

        if reporter._writer is not None:
            reporter._writer.flush()
        if not os.path.exists(reporter.log):
            return None
        log = read_cvlog(reporter.log)
        if log.n_records == 0:
            return None
        cvs = np.column_stack([log.column(label) for label in link.labels()])
        return log.column("time"), cvs, log.column("bias")

    return load


def run_until(link, simulation, rules, *, stretch: int | None = None) -> StopDecision:
    """Step ``simulation`` until ``rules`` hold; write the final checkpoint with the decision.

    Parameters
    ----------
    link : BiasLink
    simulation : openmm.app.Simulation
        With ``link``'s reporter (checkpoint, and a CV log for Converged, ErrorBelow and EntersBasin on
        frames; without a log they use the hill centres) among its reporters.
    rules : gridbias.stopping.StopRule
    stretch : int, keyword-only, optional
        Steps between looks at the rules (default 10 deposit strides; rules may ask for fewer).

    Returns
    -------
    StopDecision
        Also recorded in the checkpoint (``RunCheckpoint.stop``), where a second call finds it.
    """
    referee = Referee(rules, link.bias)
    reporter = _reporter_of(link, simulation)
    default = DEFAULT_STRETCH_DEPOSITS * reporter.stride if stretch is None else stretch
    if isinstance(default, bool) or not isinstance(default, (int, np.integer)) or default < 1:
        raise ParameterError(f"stretch must be an integer number of steps >= 1, got {stretch!r}")
    if reporter._restored_step is None and os.path.exists(reporter.checkpoint):
        link.restore(simulation, reporter.checkpoint)
    recorded = None if link.restored_stop is None else StopDecision.from_dict(link.restored_stop)
    if reporter._restored_step is not None and referee.confirms(recorded):
        return recorded
    loader = _frames_loader(link, reporter)

    def progress(frames=None):
        state = simulation.context.getState()
        step = simulation.currentStep
        return Progress(step, float(in_md_units(state.getTime())), link.bias,
                        referee.elapsed(), referee.seconds_per_step(step), frames)

    while True:
        simulation.step(referee.stretch(progress(), int(default)))
        decision = referee.decide(progress(loader))
        if decision is not None:
            if reporter._writer is not None:
                reporter._writer.flush()
            link.save(simulation, reporter.checkpoint, stop=decision.to_dict())
            reporter.last_checkpoint_step = simulation.currentStep
            link.restored_stop = decision.to_dict()
            return decision
        referee.restart_clock(simulation.currentStep)
