"""Weights that turn frames sampled under a growing bias into unbiased-ensemble samples.

Two estimators: the time-independent offset c(t) (every frame, bias as it was at the frame), and the
final, quasi-static bias (late frames only). Both include the walls in the weights, so the reference
ensemble is the unbiased one without walls, up to the walls' reach.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..grid import Grid
from ._checks import as_fraction, as_points, as_positive, as_series, frozen, same_length
from ._grid_sums import log_quadrature, logsumexp
from .surfaces import _hill_times, _replay

__all__ = ["FrameWeights", "kish_effective_sample_size", "time_independent_offset", "offset_weights",
           "final_bias_weights", "DEFAULT_BURN_IN_FRACTION"]

#: Fraction of the run discarded before final-bias reweighting: the filling transient in which the bias
#: is still far from quasi-static (common practice, no source; check that results do not move with it).
DEFAULT_BURN_IN_FRACTION = 0.5


def kish_effective_sample_size(log_weights) -> float:
    """Kish's effective number of samples for importance weights given as logarithms.

    Parameters
    ----------
    log_weights : (n,) float
        ``ln w_i``, any additive constant; ``-inf`` marks a frame with zero weight.

    Returns
    -------
    float
        ``(sum_i w_i)**2 / sum_i w_i**2``, between 1 and the number of non-zero weights (0 if none).

    Notes
    -----
    Computed as ``exp(2 LSE(l) - LSE(2 l))`` (LSE = log-sum-exp), which cannot overflow. It ignores time
    correlation between frames; combine it with block analysis for error bars.

    References
    ----------
    L. Kish, *Survey Sampling*, Wiley, New York (1965).

    Examples
    --------
    >>> kish_effective_sample_size([0.0, 0.0, 0.0, 0.0])
    4.0
    """
    lw = as_series("log_weights", log_weights, allow_nonfinite=True)
    if np.isnan(lw).any() or (lw == np.inf).any():
        raise ParameterError(f"log_weights must be finite or -inf (zero weight), got {lw[~(lw < np.inf)][0]}")
    lw = lw[np.isfinite(lw)]
    if lw.size == 0:
        return 0.0
    return float(min(np.exp(2.0 * logsumexp(lw) - logsumexp(2.0 * lw)), lw.size))


def time_independent_offset(values, grid: Grid, kT: float, bias_factor: float | None) -> float:
    """The offset c(t) that makes ``V(s, t) - c(t)`` time-independent in the quasi-stationary regime.

    Parameters
    ----------
    values : float array of shape ``grid.shape``, kJ/mol
        The grid part of the bias at time t (walls excluded).
    grid : Grid
    kT : float, kJ/mol
    bias_factor : float > 1 or None
        gamma; None for standard metadynamics (the limit gamma -> infinity).

    Returns
    -------
    float, kJ/mol

    Notes
    -----
    ``c(t) = (1/beta) ln[ int ds exp(gamma/(gamma-1) beta V(s,t)) / int ds exp(beta V(s,t)/(gamma-1)) ]``,
    which equals ``(1/beta) ln(Z_0 / Z_V)`` when ``V = -(1 - 1/gamma) F + C``. For standard metadynamics
    the limit is ``(1/beta) ln[ int ds exp(beta V) / int ds 1 ]``. The integrals run over the grid with
    the trapezoid rule (periodic axes: every node counts fully). c = 0 for a bias of zero.

    References
    ----------
    P. Tiwary and M. Parrinello, "A time-independent free energy estimator for metadynamics",
    J. Phys. Chem. B 119, 736 (2015).
    """
    if not isinstance(grid, Grid):
        raise ParameterError(f"grid must be a gridbias.Grid, got {type(grid).__name__}")
    v = np.asarray(values, dtype=float)
    if v.shape != tuple(grid.shape):
        raise ParameterError(f"values must have the grid's shape {tuple(grid.shape)}, got {v.shape}")
    beta = 1.0 / as_positive("kT", kT, "kJ/mol")
    log_w = log_quadrature(grid)
    if bias_factor is None:
        return (logsumexp(beta * v + log_w) - logsumexp(log_w)) / beta
    gamma = float(bias_factor)
    if not gamma > 1:
        raise ParameterError(f"bias_factor must be > 1 or None (standard metadynamics), got {bias_factor!r}")
    top = logsumexp(gamma / (gamma - 1.0) * beta * v + log_w)
    bottom = logsumexp(beta * v / (gamma - 1.0) + log_w)
    return (top - bottom) / beta


@dataclass(frozen=True, eq=False)
class FrameWeights:
    """Per-frame weights to the unbiased ensemble, kept as logarithms.

    Attributes
    ----------
    log_weights : (n,) float
        ``ln w_i``, up to a common constant; ``-inf`` for frames left out (burn-in).
    offsets : (n,) float, kJ/mol
        The c(t) subtracted from each frame's bias (0 for final-bias weights).
    kT : float, kJ/mol
    method : str
        ``"time-independent offset"``, ``"final bias"`` or ``"given"``.
    burn_in_time : float, ps
        Frames before this time carry no weight (``-inf`` when none were left out).
    effective_sample_size : float
        Kish's effective number of frames (ignores time correlation).
    """

    log_weights: np.ndarray
    offsets: np.ndarray
    kT: float
    method: str
    burn_in_time: float
    effective_sample_size: float

    @classmethod
    def from_log_weights(cls, log_weights, kT: float) -> "FrameWeights":
        """Wrap log-weights computed elsewhere: (n,) float (``-inf`` allowed), kT in kJ/mol."""
        lw = as_series("log_weights", log_weights, allow_nonfinite=True)
        kT = as_positive("kT", kT, "kJ/mol")
        return cls(frozen(lw), frozen(np.zeros_like(lw)), kT, "given", -np.inf,
                   kish_effective_sample_size(lw))

    @property
    def n_frames(self) -> int:
        """Number of frames n (used or not)."""
        return self.log_weights.shape[0]

    @property
    def used(self) -> np.ndarray:
        """(n,) bool: frames with non-zero weight."""
        return np.isfinite(self.log_weights)

    def normalized(self) -> np.ndarray:
        """(n,) float: the weights scaled to sum to 1."""
        lw = self.log_weights
        return np.exp(lw - logsumexp(lw))

    def summary(self) -> str:
        """One sentence: method, frames used and effective sample size."""
        used = int(self.used.sum())
        share = 100.0 * self.effective_sample_size / max(used, 1)
        return (f"{self.method} weights: {used} of {self.n_frames} frames used, effective sample size "
                f"{self.effective_sample_size:.1f} ({share:.1f}%)")


def _make(log_weights, offsets, kT, method, burn_in_time) -> FrameWeights:
    return FrameWeights(frozen(log_weights), frozen(offsets), float(kT), method, float(burn_in_time),
                        kish_effective_sample_size(log_weights))


def offset_weights(bias, frame_times, *, frame_bias=None, frame_cvs=None,
                   progress: Callable[[int, int], None] | None = None) -> FrameWeights:
    """Weights ``w = exp(beta (V_applied - c(t)))`` with c(t) from the bias as it was at each frame.

    Parameters
    ----------
    bias : GridBias
        The bias at the end of the run; its hill history must carry times (ps), non-decreasing.
    frame_times : (n,) float, ps
        Simulated time of each frame.
    frame_bias : (n,) float, kJ/mol, keyword-only
        The bias applied at each frame (grid part plus walls), as logged during the run. Or give
    frame_cvs : (n, d) float, CV units, keyword-only
        The CVs of each frame; the applied bias is then recomputed from the replayed bias (grid + walls).
    progress : callable(done, total), keyword-only, optional
        Called as the replay advances, for long histories.

    Returns
    -------
    FrameWeights
        ``method="time-independent offset"``.

    Notes
    -----
    ``w_t = exp(beta [V(s_t, t) - c(t)])`` with ``c(t)`` from :func:`time_independent_offset`. A frame at
    time t was sampled under the hills deposited strictly before t: a hill deposited at t is built from
    that very frame and could not have acted on it. So frames between two deposits share the c of the
    earlier one, and frames up to the first hill have c = 0. The logged ``frame_bias`` must be that bias
    too (log a frame before depositing at the same step). Walls enter through ``V_applied``; c(t) uses
    the grid part only (the walls do not change in time).

    References
    ----------
    P. Tiwary and M. Parrinello, J. Phys. Chem. B 119, 736 (2015).
    """
    times = as_series("frame_times", frame_times)
    if (frame_bias is None) == (frame_cvs is None):
        raise ParameterError(
            "give exactly one of frame_bias (kJ/mol, as logged) or frame_cvs (to recompute it)")
    if frame_bias is not None:
        applied = as_series("frame_bias", frame_bias)
        same_length(frame_times=times, frame_bias=applied)
        cvs = None
    else:
        cvs = as_points("frame_cvs", frame_cvs, bias.ndim)
        same_length(frame_times=times, frame_cvs=cvs)
        applied = np.empty(times.shape[0])
    counts = np.searchsorted(_hill_times(bias), times, side="left")
    needed, frame_slot = np.unique(counts, return_inverse=True)
    offsets_u = np.empty(needed.size)
    for done, (u, partial) in enumerate(_replay(bias, needed), start=1):
        offsets_u[u] = time_independent_offset(partial.values, bias.grid, bias.kT, bias.bias_factor)
        if cvs is not None:
            at = frame_slot == u
            applied[at] = partial.evaluate(cvs[at])[0]
        if progress is not None:
            progress(done, needed.size)
    offsets = offsets_u[frame_slot]
    log_weights = (applied - offsets) / bias.kT
    return _make(log_weights, offsets, bias.kT, "time-independent offset", -np.inf)


def final_bias_weights(bias, frame_times, frame_cvs, *,
                       burn_in_fraction: float = DEFAULT_BURN_IN_FRACTION) -> FrameWeights:
    """Weights ``w = exp(beta V_final(s))`` for the late, quasi-static part of the run.

    Parameters
    ----------
    bias : GridBias
        The bias at the end of the run (grid + walls are evaluated at the frames).
    frame_times : (n,) float, ps
    frame_cvs : (n, d) float, CV units
    burn_in_fraction : float in [0, 1), keyword-only, default 0.5
        Frames in the first ``burn_in_fraction`` of the frames' time span get zero weight: there the
        bias still grows quickly and is far from its final shape (common practice, no source; check that
        the answer does not move when this changes).

    Returns
    -------
    FrameWeights
        ``method="final bias"``, ``offsets`` all zero.

    Notes
    -----
    The umbrella-sampling identity for a static bias, ``<O>_0 = <O e^{beta V}>_b / <e^{beta V}>_b``
    (Torrie & Valleau, J. Comput. Phys. 23, 187, 1977), applied to frames sampled once the bias has become
    quasi-static, as proposed for incrementally deposited biases by Branduardi, Bussi & Parrinello
    (J. Chem. Theory Comput. 8, 2247, 2012). Valid for well-tempered runs late in the run; a standard run
    never becomes quasi-static, so prefer :func:`offset_weights` there.
    """
    times = as_series("frame_times", frame_times)
    cvs = as_points("frame_cvs", frame_cvs, bias.ndim)
    same_length(frame_times=times, frame_cvs=cvs)
    fraction = as_fraction("burn_in_fraction", burn_in_fraction)
    if times.size == 0:
        raise ParameterError("frame_times is empty: there are no frames to reweight")
    start = times.min() + fraction * (times.max() - times.min())
    keep = times >= start
    log_weights = np.full(times.shape[0], -np.inf)
    log_weights[keep] = bias.evaluate(cvs[keep])[0] / bias.kT
    return _make(log_weights, np.zeros(times.shape[0]), bias.kT, "final bias",
                 start if fraction > 0 else -np.inf)
