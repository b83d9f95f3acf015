"""The demo's simulation loop: build the dipeptide, attach the bias, step until done or asked to stop.

Interrupting (Ctrl-C, SIGTERM) writes the checkpoint and stops; the next call continues from it.
"""

from __future__ import annotations

import math
import os
import signal
import time

import numpy as np

from .._files import fsync_path
from ..errors import CheckpointError
from .settings import CHECKPOINT, FRAMES, START, SUBFOLDERS

__all__ = ["simulate", "say"]


def say(stream, text=""):
    """Write one line to ``stream`` and flush it."""
    stream.write(text + "\n")
    stream.flush()


class _StopRequest:
    """SIGINT/SIGTERM handler: the first signal asks the loop to stop at the next chunk; a second one
    stops at once (KeyboardInterrupt)."""

    def __init__(self):
        self.asked = False
        self._previous = {}

    def __enter__(self):
        for sig in (signal.SIGINT, signal.SIGTERM):
            try:
                self._previous[sig] = signal.signal(sig, self._handle)
            except ValueError:  # not the main thread: signals stay as they are
                pass
        return self

    def _handle(self, signum, frame):
        if self.asked:
            raise KeyboardInterrupt
        self.asked = True

    def __exit__(self, *exc):
        for sig, handler in self._previous.items():
            signal.signal(sig, handler)


# ---------------------------------------------------------------------------------------------- the run
def _choose_platform(requested, system, positions, stream, checkpoint_platform, probe, stride):
    from .dipeptide import fastest_platform

    if requested != "auto":
        return requested
    if checkpoint_platform is not None:
        say(stream, f"platform: {checkpoint_platform} (the one the checkpoint was written on, so the run "
                     "continues bit for bit)")
        return checkpoint_platform
    name, rates = fastest_platform(system, positions, seconds=0.5, attach=probe, stride=stride)
    timed = ", ".join(f"{p} {r:,.0f} steps/s" for p, r in sorted(rates.items(), key=lambda x: -x[1]))
    say(stream, f"platform: {name} (timed with the bias attached and depositing: {timed})")
    return name


def _status_line(settings, step, bias, since, mode_name):
    """The progress line; ``since`` is (step, monotonic time) the speed is measured from, or None."""
    from .dipeptide import TIMESTEP

    ns = step * TIMESTEP / 1000.0
    total_ns = settings.n_steps * TIMESTEP / 1000.0
    recent = np.asarray(bias.history.heights[-10:])  # one hill's height depends on where the CV happens to be
    # two significant digits: a well-tempered run's hills fall below 1 % of the initial height
    height = f"{recent.mean():.3g} kJ/mol ({100 * recent.mean() / bias.height:.2g}% of the first)" \
        if recent.size else "-"
    # speed and time left from the steps since the first stretch: start-up (compiling, the first force
    # evaluations) would make the first estimate far too long
    rate = math.nan
    if since is not None:
        done, elapsed = step - since[0], time.monotonic() - since[1]
        rate = done / elapsed if elapsed > 0 and done > 0 else math.nan
    left = (settings.n_steps - step) / rate if rate > 0 else math.nan
    from ..progress import format_duration

    speed = f"{rate * TIMESTEP * 86400 / 1000:,.0f} ns/day" if math.isfinite(rate) else "measuring speed"
    if settings.until_converged:
        total = f"until converged, at most {total_ns:g}"
        eta = f"at most {format_duration(left)} left" if math.isfinite(left) else "time left: measuring"
    else:
        total = f"{total_ns:g}"
        eta = f"{format_duration(left)} left" if math.isfinite(left) else "time left: measuring"
    return f"{mode_name}: {ns:6.3f} / {total} ns | {bias.n_hills:,} hills | height {height} | {speed} | {eta}"


def simulate(folder, settings, stream, progress) -> tuple[bool, int, dict]:
    """Run (or continue) the simulation up to ``settings.n_steps``; return (completed, step, info)."""
    from .. import openmm as gbo
    from ..runs import load_run
    from .dipeptide import backbone_dihedral_atoms, build_dipeptide, make_simulation, minimize, write_pdb

    checkpoint = os.path.join(folder, CHECKPOINT)
    frames = os.path.join(folder, FRAMES)
    previous = load_run(checkpoint) if os.path.exists(checkpoint) else None
    if previous is not None and previous.step is not None and previous.step >= settings.n_steps:
        say(stream, f"the run in {folder} already reached {previous.time / 1000:g} ns (asked: "
                     f"{settings.length_ns:g} ns); analysing it again")
        return True, previous.step, {"platform": previous.platform, "steps_per_second": math.nan}
    recorded = _recorded_decision(checkpoint, settings) if previous is not None else None
    if recorded is not None:
        say(stream, f"the run in {folder} has already stopped ({recorded}); analysing it again")
        return True, previous.step, {"platform": previous.platform, "steps_per_second": math.nan,
                                     "decision": str(recorded)}
    if previous is None and os.path.exists(frames):
        os.unlink(frames)  # frames of a run that never reached its first checkpoint

    topology, positions, system = build_dipeptide()
    positions, _ = minimize(system, positions)
    phi_atoms, psi_atoms = backbone_dihedral_atoms(topology)
    cvs = [gbo.dihedral(*phi_atoms, name="phi")]
    if settings.mode == "2d":
        cvs.append(gbo.dihedral(*psi_atoms, name="psi"))
    d = len(cvs)
    bias = gbo.make_bias(cvs, lower=[-math.pi] * d, upper=[math.pi] * d, bins=[settings.bins] * d,
                         sigma=[settings.sigma] * d, height=settings.height, temperature=settings.temperature,
                         bias_factor=settings.bias_factor)
    def probe(system_copy, name):  # what each platform would run: its route, a copy of the bias
        return gbo.attach(system_copy, cvs, bias.copy(), platform=name)

    platform = _choose_platform(settings.platform, system, positions, stream,
                                None if previous is None else previous.platform, probe, settings.stride)
    # attach picks the route for the platform (gridbias.openmm.routes; bench/README.md, "OpenMM adapter").
    link = gbo.attach(system, cvs, bias, platform=platform)
    simulation = make_simulation(topology, system, positions, temperature=settings.temperature,
                                 platform=platform, seed=settings.seed)
    write_pdb(os.path.join(folder, START), topology, positions)  # after the checks that may refuse the run
    # Reweight mode: psi is not biased but logged beside phi at every record, for reweighting afterwards.
    observables = [gbo.dihedral(*psi_atoms, name="psi")] if settings.mode == "reweight" else []
    reporter = link.reporter(settings.stride, checkpoint=checkpoint,
                             checkpoint_every=settings.checkpoint_every, log=frames, observables=observables)
    simulation.reporters.append(reporter)
    try:
        if previous is not None:
            try:
                restored = link.restore(simulation, checkpoint)
            except CheckpointError as exc:
                raise CheckpointError(f"{exc}; the checkpoint was written with other demo settings: start "
                                      f"again with --fresh, or use another --out folder") from exc
            say(stream, f"continuing from {checkpoint} at {restored.time / 1000:g} ns "
                         f"({link.bias.n_hills:,} hills)")
        return _advance(simulation, link, reporter, checkpoint, settings, stream, progress, platform)
    finally:
        reporter.close()


