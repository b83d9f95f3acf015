"""Analytic test systems and the BAOAB Langevin driver, checked against published values and exact results."""

import math

import numba
import numpy as np
import pytest

import gridbias as gb
from gridbias.errors import ParameterError
from gridbias.testsystems import (
    CoupledDoubleWell,
    DoubleWell,
    HarmonicWell,
    MuellerBrown,
    run_langevin,
    run_metadynamics,
)

optimize = pytest.importorskip("scipy.optimize")
integrate = pytest.importorskip("scipy.integrate")

T = 300.0
KT = gb.KB * T
# Sampling tests run millions of steps: seconds compiled, far too long with NUMBA_DISABLE_JIT=1.
needs_jit = pytest.mark.skipif(numba.config.DISABLE_JIT, reason="needs compiled dynamics (slow without JIT)")

POTENTIALS = [
    HarmonicWell(stiffness=150.0, center=0.2),
    DoubleWell(barrier=20.0, tilt=3.0),
    MuellerBrown(scale=0.3),
    CoupledDoubleWell(barrier=20.0, tilt=-2.0, stiffness=150.0, coupling=1.5),
]


def block_standard_error(samples_n, n_blocks=50):
    """Standard error of the mean of correlated samples from block means (blocks much longer than the
    correlation time; Flyvbjerg & Petersen, J. Chem. Phys. 91, 461, 1989)."""
    usable = samples_n[: samples_n.size - samples_n.size % n_blocks]
    return usable.reshape(n_blocks, -1).mean(axis=1).std(ddof=1) / math.sqrt(n_blocks)


# --- Müller-Brown: published coefficients -> stationary points --------------------------------------
# Müller & Brown, Theor. Chim. Acta 53, 75 (1979) for the surface; the stationary points and energies are
# the [computed] values of REFERENCES.md §5 (coordinates matched by a third-party listing [checked]).
MB_STATIONARY = [
    ("M_A", (-0.558224, 1.441726), -146.699517, 0),
    ("M_B", (0.623499, 0.028038), -108.166724, 0),
    ("M_C", (-0.050011, 0.466694), -80.767818, 0),
    ("S1", (-0.822002, 0.624313), -40.664844, 1),
    ("S2", (0.212487, 0.292988), -72.248940, 1),
]


@pytest.mark.parametrize("name, point, energy, n_negative", MB_STATIONARY, ids=[p[0] for p in MB_STATIONARY])
def test_mueller_brown_stationary_points(name, point, energy, n_negative):
    mb = MuellerBrown(scale=1.0)

    def gradient(p):
        return mb.energy_gradient(p[None, :])[1][0]

    start = np.array(point) + np.array([0.03, -0.03])
    found = optimize.root(gradient, start, tol=1e-13)
    assert found.success, found.message
    np.testing.assert_allclose(found.x, point, atol=2e-6)
    assert mb.energy_gradient(found.x[None, :])[0][0] == pytest.approx(energy, abs=2e-6)
    hessian = optimize.approx_fprime(found.x, gradient, 1e-7)
    eigenvalues = np.linalg.eigvalsh(0.5 * (hessian + hessian.T))
    assert np.sum(eigenvalues < 0) == n_negative  # minima: none negative; saddles: one


def test_mueller_brown_value_at_origin():
    # V(0, 0) = -48.401274 in a third-party doctest ([checked], REFERENCES.md §5).
    assert MuellerBrown(scale=1.0).energy_gradient([[0.0, 0.0]])[0][0] == pytest.approx(-48.401274, abs=1e-6)


def test_mueller_brown_for_barrier_scales_the_highest_barrier():
    mb = MuellerBrown.for_barrier(12.0, T)
    energy = mb.energy_gradient([MB_STATIONARY[3][1], MB_STATIONARY[0][1]])[0]  # S1, M_A
    assert (energy[0] - energy[1]) / KT == pytest.approx(12.0, rel=1e-6)


