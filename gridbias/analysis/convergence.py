"""A convergence verdict a user can act on: each criterion with its measured value, threshold and outcome."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ._checks import as_count, as_fraction, as_points, as_positive, as_series, same_length
from .basins import Basins, count_transitions
from .differences import BasinDifferences, basin_differences_from_bias

__all__ = ["Criterion", "ConvergenceVerdict", "drift_criterion", "transition_criterion", "height_criterion",
           "assess_convergence", "DEFAULT_WINDOW_FRACTION", "DEFAULT_DRIFT_KT", "DEFAULT_MIN_TRANSITIONS",
           "DEFAULT_MAX_HEIGHT_FRACTION"]

# Defaults (common practice, no source): stop when the basin differences move by less than about
# 0.5 kBT over the last 20-30 % of the run, after many recrossings (5-10 round trips, i.e. 10-20
# transitions), with well-tempered hills down to a few percent of their initial height.
DEFAULT_WINDOW_FRACTION = 0.25
DEFAULT_DRIFT_KT = 0.5
DEFAULT_MIN_TRANSITIONS = 10
DEFAULT_MAX_HEIGHT_FRACTION = 0.05
DEFAULT_RECENT_HILLS = 10


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


def drift_criterion(differences: BasinDifferences, *, window_fraction: float = DEFAULT_WINDOW_FRACTION,
                    tolerance_kT: float = DEFAULT_DRIFT_KT) -> Criterion:
    """Have the basin differences stopped moving over the last part of the run?

    Parameters
    ----------
    differences : BasinDifferences
        From :func:`basin_differences_from_bias` or :func:`basin_differences_from_frames`. Where the
        times are unknown (NaN), the window is the last ``window_fraction`` of the estimates.
    window_fraction : float in (0, 1], keyword-only, default 0.25
        The last part of the time span examined.
    tolerance_kT : float, keyword-only, default 0.5
        Largest allowed drift, kBT.

    Returns
    -------
    Criterion
        ``measured`` = max over basins and over the window's times of ``|dF(t) - dF(t_end)|``, in kBT.
        Fails (NaN) with fewer than two basins, fewer than two times in the window, or a basin without
        an estimate in the window.
    """
    if not isinstance(differences, BasinDifferences):
        raise ParameterError(f"differences must be BasinDifferences, got {type(differences).__name__}")
    fraction = as_fraction("window_fraction", window_fraction, allow_zero=False, allow_one=True)
    tol = as_positive("tolerance_kT", tolerance_kT, "kBT")
    name = "basin differences stable"
    times = differences.times
    span = f"the last {100 * fraction:.0f}% of the run"
    measured, problem = np.nan, ""
    if len(differences.names) < 2:
        problem = "fewer than two basins: there is no difference to follow"
    else:
        if np.isfinite(times).all():
            window = times >= times[-1] - fraction * (times[-1] - times[0])
        else:  # hills without time: the last part of the estimates, in deposition order
            span = f"the last {100 * fraction:.0f}% of the estimates (no simulated time recorded)"
            window = np.arange(times.size) >= times.size - max(1, round(fraction * times.size))
        values = np.delete(differences.differences[window], differences.reference, axis=1)
        if window.sum() < 2:
            problem = f"fewer than two estimates in {span}; ask for more time points"
        elif not np.isfinite(values).all():
            problem = f"a basin has no estimate somewhere in {span} (not visited yet)"
        else:
            measured = float(np.max(np.abs(values - values[-1])) / differences.kT)
    if problem:
        detail = f"{problem}; allowed < {tol:g} kBT"
    else:
        detail = (f"largest change {measured:.2f} kBT over {span} ({int(window.sum())} estimates, "
                  f"{differences.source}); allowed < {tol:g} kBT")
    return Criterion(name, measured, tol, "<", "kBT", _compare(measured, tol, "<"), detail)


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


def assess_convergence(bias, basins: Basins, *, frame_times=None, frame_cvs=None,
                       differences: BasinDifferences | None = None, n_points: int = 40,
                       window_fraction: float = DEFAULT_WINDOW_FRACTION,
                       tolerance_kT: float = DEFAULT_DRIFT_KT,
                       min_transitions: int = DEFAULT_MIN_TRANSITIONS,
                       max_height_fraction: float = DEFAULT_MAX_HEIGHT_FRACTION) -> ConvergenceVerdict:
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
    differences : BasinDifferences, keyword-only, optional
        Default: :func:`basin_differences_from_bias` at ``n_points`` evenly spaced times.
    n_points : int, keyword-only, default 40
    window_fraction, tolerance_kT, min_transitions, max_height_fraction : keyword-only
        Thresholds (see :func:`drift_criterion`, :func:`transition_criterion`, :func:`height_criterion`).

    Returns
    -------
    ConvergenceVerdict
        ``converged`` is True only if every criterion holds: basin differences drifted less than
        ``tolerance_kT`` over the last ``window_fraction`` of the run; at least ``min_transitions``
        core-to-core transitions; for well-tempered runs, recent hills at most ``max_height_fraction`` of
        the initial height.
    """
    if not isinstance(basins, Basins):
        raise ParameterError(f"basins must be Basins, got {type(basins).__name__}")
    if (frame_times is None) != (frame_cvs is None):
        raise ParameterError(
            "give both frame_times and frame_cvs, or neither (then the hill centres are used)")
    if frame_cvs is None:
        if bias.n_hills == 0:
            raise ParameterError("the bias has no hills and no frames were given: nothing to assess")
        cvs = np.asarray(bias.history.centers)
        source = "the CV at each deposit"
    else:
        cvs = as_points("frame_cvs", frame_cvs, bias.ndim)
        same_length(frame_times=as_series("frame_times", frame_times), frame_cvs=cvs)
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
    return ConvergenceVerdict(tuple(criteria), tuple(notes))
