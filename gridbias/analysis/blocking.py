"""Block analysis of time-correlated series: the blocking curve and its plateau.

The method is that of Flyvbjerg & Petersen (J. Chem. Phys. 91, 461, 1989): average neighbouring pairs of
values again and again; the naive standard error of the mean grows with the block size until the blocks
are longer than the correlation time, then stays flat. The flat part (the plateau) is the standard error.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ._checks import as_count, as_series, frozen

__all__ = ["BlockingCurve", "blocking_curve", "DEFAULT_MIN_BLOCKS"]

#: Fewest blocks a plateau may be read at. Below about 30 blocks the estimate is too noisy to trust
#: (common practice, no source; the same threshold is quoted with the method).
DEFAULT_MIN_BLOCKS = 30


@dataclass(frozen=True, eq=False)
class BlockingCurve:
    """The blocking curve of one series and the standard error read from its plateau.

    Attributes
    ----------
    levels : (k,) int
        Blocking level; level ``l`` averages blocks of ``2**l`` consecutive values.
    block_sizes : (k,) int
        Values per block, ``2**levels``.
    n_blocks : (k,) int
        Blocks at each level (the tail that does not fill a block is dropped).
    standard_errors : (k,) float
        Naive standard error of the mean at each level, ``sqrt(c0 / (n_blocks - 1))``, in the series' units.
    standard_error_bars : (k,) float
        Uncertainty of each estimate, ``standard_errors / sqrt(2 (n_blocks - 1))``.
    mean : float
        Mean of the series (all values).
    plateau_level : int or None
        First level whose estimate agrees with the previous level's within their error bars, among the
        levels with at least ``min_blocks`` blocks. None when there is no such level: the series is too
        short for a reliable error.
    min_blocks : int
        Fewest blocks a plateau may be read at.
    """

    levels: np.ndarray
    block_sizes: np.ndarray
    n_blocks: np.ndarray
    standard_errors: np.ndarray
    standard_error_bars: np.ndarray
    mean: float
    plateau_level: int | None
    min_blocks: int

    @property
    def plateau_found(self) -> bool:
        """True when a plateau was found; otherwise ``standard_error`` is only a lower bound."""
        return self.plateau_level is not None

    @property
    def standard_error(self) -> float:
        """The standard error of the mean: the plateau value, or, without a plateau, the largest estimate
        among the levels with at least ``min_blocks`` blocks (a lower bound; NaN if no such level)."""
        return float(_chosen_errors(self.standard_errors, self.n_blocks,
                                    -1 if self.plateau_level is None else self.plateau_level,
                                    self.min_blocks))

    def summary(self) -> str:
        """One sentence: the mean, its standard error and how it was read."""
        if self.plateau_found:
            lvl = self.plateau_level
            return (f"mean {self.mean:.6g} +/- {self.standard_error:.3g} (plateau at level {lvl}: "
                    f"blocks of {self.block_sizes[lvl]} values, {self.n_blocks[lvl]} blocks)")
        return (f"mean {self.mean:.6g}; no plateau with >= {self.min_blocks} blocks: the series is too short "
                f"for a reliable error, which is at least {self.standard_error:.3g}")


def _pick_plateau(se_k, bar_k, n_blocks_k, min_blocks) -> np.ndarray:
    """Plateau level per series: se_k, bar_k (k,) or (k, m) -> int or (m,) int, -1 where none."""
    se = np.asarray(se_k, dtype=float)
    bar = np.asarray(bar_k, dtype=float)
    level = np.full(se.shape[1:], -1, dtype=np.int64)
    for k in range(1, se.shape[0]):
        if n_blocks_k[k] < min_blocks:
            break
        agree = np.abs(se[k] - se[k - 1]) <= bar[k] + bar[k - 1]
        level = np.where((level < 0) & agree, k, level)
    return level


def _chosen_errors(se_k, n_blocks_k, level, min_blocks) -> np.ndarray:
    """The plateau value where ``level >= 0``, else the largest estimate with >= min_blocks blocks."""
    se = np.asarray(se_k, dtype=float)
    level = np.asarray(level)
    usable = np.asarray(n_blocks_k) >= min_blocks
    if usable.any():
        with np.errstate(invalid="ignore"):
            bound = np.nanmax(np.where(usable.reshape((-1,) + (1,) * (se.ndim - 1)), se, -np.inf), axis=0)
    else:
        bound = np.full(se.shape[1:], np.nan)
    at_level = np.take_along_axis(se, np.maximum(level, 0).reshape((1,) + level.shape), axis=0)[0]
    return np.where(level >= 0, at_level, bound)


def blocking_curve(series, *, min_blocks: int = DEFAULT_MIN_BLOCKS) -> BlockingCurve:
    """Block the series until two blocks remain and read the standard error of its mean.

    Parameters
    ----------
    series : (n,) float
        Values in time order (n >= 4), any unit; equally spaced in time.
    min_blocks : int, keyword-only, default 30
        Fewest blocks a plateau may be read at (common practice, no source).

    Returns
    -------
    BlockingCurve

    Raises
    ------
    ParameterError
        If the series has fewer than 4 values or is not finite.

    Notes
    -----
    At each level with ``n_b`` blocks of means ``x_i``, ``c0 = (1/n_b) sum_i (x_i - xbar)**2`` and the
    standard error is ``sqrt(c0 / (n_b - 1)) * (1 +/- 1/sqrt(2 (n_b - 1)))``. Then neighbouring blocks are
    averaged, ``x'_i = (x_{2i-1} + x_{2i}) / 2``, dropping an odd last block. The plateau is the first
    level whose estimate agrees with the previous one within the sum of their error bars, among levels
    with at least ``min_blocks`` blocks; without one, ``plateau_found`` is False.

    References
    ----------
    H. Flyvbjerg and H. G. Petersen, "Error estimates on averages of correlated data",
    J. Chem. Phys. 91, 461 (1989).

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(1).normal(size=4096)
    >>> curve = blocking_curve(x)
    >>> curve.plateau_found, round(curve.standard_error * 64, 1)
    (True, 1.0)
    """
    x = as_series("series", series)
    min_blocks = as_count("min_blocks", min_blocks, 2)
    if x.shape[0] < 4:
        raise ParameterError(f"series must hold at least 4 values for block analysis, got {x.shape[0]}")
    mean = float(x.mean())
    se, bar, n_blocks = [], [], []
    while x.shape[0] >= 2:
        nb = x.shape[0]
        c0 = float(np.mean((x - x.mean()) ** 2))
        err = np.sqrt(c0 / (nb - 1))
        se.append(err)
        bar.append(err / np.sqrt(2.0 * (nb - 1)))
        n_blocks.append(nb)
        half = nb // 2
        x = 0.5 * (x[0 : 2 * half : 2] + x[1 : 2 * half : 2])
    levels = np.arange(len(se))
    level = int(_pick_plateau(se, bar, n_blocks, min_blocks))
    return BlockingCurve(
        levels=frozen(levels),
        block_sizes=frozen(2 ** levels),
        n_blocks=frozen(np.array(n_blocks, dtype=np.int64)),
        standard_errors=frozen(se),
        standard_error_bars=frozen(bar),
        mean=mean,
        plateau_level=None if level < 0 else level,
        min_blocks=min_blocks,
    )


def ratio_standard_errors(bin_n, weight_n, n_bins, *, min_blocks=DEFAULT_MIN_BLOCKS):
    """Weighted bin probabilities and their block-analysis standard errors.

    The estimate of bin ``j`` is the ratio ``p_j = sum_i w_i [b_i = j] / sum_i w_i`` over all frames
    (frames with ``b_i = -1`` count only in the denominator). Consecutive frames are grouped into blocks
    of ``2**l`` frames; the block sums of the numerator (``N_bj``) and of the denominator (``D_b``) are
    linearised, ``z_bj = (N_bj - p_j D_b) / (block size * mean_i w_i)`` (first-order propagation
    through the ratio, common practice, no source), and blocked as in :func:`blocking_curve`. Pairs
    (block, bin) are kept sparse, so memory stays O(n) for any number of bins.

    Parameters
    ----------
    bin_n : (n,) int
        Bin of each frame, in time order; -1 for frames in no bin.
    weight_n : (n,) float
        Non-negative frame weights (any common scale; not all zero).
    n_bins : int
        Number of bins m.
    min_blocks : int, keyword-only

    Returns
    -------
    probability_m : (m,) float
    standard_error_m : (m,) float
        At each bin's own plateau, or a lower bound where it has none.
    plateau_found_m : (m,) bool
    """
    bin_n = np.asarray(bin_n, dtype=np.int64)
    w = np.asarray(weight_n, dtype=float)
    total = w.sum()
    if not total > 0:
        raise ParameterError("the frame weights sum to zero: no frame carries weight")
    inside = bin_n >= 0
    pair_block = np.flatnonzero(inside)
    pair_bin = bin_n[inside]
    pair_sum = w[inside]
    p_m = np.bincount(pair_bin, weights=pair_sum, minlength=n_bins) / total
    block_sum = w
    d_mean = w.mean()  # mean denominator per block, at block size 1; doubles with each level
    se_levels, bar_levels, n_blocks = [], [], []
    while block_sum.shape[0] >= 2:
        nb = block_sum.shape[0]
        s_n = np.bincount(pair_bin, weights=pair_sum, minlength=n_bins)
        s_nn = np.bincount(pair_bin, weights=pair_sum**2, minlength=n_bins)
        s_nd = np.bincount(pair_bin, weights=pair_sum * block_sum[pair_block], minlength=n_bins)
        s_d = block_sum.sum()
        s_dd = float(np.dot(block_sum, block_sum))
        mean_z = (s_n - p_m * s_d) / (nb * d_mean)
        mean_z2 = (s_nn - 2.0 * p_m * s_nd + p_m**2 * s_dd) / (nb * d_mean**2)
        c0 = np.maximum(mean_z2 - mean_z**2, 0.0)
        err = np.sqrt(c0 / (nb - 1))
        se_levels.append(err)
        bar_levels.append(err / np.sqrt(2.0 * (nb - 1)))
        n_blocks.append(nb)
        half = nb // 2
        block_sum = block_sum[0 : 2 * half : 2] + block_sum[1 : 2 * half : 2]
        d_mean *= 2.0
        keep = pair_block < 2 * half
        key = (pair_block[keep] // 2) * n_bins + pair_bin[keep]
        unique_key, inverse = np.unique(key, return_inverse=True)
        pair_sum = np.bincount(inverse, weights=pair_sum[keep])
        pair_block = unique_key // n_bins
        pair_bin = unique_key % n_bins
    se_km = np.array(se_levels).reshape(len(se_levels), n_bins)
    bar_km = np.array(bar_levels).reshape(len(se_levels), n_bins)
    level_m = _pick_plateau(se_km, bar_km, n_blocks, min_blocks)
    return p_m, _chosen_errors(se_km, n_blocks, level_m, min_blocks), level_m >= 0