# --- gradients and exact free energies --------------------------------------------------------------
@pytest.mark.parametrize("potential", POTENTIALS, ids=lambda p: type(p).__name__)
def test_gradient_matches_central_differences(potential):
    rng = np.random.default_rng(11)
    points = rng.uniform(-1.2, 1.2, size=(40, potential.ndim))
    _, grad = potential.energy_gradient(points)
    step = 1e-6
    for axis in range(potential.ndim):
        shift = np.zeros(potential.ndim)
        shift[axis] = step
        above = potential.energy_gradient(points + shift)[0]
        below = potential.energy_gradient(points - shift)[0]
        numeric = (above - below) / (2 * step)
        np.testing.assert_allclose(grad[:, axis], numeric, rtol=1e-6, atol=1e-5)


def test_coupled_double_well_marginal_equals_closed_form():
    # F(x) = -kT ln ∫ exp(-U/kT) dy: the Gaussian integral in y is exact (standard statistical mechanics);
    # the numerical quadrature must reproduce it.
    pot = POTENTIALS[3]
    x = np.linspace(-1.8, 1.8, 73)
    np.testing.assert_allclose(pot.marginal_free_energy(0, x, T), pot.free_energy(x[:, None], temperature=T),
                               rtol=0, atol=1e-9)


def test_coupled_double_well_without_coupling_is_the_separable_double_well():
    # Separable U = h (x^2 - 1)^2 + k y^2 / 2 gives F(x) = h (x^2 - 1)^2 + C (REFERENCES.md §6).
    x = np.linspace(-1.5, 1.5, 31)
    f_separable = CoupledDoubleWell(barrier=20.0, coupling=0.0).free_energy(x[:, None], temperature=T)
    f_1d = DoubleWell(barrier=20.0).free_energy(x[:, None], temperature=T)
    difference = f_separable - f_1d
    np.testing.assert_allclose(difference, difference[0], atol=1e-12)


@pytest.mark.parametrize("axis", [0, 1])
def test_mueller_brown_marginal_against_dense_trapezoid(axis):
    # An independent quadrature: the trapezoid rule on a 20001-point line (error far below 1e-6 kJ/mol for
    # these smooth integrands).
    mb = MuellerBrown.for_barrier(12.0, T)
    keep = np.linspace(-1.4, 1.0, 9) if axis == 0 else np.linspace(-0.2, 1.9, 9)
    other = 1 - axis
    lo, hi = mb.domain[other]
    line = np.linspace(lo, hi, 20001)
    expected = []
    for s in keep:
        pts = np.empty((line.size, 2))
        pts[:, axis], pts[:, other] = s, line
        u = mb.energy_gradient(pts)[0]
        expected.append(u.min() - KT * math.log(integrate.trapezoid(np.exp(-(u - u.min()) / KT), line)))
    np.testing.assert_allclose(mb.marginal_free_energy(axis, keep, T), expected, rtol=0, atol=1e-6)


def test_marginal_of_a_one_dimensional_potential_is_the_potential():
    pot = POTENTIALS[1]
    x = np.linspace(-1.5, 1.5, 7)
    np.testing.assert_array_equal(pot.marginal_free_energy(0, x, T), pot.energy_gradient(x[:, None])[0])


def test_marginal_refuses_a_domain_that_cuts_the_integral():
    with pytest.raises(ParameterError, match="does not vanish at the edges"):
        MuellerBrown(scale=0.01).marginal_free_energy(0, [-0.5], 3000.0)


# --- BAOAB sampling ---------------------------------------------------------------------------------
@needs_jit
def test_baoab_samples_the_harmonic_configurational_distribution_exactly():
    # Equipartition: <x^2> = kT/k. BAOAB samples the configurational distribution of a harmonic oscillator
    # without time-step error (Leimkuhler & Matthews, Appl. Math. Res. Express 2013, 34; from memory), so a
    # large step (omega dt = 1) must still give kT/k within the statistical error.
    well = HarmonicWell(stiffness=100.0)
    traj = run_langevin(well, [0.3], n_steps=1_000_000, dt=0.1, friction=2.0, temperature=T,
                        rng=np.random.default_rng(5), record_every=2)
    x2 = traj.positions[:, 0] ** 2
    expected = KT / well.stiffness
    error = block_standard_error(x2)
    assert error < 0.01 * expected  # the run is long enough to detect a 3 % error
    assert abs(x2.mean() - expected) < 4 * error


