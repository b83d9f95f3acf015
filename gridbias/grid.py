"""The regular grid a bias lives on: axes, periodicity, spacing, wrapping and validation."""

from __future__ import annotations

import math

import numpy as np

from .errors import GridError

__all__ = ["Grid", "MAX_DIMENSIONS", "MEMORY_BUDGET"]

MAX_DIMENSIONS = 3

#: Largest table a bias on a grid may hold, bytes: the node values and their spline derivatives
#: (``8 * 2**d`` bytes per node). 4 GiB allows 400^3 nodes in 3-D and 11,000^2 in 2-D (re-sending such a
#: table to OpenMM already takes about a minute); larger grids are refused before anything is allocated
#: (a typo in ``bins`` must not exhaust the machine's memory).
MEMORY_BUDGET = 4 * 2**30

# Fewest float64 steps an axis must span: a spacing below ~1e-12 of the coordinates cannot be resolved.
_RESOLUTION = 1e-12


def _as_vector(name, value, ndim=None, dtype=float):
    try:
        arr = np.atleast_1d(np.asarray(value, dtype=dtype))
    except (TypeError, ValueError, OverflowError):
        raise GridError(f"{name} must be a number or a flat sequence of numbers, got {str(value)[:80]!r}") from None
    if arr.ndim != 1:
        raise GridError(f"{name} must be a number or a flat sequence, got shape {arr.shape}")
    if ndim is not None and arr.shape[0] != ndim:
        raise GridError(f"{name} has {arr.shape[0]} entries but the grid has {ndim} axes")
    return arr


