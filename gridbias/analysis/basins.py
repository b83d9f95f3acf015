"""Basins on the CV grid: boxes the user names, or minima found on the surface with their catchment."""

from __future__ import annotations

import itertools
import string
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..grid import Grid
from ._checks import as_count, as_points, as_positive, frozen
from ._grid_sums import log_quadrature

__all__ = ["Basins", "Transitions", "basins_from_boxes", "find_basins", "basin_free_energies",
           "count_transitions", "DEFAULT_MIN_DEPTH_KT", "DEFAULT_CORE_KT"]

#: Minima shallower than this (kBT, below their lowest saddle) merge into a neighbour: a common
#: statistical noise level of a metadynamics surface is about 1 kBT (common practice, no source).
DEFAULT_MIN_DEPTH_KT = 2.0
#: A found basin's core: the nodes within this many kBT of its minimum (common practice, no source).
DEFAULT_CORE_KT = 1.0


def nearest_nodes(grid: Grid, pts) -> np.ndarray:
    """Flat index of the grid node nearest to each point (n, d), or -1 outside a non-periodic axis."""
    idx = np.rint((pts - grid.lower) / grid.spacing).astype(np.int64)
    inside = np.ones(pts.shape[0], dtype=bool)
    for axis in range(grid.ndim):
        if grid.periodic[axis]:
            idx[:, axis] %= grid.bins[axis]
        else:
            inside &= (idx[:, axis] >= 0) & (idx[:, axis] <= grid.bins[axis])
    idx = np.clip(idx, 0, np.array(grid.shape) - 1)
    return np.where(inside, np.ravel_multi_index(tuple(idx.T), grid.shape), -1)


@dataclass(frozen=True, eq=False)
class Basins:
    """Named regions of CV space, labelled on the grid nodes.

    Attributes
    ----------
    grid : Grid
    names : tuple of k str
    labels : int array of shape ``grid.shape``
        Basin index of each node, -1 for nodes in no basin.
    cores : int array of shape ``grid.shape``
        Basin index of the nodes in each basin's core (-1 elsewhere); transitions count core to core.
        For boxes the core is the whole box.
    markers : (k, d) float, CV units
        A point per basin for plots: the minimum of a found basin, the centre of a box.
    depths : (k,) float, kJ/mol
        For found basins, lowest saddle to another basin minus the basin's minimum (inf when there is one
        basin); NaN for boxes.
    boxes : tuple (lower (k, d), upper (k, d)) or None
        Box corners, CV units (on a periodic axis lower > upper wraps through the boundary); None for
        found basins.
    """

    grid: Grid
    names: tuple
    labels: np.ndarray
    cores: np.ndarray
    markers: np.ndarray
    depths: np.ndarray
    boxes: tuple | None

    @property
    def n_basins(self) -> int:
        """Number of basins k."""
        return len(self.names)

    def assign(self, points, *, core: bool = False) -> np.ndarray:
        """The basin of each point: (n, d) CV units -> (n,) int, -1 in no basin (or in no core).

        Boxes test membership exactly; found basins use the label of the nearest grid node (points
        outside a non-periodic axis of the grid get -1).
        """
        pts = as_points("points", points, self.grid.ndim)
        if self.boxes is not None:
            out = np.full(pts.shape[0], -1, dtype=np.int64)
            for b in range(self.n_basins):
                out[_in_box(self.grid, pts, self.boxes[0][b], self.boxes[1][b])] = b
            return out
        flat = nearest_nodes(self.grid, pts)
        table = np.asarray(self.cores if core else self.labels).ravel()
        return np.where(flat >= 0, table[np.maximum(flat, 0)], -1)


@dataclass(frozen=True, eq=False)
class Transitions:
    """Core-to-core transitions counted along a CV time series.

    Attributes
    ----------
    total : int
        Transitions between different basins' cores.
    matrix : (k, k) int
        ``matrix[a, b]`` transitions from core a to core b.
    """

    total: int
    matrix: np.ndarray


def _names(k) -> tuple:
    letters = string.ascii_uppercase
    return tuple(letters[i] if i < len(letters) else f"basin{i + 1}" for i in range(k))


def _axis_interval(grid, axis, low, high):
    """(start, width) of a box side; on periodic axes the side may wrap (width None: the whole axis)."""
    if grid.periodic[axis]:
        period = grid.span[axis]
        if high - low >= period:
            return low, None
        return low, (high - low) % period
    if not high > low:
        raise ParameterError(f"axis {axis}: a box's upper ({high}) must exceed its lower ({low}) on a "
                             "non-periodic axis")
    return low, high - low


