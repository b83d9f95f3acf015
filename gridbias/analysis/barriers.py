"""Saddle points, barriers and minimum free-energy paths between adjacent basins, with block errors."""

from __future__ import annotations

import heapq
import itertools
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..grid import Grid
from ._checks import as_count, as_points, as_positive, frozen, same_length
from ._grid_sums import log_quadrature
from .basins import Basins, checked_surface, nearest_nodes
from .blocking import DEFAULT_MIN_BLOCKS, blocking_curve
from .reweighting import FrameWeights

__all__ = ["Crossing", "Crossings", "find_crossings"]

#: The exponent of the path weight exp((F - F_saddle)/kT) is capped here, so a path never overflows even
#: through nodes hundreds of kBT up (such nodes are then merely very expensive).
_MAX_EXPONENT = 600.0


@dataclass(frozen=True, eq=False)
class Crossing:
    """The way over from one basin to an adjacent one.

    Attributes
    ----------
    basins : (str, str)
        Names of the two basins, ``(a, b)``.
    saddle : (d,) float, CV units
        The saddle point: the lowest point of the highest crossing between the two basins (a grid node).
    saddle_free_energy : float, kJ/mol
        The surface at the saddle point.
    minima : (2, d) float, CV units
        The lowest node of each basin, where the barriers are measured from.
    barriers : (2,) float, kJ/mol
        ``F(saddle) - F(minimum of a)`` and ``F(saddle) - F(minimum of b)`` on the surface.
    barriers_reweighted : (2,) float, kJ/mol
        The same from the reweighted frames (the node cells' weighted populations); NaN without frames or
        where a cell holds no frame.
    barrier_errors : (2,) float, kJ/mol
        One block-analysis standard error of each barrier (NaN without frames).
    path : (n, d) float, CV units
        The minimum free-energy path: grid nodes from the minimum of a through the saddle point to the
        minimum of b (periodic axes wrapped into the grid).
    path_progress : (n,) float
        Position along the path, 0 at the minimum of a, 1 at the minimum of b (arc length in grid
        spacings, normalised).
    path_free_energy : (n,) float, kJ/mol
        The surface along the path, relative to the minimum of a.
    path_reweighted : (n,) float, kJ/mol
        The reweighted frames' free energy along the path, relative to the minimum of a (NaN where a
        node cell holds no frame, or without frames).
    path_errors : (n,) float, kJ/mol
        One block-analysis standard error of each path point relative to the minimum of a (NaN without
        frames).
    plateau_found : (2,) bool
        False where a barrier's blocking curve had no plateau: its error is then only a lower bound.
    """

    basins: tuple
    saddle: np.ndarray
    saddle_free_energy: float
    minima: np.ndarray
    barriers: np.ndarray
    barriers_reweighted: np.ndarray
    barrier_errors: np.ndarray
    path: np.ndarray
    path_progress: np.ndarray
    path_free_energy: np.ndarray
    path_reweighted: np.ndarray
    path_errors: np.ndarray
    plateau_found: np.ndarray


@dataclass(frozen=True, eq=False)
class Crossings:
    """Every crossing between adjacent basins of one surface.

    Attributes
    ----------
    crossings : tuple of Crossing
        One per pair of adjacent basins, in the order of the basins.
    kT : float, kJ/mol
    names : tuple of str
        The CV names used in :meth:`table` (default "CV 1", ...).
    """

    crossings: tuple
    kT: float
    names: tuple = ()

    def __len__(self) -> int:
        return len(self.crossings)

    def __iter__(self):
        return iter(self.crossings)

    def __getitem__(self, i) -> Crossing:
        return self.crossings[i]

    def between(self, a: str, b: str) -> Crossing:
        """The crossing between basins ``a`` and ``b`` (either order)."""
        for c in self.crossings:
            if set(c.basins) == {a, b}:
                return c
        pairs = ", ".join("-".join(c.basins) for c in self.crossings) or "none"
        raise ParameterError(f"no crossing between basins {a!r} and {b!r}; adjacent pairs: {pairs}")

    def table(self, *, format_point=None) -> str:
        """Saddle points and barriers as text, one line per crossing and side.

        ``format_point(point (d,)) -> str`` renders a point in CV units (default: the raw values).
        """
        if not self.crossings:
            return "saddle points: none (fewer than two adjacent basins)"
        show = format_point or (lambda p: "(" + ", ".join(f"{x:.4g}" for x in p) + ")")
        lines = ["saddle points and barriers (lowest point of the highest crossing; barrier = F(saddle) - "
                 "F(basin minimum)):"]
        width = max(len(name) for c in self.crossings for name in c.basins) + 1
        for c in self.crossings:
            lines.append(f"  {c.basins[0]} <-> {c.basins[1]}: saddle at {show(c.saddle)}")
            for side in (0, 1):
                value = c.barriers[side]
                label = f"{c.basins[side]}:"
                text = f"    from {label:<{width}} {value:8.3f} kJ/mol ({value / self.kT:6.2f} kBT)"
                if np.isfinite(c.barrier_errors[side]):
                    text += (f"; reweighted frames {c.barriers_reweighted[side]:.3f} +/- "
                             f"{c.barrier_errors[side]:.3f} kJ/mol")
                    if not c.plateau_found[side]:
                        text += " (no blocking plateau: error is a lower bound)"
                lines.append(text)
        return "\n".join(lines)


