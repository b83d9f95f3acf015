"""The demo runner: well-tempered metadynamics of the alanine dipeptide in vacuum, from start to report.

``gridbias demo`` calls :func:`run_demo`. Two modes:

- ``"2d"`` biases both backbone dihedrals (phi, psi) and reports the free-energy surface, its basins,
  the free-energy differences between them with errors, and the convergence verdict;
- ``"reweight"`` biases phi only, logs psi as an unbiased observable, and recovers the free energy along
  psi by reweighting the logged frames (time-independent offset c(t)), compared with the 2d run's surface
  when that run is in the same results folder.

Each mode works in its own subfolder of the results folder and can be interrupted at any moment (Ctrl-C
or SIGTERM): the runner writes a checkpoint and stops; running it again continues from the checkpoint.
A finished run is analysed again, not rerun.

The run parameters and why (the molecule is described in :mod:`gridbias.demo.dipeptide`):

- 300 K: room temperature, the usual reference temperature for this molecule.
- Hill width 0.35 rad (20 deg) on each dihedral: below the spread of phi in the phi < 0 region (a 30 deg
  standard deviation in an unbiased 1 ns run started in C7eq, measured here), so hills resolve the shape
  of the basins; a width near or a bit below the CV's spread within a basin is common practice.
- Initial height 1.5 kJ/mol (0.6 kBT) every 250 steps (0.5 ps): hills of 0.5-1 kBT every 0.5-1 ps are
  common practice for a molecule this small.
- Bias factor 6: well-tempered metadynamics samples the CVs as exp(-F / (gamma kBT)) (Barducci, Bussi &
  Parrinello, PRL 100, 020603, 2008), so the phi barrier between C7eq and C7ax (about 38 kJ/mol, 15 kBT,
  in this demo's own F(phi); 30-40 kJ/mol from memory in REFERENCES) becomes about 2.5 kBT and is
  crossed hundreds of times, while regions far above the barriers are not filled for nothing.
- Grid: 96 bins per period (3.75 deg), a third of the hill width or finer (common practice).
- Length: 10 ns in each mode, 2 ns with ``quick``. Measured on this 2-core machine (Reference platform,
  which is about 10x faster than the CPU platform for 22 atoms): 25,000-30,000 steps/s with the bias
  work included when the machine is otherwise idle, so about 3 minutes (quick: 40 s); about 4.5 minutes
  (quick: 1.5 minutes) while other jobs share the cores. The 10 ns run passes the convergence criteria
  with margin (hill heights near 3% of the initial against the 5% threshold, basin differences drifting
  by about 0.25 kBT against 0.5); the quick run usually does not, and its report says so.

Cautions (repeated in every report): the surface depends on the CV choice (here phi and psi, known to
describe this molecule's slow motions in vacuum well; a poor CV causes hysteresis and overfilling), on
convergence and sampling time, and on the force field (ff14SB in vacuum, fitted for use with water).
Results need validation before they are relied on.
"""

from __future__ import annotations

import math
import os
import signal
import sys
import time
from dataclasses import dataclass, replace

import numpy as np

from .._files import CheckpointLock, fsync_path
from ..errors import CheckpointError, LockError, ParameterError

__all__ = ["DemoSettings", "DemoResult", "run_demo", "CONFORMERS", "SUBFOLDERS", "FULL_LENGTH_NS",
           "QUICK_LENGTH_NS"]

#: Simulated time of a full run and of a quick one, ns (see the module docstring for the timing).
FULL_LENGTH_NS = 10.0
QUICK_LENGTH_NS = 2.0

#: Subfolder of the results folder each mode works in.
SUBFOLDERS = {"2d": "phi-psi", "reweight": "phi-only"}

#: Potential-energy minima (phi, psi) in degrees of this force field (amber14/ff14SB, vacuum), found with
#: OpenMM's minimiser from the three classic starting conformations; used to name the basins found.
#: tests/test_demo_run.py recomputes them.
CONFORMERS = {"C7eq": (-75.0, 54.0), "C5": (-152.0, 160.0), "C7ax": (61.0, -41.0)}