def _in_box(grid, pts, low_d, high_d) -> np.ndarray:
    inside = np.ones(pts.shape[0], dtype=bool)
    for axis in range(grid.ndim):
        start, width = _axis_interval(grid, axis, low_d[axis], high_d[axis])
        if width is None:
            continue
        offset = pts[:, axis] - start
        if grid.periodic[axis]:
            offset = np.mod(offset, grid.span[axis])
        inside &= (offset >= 0) & (offset <= width)
    return inside


def _boxes_overlap(grid, low_a, high_a, low_b, high_b) -> bool:
    for axis in range(grid.ndim):
        sa, wa = _axis_interval(grid, axis, low_a[axis], high_a[axis])
        sb, wb = _axis_interval(grid, axis, low_b[axis], high_b[axis])
        if wa is None or wb is None:
            continue
        if grid.periodic[axis]:
            period = grid.span[axis]
            if not ((sb - sa) % period <= wa or (sa - sb) % period <= wb):
                return False
        elif max(sa, sb) > min(sa + wa, sb + wb):
            return False
    return True


def basins_from_boxes(grid: Grid, boxes: dict) -> Basins:
    """Basins given as boxes in CV space.

    Parameters
    ----------
    grid : Grid
        The bias grid (the boxes are labelled on its nodes).
    boxes : dict name -> (lower (d,), upper (d,))
        Box corners in CV units. On a periodic axis ``lower > upper`` wraps through the boundary. Boxes
        must not overlap and each must contain at least one grid node.

    Returns
    -------
    Basins
        ``cores`` equal ``labels``: a transition needs the trajectory to reach the other box.
    """
    if not isinstance(grid, Grid):
        raise ParameterError(f"grid must be a gridbias.Grid, got {type(grid).__name__}")
    if not isinstance(boxes, dict) or not boxes:
        raise ParameterError(f"boxes must be a non-empty dict name -> (lower, upper), got {boxes!r}")
    d = grid.ndim
    names, lows, highs = [], [], []
    for name, corners in boxes.items():
        try:
            low, high = corners
        except (TypeError, ValueError):
            raise ParameterError(f"boxes[{name!r}] must be a pair (lower, upper), got {corners!r}") from None
        low = np.atleast_1d(np.asarray(low, dtype=float))
        high = np.atleast_1d(np.asarray(high, dtype=float))
        finite = np.isfinite(low).all() and np.isfinite(high).all()
        if low.shape != (d,) or high.shape != (d,) or not finite:
            raise ParameterError(f"boxes[{name!r}] corners must be {d} finite numbers each, got {corners!r}")
        for axis in range(d):
            _axis_interval(grid, axis, low[axis], high[axis])
        names.append(str(name))
        lows.append(low)
        highs.append(high)
    for a, b in itertools.combinations(range(len(names)), 2):
        if _boxes_overlap(grid, lows[a], highs[a], lows[b], highs[b]):
            raise ParameterError(f"boxes {names[a]!r} and {names[b]!r} overlap; basins must be disjoint")
    nodes = grid.nodes().reshape(-1, d)
    labels = np.full(grid.size, -1, dtype=np.int64)
    markers = np.empty((len(names), d))
    for b in range(len(names)):
        inside = _in_box(grid, nodes, lows[b], highs[b])
        if not inside.any():
            raise ParameterError(f"box {names[b]!r} ({lows[b].tolist()} to {highs[b].tolist()}) contains no "
                                 f"grid node; widen it to at least one grid spacing {grid.spacing.tolist()}")
        labels[inside] = b
        for axis in range(d):
            start, width = _axis_interval(grid, axis, lows[b][axis], highs[b][axis])
            centre = start + 0.5 * (grid.span[axis] if width is None else width)
            if grid.periodic[axis]:
                centre = grid.lower[axis] + np.mod(centre - grid.lower[axis], grid.span[axis])
            markers[b, axis] = centre
    labels = labels.reshape(grid.shape)
    return Basins(grid, tuple(names), frozen(labels), frozen(labels), frozen(markers),
                  frozen(np.full(len(names), np.nan)), (frozen(np.array(lows)), frozen(np.array(highs))))


def _neighbour_offsets(d):
    return [o for o in itertools.product((-1, 0, 1), repeat=d) if any(o)]


def _shifted(grid, array, offset, fill):
    """``array`` at node + offset (wrapping periodic axes), ``fill`` where that leaves the grid."""
    out = array
    for axis, step in enumerate(offset):
        if step == 0:
            continue
        out = np.roll(out, -step, axis=axis)
        if not grid.periodic[axis]:
            edge = [slice(None)] * grid.ndim
            edge[axis] = -1 if step > 0 else 0
            out[tuple(edge)] = fill
    return out