# ------------------------------------------------------------------------------------------- the graph
def _neighbours(grid):
    """(offsets (m, d) int, lengths (m,) in grid spacings, table (m, N) flat index or -1 off the grid)."""
    d = grid.ndim
    offsets = np.array([o for o in itertools.product((-1, 0, 1), repeat=d) if any(o)], dtype=np.int64)
    index = np.indices(grid.shape).reshape(d, -1).T
    shape = np.array(grid.shape)
    table = np.empty((offsets.shape[0], grid.size), dtype=np.int64)
    for m, off in enumerate(offsets):
        moved = index + off
        ok = np.ones(grid.size, dtype=bool)
        for axis in range(d):
            if grid.periodic[axis]:
                moved[:, axis] %= shape[axis]
            else:
                ok &= (moved[:, axis] >= 0) & (moved[:, axis] < shape[axis])
        flat = np.ravel_multi_index(tuple(np.clip(moved, 0, shape - 1).T), grid.shape)
        table[m] = np.where(ok, flat, -1)
    return offsets, np.sqrt((offsets**2).sum(axis=1)), table


def _bottleneck(table, fes, allowed, start, goal):
    """Lowest-maximum path from ``start`` to ``goal`` over ``allowed`` nodes: (saddle node, its F) or None."""
    best = np.full(fes.size, np.inf)
    previous = np.full(fes.size, -1, dtype=np.int64)
    best[start] = fes[start]
    heap = [(fes[start], start)]
    nbrs = table.T.tolist()
    while heap:
        level, node = heapq.heappop(heap)
        if level > best[node]:
            continue
        if node == goal:
            break
        for nxt in nbrs[node]:
            if nxt < 0 or not allowed[nxt]:
                continue
            cand = max(level, fes[nxt])
            if cand < best[nxt]:
                best[nxt] = cand
                previous[nxt] = node
                heapq.heappush(heap, (cand, nxt))
    if not np.isfinite(best[goal]):
        return None
    walk = [goal]
    while walk[-1] != start:
        walk.append(int(previous[walk[-1]]))
    route = np.array(walk)
    return int(route[np.argmax(fes[route])]), float(best[goal])


def _cheapest(table, lengths, cost, allowed, start, goal):
    """Path (flat node indices) from start to goal minimising sum(length * mean cost of the two nodes)."""
    dist = np.full(cost.size, np.inf)
    previous = np.full(cost.size, -1, dtype=np.int64)
    dist[start] = 0.0
    heap = [(0.0, start)]
    nbrs = table.T.tolist()
    lengths = lengths.tolist()
    while heap:
        here, node = heapq.heappop(heap)
        if here > dist[node]:
            continue
        if node == goal:
            break
        c0 = cost[node]
        for m, nxt in enumerate(nbrs[node]):
            if nxt < 0 or not allowed[nxt]:
                continue
            cand = here + lengths[m] * 0.5 * (c0 + cost[nxt])
            if cand < dist[nxt]:
                dist[nxt] = cand
                previous[nxt] = node
                heapq.heappush(heap, (cand, nxt))
    walk = [goal]
    while walk[-1] != start:
        walk.append(int(previous[walk[-1]]))
    return walk[::-1]


def _progress(grid, route):
    """Normalised arc length along a node route (grid spacings, minimum image on periodic axes)."""
    index = np.array(np.unravel_index(route, grid.shape)).T.astype(float)
    step = np.diff(index, axis=0)
    for axis in range(grid.ndim):
        if grid.periodic[axis]:
            n = grid.shape[axis]
            step[:, axis] = (step[:, axis] + n / 2) % n - n / 2
    arc = np.concatenate([[0.0], np.cumsum(np.sqrt((step**2).sum(axis=1)))])
    return arc / arc[-1] if arc[-1] > 0 else arc


