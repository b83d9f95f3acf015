"""Metadynamics parameters from a short unbiased run: measure each CV, propose a parameter set, explain it.

Give :func:`advise` the CV time series of a short unbiased run (or :func:`advise_from_file` a file);
it measures per CV the fluctuation, the range visited, the integrated autocorrelation time with its error
and the basins seen, and proposes hill width, grid, stride, initial height, bias factor and walls, each
with its reason, plus warnings where the data cannot support a choice and what the time you can afford
implies. :meth:`Advice.render` prints it all with ready-to-paste ``make_bias(...)`` and reporter calls.

The rules are rules of thumb (common practice, no source) unless a source is named:

- hill width: half the CV's fluctuation in its starting basin (common practice: a half to a third);
- grid spacing: at most a third of the hill width (common practice);
- stride: three autocorrelation times, so that the CV has relaxed between hills (common practice: "a few");
- initial height: kBT / 2 (common practice: a fraction of kBT up to about kBT, 0.5-1.5 kJ/mol at 300 K);
- bias factor: the expected barrier over 2 kBT, so the biased run sees about 2 kBT of it (common practice:
  gamma kBT comparable to the barrier, i.e. a barrier of 1-3 kBT under the bias); the barrier seen under
  the bias is dF/gamma exactly (Barducci, Bussi & Parrinello, PRL 100, 020603, 2008);
- walls at the edges of the range of interest, 3 hill widths inside the grid edges (common practice), rising
  by 10 gamma kBT at the grid edge (rule of this package, no source: the biased run samples
  exp(-(F + wall) / (gamma kBT)), so a wall must rise by many gamma kBT to hold the CV).

The time to convergence is estimated from the well-tempered stationary bias V = -(1 - 1/gamma) F + c(t)
(Barducci et al. 2008): depositing a hill of volume ``w (2 pi)^(d/2) prod(sigma)`` every ``tau_G`` raises
c(t) over the explored volume Omega, which gives a mean hill height ``kB dT Omega tau_G / (prod((2 pi)^(1/2)
sigma) t)`` at late times (derived here; it reproduces c(t) ~ kB dT ln t). It is an estimate, checked on an
analytic double well in tests/core/test_advice_double_well.py, not a guarantee.
"""

from __future__ import annotations

import math
import textwrap
from dataclasses import dataclass

import numpy as np

from ._series_files import Series, read_series
from ._short_run import CVStatistics, measure_cv
from .analysis._checks import as_positive
from .analysis.convergence import DEFAULT_MAX_HEIGHT_FRACTION
from .bias import KB, GridBias
from .errors import ParameterError
from .grid import MAX_DIMENSIONS, Grid
from .walls import Wall

__all__ = ["CVStatistics", "Advice", "advise", "advise_from_file", "advise_from_series", "read_series",
           "Series", "MIN_FRAMES", "MAX_FRAMES", "SIGMA_FRACTION",
           "SPACING_FRACTION", "STRIDE_TIMES", "HEIGHT_KT", "BIASED_BARRIER_KT", "DEFAULT_BIAS_FACTOR",
           "WALL_MARGIN_SIGMAS", "WALL_RISE_GAMMA_KT", "PLANNING_FACTOR"]

