"""The replay check of a loaded bias: its table must be what its own hill history gives, to rounding.

A checkpoint stores both the bias table (node values and spline derivatives) and the hills that made it, so
a file whose checksum is right can still say two different things. `table_problem` finds out:

- up to `FULL_REPLAY_BUDGET` node updates (hills times footprint nodes times ``2**d`` tables, about half
  a second), the whole history is replayed into a fresh table and every entry compared;
- beyond that (large histories: a 48^3 grid replays 700-1,700 hills a second, so 10,000 hills take
  6-15 s; bench/README.md, Faults), a
  deterministic subset is checked: the node values at `SUBSET_NODES` nodes (the largest and smallest value
  and evenly spaced nodes of the flattened grid) are recomputed as the direct sum of every hill, and every
  spline-derivative table is checked along the grid lines through those nodes. A table altered only away
  from those nodes and lines is then not detected (it is still finite and loads as a bias).

Tolerance: ``8 n eps`` times the sum of the hill heights (n hills, eps the float64 rounding unit), at
least ``1e-12`` times that sum: the rounding of n additions.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["table_problem", "FULL_REPLAY_BUDGET", "SUBSET_NODES"]

#: Node updates (hills x footprint nodes x 2**d) up to which the whole history is replayed.
FULL_REPLAY_BUDGET = 50_000_000
#: Nodes whose values are recomputed from every hill when the history is too large to replay.
SUBSET_NODES = 32
_CHUNK = 1 << 15  # hills per block of the direct sum


def _tolerance(heights: np.ndarray) -> float:
    total = float(np.sum(heights))
    n = max(heights.size, 1)
    return max(8 * n * np.finfo(float).eps, 1e-12) * total + 1e-300


def replay_cost(bias) -> int:
    """Node updates a full replay of `bias`'s history costs."""
    grid = bias.grid
    footprint = 1
    for a in range(bias.ndim):
        with np.errstate(over="ignore"):  # an absurdly wide hill reaches the whole axis: inf is the answer
            reach = bias.cutoff * bias.sigma[a] / grid.spacing[a]
        footprint *= min(grid.shape[a], 2 * int(min(reach, 1e9)) + 3)
    return bias.n_hills * footprint * 2**bias.ndim


def table_problem(bias, coef: np.ndarray) -> str:
    """'' if the table `coef` (the layout of ``GridBias._kernel_args()[0]``) equals the replay of `bias`'s
    hill history to rounding, else one phrase saying where it does not."""
    heights = np.asarray(bias.history.heights)
    tol = _tolerance(heights)
    if replay_cost(bias) <= FULL_REPLAY_BUDGET:
        replayed = bias.rebuilt()._kernel_args()[0]
        worst = np.abs(replayed - coef)
        index = np.unravel_index(int(np.argmax(worst)), worst.shape)
        if worst[index] > tol:
            return (f"the table differs from the replay of its {bias.n_hills} hills by {worst[index]:.3g} "
                    f"at table entry {tuple(int(i) for i in index)} (allowed {tol:.3g})")
        return ""
    return _subset_problem(bias, coef, tol)


def _sample_nodes(values: np.ndarray) -> list:
    """Deterministic node indices (flattened): largest and smallest value, then evenly spaced nodes."""
    flat = values.reshape(-1)
    picks = [int(np.argmax(flat)), int(np.argmin(flat))]
    picks += np.linspace(0, flat.size - 1, SUBSET_NODES - 2).round().astype(int).tolist()
    return sorted(set(picks))


def _subset_problem(bias, coef, tol) -> str:
    shape = bias.grid.shape
    values = coef[0].reshape(shape)
    nodes = _sample_nodes(values)
    index_kd = np.array(np.unravel_index(nodes, shape)).T  # (k, d) node indices
    direct = _direct_sum(bias, index_kd)
    for j, node in enumerate(index_kd):
        got = values[tuple(node)]
        if abs(got - direct[j]) > tol:
            return (f"the value at node {tuple(int(i) for i in node)} is {got:.10g}, its {bias.n_hills} hills "
                    f"give {direct[j]:.10g} (checked at {len(nodes)} nodes; allowed {tol:.3g})")
    return _slope_problem(bias, coef, index_kd, tol)


def _direct_sum(bias, index_kd: np.ndarray) -> np.ndarray:
    """The grid value at each node, summed over every hill exactly as the deposit kernel shapes it."""
    grid = bias.grid
    centers = np.asarray(bias.history.centers)
    heights = np.asarray(bias.history.heights)
    total = np.zeros(index_kd.shape[0])
    for start in range(0, heights.size, _CHUNK):
        c = centers[start:start + _CHUNK]
        product = np.broadcast_to(heights[start:start + _CHUNK, None], (c.shape[0], index_kd.shape[0])).copy()
        for a in range(bias.ndim):
            n, spacing, sigma = grid.shape[a], grid.spacing[a], bias.sigma[a]
            u = (c[:, a] - grid.lower[a]) / spacing
            r = bias.cutoff * sigma / spacing
            if grid.periodic[a]:
                u = u - n * np.floor(u / n)
            dist = index_kd[None, :, a] - u[:, None]
            if grid.periodic[a]:
                dist -= n * np.floor(dist / n + 0.5)
            z = dist * spacing / sigma
            product *= np.where(np.abs(dist) <= r, np.exp(-0.5 * z * z), 0.0)
        total += product.sum(axis=0)
    return total


def _slope_problem(bias, coef, index_kd, tol) -> str:
    """Every derivative table m >= 1 must be the spline slope, along its lowest axis, of table m - bit."""
    from ._kernels import spline_slopes

    grid = bias.grid
    d = bias.ndim
    shape = grid.shape
    tables = coef.reshape((coef.shape[0],) + tuple(shape))
    slopes = None
    for m in range(1, 2**d):
        a = (m & -m).bit_length() - 1
        base = m ^ (1 << a)
        for node in index_kd:
            where = list(node)
            where[a] = slice(None)
            line = np.ascontiguousarray(tables[(base, *where)])
            if slopes is None or slopes.shape != line.shape:
                slopes = np.empty_like(line)
            spline_slopes(line, bool(grid.periodic[a]), slopes)
            worst = float(np.max(np.abs(slopes - tables[(m, *where)])))
            if worst > 4 * tol * max(1.0, math.sqrt(line.size)):
                return (f"derivative table {m} disagrees with the spline of table {base} along axis {a} by "
                        f"{worst:.3g} on the grid line through node {tuple(int(i) for i in node)}")
    return ""