# Files the runner writes (and --fresh removes); nothing else in the folder is touched.
CHECKPOINT = "run.gbz"
FRAMES = "frames.gbl"
START = "start.pdb"
REPORT = "report.txt"
SURFACE = ("surface.npz", "surface.csv", "surface.png")
CONVERGENCE = "convergence.png"
PSI_PROFILE = ("psi-reweighted.npz", "psi-reweighted.csv")
PSI_COMPARISON = "psi-comparison.png"
_OWN_FILES = (CHECKPOINT, FRAMES, START, REPORT, *SURFACE, CONVERGENCE, *PSI_PROFILE, PSI_COMPARISON)


@dataclass(frozen=True)
class DemoSettings:
    """What the demo runs. The bias parameters are fixed: a checkpoint refuses to continue under others.

    Attributes
    ----------
    mode : {"2d", "reweight"}
    length_ns : float
        Simulated time to reach, ns.
    platform : str
        "auto" (time the available platforms, take the fastest) or an OpenMM platform name.
    seed : int
        Seeds the starting velocities and the thermostat's random forces.
    temperature : float, K
    height : float, kJ/mol
        Initial hill height.
    sigma : float, rad
    bias_factor : float
    bins : int
        Grid intervals per dihedral.
    stride : int
        Steps between hills (and between logged frames).
    checkpoint_every : int
        Steps between checkpoints.
    """

    mode: str = "2d"
    length_ns: float = FULL_LENGTH_NS
    platform: str = "auto"
    seed: int = 2024
    temperature: float = 300.0
    height: float = 1.5
    sigma: float = 0.35
    bias_factor: float = 6.0
    bins: int = 96
    stride: int = 250
    checkpoint_every: int = 50_000

    def __post_init__(self):
        if self.mode not in SUBFOLDERS:
            raise ParameterError(f"mode must be one of {tuple(SUBFOLDERS)}, got {self.mode!r}")
        if not (isinstance(self.length_ns, (int, float)) and math.isfinite(self.length_ns)
                and self.length_ns > 0):
            raise ParameterError(f"length_ns must be a positive number of ns, got {self.length_ns!r}")

    @classmethod
    def from_options(cls, *, mode="2d", quick=False, length_ns=None, platform="auto", seed=2024):
        """Settings from the command's options; ``length_ns`` overrides ``quick``."""
        if length_ns is None:
            length_ns = QUICK_LENGTH_NS if quick else FULL_LENGTH_NS
        return cls(mode=mode, length_ns=float(length_ns), platform=platform, seed=int(seed))

    @property
    def n_steps(self) -> int:
        """Steps to reach ``length_ns`` (at least one stride)."""
        from .dipeptide import TIMESTEP

        return max(self.stride, int(round(self.length_ns * 1000.0 / TIMESTEP)))

    @property
    def biased(self) -> tuple:
        """Names of the biased dihedrals."""
        return ("phi", "psi") if self.mode == "2d" else ("phi",)


@dataclass(frozen=True)
class DemoResult:
    """What a call of :func:`run_demo` did.

    Attributes
    ----------
    folder : str
        The mode's results folder.
    completed : bool
        False when the run was interrupted (a checkpoint was written; call again to continue).
    step : int
        MD step reached.
    report : str
        The text report (empty when interrupted).
    files : tuple of str
        Files written by the analysis.
    """

    folder: str
    completed: bool
    step: int
    report: str
    files: tuple


# ------------------------------------------------------------------------------------------------ helpers
def _say(stream, text=""):
    stream.write(text + "\n")
    stream.flush()


def _remove_own_files(folder):
    for name in _OWN_FILES:
        path = os.path.join(folder, name)
        if os.path.isfile(path):
            os.unlink(path)


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


