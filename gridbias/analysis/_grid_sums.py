"""Log-space sums over the nodes of a grid: log-sum-exp and trapezoid weights."""

from __future__ import annotations

import math

import numpy as np

from ..grid import Grid

__all__ = ["logsumexp", "log_quadrature"]


def logsumexp(a) -> float:
    """``ln sum_i exp(a_i)`` without overflow; -inf for an empty or all -inf input."""
    a = np.asarray(a, dtype=float)
    top = np.max(a) if a.size else -np.inf
    if not np.isfinite(top):
        return float(top)
    return float(top + np.log(np.sum(np.exp(a - top))))


def log_quadrature(grid: Grid) -> np.ndarray:
    """ln of the trapezoid weights at the nodes, shape ``grid.shape``.

    End nodes of a non-periodic axis count half; every node of a periodic axis counts fully. The common
    factor (the cell volume) is left out: it cancels in every ratio the analysis takes.
    """
    log_w = np.zeros(grid.shape)
    for axis, periodic in enumerate(grid.periodic):
        if not periodic:
            edge = [slice(None)] * grid.ndim
            for end in (0, -1):
                edge[axis] = end
                log_w[tuple(edge)] += math.log(0.5)
    return log_w