def _descent_roots(grid, fes) -> np.ndarray:
    """Flat index of the minimum each node flows to by steepest descent (drop per index distance)."""
    flat_index = np.arange(grid.size).reshape(grid.shape)
    best_slope = np.zeros(grid.shape)
    target = flat_index.copy()
    for offset in _neighbour_offsets(grid.ndim):
        neighbour_f = _shifted(grid, fes, offset, np.inf)
        slope = (fes - neighbour_f) / np.sqrt(np.sum(np.square(offset)))
        better = slope > best_slope
        best_slope = np.where(better, slope, best_slope)
        target = np.where(better, _shifted(grid, flat_index, offset, -1), target)
    down = target.ravel()
    while True:
        nxt = down[down]
        if np.array_equal(nxt, down):
            return down
        down = nxt


def _saddles(grid, fes, roots):
    """Lowest saddle between each pair of adjacent catchments: arrays (a, b, height), a < b."""
    flat_f = fes.ravel()
    root_grid = roots.reshape(grid.shape)
    pairs_a, pairs_b, heights = [], [], []
    for offset in _neighbour_offsets(grid.ndim):
        other = _shifted(grid, root_grid, offset, -1).ravel()
        other_f = _shifted(grid, fes, offset, np.inf).ravel()
        cross = (other >= 0) & (other != roots)
        pairs_a.append(np.minimum(roots[cross], other[cross]))
        pairs_b.append(np.maximum(roots[cross], other[cross]))
        heights.append(np.maximum(flat_f[cross], other_f[cross]))
    a, b, h = (np.concatenate(x) for x in (pairs_a, pairs_b, heights))
    order = np.lexsort((h, b, a))
    a, b, h = a[order], b[order], h[order]
    first = np.ones(a.size, dtype=bool)
    first[1:] = (a[1:] != a[:-1]) | (b[1:] != b[:-1])
    return a[first], b[first], h[first]


def checked_surface(grid: Grid, free_energy) -> np.ndarray:
    """``free_energy`` as a float array of ``grid.shape``, finite everywhere, or ParameterError."""
    if not isinstance(grid, Grid):
        raise ParameterError(f"grid must be a gridbias.Grid, got {type(grid).__name__}")
    fes = np.asarray(free_energy, dtype=float)
    if fes.shape != tuple(grid.shape):
        raise ParameterError(f"free_energy must have the grid's shape {tuple(grid.shape)}, got {fes.shape}")
    if not np.isfinite(fes).all():
        raise ParameterError("free_energy must be finite at every node (got NaN or inf)")
    return fes


def find_basins(grid: Grid, free_energy, kT: float, *, min_depth_kT: float = DEFAULT_MIN_DEPTH_KT,
                core_kT: float = DEFAULT_CORE_KT) -> Basins:
    """Minima of a free-energy surface and their catchment regions.

    Parameters
    ----------
    grid : Grid
    free_energy : float array of shape ``grid.shape``, kJ/mol
        Finite everywhere (e.g. ``Surface.free_energy``).
    kT : float, kJ/mol
    min_depth_kT : float, keyword-only, default 2.0
        A minimum counts as a basin only if it lies at least this many kBT below the lowest saddle that
        leads to a deeper minimum; shallower ones merge into that neighbour.
    core_kT : float, keyword-only, default 1.0
        Core of each basin: its nodes within ``core_kT`` kBT of its minimum. Must be below
        ``min_depth_kT`` so that cores never touch.

    Returns
    -------
    Basins
        Ordered by their minimum free energy (the first is the global minimum), named "A", "B", ...

    Notes
    -----
    Each node points to the neighbour (all 3**d - 1 of them, wrapping periodic axes) with the steepest
    drop per index distance; following the pointers gives the catchment of each local minimum. Adjacent
    catchments are then merged in order of their saddle height (the saddle between two catchments is the
    lowest over their shared node pairs of the higher node) whenever the shallower minimum lies less than
    ``min_depth_kT`` below the saddle. Flat regions (e.g. never visited) merge the same way.
    """
    fes = checked_surface(grid, free_energy)
    kT = as_positive("kT", kT, "kJ/mol")
    min_depth = as_positive("min_depth_kT", min_depth_kT, "kBT") * kT
    core = as_positive("core_kT", core_kT, "kBT") * kT
    if core >= min_depth:
        raise ParameterError(f"core_kT ({core_kT}) must be below min_depth_kT ({min_depth_kT}) so that "
                             "basin cores stay apart")
    flat_f = fes.ravel()
    roots = _descent_roots(grid, fes)
    parent = {int(r): int(r) for r in np.unique(roots)}

    def find(x):
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    a, b, h = _saddles(grid, fes, roots)
    lowest_saddle = {}
    for i in np.argsort(h, kind="stable"):
        ra, rb = find(int(a[i])), find(int(b[i]))
        if ra == rb:
            continue
        deep, shallow = (ra, rb) if flat_f[ra] <= flat_f[rb] else (rb, ra)
        if h[i] - flat_f[shallow] < min_depth:
            parent[shallow] = deep
        else:
            for r in (ra, rb):
                lowest_saddle[r] = min(lowest_saddle.get(r, np.inf), float(h[i]))
    final = sorted({find(r) for r in parent}, key=lambda r: (flat_f[r], r))
    index_of = {r: k for k, r in enumerate(final)}
    lookup = np.array([index_of[find(int(r))] for r in roots])
    labels = lookup.reshape(grid.shape)
    minima = np.array(final)
    cores = np.where(fes < flat_f[minima][labels] + core, labels, -1)
    markers = grid.nodes().reshape(-1, grid.ndim)[minima]
    depths = np.array([lowest_saddle.get(r, np.inf) - flat_f[r] for r in final])
    return Basins(grid, _names(len(final)), frozen(labels), frozen(cores), frozen(markers), frozen(depths),
                  None)


