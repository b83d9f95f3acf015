"""Metadynamics on analytic potentials converges to the published limits.

Well-tempered: F(s) = -(gamma / (gamma - 1)) V(s, t -> inf) + C (Barducci, Bussi & Parrinello, PRL 100,
020603, 2008). Standard: the time average of V after the filling converges to -F + C (Bussi, Laio &
Parrinello, PRL 96, 090601, 2006). Dynamics: BAOAB Langevin (Leimkuhler & Matthews, Appl. Math. Res. Express
2013) from gridbias.testsystems, with fixed seeds.

Comparison conventions used throughout:
- the region compared is F - F_min < 8 kT (the acceptance criterion of the issue);
- nodes closer than 2 sigma to a grid edge or a wall are left out, where hills are cut and the limit does not
  hold (common practice, no source; REFERENCES.md §9);
- estimate and exact F are aligned by the mean of their difference over the compared region, the constant
  that minimises the RMSE, so the RMSE measures shape only.
"""


import numba
import numpy as np
import pytest

import gridbias as gb
from gridbias.testsystems import (
    CoupledDoubleWell,
    DoubleWell,
    HarmonicWell,
    MuellerBrown,
    run_langevin,
    run_metadynamics,
)

pytestmark = pytest.mark.skipif(numba.config.DISABLE_JIT, reason="needs compiled dynamics (slow without JIT)")

T = 300.0
KT = gb.KB * T
RMSE_LIMIT_KT = 0.5  # the acceptance criterion for well-tempered runs


def compared_nodes(grid, exact_g, margin, walls=()):
    """Mask of nodes with F - F_min < 8 kT lying at least ``margin`` (d,) inside every grid edge and
    on the allowed side of every wall, at least ``margin`` from its bound."""
    mask = exact_g - exact_g.min() < 8.0 * KT
    nodes = grid.nodes()
    for axis in range(grid.ndim):
        s = nodes[..., axis]
        mask &= (s >= grid.lower[axis] + margin[axis]) & (s <= grid.upper[axis] - margin[axis])
    for wall in walls:
        mask &= wall.sign * (nodes[..., wall.cv] - wall.bound) <= -margin[wall.cv]
    return mask


def aligned_rmse_kt(estimate_g, exact_g, mask):
    """RMSE (in kT) of estimate - exact over ``mask`` after removing their mean difference there."""
    difference = (estimate_g - exact_g)[mask]
    return float(np.sqrt(np.mean((difference - difference.mean()) ** 2)) / KT)


def exact_on_grid(potential, grid):
    nodes = grid.nodes().reshape(-1, grid.ndim)
    return potential.free_energy(nodes, temperature=T).reshape(grid.shape)


def report(record_property, **values):
    for name, value in values.items():
        record_property(name, round(float(value), 4))
    print(" ".join(f"{name}={value:.3f}" for name, value in values.items()))


