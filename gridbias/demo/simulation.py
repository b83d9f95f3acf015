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


def _choose_platform(requested, system, positions, stream, checkpoint_platform):
    from .dipeptide import fastest_platform

    if requested != "auto":
        return requested
    if checkpoint_platform is not None:
        say(stream, f"platform: {checkpoint_platform} (the one the checkpoint was written on, so the run "
                     "continues bit for bit)")
        return checkpoint_platform
    name, rates = fastest_platform(system, positions, seconds=0.5)
    timed = ", ".join(f"{p} {r:,.0f} steps/s" for p, r in sorted(rates.items(), key=lambda x: -x[1]))
    say(stream, f"platform: {name} (timed: {timed})")
    return name


def _status_line(settings, step, bias, started_step, started, mode_name):
    from .dipeptide import TIMESTEP

    ns = step * TIMESTEP / 1000.0
    total_ns = settings.n_steps * TIMESTEP / 1000.0
    recent = np.asarray(bias.history.heights[-10:])  # one hill's height depends on where the CV happens to be
    height = f"{recent.mean():.3g} kJ/mol ({100 * recent.mean() / bias.height:.0f}%)" if recent.size else "-"
    elapsed = time.monotonic() - started
    done = step - started_step
    rate = done / elapsed if elapsed > 0 and done > 0 else math.nan
    eta = (settings.n_steps - step) / rate if rate > 0 else math.nan
    from ..progress import format_duration

    speed = f"{rate * TIMESTEP * 86400 / 1000:,.0f} ns/day" if math.isfinite(rate) else "-"
    return (f"{mode_name}: {ns:6.3f} / {total_ns:g} ns | {bias.n_hills:,} hills | height {height} | "
            f"{speed} | ETA {format_duration(eta)}")


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
    if previous is None and os.path.exists(frames):
        os.unlink(frames)  # frames of a run that never reached its first checkpoint

    topology, positions, system = build_dipeptide()
    positions, _ = minimize(system, positions)
    write_pdb(os.path.join(folder, START), topology, positions)
    phi_atoms, psi_atoms = backbone_dihedral_atoms(topology)
    cvs = [gbo.dihedral(*phi_atoms, name="phi")]
    if settings.mode == "2d":
        cvs.append(gbo.dihedral(*psi_atoms, name="psi"))
    d = len(cvs)
    bias = gbo.make_bias(cvs, lower=[-math.pi] * d, upper=[math.pi] * d, bins=[settings.bins] * d,
                         sigma=[settings.sigma] * d, height=settings.height, temperature=settings.temperature,
                         bias_factor=settings.bias_factor)
    platform = _choose_platform(settings.platform, system, positions, stream,
                                None if previous is None else previous.platform)
    # On the Reference platform (the fastest for 22 atoms) the CustomCVForce route is cheaper per step and per
    # table push than the compound route (bench/README.md, "OpenMM adapter"); elsewhere the compound route is.
    link = gbo.attach(system, cvs, bias, route="cvforce" if platform == "Reference" else "compound")
    simulation = make_simulation(topology, system, positions, temperature=settings.temperature,
                                 platform=platform, seed=settings.seed)
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


def _advance(simulation, link, reporter, checkpoint, settings, stream, progress, platform):
    """Step in chunks until the target step or a stop request; write the checkpoint at the end."""
    mode_name = SUBFOLDERS[settings.mode]
    chunk = settings.stride * 20
    started_step = simulation.currentStep
    started = time.monotonic()
    with _StopRequest() as stop:
        while simulation.currentStep < settings.n_steps and not stop.asked:
            simulation.step(min(chunk, settings.n_steps - simulation.currentStep))
            progress.update(_status_line(settings, simulation.currentStep, link.bias, started_step, started,
                                         mode_name))
        line = _status_line(settings, simulation.currentStep, link.bias, started_step, started, mode_name)
        # The frames logged so far reach the disk before the checkpoint that matches them (as the
        # adapter's reporter does before each of its checkpoints); the reporter keeps the checkpoint
        # locked until the final one is written.
        fsync_path(os.path.join(os.path.dirname(checkpoint), FRAMES))
        link.save(simulation, checkpoint)
        reporter.close()
    progress.finish(line)
    elapsed = time.monotonic() - started
    done = simulation.currentStep - started_step
    info = {"platform": platform, "steps_per_second": done / elapsed if elapsed > 0 else math.nan,
            "wall_seconds": elapsed}
    if stop.asked:
        say(stream, f"stopped at step {simulation.currentStep:,}; the checkpoint {checkpoint} is written. "
                     "Run the same command again to continue.")
        return False, simulation.currentStep, info
    return True, simulation.currentStep, info