def basin_free_energies(basins: Basins, free_energy, kT: float) -> np.ndarray:
    """Free energy of each basin from a surface on the grid.

    Parameters
    ----------
    basins : Basins
    free_energy : float array of shape ``grid.shape``, kJ/mol
    kT : float, kJ/mol

    Returns
    -------
    (k,) float, kJ/mol
        ``F_B = -kT ln sum_{s in B} exp(-F(s)/kT)`` (trapezoid weights on non-periodic axes), shifted so
        the lowest basin is 0; differences between basins do not depend on the shift (common practice,
        no source).
    """
    if not isinstance(basins, Basins):
        raise ParameterError(f"basins must be Basins (from basins_from_boxes or find_basins), got "
                             f"{type(basins).__name__}")
    fes = np.asarray(free_energy, dtype=float)
    if fes.shape != tuple(basins.grid.shape):
        raise ParameterError(
            f"free_energy must have the grid's shape {tuple(basins.grid.shape)}, got {fes.shape}")
    kT = as_positive("kT", kT, "kJ/mol")
    log_terms = (log_quadrature(basins.grid) - fes / kT).ravel()
    labels = basins.labels.ravel()
    top = log_terms.max()
    sums = np.bincount(labels[labels >= 0], weights=np.exp(log_terms[labels >= 0] - top),
                       minlength=basins.n_basins)
    with np.errstate(divide="ignore"):
        out = -kT * (np.log(sums) + top)
    return out - out.min()


def count_transitions(core_labels, n_basins: int) -> Transitions:
    """Count transitions between basin cores along a CV time series (core-to-core definition).

    Parameters
    ----------
    core_labels : (n,) int
        Core of each frame in time order (``Basins.assign(cvs, core=True)``), -1 outside every core.
    n_basins : int
        Number of basins k.

    Returns
    -------
    Transitions

    Notes
    -----
    The state is the last core visited; a transition is counted when the trajectory enters a core other
    than that one. Leaving a core and coming back to it is not a transition, which filters out the fast
    recrossings of the boundary region (hysteresis; common practice, no source). Count one trajectory at
    a time: frames of different walkers must not be interleaved.
    """
    n_basins = as_count("n_basins", n_basins, 1)
    labels = np.asarray(core_labels)
    if labels.ndim != 1 or not np.issubdtype(labels.dtype, np.integer):
        raise ParameterError(f"core_labels must be a 1-D integer array, got dtype {labels.dtype}, "
                             f"shape {labels.shape}")
    if labels.size and (labels.min() < -1 or labels.max() >= n_basins):
        raise ParameterError(
            f"core_labels must lie in -1..{n_basins - 1}, got {labels.min()}..{labels.max()}")
    visited = labels[labels >= 0]
    change = np.flatnonzero(visited[1:] != visited[:-1])
    matrix = np.zeros((n_basins, n_basins), dtype=np.int64)
    np.add.at(matrix, (visited[change], visited[change + 1]), 1)
    return Transitions(int(change.size), frozen(matrix))