#: Fewest frames accepted: fewer cannot show a fluctuation, let alone an autocorrelation time.
MIN_FRAMES = 100
#: Most frames accepted (the autocorrelation's FFT needs ~64 bytes per frame).
MAX_FRAMES = 4_000_000
SIGMA_FRACTION = 0.5          # hill width / fluctuation (common practice: 1/3 to 1/2)
SPACING_FRACTION = 1.0 / 3.0  # grid spacing / hill width, at most (common practice)
STRIDE_TIMES = 3.0            # stride / autocorrelation time (common practice: a few)
HEIGHT_KT = 0.5               # initial height / kBT (common practice: a fraction of kBT up to ~kBT)
BIASED_BARRIER_KT = 2.0       # barrier left under the bias, dF / gamma, kBT (common practice: 1-3 kBT)
DEFAULT_BIAS_FACTOR = 10.0    # without a barrier (common practice: 5-15 for conformational changes)
WALL_MARGIN_SIGMAS = 3.0      # walls this many hill widths inside the grid edges (common practice)
WALL_RISE_GAMMA_KT = 10.0     # wall energy at the grid edge, gamma kBT (rule of this package, no source)
BARELY_MOVED = 1.0 / 500.0    # fluctuation below this fraction of the range of interest: "barely moved"
#: Planned run length / time for the hills to fall to 5 %: on the analytic double well the convergence
#: verdict (drift and transitions included) first passed 1.25-3.25 times after that time (6 runs, barriers of
#: 10 and 14 kBT; tests/core/test_advice_double_well.py). Measured there, not a general law.
PLANNING_FACTOR = 4.0
#: The line of the pasted code where the user's Simulation is created (after ``attach``).
SIMULATION_LINE = "# ... create the Simulation here, after attach (attach adds forces to the System) ..."
MAX_NODES = 4_000_000         # above this the grid is flagged (memory and engine table pushes)


@dataclass(frozen=True)
class Advice:
    """A proposed parameter set with its reasons, warnings and implications.

    Attributes
    ----------
    statistics : tuple of CVStatistics
    temperature : float, K
    timestep : float or None, ps
        The MD time step; without it the stride is given in ps only.
    lower, upper, sigma : tuple of float, CV units
    bins : tuple of int
    periodic : tuple of bool
    height : float, kJ/mol
    bias_factor : float
    walls : tuple of Wall
    stride_time : float, ps
    stride : int or None, steps (``stride_time / timestep``)
    checkpoint_every : int or None, steps
    time_to_small_hills : float, ps
        Estimated time for the hills to fall to 5 % of their initial height (the convergence verdict's
        threshold); the other criteria (transitions, drift) usually need longer.
    planned_time : float, ps
        The run length to plan for: ``PLANNING_FACTOR`` times ``time_to_small_hills``.
    affordable_time : float or None, ps
    expected_hills : int or None
        Hills in ``affordable_time``.
    expected_final_height : float or None, kJ/mol
        Mean hill height at the end of ``affordable_time``.
    reasons : tuple of (str, str)
        (parameter, why) for every parameter.
    warnings : tuple of str
    implications : tuple of str
    """

    statistics: tuple
    temperature: float
    timestep: float | None
    lower: tuple
    upper: tuple
    sigma: tuple
    bins: tuple
    periodic: tuple
    height: float
    bias_factor: float
    walls: tuple
    stride_time: float
    stride: int | None
    checkpoint_every: int | None
    time_to_small_hills: float
    planned_time: float
    affordable_time: float | None
    expected_hills: int | None
    expected_final_height: float | None
    reasons: tuple
    warnings: tuple
    implications: tuple

    @property
    def kT(self) -> float:
        """kB T, kJ/mol."""
        return KB * self.temperature

    def grid_bias(self) -> GridBias:
        """The proposed bias as a core GridBias (for any Python MD code)."""
        grid = Grid(list(self.lower), list(self.upper), list(self.bins), list(self.periodic))
        return GridBias(grid, list(self.sigma), self.height, self.temperature, self.bias_factor,
                        list(self.walls))

    def code(self) -> str:
        """Ready-to-paste ``make_bias(...)``, ``attach`` and reporter calls for an OpenMM script."""
        uses_pi = any(_pi_text(v) != repr(v) for v in self.lower + self.upper)
        pad = " " * len("bias = gbo.make_bias(")
        walls = [f'{{"cv": {w.cv}, "bound": {w.bound!r}, "k": {w.k!r}, "side": "{w.side}"}}'
                 for w in self.walls]
        end = "," if walls else ")"
        lines = ["import math" if uses_pi else None,
                 f"bias = gbo.make_bias(cvs, lower=[{', '.join(map(_pi_text, self.lower))}], "
                 f"upper=[{', '.join(map(_pi_text, self.upper))}],",
                 f"{pad}bins={list(self.bins)}, sigma={list(self.sigma)}, height={self.height!r},",
                 f"{pad}temperature={self.temperature!r}, bias_factor={self.bias_factor!r}{end}"]
        if walls:
            lines += [f"{pad}walls=[{walls[0]},"] + [f"{pad}       {w}," for w in walls[1:]]
            lines[-1] = lines[-1][:-1] + "])"
        lines += [
                 "link = gbo.attach(system, cvs, bias)",
                 SIMULATION_LINE]
        if self.stride is not None:
            lines += [f"simulation.reporters.append(link.reporter(stride={self.stride}, checkpoint=\"run.gbz\", "
                      f"checkpoint_every={self.checkpoint_every},",
                      " " * len("simulation.reporters.append(link.reporter(") + "log=\"run.gbl\"))"]
        else:
            lines += [f"stride = max(1, round({self.stride_time!r} / timestep_ps))   # timestep_ps: your MD "
                      "time step in ps",
                      "simulation.reporters.append(link.reporter(stride=stride, checkpoint=\"run.gbz\", "
                      "checkpoint_every=stride * max(1, round(100.0 / "
                      f"{self.stride_time!r})), log=\"run.gbl\"))"]
        return "\n".join(line for line in lines if line is not None)

    def render(self, *, width: int = 110) -> str:
        """The whole advice as text: measurements, parameters with reasons, implications, warnings, code.

        Prose is wrapped at ``width`` characters; the code lines are left whole so they paste as they are.
        """
        def item(first, text):
            return textwrap.fill(text, width, initial_indent=first, subsequent_indent=" " * (len(first) + 2),
                                 break_on_hyphens=False)

        out = [f"Advice from a short unbiased run at {self.temperature:g} K (kBT = {self.kT:.4g} kJ/mol)",
               "Measured:"]
        out += [item("  ", s.line().strip()) for s in self.statistics]
        out.append("Proposed parameters (rules of thumb, common practice unless a source is named):")
        out += [item("  ", f"{name}: {why}") for name, why in self.reasons]
        out.append("What the run length implies (an estimate, not a guarantee):")
        out += [item("  ", text) for text in self.implications]
        if self.warnings:
            out.append("WARNINGS (the data cannot fully support these choices):")
            out += [item("  ! ", text) for text in self.warnings]
        out.append(item("", "Paste into your OpenMM script (cvs: your list of gbo CVs, in this order: "
                        + ", ".join(s.name for s in self.statistics) + "):"))
        out += ["    " + line for line in self.code().splitlines()]
        out.append(item("", "Check the result: validate the surface with repeat runs (other seeds, hill widths, "
                        "bias factors) before relying on it."))
        return "\n".join(out)

    __str__ = render


