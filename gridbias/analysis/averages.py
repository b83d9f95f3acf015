"""Unbiased averages of any per-frame quantity, and probabilities of regions, with block-analysis errors."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ._checks import as_count, as_series, same_length
from .blocking import DEFAULT_MIN_BLOCKS, BlockingCurve, blocking_curve
from .reweighting import FrameWeights

__all__ = ["Average", "RegionProbability", "reweighted_average", "region_probability"]


@dataclass(frozen=True, eq=False)
class Average:
    """The unbiased-ensemble average of a per-frame quantity, with its statistical error.

    Attributes
    ----------
    value : float
        ``sum_i w_i x_i / sum_i w_i``, in the quantity's unit.
    error : float
        One standard error from block analysis (a lower bound when ``plateau_found`` is False).
    plateau_found : bool
        False when the blocking curve had no plateau with enough blocks: the run is too short for a
        reliable error, and ``error`` only bounds it from below.
    effective_sample_size : float
        Kish's effective number of frames behind the average (ignores time correlation).
    n_frames : int
        Frames that carry weight.
    blocking : BlockingCurve
        The blocking curve of the linearised estimator (for a plot).
    """

    value: float
    error: float
    plateau_found: bool
    effective_sample_size: float
    n_frames: int
    blocking: BlockingCurve

    def summary(self, unit: str = "") -> str:
        """One line: value +/- error, frames, and a flag when the error is only a lower bound."""
        unit = f" {unit}" if unit else ""
        flag = "" if self.plateau_found else " (no blocking plateau: the error is a lower bound)"
        return (f"{self.value:.6g} +/- {self.error:.2g}{unit} from {self.n_frames} frames (effective sample "
                f"size {self.effective_sample_size:.0f}){flag}")


@dataclass(frozen=True, eq=False)
class RegionProbability:
    """The unbiased probability of a region of configuration space (a basin, a state), with errors.

    Attributes
    ----------
    probability, error : float
        Weighted fraction of the frames inside the region, and one standard error (block analysis).
    free_energy, free_energy_error : float, kJ/mol
        ``-kT ln p`` against the whole ensemble (0 for p = 1; +inf when no weighted frame is inside) and
        ``kT * error / p``.
    plateau_found : bool
        As in :class:`Average`.
    n_inside : int
        Frames inside the region (unweighted).
    effective_sample_size : float
    kT : float, kJ/mol
    """

    probability: float
    error: float
    free_energy: float
    free_energy_error: float
    plateau_found: bool
    n_inside: int
    effective_sample_size: float
    kT: float

    def summary(self) -> str:
        """One line: probability +/- error and the free energy of the region."""
        flag = "" if self.plateau_found else " (no blocking plateau: the errors are lower bounds)"
        return (f"p = {self.probability:.4g} +/- {self.error:.2g} ({self.n_inside} frames inside); "
                f"-kT ln p = {self.free_energy:.3f} +/- {self.free_energy_error:.2f} kJ/mol{flag}")


def _check_weights(weights) -> None:
    if not isinstance(weights, FrameWeights):
        raise ParameterError(f"weights must be FrameWeights (from offset_weights, final_bias_weights or "
                             f"weights_at_steps), got {type(weights).__name__}")


def _normalised(weights: FrameWeights) -> tuple[np.ndarray, int]:
    """(weights from the first used frame on, scaled to max 1; that frame's index)."""
    used = weights.used
    if not used.any():
        raise ParameterError("no frame carries weight (all were left out, e.g. by the burn-in)")
    first = int(np.flatnonzero(used)[0])
    lw = weights.log_weights[first:]
    w = np.where(np.isfinite(lw), np.exp(lw - lw[np.isfinite(lw)].max()), 0.0)
    if w.size < 4:
        raise ParameterError(f"only {w.size} frames from the first weighted one on: block analysis needs at "
                             "least 4")
    return w, first


def _ratio(w, x, min_blocks) -> tuple[float, BlockingCurve]:
    """sum w x / sum w and the blocking curve of its linearised estimator z_i = w_i (x_i - A) / mean(w)."""
    total = w.sum()
    value = float(np.dot(w, x) / total)
    z = w * (x - value) / w.mean()  # first-order propagation through the ratio (common practice, no source)
    return value, blocking_curve(z, min_blocks=min_blocks)


def reweighted_average(weights: FrameWeights, values, *, min_blocks: int = DEFAULT_MIN_BLOCKS) -> Average:
    """The average of a per-frame quantity in the unbiased ensemble, with a block-analysis error.

    Parameters
    ----------
    weights : FrameWeights
        One weight per frame (``offset_weights``, ``final_bias_weights``, ``weights_at_steps``).
    values : (n,) float
        The quantity per frame, in time order, finite (any unit).
    min_blocks : int, keyword-only, default 30
        Fewest blocks a plateau may be read at (common practice, no source).

    Returns
    -------
    Average

    Notes
    -----
    ``A = sum_i w_i x_i / sum_i w_i``. Its error: the deviation of the ratio is, to first order,
    ``(1 / (n w_bar)) sum_i w_i (x_i - A)``, the mean of ``z_i = w_i (x_i - A) / w_bar``; the standard error
    of that mean is read from the plateau of its blocking curve (Flyvbjerg & Petersen, J. Chem. Phys. 91,
    461, 1989), which accounts for time correlation. It is statistical only: systematic errors of the
    weights (a bias still far from quasi-static, poor CVs) are not included.
    """
    _check_weights(weights)
    x = as_series("values", values)
    same_length(weights=weights.log_weights, values=x)
    min_blocks = as_count("min_blocks", min_blocks, 2)
    w, first = _normalised(weights)
    value, curve = _ratio(w, x[first:], min_blocks)
    return Average(value, curve.standard_error, curve.plateau_found, weights.effective_sample_size,
                   int(weights.used.sum()), curve)


def region_probability(weights: FrameWeights, inside, *,
                       min_blocks: int = DEFAULT_MIN_BLOCKS) -> RegionProbability:
    """The unbiased probability that a frame lies in a region, and its free energy ``-kT ln p``.

    Parameters
    ----------
    weights : FrameWeights
        One weight per frame.
    inside : (n,) bool
        True for the frames in the region, defined by any quantity (e.g. ``(rg < 0.9) & (phi < 0)``).
    min_blocks : int, keyword-only, default 30

    Returns
    -------
    RegionProbability

    Notes
    -----
    The reweighted average of the region's indicator (see :func:`reweighted_average`); the free energy's
    error is ``kT sigma_p / p`` (first order). Two regions' free-energy difference is
    ``-kT ln(p_A / p_B)``.
    """
    _check_weights(weights)
    flags = np.asarray(inside)
    if flags.dtype != bool:
        raise ParameterError(f"inside must be an array of bool (one per frame), got dtype {flags.dtype}")
    if flags.ndim != 1:
        raise ParameterError(f"inside must be 1-D (n,), got shape {flags.shape}")
    average = reweighted_average(weights, flags.astype(float), min_blocks=min_blocks)
    p, se = average.value, average.error
    kT = weights.kT
    free = -kT * math.log(p) if p > 0 else math.inf
    free_err = kT * se / p if p > 0 else math.nan
    n_inside = int((flags & weights.used).sum())
    return RegionProbability(p, se, free, free_err, average.plateau_found, n_inside,
                             weights.effective_sample_size, kT)