class _FrameLog:
    """An OpenMM reporter that logs step, time, phi, psi and the bias the frame felt (reweight mode).

    The adapter's own log holds the biased CVs only; here psi is not biased but is needed per frame, so
    the demo writes a log of the same layout with psi added. It must come before the bias reporter in
    ``simulation.reporters``, so that at a deposit step it logs the bias in effect before the deposit.
    """

    def __init__(self, path, link, quads, every):
        from ..cvlog import CVLogWriter

        self._link = link
        self._quads = np.asarray(quads)
        self._every = every
        metadata = {"cvs": link.describe_cvs(), "grid": link.bias.grid.to_dict(),
                    "temperature": link.bias.temperature, "bias_factor": link.bias.bias_factor,
                    "stride": every,
                    "observables": [{"name": "psi", "kind": "dihedral", "atoms": [int(a) for a in quads[1]]}]}
        self._writer = CVLogWriter(path, ["step", "time", "phi", "psi", "bias"],
                                   ["1", "ps", "rad", "rad", "kJ/mol"], metadata)

    def describeNextReport(self, simulation):
        steps = self._every - simulation.currentStep % self._every
        return {"steps": steps, "periodic": False, "include": ["positions"]}

    def report(self, simulation, state):
        from ..openmm._units import in_md_units
        from .dipeptide import dihedral_angles

        phi, psi = dihedral_angles(in_md_units(state.getPositions(asNumpy=True)), self._quads)
        energy, _ = self._link.bias.evaluate([phi])
        self._writer.write([float(simulation.currentStep), float(in_md_units(state.getTime())), phi, psi,
                            energy])

    def restored(self, step):
        self._writer.truncate_after(step)

    def close(self):
        self._writer.close()


# ---------------------------------------------------------------------------------------------- the run
def _choose_platform(requested, system, positions, stream, checkpoint_platform):
    from .dipeptide import fastest_platform

    if requested != "auto":
        return requested
    if checkpoint_platform is not None:
        _say(stream, f"platform: {checkpoint_platform} (the one the checkpoint was written on, so the run "
                     "continues bit for bit)")
        return checkpoint_platform
    name, rates = fastest_platform(system, positions, seconds=0.5)
    timed = ", ".join(f"{p} {r:,.0f} steps/s" for p, r in sorted(rates.items(), key=lambda x: -x[1]))
    _say(stream, f"platform: {name} (timed: {timed})")
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
    from ..cli import format_duration

    speed = f"{rate * TIMESTEP * 86400 / 1000:,.0f} ns/day" if math.isfinite(rate) else "-"
    return (f"{mode_name}: {ns:6.3f} / {total_ns:g} ns | {bias.n_hills:,} hills | height {height} | "
            f"{speed} | ETA {format_duration(eta)}")