def _pi_text(value: float) -> str:
    for k, text in ((1, "math.pi"), (-1, "-math.pi")):
        if value == k * math.pi:
            return text
    return repr(value)


def _round(value: float, digits: int = 4) -> float:
    """``value`` rounded to ``digits`` significant digits (what the pasted code holds)."""
    return float(f"{value:.{digits}g}")


def _round_near(value: float, scale: float) -> float:
    """``value`` rounded to the decimal place of about ``scale`` / 100 (a bound next to a hill width)."""
    return round(value, max(0, 2 - math.floor(math.log10(scale))))


# ------------------------------------------------------------------------------------------ proposing
def _per_cv(name, values, d, convert):
    if values is None:
        return [None] * d
    seq = list(values) if isinstance(values, (list, tuple, np.ndarray)) else None
    if seq is None or len(seq) != d:
        raise ParameterError(f"{name} must have {d} entries (one per CV), got {values!r}")
    return [None if v is None else convert(f"{name}[{i}]", v) for i, v in enumerate(seq)]


def _range(name, value):
    try:
        lo, hi = (float(v) for v in value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} must be a pair (lowest, highest) or None, got {value!r}") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise ParameterError(f"{name} must be a finite pair (lowest, highest) with lowest < highest, "
                             f"got {value!r}")
    return lo, hi