@needs_jit
def test_baoab_kinetic_temperature():
    # <v^2> = kT/m per coordinate (equipartition). Full-step BAOAB velocities carry an O(dt^2) error
    # (Leimkuhler & Matthews 2013, from memory); at omega dt = 0.1 it is about 0.3 %, below the 1.5 % allowed.
    well = HarmonicWell(stiffness=100.0)
    traj = run_langevin(well, [0.0], n_steps=1_000_000, dt=0.01, friction=20.0, temperature=T,
                        rng=np.random.default_rng(6), record_every=5)
    v2 = traj.velocities[:, 0] ** 2
    assert block_standard_error(v2) < 0.005 * KT  # so the 1.5 % allowance is 3 standard errors
    assert v2.mean() == pytest.approx(KT, rel=0.015)


@needs_jit
def test_tilted_double_well_populations_match_quadrature():
    # Probability of the left well, P(x < 0) = ∫_{x<0} e^{-U/kT} / ∫ e^{-U/kT} (REFERENCES.md §6, tilted
    # double well), from an unbiased run with a 3 kT barrier.
    pot = DoubleWell(barrier=3.0 * KT, tilt=0.5 * KT)

    def weight(x):
        return math.exp(-pot.energy_gradient([[x]])[0][0] / KT)

    left = integrate.quad(weight, -3.0, 0.0, epsabs=1e-13)[0]
    right = integrate.quad(weight, 0.0, 3.0, epsabs=1e-13)[0]
    expected = left / (left + right)
    traj = run_langevin(pot, [1.0], n_steps=2_000_000, dt=0.01, friction=5.0, temperature=T,
                        rng=np.random.default_rng(8), record_every=5)
    in_left = (traj.positions[:, 0] < 0).astype(float)
    error = block_standard_error(in_left)
    assert error < 0.02
    assert abs(in_left.mean() - expected) < 4 * error


@pytest.mark.parametrize("potential", POTENTIALS, ids=lambda p: type(p).__name__)
def test_compiled_energies_match_the_numpy_formula(potential):
    start = [0.8] if potential.ndim == 1 else [0.6, 0.05]
    traj = run_langevin(potential, start, n_steps=2000, dt=0.002, friction=5.0, temperature=T,
                        rng=np.random.default_rng(3), record_every=10)
    np.testing.assert_allclose(traj.potential_energies, potential.energy_gradient(traj.positions)[0],
                               rtol=1e-12, atol=1e-10)
    np.testing.assert_array_equal(traj.bias_energies, 0.0)


def test_compiled_forces_conserve_energy_without_friction():
    # With zero friction BAOAB is velocity Verlet, which conserves U + m v^2 / 2 up to O(dt^2) bounded
    # fluctuations (Leimkuhler & Matthews 2013) only if the compiled force is minus the gradient of the
    # compiled energy.
    mb = MuellerBrown.for_barrier(12.0, T)
    mass = 10.0
    traj = run_langevin(mb, [-0.55, 1.44], v0=[1.5, -1.0], n_steps=50_000, dt=0.0005, friction=0.0,
                        temperature=T, mass=mass, rng=np.random.default_rng(4), record_every=10)
    total = traj.potential_energies + 0.5 * mass * np.sum(traj.velocities**2, axis=1)
    kinetic_range = np.ptp(0.5 * mass * np.sum(traj.velocities**2, axis=1))
    assert kinetic_range > 5 * KT  # the walker really moves
    assert np.ptp(total) < 0.01 * KT