def _simulate(folder, settings, stream, progress) -> tuple[bool, int, dict]:
    """Run (or continue) the simulation up to ``settings.n_steps``; return (completed, step, info)."""
    from .. import openmm as gbo
    from ..cli import load_run
    from .dipeptide import backbone_dihedral_atoms, build_dipeptide, make_simulation, minimize, write_pdb

    checkpoint = os.path.join(folder, CHECKPOINT)
    frames = os.path.join(folder, FRAMES)
    previous = load_run(checkpoint) if os.path.exists(checkpoint) else None
    if previous is not None and previous.step is not None and previous.step >= settings.n_steps:
        _say(stream, f"the run in {folder} already reached {previous.time_ps / 1000:g} ns (asked: "
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
    frame_log = None
    if settings.mode == "reweight":
        frame_log = _FrameLog(frames, link, (phi_atoms, psi_atoms), settings.stride)
        simulation.reporters.append(frame_log)
    reporter = link.reporter(settings.stride, checkpoint=checkpoint,
                             checkpoint_every=settings.checkpoint_every,
                             log=None if frame_log is not None else frames)
    simulation.reporters.append(reporter)
    try:
        if previous is not None:
            try:
                meta = link.restore(simulation, checkpoint)
            except CheckpointError as exc:
                raise CheckpointError(f"{exc}; the checkpoint was written with other demo settings: start "
                                      f"again with --fresh, or use another --out folder") from exc
            if frame_log is not None:
                frame_log.restored(int(meta["step"]))
            _say(stream, f"continuing from {checkpoint} at {meta['time_ps'] / 1000:g} ns "
                         f"({link.bias.n_hills:,} hills)")
        return _advance(simulation, link, reporter, frame_log, checkpoint, settings, stream, progress,
                        platform)
    finally:
        reporter.close()
        if frame_log is not None:
            frame_log.close()


def _advance(simulation, link, reporter, frame_log, checkpoint, settings, stream, progress, platform):
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
        if frame_log is not None:
            frame_log.close()
    progress.finish(line)
    elapsed = time.monotonic() - started
    done = simulation.currentStep - started_step
    info = {"platform": platform, "steps_per_second": done / elapsed if elapsed > 0 else math.nan,
            "wall_seconds": elapsed}
    if stop.asked:
        _say(stream, f"stopped at step {simulation.currentStep:,}; the checkpoint {checkpoint} is written. "
                     "Run the same command again to continue.")
        return False, simulation.currentStep, info
    return True, simulation.currentStep, info


# ---------------------------------------------------------------------------------------------- analysis
_CAUTIONS = (
    "What these numbers depend on:",
    "- The CVs. phi and psi describe this molecule's slow conformational motions in vacuum well; in other "
    "systems a slow motion left out of the CVs shows up as hysteresis, overfilling and differences that "
    "drift instead of settling.",
    "- Convergence. The verdict's criteria are necessary, not sufficient: repeat the run with other seeds, "
    "hill widths and bias factors before trusting a number.",
    "- Sampling time. The error bars are block-analysis errors of one run; they assume the run is long "
    "compared with the time between transitions, and they shrink only as the run grows.",
    "- The force field. amber14 (ff14SB) in vacuum, a force field fitted for use with water: these are free "
    "energies of the model molecule in vacuum, not of the dipeptide in solution.",
    "Results need validation before they are relied on.",
)


def _conformers_in(basins) -> list:
    """For each basin, the named conformers whose (phi[, psi]) lies in its catchment."""
    d = basins.grid.ndim
    points = np.radians([ref[:d] for ref in CONFORMERS.values()])
    where = basins.assign(points)
    return [[name for name, b in zip(CONFORMERS, where, strict=True) if b == k]
            for k in range(basins.n_basins)]


def _basin_of(conformers, name) -> int | None:
    for k, names in enumerate(conformers):
        if name in names:
            return k
    return None


def _pm(value, error, kT) -> str:
    if not np.isfinite(value):
        return "not visited"
    if error is None or not np.isfinite(error):
        return f"{value:6.2f} kJ/mol ({value / kT:5.2f} kBT)"
    return f"{value:6.2f} +/- {error:4.2f} kJ/mol ({value / kT:5.2f} +/- {error / kT:4.2f} kBT)"


def _psi_from_surface(folder_2d, edges, kT):
    """F(psi) from the 2d run's final surface, averaged into the given psi bins; None without that run."""
    from .. import analysis
    from ..cli import load_run

    path = os.path.join(folder_2d, CHECKPOINT)
    if not os.path.exists(path):
        return None, path
    run = load_run(path)
    fes = analysis.surface_at(run.bias).free_energy  # (phi, psi) nodes
    grid = run.bias.grid
    # marginal over phi (periodic: every node counts fully), then the Boltzmann average over the psi nodes in
    # each bin: F_bin = -kT ln mean_{nodes in bin} exp(-F(psi)/kT)
    f_psi = -kT * np.log(np.exp(-(fes - fes.min()) / kT).sum(axis=0))
    psi = grid.axes[1]
    bins = np.searchsorted(edges, psi, side="right") - 1
    out = np.full(edges.size - 1, np.nan)
    for j in range(edges.size - 1):
        inside = bins == j
        if inside.any():
            out[j] = -kT * np.log(np.mean(np.exp(-f_psi[inside] / kT)))
    return out - np.nanmin(out), path


#: Bins compared between the reweighted F(psi) and the 2d run's: below this free energy in the 2d run (the
#: threshold of the analytic reweighting checks) and visited by at least this many frames of the phi-only
#: run. psi is not biased there, so its barrier region is visited only a handful of times in 10 ns and
#: those bins are noise, not a test of the method.
COMPARE_BELOW_KT = 8.0
COMPARE_MIN_FRAMES = 20


def _compare_profiles(reweighted, counts, reference, kT):
    """Compare the reweighted profile with the reference on the same bins (see COMPARE_BELOW_KT).

    Their zeros are arbitrary, so the reference is first shifted by the Boltzmann-weighted (weights
    exp(-F_ref/kT)) mean difference over the compared bins. Returns (shift, rmsd, max |difference|, bins
    compared), kJ/mol.
    """
    keep = (np.isfinite(reweighted) & np.isfinite(reference) & (reference < COMPARE_BELOW_KT * kT)
            & (counts >= COMPARE_MIN_FRAMES))
    if keep.sum() < 3:
        return 0.0, math.nan, math.nan, int(keep.sum())
    w = np.exp(-reference[keep] / kT)
    diff = reweighted[keep] - reference[keep]
    shift = float(np.sum(w * diff) / np.sum(w))
    diff = diff - shift
    return shift, float(np.sqrt(np.mean(diff ** 2))), float(np.max(np.abs(diff))), int(keep.sum())


_MAX_DOTS = 5000  # frames drawn per CV panel: more only blacken the panel


def _convergence_figure(plots, differences, bias, t, cvs, names, window_fraction, max_fraction):
    """Basin differences against time, hill heights, and each biased CV along the run, one panel each."""
    d = cvs.shape[1]
    figure, axes = plots.new_figure(2 + d, 1, width=7.0, height=6.4 + 2.0 * d)
    plots.plot_basin_differences(differences, ax=axes[0], window_fraction=window_fraction)
    # The first hills make the estimates jump; scale the axis to the rest of the run.
    late = np.concatenate([s.differences[s.times >= 0.1 * s.times[-1]].ravel() for s in differences])
    late = late[np.isfinite(late)]
    if late.size:
        margin = max(0.15 * (late.max() - late.min()), bias.kT)
        axes[0].set_ylim(min(late.min(), 0.0) - margin, late.max() + 3 * margin)
    axes[0].legend(frameon=False, ncols=2, loc="upper right", fontsize="small")
    axes[0].set_title("basin free-energy differences (the bias estimate, and reweighted frames with errors)",
                      loc="left", fontsize="medium")
    times, heights = np.asarray(bias.history.times), np.asarray(bias.history.heights)
    step = max(1, times.size // _MAX_DOTS)
    plots.plot_hill_heights(times[::step], heights[::step], ax=axes[1], initial_height=bias.height,
                            max_fraction=max_fraction)
    axes[1].legend(frameon=True, framealpha=1.0, edgecolor="none", loc="upper right", fontsize="small")
    axes[1].set_title("hill heights" + (f" (every {step}th hill)" if step > 1 else ""), loc="left",
                      fontsize="medium")
    every = max(1, t.size // _MAX_DOTS)
    for i in range(d):
        plots.plot_cv_timeseries(t[::every], cvs[::every, i], ax=axes[2 + i], names=[names[i]],
                                 angular=[True], angle_unit="deg")
        axes[2 + i].set_ylim(-180, 180)
        axes[2 + i].set_yticks([-180, -90, 0, 90, 180])
    axes[2].set_title("biased CVs along the run" + (f" (every {every}th frame)" if every > 1 else ""),
                      loc="left", fontsize="medium")
    return figure


def _analyse(folder, settings, info, progress):
    """Surface, basins, differences with errors, verdict, figures and the report; returns (text, files)."""
    from .. import analysis
    from ..analysis.convergence import DEFAULT_MAX_HEIGHT_FRACTION, DEFAULT_WINDOW_FRACTION
    from ..cli import (
        load_run,
        profile_bytes,
        read_log,
        require_plots,
        run_frames,
        shown_profile,
        surface_bytes,
        write_atomically,
    )
    from .dipeptide import TIMESTEP

    started = time.monotonic()
    run = load_run(os.path.join(folder, CHECKPOINT))
    bias = run.bias
    kT = bias.kT
    log = read_log(os.path.join(folder, FRAMES))
    t, cvs, logged_bias, _ = run_frames(run, log)
    surface = analysis.surface_at(bias)
    basins = analysis.find_basins(bias.grid, surface.free_energy, kT)
    conformers = _conformers_in(basins)
    # Name each basin after the conformers in its catchment (e.g. "C7eq", or "C7eq/C5" along phi alone).
    named = tuple("/".join(held) or name for held, name in zip(conformers, basins.names, strict=True))
    basins = replace(basins, names=named)
    reference = _basin_of(conformers, "C7eq")
    reference = 0 if reference is None else reference
    weights = analysis.offset_weights(bias, t, frame_bias=logged_bias,
                                      progress=progress.counter("reweighting the frames"))
    from_bias = analysis.basin_differences_from_bias(bias, basins, n_points=40, reference=reference,
                                                     progress=progress.counter("replaying the hills"))
    from_frames = analysis.basin_differences_from_frames(weights, t, cvs, basins, n_points=20,
                                                         reference=reference)
    verdict = analysis.assess_convergence(bias, basins, frame_times=t, frame_cvs=cvs, differences=from_bias)
    plots = require_plots()
    files = []

    def put(name, data):
        path = os.path.join(folder, name)
        write_atomically(path, data)
        files.append(path)

    for name in SURFACE:
        put(name, surface_bytes(surface, name.rsplit(".", 1)[1], names=run.names, units=run.units,
                                basins=basins))
    put(CONVERGENCE, _figure_png(_convergence_figure(plots, [from_bias, from_frames], bias, t, cvs, run.names,
                                                     DEFAULT_WINDOW_FRACTION, DEFAULT_MAX_HEIGHT_FRACTION)))
    psi_lines = []
    if settings.mode == "reweight":
        psi = np.asarray(log.column("psi"))[: t.size]
        edges = np.linspace(-math.pi, math.pi, settings.bins // 2 + 1)  # two 2d-grid nodes per bin
        profile = analysis.free_energy_along(weights, psi, edges, names=("psi",))
        for name in PSI_PROFILE:
            put(name, profile_bytes(profile, name.rsplit(".", 1)[1], units=("rad",)))
        reference_psi, path_2d = _psi_from_surface(os.path.join(os.path.dirname(folder), SUBFOLDERS["2d"]),
                                                   edges, kT)
        figure, ax = plots.new_figure()
        plots.plot_free_energy(shown_profile(profile, ("rad",)), ax=ax)
        sparse = np.isfinite(profile.free_energy) & (profile.counts < COMPARE_MIN_FRAMES)
        if sparse.any():
            ax.plot(np.degrees(profile.centers[0][sparse]), profile.free_energy[sparse], linestyle="none",
                    marker="o", markersize=6, markerfacecolor="white", markeredgecolor="#1d2b36",
                    label=f"bins with fewer than {COMPARE_MIN_FRAMES} frames")
        if reference_psi is not None:
            shift, rmsd, worst, n = _compare_profiles(profile.free_energy, profile.counts, reference_psi, kT)
            ax.plot(np.degrees(profile.centers[0]), reference_psi + shift, color="#b5532b", linestyle="--",
                    linewidth=1.5, label="from the 2d run's surface")
            psi_lines.append(f"compared with the 2d run ({path_2d}): over the {n} psi bins below "
                             f"{COMPARE_BELOW_KT:g} kBT there and visited at least {COMPARE_MIN_FRAMES} "
                             f"times here, the two profiles differ by {rmsd:.2f} kJ/mol rms "
                             f"({rmsd / kT:.2f} kBT), {worst:.2f} kJ/mol at most (after aligning their zero)")
            psi_lines.append("psi was not biased in this run: its barrier region (psi near -120 deg) is "
                             "visited rarely, so F(psi) there is noisy and its error bars are unreliable")
        else:
            psi_lines.append(f"no 2d run to compare with ({path_2d} is missing): run 'gridbias demo' with "
                             "the same --out first")
        ax.legend(frameon=False, loc="upper center")
        ax.set_title("free energy along psi, recovered by reweighting (psi was not biased)", loc="left",
                     fontsize="medium")
        put(PSI_COMPARISON, _figure_png(figure))
        finite = np.isfinite(profile.free_energy)
        errors = profile.error[finite & np.isfinite(profile.error)]
        spread = f"median error {np.median(errors):.2f} kJ/mol" if errors.size else "no error estimate yet"
        psi_lines.insert(0, f"F(psi) by reweighting the {t.size:,} logged frames ({weights.summary()}); "
                            f"{spread}, {finite.sum()} of {finite.size} bins reached")
    text = _report_text(settings, run, info, basins, conformers, surface, from_bias, from_frames, verdict,
                        psi_lines, files, t.size, TIMESTEP, time.monotonic() - started)
    put(REPORT, (text + "\n").encode("utf-8"))
    return text, tuple(files)


def _figure_png(figure) -> bytes:
    from ..cli import figure_bytes

    return figure_bytes(figure, "png")


def _report_text(settings, run, info, basins, conformers, surface, from_bias, from_frames, verdict, psi_lines,
                 files, n_frames, timestep, analysis_seconds) -> str:
    from ..cli import format_duration

    bias = run.bias
    kT = bias.kT
    ns = run.step * timestep / 1000.0
    biased = " and ".join(settings.biased)
    lines = [f"gridbias demo report: alanine dipeptide in vacuum, well-tempered metadynamics on {biased}", ""]
    lines.append(f"run          {ns:g} ns ({run.step:,} steps of {timestep * 1000:g} fs), "
                 f"{settings.temperature:g} K, Langevin (1/ps), amber14 (ff14SB), no cutoff, H-bond "
                 "constraints")
    lines.append(f"bias         initial hill height {settings.height:g} kJ/mol every {settings.stride} steps "
                 f"({settings.stride * timestep:g} ps), width {math.degrees(settings.sigma):.1f} deg, "
                 f"bias factor {settings.bias_factor:g}, grid {' x '.join([str(settings.bins)] * bias.ndim)} "
                 f"({360 / settings.bins:g} deg)")
    rate = info.get("steps_per_second", math.nan)
    session = (f"; this session {rate:,.0f} steps/s ({rate * timestep * 86400 / 1000:,.0f} ns/day), "
               f"{format_duration(info.get('wall_seconds', math.nan))}" if np.isfinite(rate) else "")
    lines.append(f"platform     {info.get('platform') or run.platform}{session}; analysis "
                 f"{format_duration(analysis_seconds)}")
    heights = np.asarray(bias.history.heights)
    recent = heights[-10:].mean()
    lines.append(f"hills        {bias.n_hills:,}; the last 10 average {recent:.3g} kJ/mol "
                 f"({100 * recent / bias.height:.2g}% of the initial); {n_frames:,} frames logged")
    lines.append("")
    lines.append("basins: catchment regions of the minima of the final surface (each node belongs to the "
                 "minimum it flows down to); F_basin = -kBT ln of the Boltzmann sum over its nodes")
    ref = from_frames.reference
    head = "".join(f"{n + ' (deg)':>12}" for n in run.names)
    lines.append(f"  basin     {head}   F from the bias   F from reweighted frames (relative to "
                 f"{basins.names[ref]})")
    for k, name in enumerate(basins.names):
        where = "".join(f"{math.degrees(x):>12.1f}" for x in basins.markers[k])
        f_bias = from_bias.differences[-1, k]
        rw = ("0 (reference)" if k == ref
              else _pm(from_frames.differences[-1, k], from_frames.errors[-1, k], kT))
        lines.append(f"  {name:<9} {where}   {f_bias:8.2f} kJ/mol   {rw}")
    lines.append("  (basins are named after the conformers whose minima (CONFORMERS in gridbias/demo/run.py) "
                 "lie in their catchment)")
    axial, equatorial = _basin_of(conformers, "C7ax"), _basin_of(conformers, "C7eq")
    lines.append("")
    if axial is not None and equatorial is not None and axial != equatorial:
        k = axial
        label = f"{basins.names[k]} - {basins.names[ref]}:"
        lines.append(f"{label} {_pm(from_frames.differences[-1, k], from_frames.errors[-1, k], kT)} from "
                     "reweighted frames;")
        lines.append(f"{'':{len(label)}} {from_bias.differences[-1, k]:.2f} kJ/mol from the final bias "
                     "(no error bar of its own)")
        if not from_frames.plateau_found[-1, k]:
            lines.append(f"{'':{len(label)}} (the blocking curve had no plateau: the error is a lower bound)")
    else:
        lines.append("C7ax - C7eq: not available yet: C7eq and C7ax are not in two different basins of this "
                     "surface (too little sampling)")
    lines.append("errors: one standard error from block analysis of the reweighted frames (Flyvbjerg & "
                 "Petersen 1989); weights with the time-independent offset c(t) (Tiwary & Parrinello 2015)")
    if psi_lines:
        lines.append("")
        lines.extend(psi_lines)
    lines.append("")
    lines.append(verdict.render())
    lines.append("")
    lines.extend(_CAUTIONS)
    lines.append("")
    folder = os.path.dirname(files[0])
    lines.append(f"files in {folder}: " + ", ".join(os.path.basename(f) for f in files)
                 + f", {REPORT}, {CHECKPOINT} (checkpoint), {FRAMES} (CV log), {START} (starting structure)")
    checkpoint, frames = os.path.join(folder, CHECKPOINT), os.path.join(folder, FRAMES)
    lines.append(f"look further: gridbias inspect {checkpoint} --log {frames}")
    lines.append(f"              gridbias reweight {checkpoint} {frames} --along psi")
    return "\n".join(lines)


def run_demo(out="gridbias-demo", settings: DemoSettings | None = None, *, fresh=False, stream=None,
             progress=None) -> DemoResult:
    """Run (or continue) the demo and write its results.

    Parameters
    ----------
    out : str or os.PathLike
        Results folder (created if needed); the mode works in ``out/phi-psi`` or ``out/phi-only``.
    settings : DemoSettings, optional
        Default: the full 2d run.
    fresh : bool, keyword-only
        Remove this mode's earlier files (only the files the demo writes) and start again.
    stream : text stream, keyword-only
        Where messages and the report go (default sys.stdout).
    progress : gridbias.cli.ProgressLine, keyword-only
        The progress display (default: one on sys.stderr).

    Returns
    -------
    DemoResult

    Raises
    ------
    CheckpointError
        The folder's checkpoint is damaged or was written with other settings (use ``fresh``).
    LockError
        Another demo is running in the same folder (or another run holds its checkpoint).
    ImportError
        OpenMM (or, for the figures, matplotlib) is missing.
    """
    from ..cli import ProgressLine

    settings = DemoSettings() if settings is None else settings
    stream = sys.stdout if stream is None else stream
    progress = ProgressLine() if progress is None else progress
    folder = os.path.join(os.fspath(out), SUBFOLDERS[settings.mode])
    if os.path.exists(folder) and not os.path.isdir(folder):
        raise ParameterError(f"out: {folder!r} exists and is not a folder")
    os.makedirs(folder, exist_ok=True)
    # One demo per folder: claim it before touching any file (a second run must not remove or cut the
    # files of a live one).
    claim = CheckpointLock(os.path.join(folder, "demo-run"))
    try:
        claim.acquire()
    except LockError as exc:
        raise LockError(f"another gridbias demo is running in {folder!r}; wait for it or stop it "
                        f"({exc})") from None
    try:
        if fresh:
            _remove_own_files(folder)
        biased = " and ".join(settings.biased)
        _say(stream, f"gridbias demo ({settings.mode}): well-tempered metadynamics of the alanine dipeptide "
                     f"in vacuum, biased on {biased}, {settings.length_ns:g} ns; results in {folder}")
        completed, step, info = _simulate(folder, settings, stream, progress)
        if not completed:
            return DemoResult(folder, False, step, "", ())
        report, files = _analyse(folder, settings, info, progress)
    finally:
        claim.release()
    _say(stream, "")
    _say(stream, report)
    return DemoResult(folder, True, step, report, files)
