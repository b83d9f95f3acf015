"""Analytic test systems with exact free energies, and a fast Langevin driver for them.

The potentials are functions of one or two coordinates (nm), in kJ/mol. Each knows its exact free energy
along the coordinates meant to be biased (its CVs), so a metadynamics run on it can be checked against the
truth. The driver integrates Langevin dynamics with the BAOAB splitting in numba, runs many steps per
call, and deposits hills on a :class:`gridbias.GridBias` between calls.

Scientific sources
------------------
- Müller, K. & Brown, L. D., Theor. Chim. Acta 53, 75 (1979): the Müller-Brown surface.
- Leimkuhler, B. & Matthews, C., Appl. Math. Res. Express 2013, 34 (2013): the BAOAB integrator.
- Exact marginal free energies F(x) = -kT ln ∫ exp(-U(x, y)/kT) dy: standard statistical mechanics
  (e.g. Tuckerman, Statistical Mechanics: Theory and Molecular Simulation, OUP 2010).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import _dynamics
from .bias import KB, GridBias
from .errors import ParameterError

__all__ = ["HarmonicWell", "DoubleWell", "MuellerBrown", "CoupledDoubleWell", "SwitchingDoubleWell", "Trajectory",
           "run_langevin", "run_metadynamics"]

# Integer ids that select a potential inside the numba kernel.
_HARMONIC, _DOUBLE_WELL, _MUELLER_BROWN, _COUPLED_DOUBLE_WELL = (
    _dynamics.HARMONIC, _dynamics.DOUBLE_WELL, _dynamics.MUELLER_BROWN, _dynamics.COUPLED_DOUBLE_WELL)

# Müller & Brown 1979, the coefficient table (rows A, a, b, c, x0, y0; one column per term).
_MB_TABLE = np.array(
    [
        [-200.0, -100.0, -170.0, 15.0],
        [-1.0, -1.0, -6.5, 0.7],
        [0.0, 0.0, 11.0, 0.6],
        [-10.0, -10.0, -6.5, 0.7],
        [1.0, 0.0, -0.5, -1.0],
        [0.0, 0.5, 1.5, 1.0],
    ]
)
# Barrier from the global minimum M_A (-146.699517) to the saddle S1 (-40.664844) in the unscaled
# potential, the highest barrier a walker must cross to visit all three minima (REFERENCES.md §5,
# recomputed from the published coefficients; the test suite re-derives it with scipy.optimize).
_MB_HIGHEST_BARRIER = 106.034673


def _points(points, ndim, name="points"):
    arr = np.asarray(points, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[1] != ndim:
        raise ParameterError(f"{name} must have shape (n, {ndim}), got shape {arr.shape}")
    return arr


def _number(name, value, allowed):
    try:
        return float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} must be {allowed}, got {value!r}") from None


def _positive(name, value):
    value = _number(name, value, "a finite number > 0")
    if not (math.isfinite(value) and value > 0.0):
        raise ParameterError(f"{name} must be a finite number > 0, got {value!r}")
    return value


def _finite(name, value):
    value = _number(name, value, "a finite number")
    if not math.isfinite(value):
        raise ParameterError(f"{name} must be a finite number, got {value!r}")
    return value


class _Potential:
    """Shared behaviour: marginal free energies by quadrature and the numba hand-over."""

    ndim: int
    cv_axes: tuple

    def energy_gradient(self, points):  # pragma: no cover - every subclass overrides it
        raise NotImplementedError

    def marginal_free_energy(self, axis, grid_1d, temperature):
        """Exact free energy along one coordinate, integrating the other one out numerically.

        Parameters
        ----------
        axis : int
            The coordinate kept (0 = x, 1 = y).
        grid_1d : (m,) float, nm
            Values of that coordinate.
        temperature : float, K

        Returns
        -------
        (m,) float, kJ/mol
            F(s) = -kT ln ∫ exp(-U/kT) d(other coordinate), the integral in nm, by adaptive quadrature
            (``scipy.integrate.quad_vec``, needs scipy) over the potential's ``domain``. For a 1-D
            potential there is nothing to integrate and F = U.

        Raises
        ------
        ParameterError
            If the energy at the domain's edges is not at least 20 kT above the minimum of a line, so
            that the integral would be cut short.
        """
        kt = KB * _positive("temperature", temperature)
        if axis not in range(self.ndim):
            raise ParameterError(f"axis must be one of {list(range(self.ndim))}, got {axis!r}")
        s_m = np.asarray(grid_1d, dtype=np.float64)
        if s_m.ndim != 1 or not np.all(np.isfinite(s_m)):
            raise ParameterError(f"grid_1d must be a flat array of finite values, got shape {s_m.shape}")
        if self.ndim == 1:
            return self.energy_gradient(s_m[:, None])[0]
        from scipy.integrate import quad_vec

        other = 1 - axis
        lo, hi = self.domain[other]
        # Shift each line by its lowest energy (found on a dense sample) so the integrands peak near 1.
        dense_t = np.linspace(lo, hi, 4001)
        pts = np.empty((s_m.size, dense_t.size, 2))
        pts[..., axis], pts[..., other] = s_m[:, None], dense_t[None, :]
        u_mt = self.energy_gradient(pts.reshape(-1, 2))[0].reshape(s_m.size, dense_t.size)
        u_min_m = u_mt.min(axis=1)
        edge_m = np.minimum(u_mt[:, 0], u_mt[:, -1]) - u_min_m
        if np.any(edge_m < 20.0 * kt):
            bad = s_m[np.argmin(edge_m)]
            raise ParameterError(
                f"grid_1d value {bad} on axis {axis}: the Boltzmann weight does not vanish at the edges "
                f"of the domain {self.domain[other]} of the other coordinate at {temperature} K; use values "
                f"inside {self.domain[axis]} or a lower temperature")
        peaks = np.unique(dense_t[np.argmin(u_mt, axis=1)])

        def weight_m(t):
            line = np.empty((s_m.size, 2))
            line[:, axis], line[:, other] = s_m, t
            return np.exp(-(self.energy_gradient(line)[0] - u_min_m) / kt)

        integral_m, _ = quad_vec(weight_m, lo, hi, points=peaks, epsabs=1e-13, epsrel=1e-11, limit=10000)
        return u_min_m - kt * np.log(integral_m)

    def _kernel_spec(self):
        """(integer id, float64 parameter array) that select this potential inside numba."""
        raise NotImplementedError  # pragma: no cover - every subclass overrides it


@dataclass(frozen=True)
class HarmonicWell(_Potential):
    """U(x) = k/2 (x - x0)^2, one coordinate.

    Parameters
    ----------
    stiffness : float, kJ/mol/nm^2
    center : float, nm

    Notes
    -----
    The Boltzmann distribution is Gaussian with variance kT/k (equipartition).
    """

    stiffness: float = 100.0
    center: float = 0.0
    ndim = 1
    cv_axes = (0,)

    def __post_init__(self):
        object.__setattr__(self, "stiffness", _positive("stiffness", self.stiffness))
        object.__setattr__(self, "center", _finite("center", self.center))

    def energy_gradient(self, points):
        """Energy and gradient at ``points`` (n, 1) nm -> (n,) kJ/mol, (n, 1) kJ/mol/nm."""
        x_n = _points(points, 1)[:, 0]
        d_n = x_n - self.center
        return 0.5 * self.stiffness * d_n**2, (self.stiffness * d_n)[:, None]

    def free_energy(self, points, *, temperature):
        """Exact F along x (n, 1) nm -> (n,) kJ/mol: the potential itself (``temperature`` unused)."""
        _positive("temperature", temperature)
        return self.energy_gradient(points)[0]

    def _kernel_spec(self):
        return _HARMONIC, np.array([self.stiffness, self.center])


@dataclass(frozen=True)
class DoubleWell(_Potential):
    """U(x) = h (x^2 - 1)^2 + tilt x, one coordinate.

    Parameters
    ----------
    barrier : float, kJ/mol
        h: with no tilt, minima at x = ±1 nm (U = 0) and a barrier of height h at x = 0.
    tilt : float, kJ/mol/nm
        Linear term that makes the wells unequal.
    """

    barrier: float = 25.0
    tilt: float = 0.0
    ndim = 1
    cv_axes = (0,)

    def __post_init__(self):
        object.__setattr__(self, "barrier", _positive("barrier", self.barrier))
        object.__setattr__(self, "tilt", _finite("tilt", self.tilt))

    def energy_gradient(self, points):
        """Energy and gradient at ``points`` (n, 1) nm -> (n,) kJ/mol, (n, 1) kJ/mol/nm."""
        x_n = _points(points, 1)[:, 0]
        u_n = x_n**2 - 1.0
        energy_n = self.barrier * u_n**2 + self.tilt * x_n
        return energy_n, (4.0 * self.barrier * u_n * x_n + self.tilt)[:, None]

    def free_energy(self, points, *, temperature):
        """Exact F along x (n, 1) nm -> (n,) kJ/mol: the potential itself (``temperature`` unused)."""
        _positive("temperature", temperature)
        return self.energy_gradient(points)[0]

    def _kernel_spec(self):
        return _DOUBLE_WELL, np.array([self.barrier, self.tilt])


@dataclass(frozen=True)
class MuellerBrown(_Potential):
    """The Müller-Brown surface times an energy scale, two coordinates (x, y) in nm.

    U(x, y) = scale * sum_k A_k exp[a_k (x-x0_k)^2 + b_k (x-x0_k)(y-y0_k) + c_k (y-y0_k)^2]
    with the coefficients of Müller & Brown, Theor. Chim. Acta 53, 75 (1979).

    Parameters
    ----------
    scale : float
        Multiplies the published energies to give kJ/mol. Use :meth:`for_barrier` to pick it from a
        barrier height in kT.

    Notes
    -----
    Minima (unscaled energies, REFERENCES.md §5): M_A (-0.558, 1.442) -146.70, M_B (0.623, 0.028) -108.17,
    M_C (-0.050, 0.467) -80.77; saddles S1 (-0.822, 0.624) -40.66 and S2 (0.212, 0.293) -72.25. The
    highest barrier met on the way between all three minima is M_A -> S1, 106.03 unscaled.
    """

    scale: float = 0.25
    ndim = 2
    cv_axes = (0, 1)

    def __post_init__(self):
        object.__setattr__(self, "scale", _positive("scale", self.scale))

    @classmethod
    def for_barrier(cls, barrier_kt, temperature):
        """The surface scaled so its highest barrier (M_A -> S1) is ``barrier_kt`` kT at ``temperature`` K."""
        kt = KB * _positive("temperature", temperature)
        return cls(scale=_positive("barrier_kt", barrier_kt) * kt / _MB_HIGHEST_BARRIER)

    @property
    def domain(self):
        """((x_lo, x_hi), (y_lo, y_hi)) nm: the edges lie >= 290 (unscaled) above the global minimum."""
        return ((-3.0, 2.0), (-1.5, 3.5))

    def energy_gradient(self, points):
        """Energy and gradient at ``points`` (n, 2) nm -> (n,) kJ/mol, (n, 2) kJ/mol/nm."""
        xy_n2 = _points(points, 2)
        big_a, a, b, c, x0, y0 = _MB_TABLE
        dx_nk = xy_n2[:, :1] - x0
        dy_nk = xy_n2[:, 1:] - y0
        term_nk = self.scale * big_a * np.exp(a * dx_nk**2 + b * dx_nk * dy_nk + c * dy_nk**2)
        grad_n2 = np.empty_like(xy_n2)
        grad_n2[:, 0] = np.sum(term_nk * (2.0 * a * dx_nk + b * dy_nk), axis=1)
        grad_n2[:, 1] = np.sum(term_nk * (b * dx_nk + 2.0 * c * dy_nk), axis=1)
        return term_nk.sum(axis=1), grad_n2

    def free_energy(self, points, *, temperature):
        """Exact F with CVs (x, y), (n, 2) nm -> (n,) kJ/mol: the potential (``temperature`` unused)."""
        _positive("temperature", temperature)
        return self.energy_gradient(points)[0]

    def _kernel_spec(self):
        return _MUELLER_BROWN, np.concatenate([[self.scale], _MB_TABLE.ravel()])


@dataclass(frozen=True)
class CoupledDoubleWell(_Potential):
    """A double well in x whose transverse well in y stiffens along x; meant to be biased along x alone.

    U(x, y) = h (x^2 - 1)^2 + tilt x + (k_y / 2) exp(c x) y^2

    Parameters
    ----------
    barrier : float, kJ/mol
        h.
    tilt : float, kJ/mol/nm
    stiffness : float, kJ/mol/nm^2
        k_y, the transverse stiffness at x = 0.
    coupling : float, 1/nm
        c: the transverse stiffness grows as exp(c x).

    Notes
    -----
    Integrating y out adds an entropic term that tilts the free energy by c kT / 2 per nm, so F(x)
    differs from the potential along the valley floor and depends on temperature:
    F(x) = h (x^2 - 1)^2 + tilt x + (kT/2) [c x + ln(k_y / (2 pi kT))] (the y integral in nm).
    With c > 0 the left well (x = -1) is wider in y and gains c kT over the right one.
    """

    barrier: float = 25.0
    tilt: float = 0.0
    stiffness: float = 200.0
    coupling: float = 1.0
    ndim = 2
    cv_axes = (0,)

    def __post_init__(self):
        object.__setattr__(self, "barrier", _positive("barrier", self.barrier))
        object.__setattr__(self, "tilt", _finite("tilt", self.tilt))
        object.__setattr__(self, "stiffness", _positive("stiffness", self.stiffness))
        object.__setattr__(self, "coupling", _finite("coupling", self.coupling))

    @property
    def domain(self):
        """((x_lo, x_hi), (y_lo, y_hi)) nm: holds the Boltzmann weight for kT up to ~10 kJ/mol."""
        softest = self.stiffness * math.exp(-2.5 * abs(self.coupling))
        half_y = 12.0 * math.sqrt(10.0 / softest)
        return ((-2.5, 2.5), (-half_y, half_y))

    def energy_gradient(self, points):
        """Energy and gradient at ``points`` (n, 2) nm -> (n,) kJ/mol, (n, 2) kJ/mol/nm."""
        xy_n2 = _points(points, 2)
        x_n, y_n = xy_n2[:, 0], xy_n2[:, 1]
        u_n = x_n**2 - 1.0
        transverse_n = 0.5 * self.stiffness * np.exp(self.coupling * x_n) * y_n**2
        energy_n = self.barrier * u_n**2 + self.tilt * x_n + transverse_n
        grad_n2 = np.empty_like(xy_n2)
        grad_n2[:, 0] = 4.0 * self.barrier * u_n * x_n + self.tilt + self.coupling * transverse_n
        grad_n2[:, 1] = self.stiffness * np.exp(self.coupling * x_n) * y_n
        return energy_n, grad_n2

    def free_energy(self, points, *, temperature):
        """Exact F(x) (closed form, see Notes) at ``points`` (n, 1) nm -> (n,) kJ/mol at ``temperature`` K."""
        kt = KB * _positive("temperature", temperature)
        x_n = _points(points, 1)[:, 0]
        along = self.barrier * (x_n**2 - 1.0) ** 2 + self.tilt * x_n
        return along + 0.5 * kt * (self.coupling * x_n + np.log(self.stiffness / (2.0 * np.pi * kt)))

    def _kernel_spec(self):
        return _COUPLED_DOUBLE_WELL, np.array([self.barrier, self.tilt, self.stiffness, self.coupling])


@dataclass(frozen=True)
class SwitchingDoubleWell(_Potential):
    """A double well in x tilted by a slow, unbiased switch y; meant to be biased along x alone.

    U(x, y) = h (x^2 - 1)^2 + h_y (y^2 - 1)^2 + tilt_y y + coupling x y: ``barrier`` h and ``switch_barrier``
    h_y (high: y flips rarely) in kJ/mol, ``switch_tilt`` (kJ/mol/nm; y = -1 stable, +1 metastable),
    ``coupling`` (kJ/mol/nm^2; y = +1 favours x = -1). A run that flips y once samples two profiles along x
    in turn, like CVs that miss a slow degree of freedom; the exact F(x) integrates y out.
    """

    barrier: float = 20.0
    switch_barrier: float = 27.0
    switch_tilt: float = 5.0
    coupling: float = 4.0
    ndim, cv_axes, domain = 2, (0,), ((-2.5, 2.5), (-2.5, 2.5))

    def __post_init__(self):
        for name in ("barrier", "switch_barrier"):
            object.__setattr__(self, name, _positive(name, getattr(self, name)))
        for name in ("switch_tilt", "coupling"):
            object.__setattr__(self, name, _finite(name, getattr(self, name)))

    def energy_gradient(self, points):
        """Energy and gradient at ``points`` (n, 2) nm -> (n,) kJ/mol, (n, 2) kJ/mol/nm."""
        x_n, y_n = _points(points, 2).T
        u_n, w_n = x_n**2 - 1.0, y_n**2 - 1.0
        energy_n = (self.barrier * u_n**2 + self.switch_barrier * w_n**2 + self.switch_tilt * y_n
                    + self.coupling * x_n * y_n)
        return energy_n, np.column_stack([4.0 * self.barrier * u_n * x_n + self.coupling * y_n, 4.0
                                          * self.switch_barrier * w_n * y_n + self.switch_tilt + self.coupling * x_n])

    def free_energy(self, points, *, temperature):
        """Exact F(x) (y integrated out by quadrature) at ``points`` (n, 1) nm -> (n,) kJ/mol."""
        return self.marginal_free_energy(0, _points(points, 1)[:, 0], temperature)

    def _kernel_spec(self):
        return _dynamics.SWITCHING_DOUBLE_WELL, np.array([self.barrier, self.switch_barrier, self.switch_tilt,
                                                          self.coupling])


@dataclass(frozen=True)
class Trajectory:
    """Frames recorded by :func:`run_langevin` or :func:`run_metadynamics`.

    Attributes
    ----------
    times : (n,) float, ps
    positions : (n, dim) float, nm
    velocities : (n, dim) float, nm/ps (full-step velocities)
    potential_energies : (n,) float, kJ/mol (the potential alone)
    bias_energies : (n,) float, kJ/mol (grid part + walls of the bias in force at that step; 0 unbiased)
    """

    times: np.ndarray
    positions: np.ndarray
    velocities: np.ndarray
    potential_energies: np.ndarray
    bias_energies: np.ndarray


# ---------------------------------------------------------------------------------------------------
# Python drivers
# ---------------------------------------------------------------------------------------------------
# Kernel arguments that stand for "no bias" (same dtypes as GridBias._kernel_args / _wall_args, so the
# compiled kernel is shared by biased and unbiased runs).
_NO_BIAS = (np.zeros((1, 1, 1, 1)), 1, np.zeros(3), np.ones(3), np.ones(3, dtype=np.int64),
            np.zeros(3, dtype=np.bool_))
_NO_WALLS = (np.zeros(0, dtype=np.int64), np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0))


def _count(name, value, minimum=1):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise ParameterError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def _check_potential(potential):
    if not isinstance(potential, _Potential):
        names = ", ".join(n for n in __all__ if n[0].isupper() and n != "Trajectory")
        raise ParameterError(
            f"potential must be a gridbias.testsystems potential ({names}), got {potential!r}")


def _state_vector(name, value, ndim):
    try:
        arr = np.array(value, dtype=np.float64).reshape(-1) if np.ndim(value) <= 1 else None
    except (TypeError, ValueError):
        arr = None
    if arr is None or arr.shape != (ndim,) or not np.all(np.isfinite(arr)):
        raise ParameterError(f"{name} must hold {ndim} finite numbers (one per coordinate), got {value!r}")
    return arr


class _Integrator:
    """Validated dynamics settings and state (positions, velocities, step count, recorded frames)."""

    def __init__(self, potential, x0, v0, n_steps, dt, friction, mass, temperature, rng, record_every):
        if not isinstance(rng, np.random.Generator):
            raise ParameterError(
                f"rng must be a numpy.random.Generator (np.random.default_rng(seed)), got {rng!r}")
        self.dt = _positive("dt", dt)
        self.friction = _finite("friction", friction)
        if self.friction < 0.0:
            raise ParameterError(f"friction must be >= 0 (1/ps), got {friction!r}")
        self.mass = _positive("mass", mass)
        self.kt = KB * _positive("temperature", temperature)
        self.record_every = _count("record_every", record_every)
        d = potential.ndim
        self.kind, self.params = potential._kernel_spec()
        self.rng = rng
        self.noise_scale = math.sqrt(self.kt / self.mass)
        self.x = _state_vector("x0", x0, d)
        if v0 is None:
            self.v = self.noise_scale * rng.standard_normal(d)
        else:
            self.v = _state_vector("v0", v0, d)
        n_frames = n_steps // self.record_every
        self.positions = np.empty((n_frames, d))
        self.velocities = np.empty((n_frames, d))
        self.potential_energies = np.empty(n_frames)
        self.bias_energies = np.empty(n_frames)
        self.step = 0

    def advance(self, n_steps, grid_args, wall_args, cv_index, use_bias):
        noise = self.noise_scale * self.rng.standard_normal((n_steps, self.x.shape[0]))
        _dynamics.baoab(self.kind, self.params, use_bias, *grid_args, *wall_args, cv_index, self.x, self.v,
                        noise, self.step, self.record_every, self.dt, self.friction, self.mass,
                        self.positions, self.velocities, self.potential_energies, self.bias_energies)
        self.step += n_steps

    def trajectory(self):
        times = self.dt * self.record_every * np.arange(1, self.positions.shape[0] + 1)
        return Trajectory(times, self.positions, self.velocities, self.potential_energies, self.bias_energies)


def _check_bias(potential, bias, cv):
    """Validated bias and the (k,) int64 coordinate indices its CVs read."""
    if not isinstance(bias, GridBias):
        raise ParameterError(f"bias must be a gridbias.GridBias, got {type(bias).__name__}")
    cv = potential.cv_axes if cv is None else cv
    cv_index = np.array(cv, dtype=np.int64).reshape(-1) if np.ndim(cv) <= 1 else None
    if (cv_index is None or cv_index.shape != (bias.ndim,) or len(set(cv_index.tolist())) != bias.ndim
            or not all(0 <= c < potential.ndim for c in cv_index.tolist())):
        raise ParameterError(
            f"cv must list {bias.ndim} distinct coordinate indices (0..{potential.ndim - 1}), one per CV "
            f"of the bias, got {cv!r}")
    return cv_index


def run_langevin(potential, x0, *, n_steps, dt, friction, temperature, rng, mass=1.0, v0=None,
                 record_every=1, bias=None, cv=None):
    """Langevin dynamics with the BAOAB splitting (Leimkuhler & Matthews 2013), under a fixed bias or none.

    Parameters
    ----------
    potential : any potential of this module (HarmonicWell, DoubleWell, ...)
    x0 : (dim,) float, nm
        Start position.
    n_steps : int
        Number of time steps.
    dt : float, ps
    friction : float, 1/ps
        Langevin collision rate (0 gives velocity Verlet, i.e. constant-energy dynamics).
    temperature : float, K
    rng : numpy.random.Generator
        Source of all random numbers (initial velocities and the thermostat); a fixed seed reproduces
        the run exactly.
    mass : float, g/mol (amu), same for every coordinate
    v0 : (dim,) float, nm/ps, optional
        Start velocity; drawn from the Maxwell-Boltzmann distribution when omitted.
    record_every : int
        Keep every this many steps as a frame.
    bias : gridbias.GridBias, optional
        A bias (grid part + walls) added to the potential and left unchanged: no hills are deposited.
    cv : sequence of int, optional
        Which coordinates are the bias's CVs, in its CV order; default ``potential.cv_axes``.

    Returns
    -------
    Trajectory
        ``n_steps // record_every`` frames; ``bias_energies`` are 0 without a bias.

    Examples
    --------
    >>> import numpy as np
    >>> from gridbias.testsystems import HarmonicWell, run_langevin
    >>> traj = run_langevin(HarmonicWell(stiffness=100.0), [0.0], n_steps=1000, dt=0.01, friction=5.0,
    ...                     temperature=300.0, rng=np.random.default_rng(1), record_every=10)
    >>> traj.positions.shape
    (100, 1)
    """
    n_steps = _count("n_steps", n_steps)
    _check_potential(potential)
    if bias is None:
        grid_args, wall_args, cv_index = _NO_BIAS, _NO_WALLS, np.zeros(0, dtype=np.int64)
    else:
        cv_index = _check_bias(potential, bias, cv)
        grid_args, wall_args = bias._kernel_args(), bias._wall_args()
    state = _Integrator(potential, x0, v0, n_steps, dt, friction, mass, temperature, rng, record_every)
    state.advance(n_steps, grid_args, wall_args, cv_index, bias is not None)
    return state.trajectory()


def run_metadynamics(potential, bias, x0, *, n_deposits, stride, dt, friction, rng, mass=1.0, cv=None,
                     v0=None, record_every=None):
    """Langevin dynamics (BAOAB) under potential + bias, depositing a hill every ``stride`` steps.

    The thermostat runs at ``bias.temperature``. Each cycle runs ``stride`` steps in one compiled call
    with the bias frozen, then calls ``bias.deposit(s, time=t)`` at the current CV point s, t in ps from
    the start of this run. ``bias`` is updated in place.

    Parameters
    ----------
    potential : any potential of this module (HarmonicWell, DoubleWell, ...)
    bias : gridbias.GridBias
        Its grid (and walls) act on the coordinates selected by ``cv``.
    x0 : (dim,) float, nm
    n_deposits : int
        Number of deposit cycles; the run has ``n_deposits * stride`` steps.
    stride : int
        Steps between deposits.
    dt : float, ps
    friction : float, 1/ps
    rng : numpy.random.Generator
    mass : float, g/mol
    cv : sequence of int, optional
        Which coordinates are the CVs, in the bias's CV order; default ``potential.cv_axes``.
    v0 : (dim,) float, nm/ps, optional
    record_every : int, optional
        Steps between recorded frames; default ``stride`` (one frame per deposit, recorded just before it).

    Returns
    -------
    Trajectory
        ``bias_energies`` hold the bias (grid + walls) acting at each recorded step.
    """
    _check_potential(potential)
    cv_index = _check_bias(potential, bias, cv)
    n_deposits = _count("n_deposits", n_deposits)
    stride = _count("stride", stride)
    record_every = stride if record_every is None else record_every
    state = _Integrator(potential, x0, v0, n_deposits * stride, dt, friction, mass, bias.temperature, rng,
                        record_every)
    for _ in range(n_deposits):
        state.advance(stride, bias._kernel_args(), bias._wall_args(), cv_index, True)
        bias.deposit(state.x[cv_index], time=state.step * state.dt)
    return state.trajectory()
