"""Append-only record of deposited hills: what convergence analysis and reweighting replay."""

from __future__ import annotations

import numpy as np

__all__ = ["HillHistory"]


class HillHistory:
    """Centres, heights and times of the hills deposited so far, in deposition order.

    Memory: ``8 * (d + 2)`` bytes per hill (32 B in 2-D), grown by doubling, so a million 2-D hills take
    32 MB. The arrays returned are read-only views; ``len(history)`` is the hill count.

    Parameters
    ----------
    ndim : int
        Number of CVs.
    """

    __slots__ = ("_ndim", "_centers", "_heights", "_times", "_n")

    def __init__(self, ndim: int, capacity: int = 1024):
        self._ndim = int(ndim)
        self._centers = np.empty((capacity, self._ndim))
        self._heights = np.empty(capacity)
        self._times = np.empty(capacity)
        self._n = 0

    def __len__(self) -> int:
        return self._n

    def _grow(self, needed: int):
        capacity = max(needed, 2 * self._heights.shape[0], 16)
        for name in ("_centers", "_heights", "_times"):
            old = getattr(self, name)
            new = np.empty((capacity,) + old.shape[1:])
            new[: self._n] = old[: self._n]
            setattr(self, name, new)

    def append(self, center, height: float, time: float):
        """Record one hill: center (d,), height kJ/mol, time ps (NaN when unknown)."""
        if self._n == self._heights.shape[0]:
            self._grow(self._n + 1)
        self._centers[self._n] = center
        self._heights[self._n] = height
        self._times[self._n] = time
        self._n += 1

    def extend(self, centers_kd, heights_k, times_k):
        """Record k hills at once: centers (k, d), heights (k,), times (k,)."""
        k = len(heights_k)
        if self._n + k > self._heights.shape[0]:
            self._grow(self._n + k)
        self._centers[self._n : self._n + k] = centers_kd
        self._heights[self._n : self._n + k] = heights_k
        self._times[self._n : self._n + k] = times_k
        self._n += k

    def _view(self, arr):
        view = arr[: self._n]
        view.flags.writeable = False
        return view

    @property
    def centers(self) -> np.ndarray:
        """(n, d) float: hill centres in CV units."""
        return self._view(self._centers)

    @property
    def heights(self) -> np.ndarray:
        """(n,) float: hill heights actually used, kJ/mol."""
        return self._view(self._heights)

    @property
    def times(self) -> np.ndarray:
        """(n,) float: simulated time of each deposit, ps (NaN where the caller gave none)."""
        return self._view(self._times)

    @property
    def nbytes(self) -> int:
        """Bytes held by the recorded hills (excluding spare capacity)."""
        return self._n * 8 * (self._ndim + 2)