def test_runs_are_reproducible_and_leave_the_global_generator_alone():
    pot = POTENTIALS[3]
    global_state = np.random.get_state()[1].copy()
    a = run_langevin(pot, [1.0, 0.0], n_steps=5000, dt=0.005, friction=5.0, temperature=T,
                     rng=np.random.default_rng(9), record_every=50)
    b = run_langevin(pot, [1.0, 0.0], n_steps=5000, dt=0.005, friction=5.0, temperature=T,
                     rng=np.random.default_rng(9), record_every=50)
    c = run_langevin(pot, [1.0, 0.0], n_steps=5000, dt=0.005, friction=5.0, temperature=T,
                     rng=np.random.default_rng(10), record_every=50)
    np.testing.assert_array_equal(a.positions, b.positions)
    np.testing.assert_array_equal(a.velocities, b.velocities)
    assert not np.array_equal(a.positions, c.positions)
    np.testing.assert_array_equal(np.random.get_state()[1], global_state)
    assert a.positions.shape == (100, 2)
    np.testing.assert_allclose(a.times, 0.25 * np.arange(1, 101))


# --- the metadynamics loop --------------------------------------------------------------------------
def test_metadynamics_deposits_where_the_walker_is_and_records_the_bias_it_felt():
    pot = POTENTIALS[3]
    grid = gb.Grid([-2.0], [2.0], [160])
    wall = gb.Wall(cv=0, bound=1.2, k=500.0, side="above")
    bias = gb.GridBias(grid, sigma=[0.1], height=2.0, temperature=T, bias_factor=6.0, walls=[wall])
    traj = run_metadynamics(pot, bias, [-1.0, 0.0], n_deposits=300, stride=50, dt=0.005, friction=5.0,
                            rng=np.random.default_rng(12), cv=[0])
    assert bias.n_hills == 300
    np.testing.assert_array_equal(bias.history.centers[:, 0], traj.positions[:, 0])
    np.testing.assert_allclose(bias.history.times, traj.times, rtol=1e-12)
    # Frame k is recorded just before hill k is added, so it felt the bias of the first k hills.
    for k in (0, 1, 57, 299):
        energy, _ = bias.rebuilt(k).evaluate(traj.positions[k, :1])
        assert traj.bias_energies[k] == pytest.approx(energy, rel=1e-12, abs=1e-12)
    assert np.any(traj.bias_energies > 0)


def test_metadynamics_on_two_cvs_uses_the_selected_coordinates_in_order():
    mb = MuellerBrown.for_barrier(12.0, T)
    grid = gb.Grid([-0.5, -1.6], [2.2, 1.2], [54, 56])
    bias = gb.GridBias(grid, sigma=[0.1, 0.1], height=1.0, temperature=T)
    traj = run_metadynamics(mb, bias, [-0.55, 1.44], n_deposits=20, stride=100, dt=0.002, friction=10.0,
                            mass=5.0, rng=np.random.default_rng(13), cv=(1, 0), record_every=25)
    assert traj.positions.shape == (80, 2)
    np.testing.assert_array_equal(bias.history.centers, traj.positions[3::4, ::-1])


def test_langevin_under_a_fixed_bias_feels_it_and_leaves_it_unchanged():
    pot = POTENTIALS[3]
    bias = gb.GridBias(gb.Grid([-2.0], [2.0], [160]), sigma=[0.2], height=3.0, temperature=T,
                       walls=[gb.Wall(cv=0, bound=-0.9, k=800.0, side="below")])
    bias.add_hills([[-1.0], [-0.8], [1.1]], [3.0, 2.0, 1.0])
    before = bias.values.copy()
    traj = run_langevin(pot, [-1.0, 0.0], n_steps=3000, dt=0.004, friction=5.0, temperature=T, bias=bias,
                        rng=np.random.default_rng(14), record_every=30)
    np.testing.assert_allclose(traj.bias_energies, bias.evaluate(traj.positions[:, :1])[0], rtol=1e-12,
                               atol=1e-12)
    np.testing.assert_array_equal(bias.values, before)
    assert bias.n_hills == 3


