"""Boundary walls: one-sided polynomial restraints that keep a CV inside the region of interest."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import ParameterError

__all__ = ["Wall"]

_SIDES = {"above": 1.0, "below": -1.0}


@dataclass(frozen=True)
class Wall:
    """A one-sided wall on one CV.

    Energy ``k * (s - bound)**power`` when ``s > bound`` (``side="above"``), or
    ``k * (bound - s)**power`` when ``s < bound`` (``side="below"``); zero otherwise.

    Parameters
    ----------
    cv : int
        Index of the CV (0-based) the wall acts on.
    bound : float
        Where the wall starts, in the CV's units (nm, rad, ...).
    k : float
        Force constant, kJ/mol per unit**power (>= 0).
    side : {"above", "below"}
        Which side of ``bound`` is penalised.
    power : float, default 2
        Exponent (>= 1).

    Notes
    -----
    Walls are part of the applied bias and of ``GridBias.evaluate``; they are never stored on the grid,
    never enter the well-tempered height and never enter ``free_energy()``. Put a wall inside the grid,
    about 3 hill widths from its edge, so hills deposited near the wall are not cut by the grid edge.
    """

    cv: int
    bound: float
    k: float
    side: str
    power: float = 2.0

    def __post_init__(self):
        if isinstance(self.cv, bool) or not isinstance(self.cv, (int, np.integer)) or self.cv < 0:
            raise ParameterError(f"Wall cv must be a CV index (integer >= 0), got {self.cv!r}")
        for name in ("bound", "k", "power"):
            value = getattr(self, name)
            try:
                value = float(value)
            except (TypeError, ValueError):
                hint = ""
                if hasattr(value, "unit"):  # an openmm.unit quantity: the adapter converts those
                    hint = (f" (a Wall takes plain numbers in the CV's unit; with the OpenMM adapter give the "
                            f"wall as a dict, e.g. walls=[{{'cv': {self.cv}, '{name}': {value!r}, ...}}] in "
                            "make_bias, which converts quantities)")
                raise ParameterError(f"Wall {name} must be a number, got {value!r}{hint}") from None
            if not math.isfinite(value):
                raise ParameterError(f"Wall {name} must be finite, got {value!r}")
            object.__setattr__(self, name, value)
        object.__setattr__(self, "cv", int(self.cv))
        if self.k < 0:
            raise ParameterError(f"Wall k must be >= 0 kJ/mol per unit**power, got {self.k}")
        if self.side not in _SIDES:
            raise ParameterError(f"Wall side must be one of {sorted(_SIDES)}, got {self.side!r}")
        if self.power < 1:
            raise ParameterError(f"Wall power must be >= 1, got {self.power}")

    @property
    def sign(self) -> float:
        """+1 for a wall above its bound, -1 below."""
        return _SIDES[self.side]

    def energy_gradient(self, points):
        """Wall energy and gradient at points.

        Parameters
        ----------
        points : (n, d) float

        Returns
        -------
        energy_n : (n,) float, kJ/mol
        grad_nd : (n, d) float, kJ/mol per CV unit
        """
        cv_nd = np.atleast_2d(np.asarray(points, dtype=float))
        dist_n = self.sign * (cv_nd[:, self.cv] - self.bound)
        active = dist_n > 0
        dist_n = np.where(active, dist_n, 0.0)
        energy_n = np.where(active, self.k * dist_n**self.power, 0.0)
        grad_nd = np.zeros_like(cv_nd)
        grad_nd[:, self.cv] = np.where(active, self.sign * self.k * self.power * dist_n ** (self.power - 1), 0.0)
        return energy_n, grad_nd

    def to_dict(self) -> dict:
        return {"cv": self.cv, "bound": self.bound, "k": self.k, "side": self.side, "power": self.power}

    @classmethod
    def from_dict(cls, spec: dict) -> "Wall":
        return cls(int(spec["cv"]), spec["bound"], spec["k"], spec["side"], spec["power"])
