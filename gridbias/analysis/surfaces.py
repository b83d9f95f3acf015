"""The free-energy surface from the bias, at the end of a run or at any past time (replaying the hills)."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..grid import Grid
from ._checks import as_count, as_series, frozen, preview

__all__ = ["Surface", "SurfaceSeries", "surface_at", "surface_series", "iter_surfaces",
           "hills_deposited_by", "evenly_spaced_times"]


@dataclass(frozen=True, eq=False)
class Surface:
    """A free-energy surface on the bias grid at one moment of the run.

    Attributes
    ----------
    grid : Grid
        The bias grid; ``free_energy`` is given at its nodes.
    free_energy : float array of shape ``grid.shape``, kJ/mol
        Minimum 0. Standard metadynamics ``-V``; well-tempered ``-(gamma/(gamma-1)) V``.
    time : float, ps
        The moment requested by time; otherwise the time of the last hill included (NaN when the hills
        carry no time or none was included).
    n_hills : int
        Hills included.
    kT : float, kJ/mol
    bias_factor : float or None
        gamma, or None for standard metadynamics.
    """

    grid: Grid
    free_energy: np.ndarray
    time: float
    n_hills: int
    kT: float
    bias_factor: float | None


@dataclass(frozen=True, eq=False)
class SurfaceSeries:
    """Free-energy surfaces at several moments of the run.

    Attributes
    ----------
    grid : Grid
    times : (m,) float, ps
        The moments requested by time; otherwise the time of the last hill included (NaN where unknown).
    n_hills : (m,) int
        Hills included in each surface.
    free_energy : float array of shape ``(m,) + grid.shape``, kJ/mol
        Each surface shifted to minimum 0.
    kT : float, kJ/mol
    bias_factor : float or None
    """

    grid: Grid
    times: np.ndarray
    n_hills: np.ndarray
    free_energy: np.ndarray
    kT: float
    bias_factor: float | None

    def __len__(self) -> int:
        return self.n_hills.shape[0]

    def __getitem__(self, i) -> Surface:
        return Surface(self.grid, self.free_energy[i], float(self.times[i]), int(self.n_hills[i]),
                       self.kT, self.bias_factor)


def _free_energy_from_values(values, bias_factor) -> np.ndarray:
    factor = 1.0 if bias_factor is None else bias_factor / (bias_factor - 1.0)
    fes = -factor * np.asarray(values, dtype=float)
    return fes - fes.min()


def _hill_times(bias) -> np.ndarray:
    times = np.asarray(bias.history.times, dtype=float)
    if times.size and np.isnan(times).any():
        first = int(np.flatnonzero(np.isnan(times))[0])
        raise ParameterError(
            f"bias.history.times has no time for hill {first} (deposited without time=...): "
            "select past moments by hill count (n_hills=...) instead of by time")
    if times.size > 1 and (np.diff(times) < 0).any():
        bad = int(np.flatnonzero(np.diff(times) < 0)[0])
        raise ParameterError(
            f"bias.history.times must be non-decreasing to select hills by time, but hill {bad + 1} "
            f"({times[bad + 1]} ps) comes after hill {bad} ({times[bad]} ps)")
    return times


def hills_deposited_by(bias, times) -> np.ndarray:
    """How many hills the bias held at each of the given times.

    A hill deposited exactly at ``t`` counts as present at ``t``.

    Parameters
    ----------
    bias : GridBias
        Its hill history must carry times (ps), in non-decreasing order.
    times : (m,) float, ps

    Returns
    -------
    (m,) int
        Number of hills with deposition time ``<= t``.

    Raises
    ------
    ParameterError
        If the history has hills without time or out of time order, or ``times`` is not finite.
    """
    t = as_series("times", np.atleast_1d(times))
    return np.searchsorted(_hill_times(bias), t, side="right").astype(np.int64)


def evenly_spaced_times(bias, n_points: int) -> np.ndarray:
    """``n_points`` times (ps) evenly spaced from the first to the last hill of the history.

    Parameters
    ----------
    bias : GridBias
        With at least one timed hill.
    n_points : int >= 1

    Returns
    -------
    (n_points,) float, ps
    """
    n_points = as_count("n_points", n_points, 1)
    times = _hill_times(bias)
    if times.size == 0:
        raise ParameterError("the bias has no hills yet: there is no run time to sample")
    return np.linspace(times[0], times[-1], n_points)


def _check_counts(bias, n_hills) -> np.ndarray:
    counts = np.atleast_1d(np.asarray(n_hills))
    if counts.ndim != 1 or counts.size == 0 or not np.issubdtype(counts.dtype, np.integer):
        raise ParameterError(f"n_hills must be a non-empty 1-D sequence of integers, got {n_hills!r}")
    if (counts < 0).any() or (counts > bias.n_hills).any():
        raise ParameterError(
            f"n_hills must lie in 0..{bias.n_hills} (the hills deposited), got {preview(counts)}")
    return counts.astype(np.int64)


def _replay(bias, counts) -> Iterator:
    """Yield (n, partial) for each count in ``counts`` (any order); ``partial`` holds the first n hills.

    One copy is replayed forward once, hills added in chunks; ``partial`` is the same object each time,
    so callers must read what they need before the next step.
    """
    order = np.argsort(counts, kind="stable")
    partial = bias.rebuilt(0)
    history = bias.history
    done = 0
    for i in order:
        n = int(counts[i])
        if n > done:
            partial.add_hills(history.centers[done:n], history.heights[done:n], history.times[done:n])
            done = n
        yield int(i), partial


def _time_of(bias, n) -> float:
    return float(bias.history.times[n - 1]) if n > 0 else float("nan")


def surface_at(bias, *, time=None, n_hills=None) -> Surface:
    """The free-energy surface from the bias as it was at a past time, or now.

    Parameters
    ----------
    bias : GridBias
    time : float, ps, keyword-only, optional
        Use the hills deposited at or before this time (the history must carry times).
    n_hills : int, keyword-only, optional
        Use the first ``n_hills`` hills. Give ``time`` or ``n_hills``, not both; neither means now.

    Returns
    -------
    Surface

    Notes
    -----
    Standard metadynamics: ``F(s) = -V(s, t)`` (Laio & Parrinello, PNAS 99, 12562, 2002).
    Well-tempered: ``F(s) = -(gamma/(gamma-1)) V(s, t)`` (Barducci, Bussi & Parrinello, PRL 100, 020603,
    2008). Both hold up to a constant, only once the bias has filled the wells; the surface is shifted to
    minimum 0. Walls are not part of it: do not read the surface within about 2 sigma of a wall (common
    practice, no source).
    """
    if time is not None and n_hills is not None:
        raise ParameterError(f"give time or n_hills, not both (got time={time!r}, n_hills={n_hills!r})")
    if time is None and n_hills is None:
        counts, stamps = np.array([bias.n_hills]), np.array([_time_of(bias, bias.n_hills)])
    else:
        counts, stamps = _counts_from(bias, None if time is None else [time],
                                      None if n_hills is None else [n_hills])
    n = int(counts[0])
    values = bias.values if n == bias.n_hills else bias.rebuilt(n).values
    return Surface(bias.grid, frozen(_free_energy_from_values(values, bias.bias_factor)), float(stamps[0]),
                   n, bias.kT, bias.bias_factor)


def iter_surfaces(bias, *, times=None, n_hills=None) -> Iterator[Surface]:
    """Yield the surfaces at increasing past moments, replaying the hills once.

    Parameters
    ----------
    bias : GridBias
    times : (m,) float, ps, keyword-only
        Moments, in non-decreasing order. Or give
    n_hills : (m,) int, keyword-only
        Hill counts, in non-decreasing order.

    Yields
    ------
    Surface
        One per requested moment, in the order given.
    """
    counts, stamps = _counts_from(bias, times, n_hills)
    if (np.diff(counts) < 0).any():
        raise ParameterError(f"times / n_hills must be in non-decreasing order, got {preview(counts)} hills")
    for i, partial in _replay(bias, counts):
        yield Surface(bias.grid, frozen(_free_energy_from_values(partial.values, bias.bias_factor)),
                      float(stamps[i]), int(counts[i]), bias.kT, bias.bias_factor)


def _counts_from(bias, times, n_hills):
    """(counts (m,) int, stamps (m,) float ps) for moments given by time or by hill count."""
    if (times is None) == (n_hills is None):
        raise ParameterError(
            f"give exactly one of times (ps) or n_hills, got times={times!r}, n_hills={n_hills!r}")
    if times is not None:
        stamps = as_series("times", np.atleast_1d(times))
        return hills_deposited_by(bias, stamps), stamps
    counts = _check_counts(bias, n_hills)
    return counts, np.array([_time_of(bias, int(n)) for n in counts])


def surface_series(bias, *, times=None, n_hills=None, n_points: int = 20,
                   progress: Callable[[int, int], None] | None = None) -> SurfaceSeries:
    """Free-energy surfaces at several past moments, from one forward replay of the hills.

    Parameters
    ----------
    bias : GridBias
    times : (m,) float, ps, keyword-only, optional
        Moments (any order). Or give
    n_hills : (m,) int, keyword-only, optional
        Hill counts. With neither, ``n_points`` times evenly spaced over the run are used.
    n_points : int, keyword-only, default 20
    progress : callable(done, total), keyword-only, optional
        Called after each surface, for long histories.

    Returns
    -------
    SurfaceSeries
        Surfaces in the order requested. Memory: ``m * grid.size * 8`` bytes.

    Notes
    -----
    The replay adds the hills with their recorded heights (no height rule is re-applied), so the last
    surface equals ``surface_at(bias)`` bit for bit when it includes every hill.
    """
    if times is None and n_hills is None:
        times = evenly_spaced_times(bias, n_points)
    counts, stamps = _counts_from(bias, times, n_hills)
    fes = np.empty((counts.size,) + tuple(bias.grid.shape))
    for done, (i, partial) in enumerate(_replay(bias, counts), start=1):
        fes[i] = _free_energy_from_values(partial.values, bias.bias_factor)
        if progress is not None:
            progress(done, counts.size)
    return SurfaceSeries(bias.grid, frozen(stamps), frozen(counts), frozen(fes), bias.kT, bias.bias_factor)