# --- bad input --------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "make, match",
    [
        (lambda: HarmonicWell(stiffness=0.0), "stiffness must be a finite number > 0, got 0.0"),
        (lambda: DoubleWell(barrier=-1.0), "barrier must be a finite number > 0"),
        (lambda: DoubleWell(tilt=float("nan")), "tilt must be a finite number"),
        (lambda: MuellerBrown(scale=float("inf")), "scale must be a finite number > 0"),
        (lambda: MuellerBrown.for_barrier(0.0, T), "barrier_kt must be a finite number > 0"),
        (lambda: CoupledDoubleWell(coupling=np.inf), "coupling must be a finite number, got inf"),
        (lambda: DoubleWell().energy_gradient([0.1, 0.2]), r"points must have shape \(n, 1\)"),
        (lambda: MuellerBrown().free_energy([[0.1]], temperature=T), r"points must have shape \(n, 2\)"),
        (lambda: DoubleWell().free_energy([[0.1]], temperature=-1.0), "temperature must be"),
        (lambda: MuellerBrown().marginal_free_energy(2, [0.0], T), r"axis must be one of \[0, 1\], got 2"),
        (lambda: MuellerBrown().marginal_free_energy(0, [np.nan], T), "grid_1d must be a flat array"),
    ],
)
def test_bad_potential_input_is_refused(make, match):
    with pytest.raises(ParameterError, match=match):
        make()


GOOD_RUN = dict(n_steps=10, dt=0.01, friction=1.0, temperature=T, rng=np.random.default_rng(0))


@pytest.mark.parametrize(
    "change, match",
    [
        (dict(dt=0.0), "dt must be a finite number > 0, got 0.0"),
        (dict(dt="fast"), "dt must be a finite number > 0, got 'fast'"),
        (dict(x0=["left"]), "x0 must hold 1 finite numbers"),
        (dict(friction=-1.0), r"friction must be >= 0 \(1/ps\), got -1.0"),
        (dict(mass=float("nan")), "mass must be a finite number > 0"),
        (dict(temperature=0.0), "temperature must be a finite number > 0"),
        (dict(n_steps=0), "n_steps must be an integer >= 1, got 0"),
        (dict(n_steps=2.5), "n_steps must be an integer >= 1, got 2.5"),
        (dict(record_every=0), "record_every must be an integer >= 1"),
        (dict(rng=42), "rng must be a numpy.random.Generator"),
        (dict(x0=[0.0, 1.0]), "x0 must hold 1 finite numbers"),
        (dict(x0=[np.inf]), "x0 must hold 1 finite numbers"),
        (dict(v0=[[1.0]]), "v0 must hold 1 finite numbers"),
        (dict(potential="double well"), "potential must be a gridbias.testsystems potential"),
    ],
)
def test_bad_run_input_is_refused(change, match):
    kwargs = dict(GOOD_RUN, potential=DoubleWell(), x0=[1.0])
    kwargs.update(change)
    potential, x0 = kwargs.pop("potential"), kwargs.pop("x0")
    with pytest.raises(ParameterError, match=match):
        run_langevin(potential, x0, **kwargs)


@pytest.mark.parametrize(
    "cv, match",
    [
        ((0, 1), r"cv must list 1 distinct coordinate indices \(0\.\.1\)"),
        ((2,), r"got \(2,\)"),
        ([[0]], r"got \[\[0\]\]"),
    ],
)
def test_bad_cv_selection_is_refused(cv, match):
    bias = gb.GridBias(gb.Grid([-2.0], [2.0], [80]), sigma=[0.1], height=1.0, temperature=T)
    with pytest.raises(ParameterError, match=match):
        run_metadynamics(CoupledDoubleWell(), bias, [1.0, 0.0], n_deposits=1, stride=1, dt=0.01, friction=1.0,
                         rng=np.random.default_rng(0), cv=cv)


def test_metadynamics_needs_a_grid_bias():
    with pytest.raises(ParameterError, match="bias must be a gridbias.GridBias, got dict"):
        run_metadynamics(DoubleWell(), {}, [1.0], n_deposits=1, stride=1, dt=0.01, friction=1.0,
                         rng=np.random.default_rng(0))