def advise(cv_series, *, interval, temperature, timestep=None, names=None, units=None, periods=None,
           barrier=None, cv_range=None, affordable_time=None) -> Advice:
    """Measure the CVs of a short unbiased run and propose metadynamics parameters.

    Parameters
    ----------
    cv_series : (n,) or (n, d) float, CV units (nm, rad)
        The CVs every ``interval`` ps, n >= 100 frames, d <= 3, all finite.
    interval : float, ps, keyword-only
        Time between frames.
    temperature : float, K, keyword-only
    timestep : float, ps, keyword-only, optional
        The MD time step, to give the stride in steps.
    names, units : sequence of str, keyword-only, optional
        Default ``cv0, cv1, ...`` and ``"nm"``.
    periods : sequence of float or None, keyword-only, optional
        Period of each CV (``2 * math.pi`` for a dihedral), None for a non-periodic CV (the default).
    barrier : float, kJ/mol, keyword-only, optional
        The highest barrier you expect to cross: sets the bias factor.
    cv_range : sequence of (lowest, highest) or None, keyword-only, optional
        The range of interest of each non-periodic CV (walls go at its ends); None for a periodic CV.
    affordable_time : float, ps, keyword-only, optional
        The simulated time you can afford for the biased run.

    Returns
    -------
    Advice

    Raises
    ------
    ParameterError
        Too few frames, non-finite or constant values, a bad shape or option; each names the problem.
    """
    try:
        data = np.asarray(cv_series, dtype=float)
    except (TypeError, ValueError):
        raise ParameterError("cv_series must be an (n, d) array of numbers, "
                             f"got {type(cv_series).__name__}") from None
    if data.ndim == 1:
        data = data[:, None]
    if data.ndim != 2 or not 1 <= data.shape[1] <= MAX_DIMENSIONS:
        raise ParameterError(f"cv_series must have shape (n, d) with 1 <= d <= {MAX_DIMENSIONS}, "
                             f"got {data.shape}")
    n, d = data.shape
    names = [f"cv{i}" for i in range(d)] if names is None else [str(s) for s in names]
    units = ["nm"] * d if units is None else [str(s) for s in units]
    if len(names) != d or len(units) != d:
        raise ParameterError(f"names and units must have {d} entries (one per CV), got {names!r}, {units!r}")
    bad = np.argwhere(~np.isfinite(data))
    if bad.size:
        f, i = bad[0]
        raise ParameterError(f"CV {names[i]!r} is not finite ({data[f, i]}) at frame {f} ({len(bad)} "
                             "non-finite values in all): the run blew up or the file is damaged; cut the run "
                             "before it")
    if n < MIN_FRAMES:
        raise ParameterError(f"the run is too short: {n} frames, at least {MIN_FRAMES} are needed (and many "
                             "autocorrelation times; see the warnings)")
    if n > MAX_FRAMES:
        raise ParameterError(f"{n:,} frames is not a short run (at most {MAX_FRAMES:,}): pass every k-th frame "
                             "with interval k times as long, or a shorter part of the run")
    interval = as_positive("interval", interval, "ps")
    temperature = as_positive("temperature", temperature, "K")
    timestep = None if timestep is None else as_positive("timestep", timestep, "ps")
    if timestep is not None and timestep > interval:
        raise ParameterError(f"timestep ({timestep} ps) must not exceed the frame interval ({interval} ps)")
    periods = _per_cv("periods", periods, d, as_positive)
    ranges = _per_cv("cv_range", cv_range, d, _range)
    barrier = None if barrier is None else as_positive("barrier", barrier, "kJ/mol")
    affordable_time = None if affordable_time is None else as_positive("affordable_time", affordable_time, "ps")
    for i in range(d):
        if periods[i] is not None and ranges[i] is not None:
            raise ParameterError(f"cv_range[{i}] must be None: CV {names[i]!r} is periodic and its grid "
                                 "spans the whole period")
    warnings: list = []
    stats = tuple(measure_cv(data[:, i], name=names[i], unit=units[i], period=periods[i], interval=interval,
                           warnings=warnings) for i in range(d))
    return _propose(stats, ranges, temperature=temperature, timestep=timestep, interval=interval,
                    barrier=barrier, affordable_time=affordable_time, warnings=warnings,
                    run_time=n * interval)