# -------------------------------------------------------------------------------------------- frames
class _NodeFrames:
    """Weighted populations of node cells and block errors of their free-energy differences.

    The cell of a node is the node and its 3**d - 1 neighbours (3 grid spacings wide), so that a cell
    holds enough frames for an error bar; a frame belongs to the cell of its nearest node's neighbours.
    """

    def __init__(self, grid, weights, frame_cvs, min_blocks, table):
        cvs = as_points("frame_cvs", frame_cvs, grid.ndim)
        same_length(weights=weights.log_weights, frame_cvs=cvs)
        used = weights.used
        if not used.any():
            raise ParameterError("no frame carries weight: nothing to estimate barriers from")
        lw = weights.log_weights
        start = int(np.flatnonzero(used)[0])
        self.w = np.where(used[start:], np.exp(lw[start:] - lw[used].max()), 0.0)
        self.node = nearest_nodes(grid, cvs)[start:]
        self.log_q = log_quadrature(grid).ravel()
        self.table = table
        self.kT = weights.kT
        self.min_blocks = min_blocks
        self.mean_w = self.w.mean()
        self.total = self.w.sum()
        self._cells = {}

    def _cell(self, node):
        """(member mask (n,), ln of the cell's quadrature volume)."""
        if node not in self._cells:
            nodes = np.unique(np.append(self.table[:, node], node))
            nodes = nodes[nodes >= 0]
            volume = np.log(np.exp(self.log_q[nodes]).sum())
            self._cells[node] = (np.isin(self.node, nodes), volume)
        return self._cells[node]

    def difference(self, node, reference):
        """(F(node) - F(reference), error, plateau) in kJ/mol; NaN where either cell is empty."""
        if node == reference:
            return 0.0, 0.0, True
        in_n, vol_n = self._cell(node)
        in_r, vol_r = self._cell(reference)
        p_n = self.w[in_n].sum() / self.total
        p_r = self.w[in_r].sum() / self.total
        if p_n == 0 or p_r == 0 or self.w.size < 4:
            return np.nan, np.nan, False
        value = -self.kT * (np.log(p_n) - vol_n - np.log(p_r) + vol_r)
        series = self.w * (in_r / p_r - in_n / p_n) / self.mean_w
        curve = blocking_curve(series, min_blocks=self.min_blocks)
        return value, self.kT * curve.standard_error, curve.plateau_found


def _direct_pairs(levels):
    """Pairs whose direct crossing is as low as any route through other basins (minimax closure)."""
    best = levels.copy()
    k = best.shape[0]
    for c in range(k):
        best = np.minimum(best, np.maximum(best[:, c : c + 1], best[c : c + 1, :]))
    return [(a, b) for a, b in itertools.combinations(range(k), 2)
            if np.isfinite(levels[a, b]) and levels[a, b] <= best[a, b]]