class Grid:
    """A regular grid over ``d`` collective variables (1 <= d <= 3).

    Parameters
    ----------
    lower, upper : (d,) float
        Axis limits in the CV's units (nm, rad, ...). ``upper > lower``.
    bins : (d,) int
        Number of intervals per axis (>= 2); spacing = (upper - lower) / bins.
    periodic : (d,) bool, optional
        Periodic axes (default all False). A periodic axis has ``bins`` distinct nodes and ``upper``
        is the same point as ``lower``; a non-periodic axis has ``bins + 1`` nodes.

    Notes
    -----
    A Grid is immutable; two grids are equal when all four specifications are equal.
    """

    __slots__ = ("_lower", "_upper", "_bins", "_periodic")

    def __init__(self, lower, upper, bins, periodic=None):
        lower_d = _as_vector("lower", lower)
        ndim = lower_d.shape[0]
        if not 1 <= ndim <= MAX_DIMENSIONS:
            raise GridError(f"lower has {ndim} entries; gridbias supports 1 to {MAX_DIMENSIONS} CVs")
        upper_d = _as_vector("upper", upper, ndim)
        try:
            bins_raw = np.atleast_1d(np.asarray(bins))
        except (TypeError, ValueError, OverflowError):
            bins_raw = np.empty(0)
        if bins_raw.ndim != 1 or bins_raw.shape[0] != ndim or bins_raw.dtype.kind not in "iuf":
            raise GridError(f"bins must be {ndim} integers >= 2 (one per axis), got {str(bins)[:80]}")
        if periodic is None:
            periodic_d = np.zeros(ndim, dtype=bool)
        else:
            periodic_d = np.atleast_1d(np.asarray(periodic))
            if periodic_d.ndim != 1 or periodic_d.shape[0] != ndim:
                raise GridError(f"periodic must have {ndim} entries (one per axis), got {periodic!r}")
            if not all(isinstance(p, bool) for p in periodic_d.tolist()):
                raise GridError(f"periodic must hold True/False per axis, got {periodic!r}")
            periodic_d = periodic_d.astype(bool)
        bins_d = np.empty(ndim, dtype=np.int64)
        for i in range(ndim):
            lo, up, b = float(lower_d[i]), float(upper_d[i]), float(bins_raw[i])
            if not (np.isfinite(lo) and np.isfinite(up)):
                raise GridError(f"axis {i}: lower ({lo}) and upper ({up}) must be finite")
            if not up > lo:
                raise GridError(f"axis {i}: upper ({up}) must exceed lower ({lo})")
            if not math.isfinite(up - lo):
                raise GridError(f"axis {i}: the span upper - lower ({up} - {lo}) overflows a float; use a "
                                "span a float can hold")
            if not (math.isfinite(b) and b.is_integer() and 2 <= b <= 2**40):
                raise GridError(f"axis {i}: bins must be an integer >= 2, got {bins_raw[i]:.6g}")
            bins_d[i] = int(b)
            if (up - lo) / bins_d[i] <= _RESOLUTION * max(abs(lo), abs(up)):
                raise GridError(f"axis {i}: the spacing ({up} - {lo}) / {int(b)} is too fine for float64 "
                                f"coordinates of that size; use fewer bins or a smaller span")
        for arr in (lower_d, upper_d, bins_d, periodic_d):
            arr.setflags(write=False)
        self._lower, self._upper, self._bins, self._periodic = lower_d, upper_d, bins_d, periodic_d
        if self.table_bytes > MEMORY_BUDGET:
            raise GridError(
                f"bins {bins_d.tolist()} give {self.size:,} nodes, whose bias table needs "
                f"{self.table_bytes:,} bytes ({self.table_bytes / 2**30:.3g} GiB); the memory budget is "
                f"{MEMORY_BUDGET / 2**30:g} GiB (gridbias.grid.MEMORY_BUDGET): use fewer bins")

    # -- specification -------------------------------------------------------------------------
    @property
    def ndim(self) -> int:
        """Number of CVs (axes)."""
        return self._lower.shape[0]

    @property
    def lower(self) -> np.ndarray:
        """(d,) float: lower axis limits."""
        return self._lower

    @property
    def upper(self) -> np.ndarray:
        """(d,) float: upper axis limits."""
        return self._upper

    @property
    def bins(self) -> np.ndarray:
        """(d,) int: intervals per axis."""
        return self._bins

    @property
    def periodic(self) -> np.ndarray:
        """(d,) bool: periodic axes."""
        return self._periodic

    @property
    def spacing(self) -> np.ndarray:
        """(d,) float: node spacing per axis."""
        return (self._upper - self._lower) / self._bins

    @property
    def span(self) -> np.ndarray:
        """(d,) float: upper - lower (the period of a periodic axis)."""
        return self._upper - self._lower

    @property
    def shape(self) -> tuple:
        """Node counts per axis: ``bins`` on periodic axes, ``bins + 1`` otherwise."""
        return tuple(int(b) if p else int(b) + 1 for b, p in zip(self._bins, self._periodic, strict=True))

    @property
    def size(self) -> int:
        """Total number of nodes."""
        return math.prod(self.shape)

    @property
    def table_bytes(self) -> int:
        """Bytes of a bias table on this grid: node values and spline derivatives, ``8 * 2**d`` per node."""
        return 8 * 2**self.ndim * self.size

    @property
    def axes(self) -> list:
        """Node coordinates per axis: a list of d arrays of lengths ``shape``."""
        return [self._lower[i] + self.spacing[i] * np.arange(n) for i, n in enumerate(self.shape)]

    def nodes(self) -> np.ndarray:
        """All node coordinates, shape ``shape + (d,)`` (``indexing='ij'``)."""
        return np.stack(np.meshgrid(*self.axes, indexing="ij"), axis=-1)

    # -- points --------------------------------------------------------------------------------
    def wrap(self, points) -> np.ndarray:
        """Map periodic coordinates into ``[lower, upper)``; other axes unchanged. (n, d) or (d,)."""
        pts = np.array(points, dtype=float)
        if pts.shape[-1:] != (self.ndim,):
            raise GridError(f"points must have shape (d,) or (n, d) with d = {self.ndim}, got {pts.shape}")
        for i in np.flatnonzero(self._periodic):
            pts[..., i] = self._lower[i] + np.mod(pts[..., i] - self._lower[i], self.span[i])
        return pts

    def contains(self, points) -> np.ndarray:
        """True where a point lies in the grid (periodic axes always do). (n,) bool or a bool."""
        pts = np.asarray(points, dtype=float)
        if pts.shape[-1:] != (self.ndim,):
            raise GridError(f"points must have shape (d,) or (n, d) with d = {self.ndim}, got {pts.shape}")
        inside = np.ones(pts.shape[:-1], dtype=bool)
        for i in range(self.ndim):
            if not self._periodic[i]:
                inside &= (pts[..., i] >= self._lower[i]) & (pts[..., i] <= self._upper[i])
        return inside

    # -- identity ------------------------------------------------------------------------------
    def to_dict(self) -> dict:
        """A JSON-safe description; ``Grid.from_dict(g.to_dict()) == g``."""
        return {
            "lower": [float(x) for x in self._lower],
            "upper": [float(x) for x in self._upper],
            "bins": [int(x) for x in self._bins],
            "periodic": [bool(x) for x in self._periodic],
        }

    @classmethod
    def from_dict(cls, spec: dict) -> "Grid":
        """The grid `to_dict` described; GridError for anything else."""
        if not isinstance(spec, dict) or not {"lower", "upper", "bins", "periodic"} <= set(spec):
            raise GridError(f"a grid description needs lower, upper, bins and periodic, got {str(spec)[:80]}")
        return cls(spec["lower"], spec["upper"], spec["bins"], spec["periodic"])

    def describe_difference(self, other: "Grid") -> str:
        """One sentence naming how ``other`` differs from this grid ('' when equal)."""
        if not isinstance(other, Grid):
            return f"expected a Grid, got {type(other).__name__}"
        if other.ndim != self.ndim:
            return f"{self.ndim} axes vs {other.ndim} axes"
        for key, mine, theirs in (
            ("lower", self._lower, other._lower),
            ("upper", self._upper, other._upper),
            ("bins", self._bins, other._bins),
            ("periodic", self._periodic, other._periodic),
        ):
            if not np.array_equal(mine, theirs):
                return f"{key} {mine.tolist()} vs {theirs.tolist()}"
        return ""

    def __eq__(self, other):
        if not isinstance(other, Grid):
            return NotImplemented
        return self.describe_difference(other) == ""

    def __hash__(self):
        return hash(repr(self))

    def __repr__(self):
        spec = self.to_dict()
        return (f"Grid(lower={spec['lower']}, upper={spec['upper']}, bins={spec['bins']}, "
                f"periodic={spec['periodic']})")
