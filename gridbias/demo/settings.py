"""The demo's settings: what it runs, why these parameters, and the files it writes.

``gridbias demo`` calls :func:`gridbias.demo.run.run_demo`. Two modes:

- ``"2d"`` biases both backbone dihedrals (phi, psi) and reports the free-energy surface, its basins,
  the free-energy differences between them with errors, and the convergence verdict;
- ``"reweight"`` biases phi only, logs psi as an unbiased observable, and recovers the free energy along
  psi by reweighting the logged frames (time-independent offset c(t)), compared with the 2d run's surface
  when that run is in the same results folder.

Each mode works in its own subfolder of the results folder and can be interrupted at any moment (Ctrl-C
or SIGTERM): the runner writes a checkpoint and stops; running it again continues from the checkpoint.
A finished run is analysed again, not rerun. The simulation loop is :mod:`gridbias.demo.simulation`, the
analysis and report :mod:`gridbias.demo.report`.

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
- Length: without a length, the run stops when the convergence verdict holds (checked at a cadence that
  costs under 10% of this tiny molecule's fast run, see ``simulation.DEMO_CHECK_FRACTION``), at most after
  20 ns; with ``length_ns`` it runs exactly that long, 2 ns with
  ``quick`` (speed and run time: bench/README.md, "Figures quoted in the code"). A 10 ns run passes the
  convergence criteria with margin (hill heights near 3% of the initial against the 5% threshold, basin
  differences drifting by about 0.25 kBT against 0.5); the quick run usually does not, and its report
  says so.

Cautions (repeated in every report): the surface depends on the CV choice (here phi and psi, known to
describe this molecule's slow motions in vacuum well; a poor CV causes hysteresis and overfilling), on
convergence and sampling time, and on the force field (ff14SB in vacuum, fitted for use with water).
Results need validation before they are relied on.
"""


from __future__ import annotations

import math
from dataclasses import dataclass

from ..errors import ParameterError

__all__ = ["DemoSettings", "CONFORMERS", "SUBFOLDERS", "FULL_LENGTH_NS", "QUICK_LENGTH_NS", "MAX_LENGTH_NS",
           "CHECKPOINT", "FRAMES", "START", "REPORT", "SURFACE", "CONVERGENCE", "BARRIERS", "PSI_PROFILE",
           "PSI_COMPARISON", "OWN_FILES"]

#: Simulated time of a full run and of a quick one, ns (see the module docstring for the timing).
FULL_LENGTH_NS = 10.0
QUICK_LENGTH_NS = 2.0
#: Longest run when no length is given and the run stops once converged, ns.
MAX_LENGTH_NS = 20.0

#: Subfolder of the results folder each mode works in.
SUBFOLDERS = {"2d": "phi-psi", "reweight": "phi-only"}

#: Potential-energy minima (phi, psi) in degrees of this force field (amber14/ff14SB, vacuum), found with
#: OpenMM's minimiser from the three classic starting conformations; used to name the basins found.
#: tests/cli/test_demo_run.py recomputes them.
CONFORMERS = {"C7eq": (-75.0, 54.0), "C5": (-152.0, 160.0), "C7ax": (61.0, -41.0)}

#: Files the demo writes (and --fresh removes); nothing else in the folder is touched.
CHECKPOINT = "run.gbz"
FRAMES = "frames.gbl"
START = "start.pdb"
REPORT = "report.txt"
SURFACE = ("surface.npz", "surface.csv", "surface.png")
CONVERGENCE = "convergence.png"
BARRIERS = "barriers.png"
PSI_PROFILE = ("psi-reweighted.npz", "psi-reweighted.csv")
PSI_COMPARISON = "psi-comparison.png"
OWN_FILES = (CHECKPOINT, FRAMES, START, REPORT, *SURFACE, CONVERGENCE, BARRIERS, *PSI_PROFILE,
             PSI_COMPARISON)


@dataclass(frozen=True)
class DemoSettings:
    """What the demo runs. The bias parameters are fixed: a checkpoint refuses to continue under others.

    Attributes
    ----------
    mode : {"2d", "reweight"}
    length_ns : float
        Simulated time to reach, ns (the longest run when ``until_converged``).
    until_converged : bool
        Stop as soon as the convergence verdict holds (``gridbias.stopping.Converged``).
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
    min_depth_kT : float, kBT
        Analysis only: a minimum of the final surface counts as a basin if it lies at least this far below
        the lowest saddle to a deeper one; shallower minima merge into that neighbour (as in
        ``analysis.find_basins``).
        Steps between checkpoints.
    """

    mode: str = "2d"
    length_ns: float = FULL_LENGTH_NS
    until_converged: bool = False
    platform: str = "auto"
    seed: int = 2024
    temperature: float = 300.0
    height: float = 1.5
    sigma: float = 0.35
    bias_factor: float = 6.0
    bins: int = 96
    stride: int = 250
    checkpoint_every: int = 50_000
    min_depth_kT: float = 2.0

    def __post_init__(self):
        if self.mode not in SUBFOLDERS:
            raise ParameterError(f"mode must be one of {tuple(SUBFOLDERS)}, got {self.mode!r}")
        if not (isinstance(self.length_ns, (int, float)) and math.isfinite(self.length_ns)
                and self.length_ns > 0):
            raise ParameterError(f"length_ns must be a positive number of ns, got {self.length_ns!r}")
        if not (isinstance(self.min_depth_kT, (int, float)) and math.isfinite(self.min_depth_kT)
                and 1.0 < self.min_depth_kT <= 100.0):
            raise ParameterError(f"min_depth_kT must be a number of kBT in (1, 100] (the basin cores span 1 "
                                 f"kBT), got {self.min_depth_kT!r}")

    @classmethod
    def from_options(cls, *, mode="2d", quick=False, length_ns=None, platform="auto", seed=2024, min_depth_kT=2.0):
        """Settings from the command's options; ``length_ns`` overrides ``quick``; with neither, the run
        stops when converged (at most ``MAX_LENGTH_NS``)."""
        until_converged = length_ns is None and not quick
        if length_ns is None:
            length_ns = QUICK_LENGTH_NS if quick else MAX_LENGTH_NS
        return cls(mode=mode, length_ns=float(length_ns), until_converged=until_converged, platform=platform,
                   seed=int(seed), min_depth_kT=float(min_depth_kT))

    @property
    def n_steps(self) -> int:
        """Steps to reach ``length_ns`` (at least one stride)."""
        from .dipeptide import TIMESTEP

        return max(self.stride, int(round(self.length_ns * 1000.0 / TIMESTEP)))

    @property
    def biased(self) -> tuple:
        """Names of the biased dihedrals."""
        return ("phi", "psi") if self.mode == "2d" else ("phi",)