# --- (a) well-tempered, 1-D double well ------------------------------------------------------------
def test_well_tempered_double_well(record_property):
    # 10 kT barrier, wells 2 kT apart (tilt); gamma = 5 lowers the barrier the CV sees to 2 kT
    # (barrier/gamma, Barducci et al. 2008). w0 = 0.5 kT every 0.5 ps, sigma = 0.1 nm ~ the CV's standard
    # deviation in a well (0.08 nm), grid spacing sigma/5 (REFERENCES.md §9, common practice).
    well = DoubleWell(barrier=10.0 * KT, tilt=1.0 * KT)
    grid = gb.Grid([-2.2], [2.2], [220])
    bias = gb.GridBias(grid, sigma=[0.1], height=0.5 * KT, temperature=T, bias_factor=5.0)
    run_metadynamics(well, bias, [-1.0], n_deposits=8000, stride=100, dt=0.005, friction=5.0,
                     rng=np.random.default_rng(2008))
    exact = exact_on_grid(well, grid)
    mask = compared_nodes(grid, exact, 2 * bias.sigma)
    rmse = aligned_rmse_kt(bias.free_energy(), exact, mask)
    early = aligned_rmse_kt(bias.rebuilt(bias.n_hills // 8).free_energy(), exact, mask)
    report(record_property, rmse_kT=rmse, rmse_at_one_eighth_kT=early)
    assert bias.n_outside == 0
    assert rmse <= RMSE_LIMIT_KT
    assert rmse < early  # the error falls as the run goes on


def test_well_tempered_harmonic_well_samples_the_tempered_distribution():
    # Once converged, the biased CV density is exp(-F / (gamma kT)) (Barducci, Bussi & Parrinello 2008), so
    # for F = k x^2 / 2 the sampled variance is gamma kT / k (REFERENCES.md §2, harmonic CV).
    well = HarmonicWell(stiffness=100.0)
    bias = gb.GridBias(gb.Grid([-2.5], [2.5], [250]), sigma=[0.1], height=0.5 * KT, temperature=T,
                       bias_factor=5.0)
    traj = run_metadynamics(well, bias, [0.0], n_deposits=10_000, stride=100, dt=0.005, friction=5.0,
                            rng=np.random.default_rng(100), record_every=10)
    x2 = traj.positions[traj.times.size // 2:, 0] ** 2  # the second half of the run
    blocks = x2.reshape(20, -1).mean(axis=1) / (5.0 * KT / well.stiffness)
    error = blocks.std(ddof=1) / np.sqrt(blocks.size)
    assert bias.n_outside == 0
    assert error < 0.03
    assert abs(blocks.mean() - 1.0) < 4 * error


# --- (b) well-tempered, Müller-Brown with CVs (x, y) -----------------------------------------------
def test_well_tempered_mueller_brown_two_cvs(record_property):
    # Müller & Brown (Theor. Chim. Acta 53, 75, 1979), scaled so the M_A -> S1 barrier is 12 kT; with both
    # coordinates as CVs the exact F is the potential itself. gamma = 6 (REFERENCES.md §9: barrier/2 kT),
    # sigma = 0.05 nm ~ the narrow width of the basins, spacing sigma/3. Walls keep the walker off the
    # ~20 kT plateau at x < -1.5 and y > 2.2, far from the compared region (x > -1.1, y < 1.9).
    surface = MuellerBrown.for_barrier(12.0, T)
    grid = gb.Grid([-2.0, -1.0], [1.6, 2.6], [216, 216])
    walls = [gb.Wall(cv=0, bound=-1.5, k=5000.0, side="below"),
             gb.Wall(cv=1, bound=2.2, k=5000.0, side="above")]
    bias = gb.GridBias(grid, sigma=[0.05, 0.05], height=0.5 * KT, temperature=T, bias_factor=6.0,
                       walls=walls)
    run_metadynamics(surface, bias, [-0.558, 1.442], n_deposits=12000, stride=100, dt=0.004, friction=10.0,
                     rng=np.random.default_rng(1979))
    exact = exact_on_grid(surface, grid)
    mask = compared_nodes(grid, exact, 2 * bias.sigma, walls)
    rmse = aligned_rmse_kt(bias.free_energy(), exact, mask)
    early = aligned_rmse_kt(bias.rebuilt(bias.n_hills // 8).free_energy(), exact, mask)
    report(record_property, rmse_kT=rmse, rmse_at_one_eighth_kT=early)
    assert bias.n_outside == 0
    assert rmse <= RMSE_LIMIT_KT
    assert rmse < early


# --- (c) well-tempered along x only of a 2-D potential -----------------------------------------------
def test_well_tempered_along_x_matches_the_marginal_free_energy(record_property):
    # The walker moves in (x, y); only x is biased. The exact F(x) = -kT ln ∫ exp(-U/kT) dy comes from
    # scipy.integrate (quad_vec) on the potential; the transverse well narrows along x, so F(x) carries an
    # entropic tilt of c kT / 2 per nm that the potential along the valley floor lacks.
    pytest.importorskip("scipy")
    surface = CoupledDoubleWell(barrier=10.0 * KT, tilt=0.0, stiffness=200.0, coupling=2.0)
    grid = gb.Grid([-2.2], [2.2], [220])
    bias = gb.GridBias(grid, sigma=[0.1], height=0.5 * KT, temperature=T, bias_factor=5.0)
    run_metadynamics(surface, bias, [-1.0, 0.0], n_deposits=8000, stride=100, dt=0.004, friction=5.0,
                     mass=2.0, cv=[0], rng=np.random.default_rng(2005))
    x = grid.axes[0]
    exact = surface.marginal_free_energy(0, x, T)
    mask = compared_nodes(grid, exact, 2 * bias.sigma)
    rmse = aligned_rmse_kt(bias.free_energy(), exact, mask)
    valley_floor = surface.energy_gradient(np.column_stack([x, np.zeros_like(x)]))[0]
    report(record_property, rmse_kT=rmse, valley_floor_rmse_kT=aligned_rmse_kt(valley_floor, exact, mask))
    assert aligned_rmse_kt(valley_floor, exact, mask) > RMSE_LIMIT_KT  # the criterion tells them apart
    assert bias.n_outside == 0
    assert rmse <= RMSE_LIMIT_KT


# --- (d) standard metadynamics, 1-D double well ------------------------------------------------------
def standard_run(well, grid, walls, height_kt, stride, n_deposits, snapshot_every, seed):
    """Standard metadynamics in chunks; returns the bias and -V (grid part) after every chunk."""
    bias = gb.GridBias(grid, sigma=[0.1], height=height_kt * KT, temperature=T, walls=walls)
    rng = np.random.default_rng(seed)
    position, velocity, snapshots = [-1.0], None, []
    for _ in range(n_deposits // snapshot_every):
        traj = run_metadynamics(well, bias, position, v0=velocity, n_deposits=snapshot_every,
                                stride=stride, dt=0.005, friction=5.0, rng=rng)
        position, velocity = traj.positions[-1], traj.velocities[-1]
        snapshots.append(-bias.values.copy())
    return bias, np.array(snapshots)


def test_standard_metadynamics_time_average(record_property):
    # Standard metadynamics never converges in one run: V fluctuates around -F + C(t) with an error that does
    # not decay and grows with the deposition rate as sqrt(w / tau_G) (Laio et al., J. Phys. Chem. B 109,
    # 6714, 2005; the square-root law from memory). Averaging -V over the part after the wells are filled
    # estimates F (Bussi, Laio & Parrinello, PRL 96, 090601, 2006), but its remaining error falls only as
    # 1/sqrt(number of refillings) and is largest at the region's 8 kT rim, which is refilled least. Hence a
    # tolerance of 0.75 kT, 1.5 times the well-tempered one, set from the error that does not decay (about
    # 0.45 kT instantaneous for w = 0.2 kT every 0.5 ps) rather than from what averaging achieved here; the
    # test also demands that averaging at least halves the instantaneous error. Walls at ±1.6 nm stop the
    # ever-rising bias from pushing the walker off the grid.
    well = DoubleWell(barrier=10.0 * KT, tilt=1.0 * KT)
    grid = gb.Grid([-2.2], [2.2], [220])
    walls = [gb.Wall(cv=0, bound=-1.6, k=5000.0, side="below"),
             gb.Wall(cv=0, bound=1.6, k=5000.0, side="above")]
    exact = exact_on_grid(well, grid)
    mask = compared_nodes(grid, exact, [0.2], walls)
    n_deposits, snapshot_every, n_filling = 10_000, 100, 2000
    # Post-filling means: the hills deposited before it hold twice the volume of the basin below the rim.
    basin_volume = np.sum(np.clip(exact.min() + 8.0 * KT - exact, 0.0, None)) * grid.spacing[0]
    assert n_filling * 0.2 * KT * 0.1 * np.sqrt(2.0 * np.pi) > 2.0 * basin_volume

    bias, snapshots = standard_run(well, grid, walls, 0.2, 100, n_deposits, snapshot_every, seed=2006)
    after = snapshots[n_filling // snapshot_every:]
    averaged = aligned_rmse_kt(after.mean(axis=0), exact, mask)
    instantaneous = np.mean([aligned_rmse_kt(v, exact, mask) for v in after])
    # The same run at four times the deposition rate w / tau_G (twice the height, half the stride).
    _, fast = standard_run(well, grid, walls, 0.4, 50, n_deposits, snapshot_every, seed=2005)
    fast_after = fast[n_filling // snapshot_every:]
    instantaneous_fast = np.mean([aligned_rmse_kt(v, exact, mask) for v in fast_after])
    report(record_property, averaged_rmse_kT=averaged, instantaneous_rmse_kT=instantaneous,
           instantaneous_rmse_4x_rate_kT=instantaneous_fast)
    assert bias.n_outside == 0
    assert averaged <= 0.75
    assert averaged < 0.5 * instantaneous  # averaging after filling helps (Bussi et al. 2006)
    assert instantaneous_fast > 1.4 * instantaneous  # sqrt(4) = 2 expected (Laio et al. 2005)


# --- (e) walls -----------------------------------------------------------------------------------------
def test_wall_against_a_driving_force_gives_the_boltzmann_population_beyond_it():
    # A harmonic well centred at 1.0 nm pushes the walker against a wall at 0.8 nm (no hills, fixed bias).
    # The fraction of time beyond the bound must be the Boltzmann one of U + wall, by quadrature
    # (standard statistical mechanics).
    integrate = pytest.importorskip("scipy.integrate")
    well = HarmonicWell(stiffness=100.0, center=1.0)
    wall = gb.Wall(cv=0, bound=0.8, k=3000.0, side="above")
    bias = gb.GridBias(gb.Grid([-1.0], [2.0], [60]), sigma=[0.1], height=1.0, temperature=T, walls=[wall])

    def weight(x):
        return np.exp(-(well.energy_gradient([[x]])[0][0] + wall.energy_gradient([[x]])[0][0]) / KT)

    inside = integrate.quad(weight, -1.0, 0.8, epsabs=1e-14)[0]
    beyond = integrate.quad(weight, 0.8, 2.0, epsabs=1e-14)[0]
    expected = beyond / (inside + beyond)
    traj = run_langevin(well, [0.5], n_steps=1_000_000, dt=0.002, friction=20.0, temperature=T, bias=bias,
                        rng=np.random.default_rng(77), record_every=10)
    is_beyond = (traj.positions[:, 0] > 0.8).astype(float)
    blocks = is_beyond.reshape(50, -1).mean(axis=1)
    error = blocks.std(ddof=1) / np.sqrt(blocks.size)
    assert 0.1 < expected < 0.9 and error < 0.01
    assert abs(is_beyond.mean() - expected) < 4 * error


def test_walls_hold_a_walker_driven_by_well_tempered_hills(record_property):
    # The hills fill both wells and keep pushing the walker outwards, against walls at ±1.3 nm. Beyond its
    # bound a k = 5000 kJ/mol/nm^2 wall confines the walker to a layer of about sqrt(kT/k) = 0.02 nm, against
    # ~2.6 nm of sampled range, so we state: beyond a bound less than 5 % of the time and never by more than
    # one hill width (our bounds, not from a source).
    well = DoubleWell(barrier=10.0 * KT, tilt=1.0 * KT)
    walls = [gb.Wall(cv=0, bound=1.3, k=5000.0, side="above"),
             gb.Wall(cv=0, bound=-1.3, k=5000.0, side="below")]
    bias = gb.GridBias(gb.Grid([-2.2], [2.2], [220]), sigma=[0.1], height=0.2 * KT, temperature=T,
                       bias_factor=5.0, walls=walls)
    traj = run_metadynamics(well, bias, [-1.0], n_deposits=10_000, stride=50, dt=0.005, friction=5.0,
                            rng=np.random.default_rng(13), record_every=10)
    x = traj.positions[:, 0]
    overshoot = np.abs(x) - 1.3
    near_wall = np.mean(overshoot > -0.2)
    report(record_property, fraction_beyond=np.mean(overshoot > 0), max_overshoot_nm=overshoot.max(),
           fraction_within_02nm=near_wall)
    assert near_wall > 0.1  # the walker really is driven against the walls
    assert np.mean(overshoot > 0) < 0.05
    assert overshoot.max() < bias.sigma[0]
