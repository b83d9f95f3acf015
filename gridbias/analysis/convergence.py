"""A convergence verdict a user can act on: each criterion with its measured value, threshold and outcome."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ._checks import as_count, as_fraction, as_points, as_positive, as_series, same_length
from .basins import Basins, count_transitions
from .differences import BasinDifferences, basin_differences_from_bias, basin_differences_from_frames
from .reweighting import FrameWeights, offset_weights

__all__ = ["Criterion", "ConvergenceVerdict", "drift_criterion", "agreement_criterion",
           "transition_criterion", "height_criterion", "assess_convergence", "DEFAULT_WINDOW_FRACTION",
           "DEFAULT_DRIFT_KT",
           "DEFAULT_DRIFT_Z", "DEFAULT_AGREEMENT_Z", "DEFAULT_AGREEMENT_KT", "DEFAULT_MIN_TRANSITIONS",
           "DEFAULT_MAX_HEIGHT_FRACTION", "DEFAULT_N_POINTS"]

# Defaults (common practice, no source): stop when the basin differences move by less than about
# 0.5 kBT over the last 20-30 % of the run, after many recrossings (5-10 round trips, i.e. 10-20
# transitions), with well-tempered hills down to a few percent of their initial height.
DEFAULT_WINDOW_FRACTION = 0.25
DEFAULT_DRIFT_KT = 0.5
DEFAULT_MIN_TRANSITIONS = 10
DEFAULT_MAX_HEIGHT_FRACTION = 0.05
DEFAULT_RECENT_HILLS = 10
#: Moments at which the bias estimate is replayed by default (25 fall in the default window).
DEFAULT_N_POINTS = 100
#: Standard errors by which a fitted drift may exceed the tolerance (about 95 % one-sided; common practice).
DEFAULT_DRIFT_Z = 2.0
#: Combined standard errors, plus a floor in kBT, by which the final-bias and reweighted-frames estimates
#: may differ before the verdict fails (3 sigma: rare by chance; the floor: measured spread in sound runs).
DEFAULT_AGREEMENT_Z = 3.0
DEFAULT_AGREEMENT_KT = 0.5


@dataclass(frozen=True)
class Criterion:
    """One convergence criterion.

    Attributes
    ----------
    name : str
    measured : float
        The measured value (NaN when it could not be measured; the criterion then fails).
    threshold : float
    comparison : str
        How ``measured`` must compare with ``threshold`` to pass: ``"<"``, ``"<="`` or ``">="``.
    unit : str
    passed : bool
    detail : str
        One sentence on what was measured, or why it could not be.
    """

    name: str
    measured: float
    threshold: float
    comparison: str
    unit: str
    passed: bool
    detail: str

    def line(self) -> str:
        """The criterion as one line of text."""
        mark = "holds " if self.passed else "FAILS "
        return f"  [{mark}] {self.name}: {self.detail}"


@dataclass(frozen=True)
class ConvergenceVerdict:
    """The criteria checked and whether they all hold.

    Attributes
    ----------
    criteria : tuple of Criterion
    notes : tuple of str
        Criteria that do not apply (e.g. hill-height decay for standard metadynamics), and cautions.
    """

    criteria: tuple
    notes: tuple = ()

    @property
    def converged(self) -> bool:
        """True only when there is at least one criterion and every one holds."""
        return bool(self.criteria) and all(c.passed for c in self.criteria)

    def render(self) -> str:
        """A short text report: the verdict, then one line per criterion."""
        held = sum(c.passed for c in self.criteria)
        if self.converged:
            head = f"Verdict: converged by all {len(self.criteria)} criteria below."
        else:
            head = f"Verdict: NOT there yet: {held} of {len(self.criteria)} criteria hold. Keep sampling."
        lines = [head] + [c.line() for c in self.criteria] + [f"  note: {n}" for n in self.notes]
        lines.append("  These criteria are necessary, not sufficient: a hidden slow degree of freedom or a "
                     "poor CV can pass them; validate before relying on the result.")
        return "\n".join(lines)

    __str__ = render


def _compare(measured, threshold, comparison) -> bool:
    if not np.isfinite(measured):
        return False
    return {"<": measured < threshold, "<=": measured <= threshold, ">=": measured >= threshold}[comparison]


def _window(differences, fraction):
    """(mask of the estimates in the last ``fraction`` of the run, x values, text naming the span)."""
    times = differences.times
    if np.isfinite(times).all():
        window = times >= times[-1] - fraction * (times[-1] - times[0])
        return window, times, f"the last {100 * fraction:.0f}% of the run"
    # hills without time: the last part of the estimates, in deposition order
    window = np.arange(times.size) >= times.size - max(1, round(fraction * times.size))
    return (window, np.arange(times.size, dtype=float),
            f"the last {100 * fraction:.0f}% of the estimates (no simulated time recorded)")


def _trend(x, y):
    """Change of y over the span of x from a straight-line fit, its standard error, and the scatter.

    The standard error of the slope is inflated for correlated residuals by the lag-1 autocorrelation
    rho (effective number of points n (1 - rho) / (1 + rho), rho clipped to [0, 0.9]; common practice,
    no source).
    """
    n = x.size
    xc = x - x.mean()
    sxx = float(np.dot(xc, xc))
    if sxx == 0.0:
        return 0.0, np.inf, 0.0
    slope = float(np.dot(xc, y - y.mean()) / sxx)
    residual = y - y.mean() - slope * xc
    scatter = float(np.sqrt(np.dot(residual, residual) / (n - 2)))
    rho = 0.0
    if n > 3 and scatter > 0:
        rho = float(np.dot(residual[1:], residual[:-1]) / np.dot(residual, residual))
    rho = min(max(rho, 0.0), 0.9)
    inflation = np.sqrt((1.0 + rho) / (1.0 - rho))
    span = float(x[-1] - x[0])
    return slope * span, scatter / np.sqrt(sxx) * inflation * span, scatter


def drift_criterion(differences: BasinDifferences, *, window_fraction: float = DEFAULT_WINDOW_FRACTION,
                    tolerance_kT: float = DEFAULT_DRIFT_KT, z: float = DEFAULT_DRIFT_Z) -> Criterion:
    """Have the basin differences stopped moving over the last part of the run, beyond their own noise?

    Parameters
    ----------
    differences : BasinDifferences
        From :func:`basin_differences_from_bias` or :func:`basin_differences_from_frames`. Where the
        times are unknown (NaN), the window is the last ``window_fraction`` of the estimates.
    window_fraction : float in (0, 1], keyword-only, default 0.25
        The last part of the time span examined.
    tolerance_kT : float, keyword-only, default 0.5
        Largest allowed drift over the window, kBT.
    z : float, keyword-only, default 2.0
        How many of its own standard errors the measured drift may exceed the tolerance by.

    Returns
    -------
    Criterion
        ``measured`` = the largest ``|drift|`` over the basins, in kBT, where the drift of a basin is the
        change over the window of a straight line fitted to its estimates; ``threshold`` = the tolerance
        plus ``z`` standard errors of that drift. Fails when a drift exceeds its threshold (a trend), when
        a drift's standard error exceeds the tolerance itself (too noisy to tell: sample longer or ask for
        more time points), and (NaN) with fewer than two basins, fewer than four estimates in the window,
        or a basin without an estimate in the window.

    Notes
    -----
    A converged estimate still fluctuates: comparing single values with the final one (itself noisy)
    calls easy runs unconverged. The fitted trend averages the fluctuations out, and its standard error
    (from the scatter about the line, corrected for correlation between successive estimates) says how
    much of the trend is noise.
    """
    if not isinstance(differences, BasinDifferences):
        raise ParameterError(f"differences must be BasinDifferences, got {type(differences).__name__}")
    fraction = as_fraction("window_fraction", window_fraction, allow_zero=False, allow_one=True)
    tol = as_positive("tolerance_kT", tolerance_kT, "kBT")
    z = as_positive("z", z)
    name = "basin differences stable"
    measured, threshold, problem = np.nan, tol, ""
    if len(differences.names) < 2:
        problem = "fewer than two basins: there is no difference to follow"
        span = ""
    else:
        window, x, span = _window(differences, fraction)
        values = np.delete(differences.differences[window], differences.reference, axis=1) / differences.kT
        if window.sum() < 4:
            problem = f"fewer than four estimates in {span}; ask for more time points"
        elif not np.isfinite(values).all():
            problem = f"a basin has no estimate somewhere in {span} (not visited yet)"
        else:
            fits = [_trend(x[window], values[:, j]) for j in range(values.shape[1])]
            worst = int(np.argmax([abs(f[0]) - z * f[1] for f in fits]))
            measured, error = abs(fits[worst][0]), fits[worst][1]
            noisiest = max(f[1] for f in fits)
            threshold = tol + z * error
            if noisiest > tol:
                problem = (f"the drift over {span} cannot be told from noise: its standard error "
                           f"{noisiest:.2f} kBT exceeds the tolerance {tol:g} kBT (sample longer)")
    passed = not problem and _compare(measured, threshold, "<")
    if problem and np.isnan(measured):
        detail = f"{problem}; allowed < {tol:g} kBT"
    elif problem:
        detail = f"drift {measured:.2f} kBT; {problem}"
    else:
        detail = (f"drift {measured:.2f} +/- {error:.2f} kBT over {span} ({int(window.sum())} estimates, "
                  f"{differences.source}); allowed < {tol:g} kBT + {z:g} standard errors = "
                  f"{threshold:.2f} kBT")
    return Criterion(name, measured, threshold, "<", "kBT", passed, detail)


def agreement_criterion(from_bias: BasinDifferences, from_frames: BasinDifferences, *,
                        window_fraction: float = DEFAULT_WINDOW_FRACTION, z: float = DEFAULT_AGREEMENT_Z,
                        tolerance_kT: float = DEFAULT_AGREEMENT_KT) -> Criterion:
    """Do the two estimates of each basin difference (final bias, reweighted frames) agree?

    Parameters
    ----------
    from_bias : BasinDifferences
        From :func:`basin_differences_from_bias` at several times (its scatter over the last
        ``window_fraction`` of the run is its error).
    from_frames : BasinDifferences
        From :func:`basin_differences_from_frames` (block-analysis errors); its last time is used.
    window_fraction : float in (0, 1], keyword-only, default 0.25
    z : float, keyword-only, default 3.0
        Allowed disagreement in combined standard errors.
    tolerance_kT : float, keyword-only, default 0.5
        Allowed disagreement on top of that, kBT: the two estimators weigh the filling transient
        differently, so they differ by a few tenths of kBT even in sound runs (measured on the analytic
        double wells of the tests).

    Returns
    -------
    Criterion
        ``measured`` = the largest ``|bias estimate - frames estimate|`` over the basins, kBT;
        ``threshold`` = ``tolerance_kT`` + ``z`` combined standard errors for that basin. When it fails,
        the detail names the likely cause: a slow degree of freedom the CVs miss.

    Notes
    -----
    The final bias follows the most recent sampling, while the frames reweighted with c(t) remember the
    whole run. When a slow coordinate outside the CVs changes the surface during the run, the bias
    adapts to the new state and the frames still carry the old one, so the two disagree far beyond their
    errors, while drift, transitions and hill heights may all look fine.
    """
    for label, value in (("from_bias", from_bias), ("from_frames", from_frames)):
        if not isinstance(value, BasinDifferences):
            raise ParameterError(f"{label} must be BasinDifferences, got {type(value).__name__}")
    if from_bias.names != from_frames.names or from_bias.reference != from_frames.reference:
        raise ParameterError(f"from_bias and from_frames must use the same basins and reference, got "
                             f"{from_bias.names} (ref {from_bias.reference}) and {from_frames.names} "
                             f"(ref {from_frames.reference})")
    fraction = as_fraction("window_fraction", window_fraction, allow_zero=False, allow_one=True)
    z = as_positive("z", z)
    tol = as_positive("tolerance_kT", tolerance_kT, "kBT")
    name = "estimators agree"
    kT = from_bias.kT
    ref = from_bias.reference
    others = [b for b in range(len(from_bias.names)) if b != ref]
    window, x, _ = _window(from_bias, fraction)
    worst = None
    for b in others:
        bias_value = from_bias.differences[-1, b] / kT
        frames_value = from_frames.differences[-1, b] / kT
        frames_error = np.nan if from_frames.errors is None else from_frames.errors[-1, b] / kT
        series = from_bias.differences[window, b] / kT
        bias_error = _trend(x[window], series)[2] if series.size >= 4 and np.isfinite(series).all() else 0.0
        combined = float(np.hypot(frames_error, bias_error))
        gap = abs(bias_value - frames_value)
        excess = gap - (tol + z * combined)
        if not np.isfinite(excess):
            return Criterion(name, np.nan, tol, "<", "kBT", False,
                             f"basin {from_bias.names[b]} has no estimate from both the bias and the frames; "
                             f"allowed < {tol:g} kBT + {z:g} combined standard errors")
        if worst is None or excess > worst[0]:
            worst = (excess, b, gap, combined, bias_value, frames_value)
    if worst is None:
        return Criterion(name, np.nan, tol, "<", "kBT", False,
                         "fewer than two basins: there is no difference to compare")
    _, b, gap, combined, bias_value, frames_value = worst
    threshold = tol + z * combined
    passed = _compare(gap, threshold, "<")
    pair = f"{from_bias.names[b]} - {from_bias.names[ref]}"
    detail = (f"{pair}: final bias {bias_value:.2f} kBT, reweighted frames {frames_value:.2f} kBT, differ by "
              f"{gap:.2f} kBT; allowed < {tol:g} kBT + {z:g} x {combined:.2f} kBT (combined standard error) "
              f"= {threshold:.2f} kBT")
    if not passed:
        detail += ("; likely cause: a slow degree of freedom the CVs miss (the surface changed during the "
                   "run): add a CV for it, or check for hysteresis")
    return Criterion(name, gap, threshold, "<", "kBT", passed, detail)


def transition_criterion(core_labels, n_basins: int, *,
                         min_transitions: int = DEFAULT_MIN_TRANSITIONS) -> Criterion:
    """Has the CV moved between basin cores often enough?

    Parameters
    ----------
    core_labels : (n,) int
        Core of each frame in time order (``Basins.assign(cvs, core=True)``), -1 outside all cores.
    n_basins : int
    min_transitions : int, keyword-only, default 10
        Core-to-core transitions needed (10 transitions = 5 round trips between two basins).

    Returns
    -------
    Criterion
        ``measured`` = the number of core-to-core transitions (:func:`count_transitions`).
    """
    needed = as_count("min_transitions", min_transitions, 1)
    counted = count_transitions(core_labels, n_basins)
    visited = int(np.count_nonzero(counted.matrix.sum(axis=0) + counted.matrix.sum(axis=1)))
    detail = (f"{counted.total} core-to-core transitions, touching {visited} of {n_basins} basins; "
              f"needed >= {needed}")
    if n_basins < 2:
        detail = f"only one basin: no transition can be counted; needed >= {needed}"
    return Criterion("transitions between basins", float(counted.total), float(needed), ">=", "transitions",
                     counted.total >= needed, detail)


def height_criterion(bias, *, max_height_fraction: float = DEFAULT_MAX_HEIGHT_FRACTION,
                     n_recent: int = DEFAULT_RECENT_HILLS) -> Criterion:
    """Have well-tempered hills decayed to a small fraction of the initial height?

    Parameters
    ----------
    bias : GridBias
        Well-tempered (``bias_factor`` set).
    max_height_fraction : float in (0, 1), keyword-only, default 0.05
    n_recent : int, keyword-only, default 10
        The current height is the mean of the last ``n_recent`` hills (one hill depends on where the CV
        happened to be).

    Returns
    -------
    Criterion
        ``measured`` = mean recent height / initial height.
    """
    if bias.bias_factor is None:
        raise ParameterError("height_criterion applies to well-tempered runs only (bias_factor is None)")
    fraction = as_fraction("max_height_fraction", max_height_fraction, allow_zero=False)
    n_recent = as_count("n_recent", n_recent, 1)
    heights = np.asarray(bias.history.heights)
    if heights.size == 0:
        return Criterion("hill height decayed", np.nan, fraction, "<=", "of initial height", False,
                         f"no hills yet; allowed <= {100 * fraction:g}% of the initial height")
    measured = float(heights[-n_recent:].mean() / bias.height)
    detail = (f"the last {min(n_recent, heights.size)} hills average {100 * measured:.2f}% of the initial "
              f"height {bias.height:g} kJ/mol; allowed <= {100 * fraction:g}%")
    return Criterion("hill height decayed", measured, fraction, "<=", "of initial height",
                     _compare(measured, fraction, "<="), detail)


def assess_convergence(bias, basins: Basins, *, frame_times=None, frame_cvs=None, frame_bias=None,
                       weights: FrameWeights | None = None, differences: BasinDifferences | None = None,
                       n_points: int = DEFAULT_N_POINTS, window_fraction: float = DEFAULT_WINDOW_FRACTION,
                       tolerance_kT: float = DEFAULT_DRIFT_KT,
                       min_transitions: int = DEFAULT_MIN_TRANSITIONS,
                       max_height_fraction: float = DEFAULT_MAX_HEIGHT_FRACTION,
                       agreement_z: float = DEFAULT_AGREEMENT_Z,
                       agreement_kT: float = DEFAULT_AGREEMENT_KT) -> ConvergenceVerdict:
    """Check a run against all convergence criteria.

    Parameters
    ----------
    bias : GridBias
        The bias at the end of the run (hill history with times).
    basins : Basins
        On the bias grid, with at least two basins for a verdict that can pass.
    frame_times : (n,) float, ps, keyword-only, optional
    frame_cvs : (n, d) float, CV units, keyword-only, optional
        The CV time series (one trajectory, in time order) used to count transitions. Default: the hill
        centres and times, i.e. the CV sampled at each deposit.
    frame_bias : (n,) float, kJ/mol, keyword-only, optional
        The bias applied at each frame, as logged. With it (or with ``weights``) the frames are reweighted
        with c(t) and the estimators are cross-checked (:func:`agreement_criterion`).
    weights : FrameWeights, keyword-only, optional
        Frame weights already computed (e.g. ``offset_weights``), instead of ``frame_bias``.
    differences : BasinDifferences, keyword-only, optional
        Default: :func:`basin_differences_from_bias` at ``n_points`` evenly spaced times.
    n_points : int, keyword-only, default 100
    window_fraction, tolerance_kT, min_transitions, max_height_fraction, agreement_z, agreement_kT
        Thresholds, keyword-only (see :func:`drift_criterion`, :func:`transition_criterion`,
        :func:`height_criterion`, :func:`agreement_criterion`).

    Returns
    -------
    ConvergenceVerdict
        ``converged`` is True only if every criterion holds: basin differences drifted less than
        ``tolerance_kT`` (plus their noise) over the last ``window_fraction`` of the run; at least
        ``min_transitions`` core-to-core transitions; for well-tempered runs, recent hills at most
        ``max_height_fraction`` of the initial height; with frames and their bias, the final-bias and
        reweighted-frames estimates agree.
    """
    if not isinstance(basins, Basins):
        raise ParameterError(f"basins must be Basins, got {type(basins).__name__}")
    if (frame_times is None) != (frame_cvs is None):
        raise ParameterError(
            "give both frame_times and frame_cvs, or neither (then the hill centres are used)")
    if (frame_bias is not None or weights is not None) and frame_cvs is None:
        raise ParameterError("frame_bias and weights need frame_times and frame_cvs")
    if frame_bias is not None and weights is not None:
        raise ParameterError("give frame_bias or weights, not both")
    if frame_cvs is None:
        if bias.n_hills == 0:
            raise ParameterError("the bias has no hills and no frames were given: nothing to assess")
        cvs = np.asarray(bias.history.centers)
        source = "the CV at each deposit"
    else:
        cvs = as_points("frame_cvs", frame_cvs, bias.ndim)
        times = as_series("frame_times", frame_times)
        same_length(frame_times=times, frame_cvs=cvs)
        source = "the frames given"
    if differences is None:
        differences = basin_differences_from_bias(bias, basins, n_points=n_points)
    criteria = [
        drift_criterion(differences, window_fraction=window_fraction, tolerance_kT=tolerance_kT),
        transition_criterion(basins.assign(cvs, core=True), basins.n_basins, min_transitions=min_transitions),
    ]
    notes = [f"transitions counted along {source}"]
    if bias.bias_factor is not None:
        criteria.append(height_criterion(bias, max_height_fraction=max_height_fraction))
    else:
        notes.append("hill-height decay does not apply to standard metadynamics (constant height)")
    if frame_bias is not None:
        weights = offset_weights(bias, times, frame_bias=frame_bias)
    if weights is not None and differences.source == "bias" and basins.n_basins > 1:
        from_frames = basin_differences_from_frames(weights, times, cvs, basins, times=[times[-1]],
                                                    reference=differences.reference)
        criteria.append(agreement_criterion(differences, from_frames, window_fraction=window_fraction,
                                            z=agreement_z, tolerance_kT=agreement_kT))
    elif weights is None:
        notes.append("no estimator cross-check: give the frames' logged bias (frame_bias) to compare the "
                     "final-bias and reweighted-frames estimates")
    return ConvergenceVerdict(tuple(criteria), tuple(notes))
