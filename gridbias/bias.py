"""GridBias: a metadynamics bias stored on a grid, with standard or well-tempered deposition and walls."""

from __future__ import annotations

import math
import warnings

import numpy as np

from . import _kernels
from .errors import CheckpointError, GridError, ParameterError
from .grid import Grid
from .history import HillHistory
from .walls import Wall

__all__ = ["GridBias", "KB", "DEFAULT_CUTOFF"]

#: Boltzmann constant in kJ/mol/K (CODATA 2018 gas constant R / 1000; exact since the 2019 SI).
KB = 0.00831446261815324

#: Hill footprint radius in widths: exp(-c**2 / 2) = 1e-6, so the truncated part is below 1e-6 of the height.
DEFAULT_CUTOFF = math.sqrt(2.0 * math.log(1e6))

_STATE_KIND = "gridbias.bias"
_STATE_VERSION = 1


def _positive_scalar(name, value, allowed):
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} must be a number ({allowed}), got {value!r}") from None
    if not (math.isfinite(x) and x > 0):
        raise ParameterError(f"{name} must be finite and {allowed}, got {value!r}")
    return x


class GridBias:
    """A metadynamics bias on a regular grid over 1-3 collective variables.

    Parameters
    ----------
    grid : Grid
        Where the bias is stored.
    sigma : (d,) float
        Gaussian hill widths, in CV units (nm, rad, ...).
    height : float
        Hill height in kJ/mol (the initial height for well-tempered metadynamics).
    temperature : float
        Simulation temperature, K.
    bias_factor : float or None, default None
        ``None`` is standard metadynamics (constant height). A number gamma > 1 selects well-tempered
        metadynamics: ``h = height * exp(-V(s) / (kB (gamma - 1) T))``, V the grid bias at the centre.
    walls : sequence of Wall, optional
        Boundary walls; part of the applied bias, never of the grid or of the free energy.
    cutoff : float, keyword-only
        Hill footprint radius in widths; the default truncates below 1e-6 of the height.

    Notes
    -----
    A hill is ``h * exp(-sum_i d_i**2 / (2 sigma_i**2))`` with ``d_i`` the minimum-image difference on
    periodic axes (Laio & Parrinello, PNAS 99, 12562, 2002). Between nodes the bias is exactly the
    function OpenMM's tabulated functions apply to the node values (natural splines on non-periodic
    axes, periodic splines on periodic axes, tensor-product cubic Hermite). Outside a non-periodic axis
    the grid part is zero and only the walls act; a deposit there adds nothing and is counted in
    ``n_outside``.

    Guarantees: ``GridBias.load(path)`` after ``save(path)`` restores the state bit for bit, so a loaded
    bias continues exactly as the original would have; replaying the history (``rebuilt()``) gives the
    same grid bit for bit.

    Examples
    --------
    >>> import numpy as np, gridbias as gb
    >>> grid = gb.Grid(lower=[-np.pi], upper=[np.pi], bins=[64], periodic=[True])
    >>> bias = gb.GridBias(grid, sigma=[0.3], height=1.2, temperature=300.0, bias_factor=10.0)
    >>> round(bias.deposit([0.0]), 6), round(bias.deposit([0.0]), 6)
    (1.2, 1.137539)
    """

    def __init__(self, grid, sigma, height, temperature, bias_factor=None, walls=(), *,
                 cutoff=DEFAULT_CUTOFF):
        if not isinstance(grid, Grid):
            raise ParameterError(f"grid must be a gridbias.Grid, got {type(grid).__name__}")
        d = grid.ndim
        sigma_d = np.atleast_1d(np.asarray(sigma, dtype=float))
        if sigma_d.shape != (d,):
            raise ParameterError(f"sigma must have {d} entries (one per CV), got {np.shape(sigma)}")
        for i, s in enumerate(sigma_d):
            if not (math.isfinite(s) and s > 0):
                raise ParameterError(f"sigma[{i}] must be finite and > 0 (CV units), got {s}")
        self._height = _positive_scalar("height", height, "> 0 kJ/mol")
        self._temperature = _positive_scalar("temperature", temperature, "> 0 K")
        if bias_factor is not None:
            gamma = _positive_scalar("bias_factor", bias_factor, "> 1 (None means standard metadynamics)")
            if gamma <= 1:
                raise ParameterError(
                    f"bias_factor must be > 1 for well-tempered metadynamics, got {bias_factor!r}; "
                    "use bias_factor=None for standard metadynamics")
            bias_factor = gamma
        self._bias_factor = bias_factor
        self._cutoff = _positive_scalar("cutoff", cutoff, "> 0 hill widths")
        walls = tuple(walls)
        for w in walls:
            if not isinstance(w, Wall):
                raise ParameterError(f"walls must hold gridbias.Wall objects, got {type(w).__name__}")
            if w.cv >= d:
                raise ParameterError(f"Wall cv={w.cv} does not exist: the grid has {d} CVs (0..{d - 1})")
        self._walls = walls
        self._grid = grid
        sigma_d.setflags(write=False)
        self._sigma = sigma_d
        coarse = np.flatnonzero(grid.spacing > sigma_d / 2)
        if coarse.size:
            i = int(coarse[0])
            warnings.warn(
                f"axis {i}: grid spacing {grid.spacing[i]:.4g} is coarser than sigma/2 ({sigma_d[i] / 2:.4g}); "
                "hills will be poorly resolved. Use spacing <= sigma/3 (common practice).",
                stacklevel=2)
        # Kernel arguments, padded to three axes.
        shape3 = tuple(grid.shape) + (1,) * (3 - d)
        self._coef = np.zeros((1 << d,) + shape3)
        self._lower3 = np.zeros(3)
        self._upper3 = np.zeros(3)
        self._spacing3 = np.ones(3)
        self._bins3 = np.ones(3, dtype=np.int64)
        self._periodic3 = np.zeros(3, dtype=np.bool_)
        self._lower3[:d] = grid.lower
        self._upper3[:d] = grid.upper
        self._spacing3[:d] = grid.spacing
        self._bins3[:d] = grid.bins
        self._periodic3[:d] = grid.periodic
        self._wall_cv = np.array([w.cv for w in walls], dtype=np.int64)
        self._wall_bound = np.array([w.bound for w in walls], dtype=float)
        self._wall_k = np.array([w.k for w in walls], dtype=float)
        self._wall_sign = np.array([w.sign for w in walls], dtype=float)
        self._wall_power = np.array([w.power for w in walls], dtype=float)
        self._has_walls = bool(walls)
        self._wt_inverse = 0.0 if bias_factor is None else 1.0 / (KB * (bias_factor - 1.0) * self._temperature)
        self._history = HillHistory(d)
        self._n_outside = 0
        self._warned_outside = False

    # -- parameters ---------------------------------------------------------------------------
    grid = property(lambda self: self._grid, doc="The Grid the bias lives on.")
    sigma = property(lambda self: self._sigma, doc="(d,) float: hill widths, CV units.")
    height = property(lambda self: self._height, doc="Hill height (initial height if well-tempered), kJ/mol.")
    temperature = property(lambda self: self._temperature, doc="Temperature, K.")
    bias_factor = property(lambda self: self._bias_factor, doc="gamma, or None for standard metadynamics.")
    walls = property(lambda self: self._walls, doc="Tuple of Wall.")
    cutoff = property(lambda self: self._cutoff, doc="Hill footprint radius, in widths.")
    history = property(lambda self: self._history, doc="HillHistory of the deposited hills.")

    @property
    def ndim(self) -> int:
        """Number of CVs."""
        return self._grid.ndim

    @property
    def kT(self) -> float:
        """kB T in kJ/mol."""
        return KB * self._temperature

    @property
    def well_tempered(self) -> bool:
        return self._bias_factor is not None

    @property
    def n_hills(self) -> int:
        """Hills deposited so far (those inside the grid)."""
        return len(self._history)

    @property
    def n_outside(self) -> int:
        """Deposits refused because the CV was outside a non-periodic axis of the grid."""
        return self._n_outside

    @property
    def values(self) -> np.ndarray:
        """Grid part of the bias at the nodes, kJ/mol; read-only view of shape ``grid.shape``."""
        view = self._coef[0].reshape(self._grid.shape)
        view.flags.writeable = False
        return view

    @property
    def nbytes(self) -> int:
        """Bytes held: grid values and their spline derivatives, plus the hill history."""
        return self._coef.nbytes + self._history.nbytes

    # -- input checks -------------------------------------------------------------------------
    def _point(self, s, name="s") -> np.ndarray:
        arr = np.asarray(s, dtype=float)
        d = self.ndim
        if arr.ndim == 0 and d == 1:
            arr = arr.reshape(1)
        if arr.shape != (d,):
            raise GridError(f"{name} must have shape ({d},) (one value per CV), got shape {arr.shape}")
        if not np.isfinite(arr).all():
            raise ParameterError(f"{name} must be finite, got {arr.tolist()}: refusing NaN/inf CV values")
        return arr

    def _points(self, points):
        """(n, d) float array and whether a single point was given."""
        arr = np.asarray(points, dtype=float)
        d = self.ndim
        single = arr.ndim == 0 or arr.ndim == 1
        if arr.ndim == 0 or (arr.ndim == 1 and d == 1 and arr.shape[0] == 1):
            arr = arr.reshape(1, 1)
        elif arr.ndim == 1:
            if arr.shape[0] != d:
                raise GridError(f"points must have shape ({d},) or (n, {d}), got shape {arr.shape}")
            arr = arr.reshape(1, d)
        elif arr.ndim != 2 or arr.shape[1] != d:
            raise GridError(f"points must have shape ({d},) or (n, {d}), got shape {arr.shape}")
        if not np.isfinite(arr).all():
            bad = arr[~np.isfinite(arr).all(axis=1)][0]
            raise ParameterError(f"points must be finite, got {bad.tolist()}: refusing NaN/inf CV values")
        return np.ascontiguousarray(arr), single

    def _note_outside(self, s):
        self._n_outside += 1
        if not self._warned_outside:
            self._warned_outside = True
            warnings.warn(
                f"CV {np.asarray(s).tolist()} is outside the grid ({self._grid.lower.tolist()} .. "
                f"{self._grid.upper.tolist()}): nothing deposited (counted in n_outside; warned once). "
                "Put walls about 3 sigma inside the grid edges.", stacklevel=3)

    # -- deposition ---------------------------------------------------------------------------
    def _kernel_args(self):
        """(coef4, ndim, lower3, spacing3, bins3, periodic3) for ``gridbias._kernels.eval_point``."""
        return (self._coef, self.ndim, self._lower3, self._spacing3, self._bins3, self._periodic3)

    def _wall_args(self):
        """(cv, bound, k, sign, power) arrays for ``gridbias._kernels.wall_point``."""
        return (self._wall_cv, self._wall_bound, self._wall_k, self._wall_sign, self._wall_power)

    def hill_height(self, s) -> float:
        """Height (kJ/mol) a hill deposited at s (d,) would get now: the well-tempered rule
        ``height * exp(-V(s) / (kB (gamma - 1) T))`` (Barducci, Bussi & Parrinello, PRL 100, 020603,
        2008), or ``height`` for standard metadynamics. 0.0 outside the grid."""
        s = self._point(s)
        if not self._grid.contains(s):
            return 0.0
        return _kernels.hill_height(*self._kernel_args(), s, self._height, self._wt_inverse)

    def deposit(self, s, *, time=None) -> float:
        """Deposit one hill at the CV point s (d,). Returns the height used, kJ/mol.

        ``time`` (ps) is recorded in the history (NaN if not given). Outside a non-periodic axis nothing
        is deposited, 0.0 is returned and ``n_outside`` grows. NaN/inf CV values raise ParameterError.
        """
        s = np.asarray(s, dtype=float)
        if s.ndim == 0 and self.ndim == 1:
            s = s.reshape(1)
        if s.shape != (self.ndim,):
            raise GridError(f"s must have shape ({self.ndim},) (one value per CV), got shape {np.shape(s)}")
        h = _kernels.deposit_point(self._coef, self.ndim, self._lower3, self._upper3, self._spacing3,
                                   self._bins3, self._periodic3, s, self._sigma, self._height,
                                   self._cutoff, self._wt_inverse)
        if h == -2.0:
            raise ParameterError(f"s must be finite, got {s.tolist()}: refusing NaN/inf CV values")
        if h < 0.0:
            self._note_outside(s)
            return 0.0
        self._history.append(s, h, np.nan if time is None else float(time))
        return h

    def add_hills(self, centers, heights, times=None) -> None:
        """Add given hills in order, without applying the height rule (multiple walkers, replay).

        Parameters
        ----------
        centers : (k, d) float
        heights : (k,) float, kJ/mol, finite and >= 0
        times : (k,) float, ps, optional
        """
        centers_kd, _ = self._points(centers)
        heights_k = np.ascontiguousarray(np.atleast_1d(np.asarray(heights, dtype=float)))
        k = centers_kd.shape[0]
        if heights_k.shape != (k,):
            raise ParameterError(f"heights must have shape ({k},) to match centers, got {heights_k.shape}")
        if not (np.isfinite(heights_k).all() and (heights_k >= 0).all()):
            raise ParameterError(f"heights must be finite and >= 0 kJ/mol, got {heights_k.tolist()[:5]}...")
        if times is None:
            times_k = np.full(k, np.nan)
        else:
            times_k = np.atleast_1d(np.asarray(times, dtype=float))
            if times_k.shape != (k,):
                raise ParameterError(f"times must have shape ({k},) to match centers, got {times_k.shape}")
        deposited_k = np.zeros(k, dtype=np.bool_)
        _kernels.add_hills(self._coef, self.ndim, self._lower3, self._upper3, self._spacing3, self._bins3,
                           self._periodic3, centers_kd, self._sigma, heights_k, self._cutoff, deposited_k)
        if not deposited_k.all():
            for s in centers_kd[~deposited_k]:
                self._note_outside(s)
        self._history.extend(centers_kd[deposited_k], heights_k[deposited_k], times_k[deposited_k])

    # -- evaluation ---------------------------------------------------------------------------
    def _evaluate(self, points, use_grid, use_walls):
        arr = np.asarray(points, dtype=float)
        d = self.ndim
        if arr.shape == (d,) or (d == 1 and arr.ndim == 0):  # one point: the lean path
            grad_d = np.empty(d)
            energy = _kernels.evaluate_one(self._coef, d, self._lower3, self._spacing3, self._bins3,
                                           self._periodic3, self._wall_cv, self._wall_bound, self._wall_k,
                                           self._wall_sign, self._wall_power, use_grid,
                                           use_walls and self._has_walls, arr.reshape(d), grad_d)
            if energy != energy:
                raise ParameterError(f"points must be finite, got {arr.tolist()}: refusing NaN/inf CV values")
            return energy, grad_d
        pts, single = self._points(arr)
        n = pts.shape[0]
        energy_n = np.empty(n)
        grad_nd = np.empty((n, self.ndim))
        _kernels.evaluate_points(self._coef, self.ndim, self._lower3, self._spacing3, self._bins3,
                                 self._periodic3, self._wall_cv, self._wall_bound, self._wall_k,
                                 self._wall_sign, self._wall_power, use_grid, use_walls and self._has_walls,
                                 pts, energy_n, grad_nd)
        if single:
            return float(energy_n[0]), grad_nd[0]
        return energy_n, grad_nd

    def evaluate(self, points):
        """Total bias (grid + walls) and its gradient.

        Parameters
        ----------
        points : (d,) or (n, d) float, CV units

        Returns
        -------
        energy : float or (n,) float, kJ/mol
        gradient : (d,) or (n, d) float, kJ/mol per CV unit (dE/ds)
        """
        return self._evaluate(points, True, True)

    def evaluate_grid(self, points):
        """Grid part of the bias only (no walls); same shapes as ``evaluate``."""
        return self._evaluate(points, True, False)

    def wall_energy(self, points):
        """Walls only; same shapes as ``evaluate``."""
        return self._evaluate(points, False, True)

    def free_energy(self) -> np.ndarray:
        """Free-energy estimate on the grid nodes, kJ/mol, minimum 0, shape ``grid.shape``.

        Standard: ``-V``. Well-tempered: ``-(gamma / (gamma - 1)) V`` (Barducci, Bussi & Parrinello,
        PRL 100, 020603, 2008). The grid part only: walls are not included.
        """
        factor = 1.0 if self._bias_factor is None else self._bias_factor / (self._bias_factor - 1.0)
        fes = -factor * self.values
        return fes - fes.min()

    # -- copies and replay --------------------------------------------------------------------
    def _empty_like(self) -> "GridBias":
        return GridBias(self._grid, self._sigma, self._height, self._temperature, self._bias_factor,
                        self._walls, cutoff=self._cutoff)

    def copy(self) -> "GridBias":
        """An independent copy (grid, history, counters)."""
        meta, arrays = self.to_state()
        return GridBias.from_state(meta, {k: v.copy() for k, v in arrays.items()})

    def rebuilt(self, n_hills=None) -> "GridBias":
        """A new bias built by replaying the first ``n_hills`` hills of the history (default: all).

        Replaying all hills reproduces ``values`` bit for bit.
        """
        n = self.n_hills if n_hills is None else int(n_hills)
        if not 0 <= n <= self.n_hills:
            raise ParameterError(f"n_hills must be in 0..{self.n_hills}, got {n_hills!r}")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fresh = self._empty_like()
        h = self._history
        fresh.add_hills(h.centers[:n], h.heights[:n], h.times[:n])
        return fresh

    # -- state and checkpoints ----------------------------------------------------------------
    def to_state(self):
        """The complete state as (meta, arrays): ``meta`` JSON-safe, ``arrays`` name -> ndarray."""
        meta = {
            "kind": _STATE_KIND,
            "version": _STATE_VERSION,
            "grid": self._grid.to_dict(),
            "sigma": [float(x) for x in self._sigma],
            "height": self._height,
            "temperature": self._temperature,
            "bias_factor": self._bias_factor,
            "cutoff": self._cutoff,
            "walls": [w.to_dict() for w in self._walls],
            "n_hills": self.n_hills,
            "n_outside": self._n_outside,
        }
        h = self._history
        arrays = {
            "coefficients": self._coef,
            "hill_centers": np.ascontiguousarray(h.centers),
            "hill_heights": np.ascontiguousarray(h.heights),
            "hill_times": np.ascontiguousarray(h.times),
        }
        return meta, arrays

    @classmethod
    def from_state(cls, meta, arrays) -> "GridBias":
        """Rebuild a bias from ``to_state()`` output; checks every field and raises CheckpointError."""
        try:
            if meta.get("kind") != _STATE_KIND:
                raise CheckpointError(f"not a gridbias bias state (kind {meta.get('kind')!r})")
            if int(meta["version"]) > _STATE_VERSION:
                raise CheckpointError(
                    f"bias state version {meta['version']} is newer than this gridbias reads "
                    f"({_STATE_VERSION}); upgrade gridbias")
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                bias = cls(Grid.from_dict(meta["grid"]), meta["sigma"], meta["height"], meta["temperature"],
                           meta["bias_factor"], [Wall.from_dict(w) for w in meta["walls"]],
                           cutoff=meta["cutoff"])
            coef = np.asarray(arrays["coefficients"])
            centers = np.asarray(arrays["hill_centers"])
            heights = np.asarray(arrays["hill_heights"])
            times = np.asarray(arrays["hill_times"])
            n = int(meta["n_hills"])
            n_outside = int(meta["n_outside"])
        except CheckpointError:
            raise
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise CheckpointError(f"bias state is incomplete or invalid: {exc}") from exc
        if coef.shape != bias._coef.shape or coef.dtype != np.float64:
            raise CheckpointError(f"coefficients have shape {coef.shape} ({coef.dtype}); the grid needs "
                                  f"{bias._coef.shape} (float64)")
        if not np.isfinite(coef).all():
            raise CheckpointError("coefficients hold NaN or infinite values")
        d = bias.ndim
        if centers.shape != (n, d) or heights.shape != (n,) or times.shape != (n,):
            raise CheckpointError(
                f"hill history does not match n_hills={n}: centers {centers.shape}, heights {heights.shape}, "
                f"times {times.shape}")
        bias._coef[...] = coef
        bias._history.extend(centers.astype(float), heights.astype(float), times.astype(float))
        bias._n_outside = n_outside
        return bias

    def describe_difference(self, other: "GridBias") -> str:
        """One sentence naming the first parameter in which ``other`` differs ('' when all agree).

        Compares the grid, sigma, height, temperature, bias_factor, cutoff and walls (not the hills).
        """
        diff = self._grid.describe_difference(other.grid)
        if diff:
            return f"grid differs: {diff}"
        for field in ("sigma", "height", "temperature", "bias_factor", "cutoff", "walls"):
            mine, theirs = getattr(self, field), getattr(other, field)
            if field == "sigma":
                if not np.array_equal(mine, theirs):
                    return f"sigma differs: {mine.tolist()} vs {np.asarray(theirs).tolist()}"
            elif mine != theirs:
                if field == "walls":
                    mine, theirs = [w.to_dict() for w in mine], [w.to_dict() for w in theirs]
                return f"{field} differs: {mine} vs {theirs}"
        return ""

    def load_state(self, meta, arrays) -> None:
        """Replace this bias's hills (values, history, counters) in place by a state from ``to_state()``.

        The state must have been written by a bias with the same parameters; otherwise CheckpointError names
        the first difference. Everything that holds this object (an OpenMM link, a driver) sees the new
        state. Used by ``gridbias.openmm`` restores.
        """
        self._adopt(GridBias.from_state(meta, arrays))

    def _adopt(self, other: "GridBias") -> None:
        """Take over the hills of ``other`` (same parameters), in place."""
        diff = self.describe_difference(other)
        if diff:
            raise CheckpointError(f"the state belongs to another bias: {diff} (this bias vs the state)")
        self._coef[...] = other._coef
        self._history = other._history
        self._n_outside = other._n_outside

    def save(self, path) -> None:
        """Write the complete state to ``path`` atomically (see gridbias.checkpoint)."""
        from .checkpoint import write_checkpoint

        meta, arrays = self.to_state()
        write_checkpoint(path, meta, arrays, kind=_STATE_KIND)

    @classmethod
    def load(cls, path) -> "GridBias":
        """Read a bias written by ``save``; verifies format, version and checksum.

        A run checkpoint of the OpenMM adapter holds more than a bias: ``gridbias.runs.load_run`` opens
        that one (and this kind too); the error for one says so.
        """
        from .checkpoint import read_checkpoint

        meta, arrays = read_checkpoint(path, kind=_STATE_KIND)
        return cls.from_state(meta, arrays)

    def __repr__(self):
        mode = "standard" if self._bias_factor is None else f"well-tempered (bias_factor={self._bias_factor:g})"
        return (f"GridBias({self._grid!r}, sigma={self._sigma.tolist()}, height={self._height:g} kJ/mol, "
                f"T={self._temperature:g} K, {mode}, walls={len(self._walls)}, hills={self.n_hills})")