def _propose(stats, ranges, *, temperature, timestep, interval, barrier, affordable_time, warnings, run_time):
    kt = KB * temperature
    reasons = []
    sigma = tuple(_round(SIGMA_FRACTION * s.fluctuation, 3) for s in stats)
    reasons.append(("sigma", ", ".join(f"{s.name} {w:.3g} {s.unit}" for s, w in zip(stats, sigma, strict=True))
                    + ": half the fluctuation in the starting basin (common practice: a half to a third)"))
    if barrier is not None:
        gamma = float(max(2, round(barrier / (BIASED_BARRIER_KT * kt))))
        reasons.append(("bias_factor", f"{gamma:g}: the expected barrier {barrier:g} kJ/mol = "
                        f"{barrier / kt:.1f} kBT becomes {barrier / gamma / kt:.1f} kBT under the bias "
                        "(dF/gamma, Barducci et al. 2008; common practice: 1-3 kBT, i.e. gamma kBT "
                        "comparable to the barrier)"))
        if gamma == 2 and barrier < 2 * BIASED_BARRIER_KT * kt:
            warnings.append(f"the expected barrier ({barrier / kt:.1f} kBT) is low: plain MD may cross "
                            "it; the smallest useful bias factor, 2, is proposed")
    else:
        gamma = DEFAULT_BIAS_FACTOR
        reasons.append(("bias_factor", f"{gamma:g}: no barrier given (common practice: 5-15 for "
                        "conformational changes)"))
        warnings.append("no expected barrier given: the bias factor is a generic guess; give barrier= "
                        "(kJ/mol) if you know it (too low a factor never crosses, too high a one converges "
                        "slowly)")
    lower, upper, bins, walls, extent = [], [], [], [], []
    for i, (s, w, rng) in enumerate(zip(stats, sigma, ranges, strict=True)):
        if s.period is not None:
            lo, hi = -s.period / 2, s.period / 2
            lower.append(lo)
            upper.append(hi)
            extent.append(s.period)
            why = f"{s.name}: the whole period (periodic CV), no walls"
        else:
            if rng is None:
                width = s.highest - s.lowest
                rng = (_round_near(s.lowest - width, w), _round_near(s.highest + width, w))
                warnings.append(
                    f"{s.name}: no range of interest given; the grid spans the range the short run visited "
                    f"({s.lowest:.4g} .. {s.highest:.4g}) widened by its width on each side. Metadynamics "
                    "will push the CV far beyond what an unbiased run sees: give cv_range covering every "
                    "basin you care about")
            elif not rng[0] <= s.mean <= rng[1]:
                warnings.append(f"{s.name}: the short run sat at {s.mean:.4g}, outside your range of "
                                f"interest {rng[0]:g} .. {rng[1]:g}; the biased run must start inside it")
            margin = WALL_MARGIN_SIGMAS * w
            lower.append(_round_near(rng[0] - margin, w))
            upper.append(_round_near(rng[1] + margin, w))
            extent.append(rng[1] - rng[0])
            k = _round(WALL_RISE_GAMMA_KT * gamma * kt / margin**2, 3)
            walls += [Wall(cv=i, bound=rng[0], k=k, side="below"),
                      Wall(cv=i, bound=rng[1], k=k, side="above")]
            why = (f"{s.name}: walls at the range of interest {rng[0]:g} .. {rng[1]:g} (k = {k:g} kJ/mol/"
                   f"{s.unit}^2: {WALL_RISE_GAMMA_KT:g} gamma kBT at the grid edge, rule of this package), "
                   f"grid {WALL_MARGIN_SIGMAS:g} hill widths beyond them (common practice)")
        if s.period is None and ranges[i] is None:  # no scale but the CV's own size
            scale, what, fraction = abs(s.mean), "its mean value", 1e-4
        else:
            scale, fraction = extent[-1], BARELY_MOVED
            what = "the period" if s.period is not None else "the range of interest"
        if s.fluctuation < fraction * scale:
            warnings.append(f"{s.name}: the CV barely moved (fluctuation {s.fluctuation:.3g} {s.unit}, "
                            f"{s.fluctuation / scale:.1e} of {what}): the hills would be tiny; check that it "
                            "is not frozen by a constraint or defined on the wrong atoms")
        bins.append(int(math.ceil((upper[-1] - lower[-1]) / (SPACING_FRACTION * w) - 1e-9)))
        reasons.append((f"grid[{s.name}]", why + f"; {bins[-1]} bins: spacing "
                        f"{(upper[-1] - lower[-1]) / bins[-1]:.3g} <= sigma/3 (common practice)"))
    n_nodes = int(np.prod([b if s.period is not None else b + 1 for b, s in zip(bins, stats, strict=True)]))
    if n_nodes > MAX_NODES:
        mib = n_nodes * 8 * 2 ** len(stats) / 2**20
        warnings.append(f"the grid has {n_nodes:,} nodes ({mib:.0f} MiB): the hills are "
                        "narrow for this range; narrow the range of interest or accept wider hills")
    height = _round(HEIGHT_KT * kt)
    reasons.append(("height", f"{height:g} kJ/mol = {HEIGHT_KT:g} kBT (common practice: a fraction of kBT "
                    "up to about kBT, 0.5-1.5 kJ/mol at room temperature)"))
    tau = max(max(s.autocorrelation_time for s in stats), interval)
    slowest = max(stats, key=lambda s: s.autocorrelation_time)
    stride_time = _round(STRIDE_TIMES * tau, 3)
    stride = checkpoint_every = None
    if timestep is not None:
        stride = max(1, int(round(stride_time / timestep)))
        stride_time = stride * timestep
        checkpoint_every = stride * max(1, int(round(100.0 / stride_time)))
    in_steps = f" = {stride} steps of {timestep:g} ps" if stride else ""
    reasons.append(("stride", f"{stride_time:.4g} ps{in_steps}: {STRIDE_TIMES:g} x the longest "
                    f"autocorrelation time ({slowest.name}, {tau:.3g} ps), so the CV relaxes between hills "
                    "(common practice: a few autocorrelation times)"))
    if checkpoint_every:
        reasons.append(("checkpoint_every", f"{checkpoint_every} steps, about 100 ps of simulated time: a "
                        "crash loses at most that"))
    # Convergence-time estimate from the well-tempered stationary bias (module docstring).
    volume = float(np.prod(extent))
    hill_volume = float(np.prod([math.sqrt(2 * math.pi) * w for w in sigma]))
    k_dt = (gamma - 1.0) * kt
    rate = k_dt * volume * stride_time / hill_volume  # mean height x time, kJ/mol ps, at late times
    time_to_small = rate / (DEFAULT_MAX_HEIGHT_FRACTION * height)
    planned = PLANNING_FACTOR * time_to_small
    implications = [
        f"explored volume {volume:.4g} (range of interest x periods), hill volume {hill_volume:.3g}: late "
        f"hills average about {rate:.4g} / t kJ/mol (t in ps), so they fall to "
        f"{100 * DEFAULT_MAX_HEIGHT_FRACTION:g} % of the initial height (the convergence verdict's "
        f"threshold) after about {time_to_small:,.0f} ps "
        f"({time_to_small / stride_time:,.0f} hills); sooner if the CVs explore only part of that volume",
        f"plan for about {planned:,.0f} ps ({planned / stride_time:,.0f} hills): the basin differences must "
        "also stop drifting, which needs many transitions (on an analytic double well the verdict passed "
        "1.25-3.25 times after the hills were small); run until analysis.assess_convergence says converged"]
    expected_hills = expected_final = None
    if affordable_time is not None:
        expected_hills = int(affordable_time // stride_time)
        expected_final = min(height, rate / affordable_time)
        implications.append(f"your {affordable_time:,.0f} ps buy {expected_hills:,} hills; the last ones "
                            f"should average about {expected_final:.3g} kJ/mol "
                            f"({100 * expected_final / height:.1f} % of the initial height)")
        if affordable_time < planned:
            warnings.append(f"the affordable time ({affordable_time:,.0f} ps) is shorter than the "
                            f"{planned:,.0f} ps to plan for: expect a verdict of 'keep sampling'; "
                            "narrow the range of interest, use a lower bias factor or plan for more time")
    if run_time < 10 * stride_time:
        warnings.append(f"the short run ({run_time:g} ps) covers fewer than 10 strides: its statistics are "
                        "thin")
    return Advice(stats, temperature, timestep, tuple(lower), tuple(upper), sigma, tuple(bins),
                  tuple(s.period is not None for s in stats), height, gamma, tuple(walls), stride_time,
                  stride, checkpoint_every, time_to_small, planned, affordable_time, expected_hills,
                  expected_final,
                  tuple(reasons), tuple(warnings), tuple(implications))


def advise_from_file(path, *, columns=None, **options) -> Advice:
    """:func:`advise` on the CVs of an unbiased run stored in a file.

    Parameters
    ----------
    path : str or os.PathLike
        A CV log (``.gbl``, as written by the OpenMM adapter), a CSV file with one header line of column
        names (``name`` or ``name[unit]``; a ``time`` column in ps gives the interval; ``[deg]`` columns are
        converted to rad) or a NumPy ``.npy`` array (n, d) of CV values.
    columns : sequence of str, keyword-only, optional
        The CV columns; default every column but ``step``, ``time`` and ``bias``.
    **options
        As for :func:`advise_from_series`.

    Returns
    -------
    Advice

    Raises
    ------
    ParameterError or CVLogError
        A missing or unreadable file, an unknown column, frames not evenly spaced, or what :func:`advise`
        refuses.
    """
    return advise_from_series(read_series(path, columns=columns), **options)


def advise_from_series(series: Series, *, temperature=None, interval=None, periods=None, cv_range=None,
                       **options) -> Advice:
    """:func:`advise` on a :class:`Series` read by :func:`read_series`.

    Parameters
    ----------
    series : Series
    temperature : float, K, keyword-only
        Default: the temperature recorded in a CV log.
    interval : float, ps, keyword-only
        Time between frames; default from the file's ``time`` column (required without one).
    periods : sequence of float or None, keyword-only, optional
        Default: 2 pi for the dihedral CVs recorded in a CV log, else not periodic.
    cv_range : sequence (one entry per CV) or dict name -> (lowest, highest), keyword-only, optional
    **options
        Passed to :func:`advise` (``barrier``, ``affordable_time``, ``timestep``); the time step comes from
        a CV log's ``step`` and ``time`` columns unless given.
    """
    if interval is None:
        if series.interval is None:
            raise ParameterError(f"{series.path!r} has no time column: give the frame interval (ps)")
        interval = series.interval
    if temperature is None:
        if series.temperature is None:
            raise ParameterError(f"{series.path!r} records no temperature: give the temperature (K)")
        temperature = series.temperature
    if series.timestep is not None:
        options.setdefault("timestep", series.timestep)
    if isinstance(cv_range, dict):
        unknown = sorted(set(cv_range) - set(series.names))
        if unknown:
            raise ParameterError(f"cv_range names {unknown[0]!r}, which is not one of the CVs "
                                 f"{', '.join(series.names)}")
        cv_range = [cv_range.get(name) for name in series.names]
    return advise(series.data, interval=interval, temperature=temperature, names=series.names,
                  units=series.units, periods=series.periods if periods is None else periods,
                  cv_range=cv_range, **options)
