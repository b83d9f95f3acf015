"""Free energy along any per-frame quantity (biased or not), from weighted histograms with block errors."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ._checks import as_count, as_points, frozen, same_length
from .blocking import DEFAULT_MIN_BLOCKS, ratio_standard_errors
from .reweighting import FrameWeights

__all__ = ["Profile", "free_energy_along"]


@dataclass(frozen=True, eq=False)
class Profile:
    """A free-energy profile (1-D) or surface (2-D) along per-frame quantities, with error bars.

    Attributes
    ----------
    edges : tuple of d arrays (m_i + 1,)
        Bin edges per axis, in the quantities' units.
    free_energy : float array of shape (m_1, ..., m_d), kJ/mol
        ``-kT ln(p / bin volume)``, shifted to minimum 0; NaN in bins no weighted frame reached.
    error : same shape, kJ/mol
        One standard error from block analysis, ``kT * se(p) / p``. It is the error of each bin against
        the common normalisation (the shift to minimum 0 is not propagated), and it is statistical only:
        systematic errors of the weights (e.g. frames from the filling transient) are not included.
    probability : same shape
        Weighted fraction of all used frames in each bin (frames outside the edges count in the total).
    counts : same shape, int
        Frames with non-zero weight in each bin, unweighted.
    plateau_found : same shape, bool
        False where the bin's blocking curve had no plateau with enough blocks: there ``error`` is only
        a lower bound.
    kT : float, kJ/mol
    effective_sample_size : float
        Kish's effective number of frames behind the profile.
    names : tuple of str
        Axis labels given by the caller (may be empty strings).
    """

    edges: tuple
    free_energy: np.ndarray
    error: np.ndarray
    probability: np.ndarray
    counts: np.ndarray
    plateau_found: np.ndarray
    kT: float
    effective_sample_size: float
    names: tuple

    @property
    def ndim(self) -> int:
        """Number of axes d."""
        return len(self.edges)

    @property
    def centers(self) -> tuple:
        """Bin centres per axis: a tuple of d arrays (m_i,)."""
        return tuple(0.5 * (e[1:] + e[:-1]) for e in self.edges)


def _check_edges(edges, ndim) -> tuple:
    flat = isinstance(edges, np.ndarray) and edges.ndim == 1
    flat = flat or (isinstance(edges, (list, tuple)) and len(edges) > 0 and np.isscalar(edges[0]))
    if flat:
        edges = (edges,)
    if not isinstance(edges, (list, tuple)) or len(edges) != ndim:
        raise ParameterError(f"edges must give one array of bin edges per column of values ({ndim}), "
                             f"got {edges!r}")
    out = []
    for i, e in enumerate(edges):
        arr = np.asarray(e, dtype=float)
        if arr.ndim != 1 or arr.size < 2 or not np.isfinite(arr).all() or (np.diff(arr) <= 0).any():
            raise ParameterError(
                f"edges[{i}] must be at least 2 finite, strictly increasing values, got {e!r}")
        out.append(frozen(arr))
    return tuple(out)


def _bin_index(values_nd, edges) -> np.ndarray:
    """Flat bin index per frame (-1 outside); the last edge belongs to the last bin."""
    shape = tuple(e.size - 1 for e in edges)
    flat = np.zeros(values_nd.shape[0], dtype=np.int64)
    inside = np.ones(values_nd.shape[0], dtype=bool)
    for axis, e in enumerate(edges):
        x = values_nd[:, axis]
        idx = np.searchsorted(e, x, side="right") - 1
        idx[x == e[-1]] = e.size - 2
        inside &= (idx >= 0) & (idx < e.size - 1)
        flat = flat * shape[axis] + np.clip(idx, 0, e.size - 2)
    flat[~inside] = -1
    return flat


def free_energy_along(weights: FrameWeights, values, edges, *, names=(),
                      min_blocks: int = DEFAULT_MIN_BLOCKS) -> Profile:
    """The free energy along one or two per-frame quantities, reweighted to the unbiased ensemble.

    Parameters
    ----------
    weights : FrameWeights
        From :func:`offset_weights` or :func:`final_bias_weights`, one entry per frame.
    values : (n,) or (n, d) float
        The quantity per frame (a biased CV, a CV that was not biased, any observable), in time order.
    edges : (m + 1,) float, or a sequence of d such arrays
        Bin edges per axis, strictly increasing. Values outside the edges count only in the normalisation.
    names : sequence of str, keyword-only
        Axis labels kept with the result, for plots.
    min_blocks : int, keyword-only, default 30
        Fewest blocks a plateau may be read at.

    Returns
    -------
    Profile

    Notes
    -----
    ``p_j = sum_i w_i [x_i in j] / sum_i w_i``; ``F_j = -kT ln(p_j / vol_j)``, shifted to minimum 0. Errors:
    block analysis over consecutive frames (Flyvbjerg & Petersen, J. Chem. Phys. 91, 461, 1989) of the
    weighted bin numerators and the common denominator, propagated to first order through the ratio and
    the logarithm, ``sigma_F = kT sigma_p / p`` (common practice, no source). Frames must be in time order
    and one trajectory (do not interleave walkers).
    """
    if not isinstance(weights, FrameWeights):
        raise ParameterError(f"weights must be FrameWeights (from offset_weights or final_bias_weights), "
                             f"got {type(weights).__name__}")
    values_nd = as_points("values", values)
    same_length(weights=weights.log_weights, values=values_nd)
    d = values_nd.shape[1]
    edges = _check_edges(edges, d)
    names = tuple(str(n) for n in names) or ("",) * d
    if len(names) != d:
        raise ParameterError(f"names must give one label per axis ({d}), got {names!r}")
    min_blocks = as_count("min_blocks", min_blocks, 2)
    if values_nd.shape[0] < 4:
        raise ParameterError(f"values must hold at least 4 frames, got {values_nd.shape[0]}")
    used = weights.used
    if not used.any():
        raise ParameterError("no frame carries weight (all were left out, e.g. by the burn-in)")
    lw = weights.log_weights
    w = np.where(used, np.exp(lw - lw[used].max()), 0.0)
    bins = _bin_index(values_nd, edges)
    shape = tuple(e.size - 1 for e in edges)
    n_bins = int(np.prod(shape))
    first = int(np.flatnonzero(used)[0])
    p, se, plateau = ratio_standard_errors(bins[first:], w[first:], n_bins, min_blocks=min_blocks)
    counts = np.bincount(bins[used & (bins >= 0)], minlength=n_bins)
    volume = np.ones(shape)
    for axis, e in enumerate(edges):
        volume = volume * np.diff(e).reshape([-1 if a == axis else 1 for a in range(d)])
    p = p.reshape(shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        fes = np.where(p > 0, -weights.kT * np.log(p / volume), np.nan)
        error = np.where(p > 0, weights.kT * se.reshape(shape) / p, np.nan)
    if np.isfinite(fes).any():
        fes = fes - np.nanmin(fes)
    ess = weights.effective_sample_size
    return Profile(edges, frozen(fes), frozen(error), frozen(p), frozen(counts.reshape(shape)),
                   frozen(plateau.reshape(shape)), weights.kT, float(ess), names)
