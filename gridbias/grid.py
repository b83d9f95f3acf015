"""The regular grid a bias lives on: axes, periodicity, spacing, wrapping and validation."""

from __future__ import annotations

import numpy as np

from .errors import GridError

__all__ = ["Grid", "MAX_DIMENSIONS"]

MAX_DIMENSIONS = 3


def _as_vector(name, value, ndim=None, dtype=float):
    arr = np.atleast_1d(np.asarray(value, dtype=dtype))
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
        bins_raw = np.atleast_1d(np.asarray(bins))
        if bins_raw.ndim != 1 or bins_raw.shape[0] != ndim:
            raise GridError(f"bins must have {ndim} entries (one per axis), got {bins!r}")
        if periodic is None:
            periodic_d = np.zeros(ndim, dtype=bool)
        else:
            periodic_d = np.atleast_1d(np.asarray(periodic))
            if periodic_d.ndim != 1 or periodic_d.shape[0] != ndim:
                raise GridError(f"periodic must have {ndim} entries (one per axis), got {periodic!r}")
            if not all(isinstance(p, (bool, np.bool_)) for p in periodic_d.tolist()):
                raise GridError(f"periodic must hold True/False per axis, got {periodic!r}")
            periodic_d = periodic_d.astype(bool)
        bins_d = np.empty(ndim, dtype=np.int64)
        for i in range(ndim):
            lo, up, b = lower_d[i], upper_d[i], bins_raw[i]
            if not (np.isfinite(lo) and np.isfinite(up)):
                raise GridError(f"axis {i}: lower ({lo}) and upper ({up}) must be finite")
            if not up > lo:
                raise GridError(f"axis {i}: upper ({up}) must exceed lower ({lo})")
            if isinstance(b, (bool, np.bool_)) or not float(b).is_integer():
                raise GridError(f"axis {i}: bins must be an integer >= 2, got {b!r}")
            if int(b) < 2:
                raise GridError(f"axis {i}: bins must be an integer >= 2, got {int(b)}")
            bins_d[i] = int(b)
        for arr in (lower_d, upper_d, bins_d, periodic_d):
            arr.setflags(write=False)
        self._lower, self._upper, self._bins, self._periodic = lower_d, upper_d, bins_d, periodic_d

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
        return int(np.prod(self.shape))

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