# ---------------------------------------------------------------------------------------------- public
def find_crossings(grid: Grid, free_energy, kT: float, basins: Basins, *, weights: FrameWeights | None = None,
                   frame_cvs=None, names=(), min_blocks: int = DEFAULT_MIN_BLOCKS) -> Crossings:
    """Saddle point, barriers and minimum free-energy path for every pair of adjacent basins.

    Parameters
    ----------
    grid : Grid
    free_energy : float array of shape ``grid.shape``, kJ/mol
        Finite everywhere (e.g. ``Surface.free_energy``).
    kT : float, kJ/mol
    basins : Basins
        On ``grid`` (found on the surface, or boxes).
    weights : FrameWeights, keyword-only, optional
        Frame weights to the unbiased ensemble (e.g. ``offset_weights``), one per frame of
    frame_cvs : (n, d) float, CV units, keyword-only, optional
        The frames' CVs, in time order. With both, barriers and the path also come from the reweighted
        frames, with block-analysis errors (the same analysis as the basin differences).
    names : sequence of str, keyword-only
        CV names for the text table.
    min_blocks : int, keyword-only, default 30

    Returns
    -------
    Crossings

    Notes
    -----
    Nodes are linked to their 3**d - 1 neighbours (periodic axes wrap). Between basins a and b the saddle
    point is the highest node of the path from the minimum of a to the minimum of b, avoiding other
    basins, whose highest node is lowest (the lowest point of the highest crossing, found exactly on the
    grid). Two basins are adjacent when that crossing is no higher than every route through third basins
    (so a way over the unexplored top of a surface is not reported as a crossing). The minimum
    free-energy path runs from the minimum of a to the saddle point and on to the minimum of b, each leg
    the chain of nodes that minimises ``sum(step length * exp((F - F_saddle)/kT))``: the resistance of a
    diffusive crossing, which keeps the path in the valleys (common practice, no source). Errors: the
    weighted population of each node's cell is found from the frames, and the error of a difference
    ``F(node) - F(minimum)`` is the block-analysis standard error (Flyvbjerg & Petersen, J. Chem. Phys.
    91, 461, 1989) of its linearised series, as for basin differences; a node's cell is the node and its
    neighbours (3 grid spacings wide), so that it holds enough frames. The surface's own values carry
    the systematic errors of metadynamics (hills smooth a sharp saddle); compare both estimates.
    """
    fes = checked_surface(grid, free_energy)
    if not isinstance(basins, Basins):
        raise ParameterError(f"basins must be Basins (from basins_from_boxes or find_basins), got "
                             f"{type(basins).__name__}")
    if basins.grid != grid:
        raise ParameterError(f"basins were defined on another grid: {grid.describe_difference(basins.grid)}")
    kT = as_positive("kT", kT, "kJ/mol")
    min_blocks = as_count("min_blocks", min_blocks, 2)
    if (weights is None) != (frame_cvs is None):
        raise ParameterError("give both weights and frame_cvs for errors, or neither")
    frames = None
    if weights is not None:
        if not isinstance(weights, FrameWeights):
            raise ParameterError(f"weights must be FrameWeights, got {type(weights).__name__}")
    flat = fes.ravel()
    labels = basins.labels.ravel()
    _, lengths, table = _neighbours(grid)
    if weights is not None:
        frames = _NodeFrames(grid, weights, frame_cvs, min_blocks, table)
    minima = []
    for b in range(basins.n_basins):
        members = np.flatnonzero(labels == b)
        minima.append(int(members[np.argmin(flat[members])]))
    node_points = grid.nodes().reshape(-1, grid.ndim)
    k = basins.n_basins
    levels = np.full((k, k), np.inf)
    saddles = {}
    for a, b in itertools.combinations(range(k), 2):
        allowed = (labels == a) | (labels == b) | (labels == -1)
        found = _bottleneck(table, flat, allowed, minima[a], minima[b])
        if found is not None:
            saddles[a, b] = found[0]
            levels[a, b] = levels[b, a] = found[1]
    out = []
    for a, b in _direct_pairs(levels):
        allowed = (labels == a) | (labels == b) | (labels == -1)
        saddle, level = saddles[a, b], float(levels[a, b])
        cost = np.exp(np.minimum((flat - level) / kT, _MAX_EXPONENT))
        route = (_cheapest(table, lengths, cost, allowed, minima[a], saddle)
                 + _cheapest(table, lengths, cost, allowed, saddle, minima[b])[1:])
        route = np.array(route, dtype=np.int64)
        nan2 = np.full(2, np.nan)
        reweighted, errors, plateau = nan2.copy(), nan2.copy(), np.zeros(2, dtype=bool)
        path_rw = np.full(route.size, np.nan)
        path_err = np.full(route.size, np.nan)
        if frames is not None:
            for side, m in enumerate((minima[a], minima[b])):
                reweighted[side], errors[side], plateau[side] = frames.difference(saddle, m)
            for j, node in enumerate(route.tolist()):
                path_rw[j], path_err[j], _ = frames.difference(node, minima[a])
        out.append(Crossing(
            basins=(basins.names[a], basins.names[b]),
            saddle=frozen(node_points[saddle]),
            saddle_free_energy=float(level),
            minima=frozen(node_points[[minima[a], minima[b]]]),
            barriers=frozen([level - flat[minima[a]], level - flat[minima[b]]]),
            barriers_reweighted=frozen(reweighted),
            barrier_errors=frozen(errors),
            path=frozen(node_points[route]),
            path_progress=frozen(_progress(grid, route)),
            path_free_energy=frozen(flat[route] - flat[minima[a]]),
            path_reweighted=frozen(path_rw),
            path_errors=frozen(path_err),
            plateau_found=frozen(plateau),
        ))
    return Crossings(tuple(out), kT, tuple(str(n) for n in names))