#: Share of the demo's wall-clock time its convergence checks may take. A check replays the hills and
#: reweights every frame (about 2.5 s at 5 ns here), while this tiny molecule runs 5 ns in a minute: at the
#: library's default 1 % the demo would look about twice per run and stop long after the verdict holds.
DEMO_CHECK_FRACTION = 0.1


def _rules(settings):
    """The demo's stop rules: its length, and with ``until_converged`` the convergence verdict."""
    from ..stopping import Converged, MaxSteps

    rules = MaxSteps(settings.n_steps)
    return Converged(max_cost_fraction=DEMO_CHECK_FRACTION) | rules if settings.until_converged else rules


def _recorded_decision(checkpoint, settings):
    """The stop decision in the checkpoint if it still ends the run under these settings, else None."""
    from ..runs import read_run_checkpoint
    from ..stopping import Referee, StopDecision

    saved = read_run_checkpoint(checkpoint)
    decision = None if saved.stop is None else StopDecision.from_dict(saved.stop)
    return decision if Referee(_rules(settings), None).confirms(decision) else None


def _frames(path, labels, writer_owner):
    """A callable reading (times, cvs, bias) of every frame in the demo's CV log, for the stop rules."""

    def load():
        from ..cvlog import read_cvlog

        if writer_owner._writer is not None:
            writer_owner._writer.flush()
        if not os.path.exists(path):
            return None
        frames = read_cvlog(path)
        if frames.n_records == 0:
            return None
        cvs = np.column_stack([frames.column(c) for c in labels])
        return frames.column("time"), cvs, frames.column("bias")

    return load


def _advance(simulation, link, reporter, checkpoint, settings, stream, progress, platform):
    """Step in chunks until a stop rule holds or a stop is requested; write the checkpoint at the end."""
    from ..openmm._units import in_md_units
    from ..stopping import Progress, Referee

    mode_name = SUBFOLDERS[settings.mode]
    chunk = settings.stride * 20
    started_step = simulation.currentStep
    started = time.monotonic()
    since = None  # speed measured from the end of the first stretch, past the start-up costs
    referee = Referee(_rules(settings), link.bias)
    frames_path = os.path.join(os.path.dirname(checkpoint), FRAMES)
    decision = None

    def look(loader=None):
        step = simulation.currentStep
        now = float(in_md_units(simulation.context.getState().getTime()))
        return Progress(step, now, link.bias, referee.elapsed(), referee.seconds_per_step(step), loader)

    with _StopRequest() as stop:
        while decision is None and not stop.asked:
            simulation.step(referee.stretch(look(), chunk))
            decision = referee.decide(look(_frames(frames_path, link.labels(), reporter)))
            referee.restart_clock(simulation.currentStep)
            progress.update(_status_line(settings, simulation.currentStep, link.bias, since, mode_name))
            if since is None:
                since = (simulation.currentStep, time.monotonic())
        line = _status_line(settings, simulation.currentStep, link.bias, since, mode_name)
        # The frames logged so far reach the disk before the checkpoint that matches them (as the
        # adapter's reporter does before each of its checkpoints); the reporter keeps the checkpoint
        # locked until the final one is written.
        fsync_path(frames_path)
        link.save(simulation, checkpoint, stop=None if decision is None else decision.to_dict())
        reporter.close()
    progress.finish(line)
    elapsed = time.monotonic() - started
    done = simulation.currentStep - started_step
    info = {"platform": platform, "steps_per_second": done / elapsed if elapsed > 0 else math.nan,
            "wall_seconds": elapsed, "decision": None if decision is None else str(decision)}
    if stop.asked:
        say(stream, f"stopped at step {simulation.currentStep:,}; the checkpoint {checkpoint} is written. "
                     "Run the same command again to continue.")
        return False, simulation.currentStep, info
    return True, simulation.currentStep, info
